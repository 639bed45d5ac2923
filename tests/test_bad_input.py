"""Bad input: one line naming the problem, exit status 2, nothing written, nothing lost.

Each row is a case an operator meets (typos, units, sizes); the expected words are this
project's own messages.
"""

from __future__ import annotations

import sqlite3

import pytest

from .conftest import run_cli

CASES = [
    (["simulate", "--freq", "7.1", "--load", "50"], "below 100 kHz"),     # MHz typed as Hz
    (["simulate", "--freq", "40", "--load", "50"], "did you mean 40e6"),
    (["simulate", "--freq", "inf", "--load", "50"], "positive number of Hz"),
    (["simulate", "--freq", "nan", "--load", "50"], "positive number of Hz"),
    (["simulate", "--freq", "1e300", "--load", "50"], "above 1 GHz"),
    (["loads", "--smith", "99999999999"], "--smith needs a count from 1 to"),
    (["loads", "--smith", "0"], "--smith needs a count from 1 to"),
    (["loads", "--smith", "10", "--seed", "-1"], "--seed must be 0 or more"),
    (["loads", "--antenna", "x.json", "--points", "0"], "--points needs 1 to 10000"),
    (["bench", "--only", "typo"], "--only: unknown typo"),
    (["virtual-board", "--carrier", "abc"], "--carrier must be W@Hz or W@band"),
    (["virtual-board", "--carrier", "@20m"], "--carrier must be W@Hz or W@band"),
    (["virtual-board", "--carrier", "10@1e30"], "above 1 GHz"),
    (["virtual-board", "--carrier", "10@144e6"], "above the HF and 6 m range"),
    (["simulate", "--freq", "7.1e6", "--load", "1e-300", "--best"], "resistance of 0.01 ohm to 1 Mohm"),
    (["virtual-board", "--carrier", "nan@20m"], "--carrier needs a power of 0 to 2000 W"),
    (["score", "--strategy", "model", "--directivity", "1"], "--directivity must be 5 to 80 dB"),
]


@pytest.mark.parametrize("argv,words", CASES, ids=[" ".join(c[0]) for c in CASES])
def test_bad_input_is_one_line_and_exit_2(argv, words, tmp_path):
    r = run_cli(*argv, timeout=60)
    assert r.returncode == 2, r.stdout + r.stderr
    assert words in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_the_demo_never_replaces_a_logbook_it_did_not_write(tmp_path):
    out = tmp_path / "shack"
    out.mkdir()
    book = out / "station.sqlite"
    db = sqlite3.connect(book)
    db.execute("CREATE TABLE tunes (seq INTEGER)")
    db.execute("INSERT INTO tunes VALUES (1)")
    db.commit()
    db.close()
    before = book.read_bytes()
    r = run_cli("demo", "--out", str(out), timeout=60)
    assert r.returncode == 2 and "was not written by the demo" in r.stderr
    assert book.read_bytes() == before and sorted(p.name for p in out.iterdir()) == ["station.sqlite"]


@pytest.mark.parametrize("kind", ["missing", "regular file", "silent"])
def test_log_fails_fast_on_a_port_that_is_not_a_board(kind, tmp_path):
    import os

    if kind == "missing":
        port = str(tmp_path / "ttyUSB9")
    elif kind == "regular file":
        port = str(tmp_path / "notes.txt")
        (tmp_path / "notes.txt").write_text("not a port")
    else:
        master, slave = os.openpty()  # a serial device with nothing behind it
        port = os.ttyname(slave)
    # (a hang would end in run_cli's timeout: the old behaviour waited silently)
    r = run_cli("log", "--port", port, "--db", str(tmp_path / "station.sqlite"), timeout=60)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert ("no feedmatch board answers" if kind == "silent" else "cannot open port") in r.stderr
    assert not (tmp_path / "station.sqlite").exists()  # nothing created
    if kind == "silent":
        os.close(master)
        os.close(slave)
