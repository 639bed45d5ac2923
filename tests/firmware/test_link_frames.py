"""The board's line reader: lines kept whole, over-long ones dropped at once, whatever the chunking."""

from __future__ import annotations

from fmlogic import link
from hypothesis import given, settings
from hypothesis import strategies as st

from ..conftest import micropython_path, run_mpy


def _spec(stream: bytes) -> list[bytes]:
    """What the reader must return for a whole stream: each line with its newline, and
    b'' once for each line longer than MAX_LINE bytes before its newline (dropped)."""
    out, line, skipping = [], bytearray(), False
    for b in stream:
        if skipping:
            skipping = b != 10
            continue
        line.append(b)
        if b == 10:
            out.append(bytes(line))
            line = bytearray()
        elif len(line) > link.MAX_LINE:
            out.append(b"")
            line, skipping = bytearray(), True
    return out


lines = st.lists(st.one_of(st.binary(max_size=40).map(lambda b: b.replace(b"\n", b"") + b"\n"),
                           st.integers(link.MAX_LINE - 2, link.MAX_LINE + 300).map(lambda k: b"x" * k + b"\n"),
                           st.binary(max_size=20)), max_size=12)


@settings(max_examples=300, deadline=None)
@given(lines, st.lists(st.integers(1, 700), min_size=1, max_size=20))
def test_any_chunking_gives_the_same_lines(parts, cuts):
    stream = b"".join(parts)
    r = link.LineReader()
    got, i, k = [], 0, 0
    while i < len(stream):
        n = cuts[k % len(cuts)]
        got += r.feed(stream[i:i + n])
        i += n
        k += 1
    assert got == _spec(stream)


def test_the_unix_port_reads_lines_alike():
    mp = micropython_path()
    if mp is None:
        import pytest

        pytest.skip("the micropython unix port is missing (install the test extras)")
    stream = b"Q 1 status {}\n" + b"y" * (link.MAX_LINE + 50) + b"\nQ 2 log {}\n"
    code = (f"from fmlogic import link\nr = link.LineReader()\nout = []\ns = {stream!r}\n"
            "for i in range(0, len(s), 37):\n    out += r.feed(s[i:i+37])\nprint(out)")
    assert run_mpy(mp, code).strip() == repr([b"Q 1 status {}\n", b"", b"Q 2 log {}\n"])
