"""Every file the board keeps, damaged every way a mast-top box meets: the start never
loops, ends in the controller or in the safe mode (relays through, link answering,
watchdog fed), names the file, and decides alike on CPython and the unix port.

The damage kinds are the ones power loss and worn flash produce (common practice for
embedded flash file stores): missing, empty, cut mid-line, random bytes, half-written
(a prefix, then erased flash, 0xFF), and a file large enough to fill the flash.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import subprocess
import sys

import pytest
from fmlogic import boot, memory
from fmlogic.controller import Controller

from ..conftest import FIRMWARE
from ..fakes import FakeBoard, board_config, make_model

FILES = ["config.json", "board.uid", "boot.cnt", "boot.try", "mem.dat", "mem.bak", "mem.last", "rec/0.log", "rec.top",
         "rec/q/9", "tune.jnl", "fault.txt"]
DAMAGES = ["missing", "empty", "cut", "random", "half", "huge"]
HUGE = 1 << 20  # 1 MB: more than the heap the unix-port run gets (and most of a Pico's flash)

# Runs under CPython and the MicroPython unix port alike: one start per directory,
# then a status request over the link; prints what the board said.
_CASES = r"""
import json, sys
from fmlogic import boot, link

class B:
    def __init__(s):
        s.inbox = []; s.out = bytearray(); s.relays = None; s.t = 0; s.feeds = 0
    def read_detectors(s): return (0.0, 0.0)
    def set_relays(s, l, c, sh, byp): s.relays = [l, c, sh, 1 if byp else 0]
    def count_freq(s): return 0.0
    def tune_button(s): return False
    def led(s, on): pass
    def wdt_feed(s): s.feeds += 1
    def ticks_ms(s): return s.t
    def ticks_diff(s, a, b): return a - b
    def sleep_ms(s, ms): s.t += ms
    def link_read(s): return s.inbox.pop(0) if s.inbox else None
    def link_write(s, d): s.out.extend(d)

def case(d):
    b = B()
    x = boot.start(d, lambda cfg: b, run=False)
    b.inbox.append(link.encode("Q", 5, "status", {}))
    x.step()
    x.step()
    st = None
    for line in bytes(b.out).split(b"\n"):
        f = link.decode(line + b"\n") if line else (None, "")
        if f[0] == "A" and f[1] == 5:
            st = f[3]
    return {"kind": type(x).__name__, "state": st["state"], "file": st.get("file"),
            "advice": bool(st.get("advice")), "seq": st["seq"], "relays": b.relays,
            "fed": b.feeds >= 2, "warn": len(st.get("warnings") or [])}

for d in DIRS:
    print(json.dumps(case(d)))
"""


def _lived(tmp_path):
    """A board directory after a few tunes: every file it keeps is there (9 records:
    8 moved into rec/0.log, the 9th still in rec/q; the memory saved whole twice, as
    after many changes, and its last change held by a record only)."""
    d = tmp_path / "lived"
    d.mkdir()
    (d / "config.json").write_text(json.dumps(board_config()))
    m = make_model()
    b = FakeBoard(m)
    ctl = Controller(b, board_config(), str(d))
    for i, f in enumerate((7.1e6, 14.2e6, 21.2e6) * 3):
        memory.SAVE_EVERY = 1 if i < 2 else 32
        m.key(10.0, f)
        seq = ctl.rec.seq
        for _ in range(400):
            ctl.step()
            if ctl.rec.seq > seq:
                break
        m.key(0.0, 0.0)
        for _ in range(3):
            ctl.step()
    assert ctl.rec.seq == 9 and (d / "mem.bak").exists() and (d / "rec" / "q" / "9").exists()
    assert ctl.mem.nlog >= 1  # a change only a record holds
    memory.journal_write(str(d), {"freq_hz": 7.1e6, "before": [0, 0, 1, 1], "swr_before": 3.0,
                                  "strategy": "model", "seq": ctl.rec.seq + 1})
    (d / "boot.try").write_text("1\n")
    (d / "fault.txt").write_text("boot 1: nothing (test)\n")
    return d, ctl.rec.seq


def _damage(path, kind, rnd):
    raw = path.read_bytes() if path.exists() else b""
    if kind == "missing":
        if path.exists():
            path.unlink()
    elif kind == "empty":
        path.write_bytes(b"")
    elif kind == "cut":
        path.write_bytes(raw[: max(1, len(raw) // 2)])
    elif kind == "random":
        path.write_bytes(bytes(rnd.getrandbits(8) for _ in range(max(16, len(raw)))))
    elif kind == "half":
        path.write_bytes(raw[: len(raw) // 2] + b"\xff" * (len(raw) - len(raw) // 2))
    else:
        path.write_bytes(bytes(rnd.getrandbits(8) for _ in range(4096)) * (HUGE // 4096))


@pytest.fixture(scope="module")
def damaged(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("boot")
    lived, seq = _lived(tmp)
    rnd = random.Random(23)
    cases = []
    for name in FILES:
        for kind in DAMAGES:
            for port in ("py", "mp"):
                d = tmp / f"{port}-{name.replace('/', '_')}-{kind}"
                shutil.copytree(lived, d)
                _damage(d / name, kind, random.Random(hash((name, kind)) & 0xFFFF))
            cases.append((name, kind))
    del rnd
    return tmp, cases, seq


def _run(port, tmp, cases, micropython):
    dirs = [str(tmp / f"{port}-{n.replace('/', '_')}-{k}") for n, k in cases]
    code = f"DIRS = {json.dumps(dirs)}\n" + _CASES
    if port == "py":
        env = dict(os.environ, PYTHONPATH=str(FIRMWARE))
        cmd = [sys.executable, "-c", code]
    else:
        env = dict(os.environ, MICROPYPATH=f"{FIRMWARE}:.frozen")
        # A heap smaller than the huge file: a start that read a whole file would fail here.
        cmd = [micropython, "-X", "heapsize=600K", "-c", code]
    r = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=str(FIRMWARE), timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    return [json.loads(x) for x in r.stdout.strip().splitlines()]


def test_every_damaged_file_ends_in_a_working_start_alike_on_both_ports(damaged, micropython):
    tmp, cases, seq = damaged
    py = _run("py", tmp, cases, micropython)
    mp = _run("mp", tmp, cases, micropython)
    for (name, kind), a, b in zip(cases, py, mp, strict=True):
        what = f"{name} {kind}: {a} / {b}"
        assert a == b, what  # the same decision on both ports
        assert a["fed"], what  # the watchdog was fed
        if a["kind"] == "SafeMode":
            assert a["relays"][3] == 1, what  # through: the box is transparent
        # A record number is never given twice, whatever happened to the files.
        assert a["seq"] >= seq or a["kind"] == "SafeMode", what
        if name == "config.json":
            # Only a config with no good copy anywhere is a fault; it names the file and says what to do.
            assert a["state"] == "fault" and a["file"] == "config.json" and a["advice"], what
        elif name == "boot.try" and kind in ("random", "huge", "half", "cut", "empty", "missing"):
            assert a["kind"] == "Controller" and a["state"] != "fault", what
        else:
            assert a["kind"] == "Controller" and a["state"] != "fault", what
        if name in ("board.uid", "mem.dat", "rec/0.log", "rec/q/9") and kind not in ("missing",):
            assert a["warn"] >= 1, what  # the damage is said, not swallowed


def test_three_failed_starts_in_a_row_come_up_in_safe_mode(tmp_path, monkeypatch):
    d = str(tmp_path)
    (tmp_path / "config.json").write_text(json.dumps(board_config()))
    b = FakeBoard(make_model())

    def broken(self):
        raise MemoryError()

    with monkeypatch.context() as mp:
        mp.setattr(memory.Records, "load", broken)
        for i in range(1, 4):
            x = boot.start(d, lambda cfg: b, run=False)
            assert isinstance(x, boot.SafeMode) and memory.read_tries(d) == i
    # Three starts in a row failed (here caught; a hang the watchdog resets counts
    # the same): the fourth comes up in safe mode without trying, and says why.
    x = boot.start(d, lambda cfg: b, run=False)
    assert isinstance(x, boot.SafeMode) and x.file == "boot.try"
    assert "3 starts in a row failed" in x.why and "out of memory" in x.why
    st = x.status()
    assert st["state"] == "fault" and "deploy" in st["advice"]
    # A deploy clears the count: the next start is a normal one, and a start that
    # runs a while clears it too.
    from feedmatch.board import deploy

    deploy.DirTarget(tmp_path).remove_tree("boot.try")
    assert isinstance(boot.start(d, lambda cfg: b, run=False), Controller)
    assert memory.read_tries(d) == 1


@pytest.mark.parametrize("exc", [MemoryError(), UnicodeError("bad byte"), ValueError("x"), OSError(5),
                                 KeyError("k"), ZeroDivisionError()])
def test_any_exception_in_the_start_is_a_safe_mode_naming_the_file(tmp_path, monkeypatch, exc):
    d = str(tmp_path)
    (tmp_path / "config.json").write_text(json.dumps(board_config()))
    m = make_model()
    m.key(10.0, 7.1e6)  # a carrier is on: the safe mode must not switch under it...
    b = FakeBoard(m)

    def fail(self, *a, **k):
        raise exc

    monkeypatch.setattr(memory.Records, "load", fail)
    b.hardware.set(3, 4, 1, 0)
    x = boot.start(d, lambda cfg: b, run=False)
    assert isinstance(x, boot.SafeMode) and x.file == "rec/"
    n = b.sets
    x.step()
    assert b.sets == n + 1  # 10 W is below the hot-switch limit of 25 W: through at once
    assert x.through and b.hardware.relays[3] == 1
    assert "rec/" in x.why and (tmp_path / "fault.txt").read_text().startswith("boot 1")
    from fmlogic import link

    b.inbox += b"garbage\n" + link.encode("Q", 9, "tune", {})
    x.step()
    assert b"safe mode" in bytes(b.outbox)


def test_the_safe_mode_switches_through_only_when_cold(tmp_path, monkeypatch):
    d = str(tmp_path)
    (tmp_path / "config.json").write_text(json.dumps(board_config()))
    m = make_model()
    b = FakeBoard(m)
    monkeypatch.setattr(memory.Memory, "load", lambda self: 1 / 0)
    x = boot.start(d, lambda cfg: b, run=False)
    m.set(3, 4, 1, 0)
    m.key(100.0, 7.1e6)  # above the 25 W hot-switch limit
    for _ in range(5):
        x.step()
    assert m.relays[3] == 0 and not x.through and b.feeds >= 5
    m.key(0.0, 0.0)
    x.step()
    assert m.relays[3] == 1 and x.through
    assert x.status()["file"] == "mem.dat"


def test_a_full_flash_never_stops_the_start_or_the_tunes(tmp_path, monkeypatch):
    import builtins
    import errno

    lived, seq = _lived(tmp_path)
    real_open = builtins.open

    def full(p, mode="r", *a, **k):
        if any(c in mode for c in "wa+") and str(p).startswith(str(lived)):
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_open(p, mode, *a, **k)

    monkeypatch.setattr(builtins, "open", full)
    m = make_model()
    b = FakeBoard(m)
    ctl = boot.start(str(lived), lambda cfg: b, run=False)
    # The journal the lived board left becomes its reset record, numbered though not stored.
    assert isinstance(ctl, Controller) and ctl.rec.seq == seq + 1
    seq += 1
    m.key(10.0, 7.1e6)
    for _ in range(400):
        ctl.step()
        if ctl.rec.seq > seq:
            break
    assert ctl.rec.seq == seq + 1 and "flash full" in ctl._status()["rec_error"]
    assert ctl.state != "fault"
