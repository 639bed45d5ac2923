"""End to end over a real pseudo-terminal: the real firmware on the virtual station."""

from __future__ import annotations

import json
import os
import random
import signal
import sqlite3
import statistics
import subprocess
import threading
import time
from pathlib import Path

import pytest
import serial
from feedmatch.logbook.logger import Logger
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualBoard

from ..conftest import BIN, logbook_rows, run_cli

BANDS_MATCHABLE = {"40m", "30m", "20m", "17m", "15m", "12m", "10m"}


from feedmatch.sim.demo import _wait  # noqa: E402


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from feedmatch.sim.demo import run_demo

    out = tmp_path_factory.mktemp("demo")
    # A relative output directory, as `make demo` uses (the firmware runs in firmware/).
    cwd = os.getcwd()
    os.chdir(out.parent)
    try:
        res = run_demo(out.name)
    finally:
        os.chdir(cwd)
    res["db"] = str(out / "station.sqlite")
    return out, res


def test_demo_tunes_every_band_and_logs_every_record(demo):
    out, res = demo
    rows = logbook_rows(res["db"])
    assert res["violations"] == []
    assert {r["band"] for r in rows} == BANDS_MATCHABLE
    seqs = [r["seq"] for r in rows]
    # A carrier that already sees a good match needs no tune, so records <= carriers.
    assert seqs == list(range(1, len(seqs) + 1)) and 0.8 * res["played"] <= len(seqs) <= res["played"]
    assert res["elapsed_s"] < 60
    locked = [r for r in rows if r["outcome"] == "locked"]
    assert len(locked) / len(rows) > 0.8
    assert all(r["swr_after"] <= 1.5 for r in locked)


def test_demo_report_figures_match_the_records(demo):
    out, res = demo
    rows = logbook_rows(res["db"])
    for b in res["report"]["bands"]:
        rs = [r for r in rows if r["band"] == b["band"]]
        ok = [r for r in rs if r["outcome"] == "locked"]
        assert b["tunes"] == len(rs)
        assert b["success_rate"] == pytest.approx(len(ok) / len(rs))
        if ok:
            assert b["median_swr_after"] == pytest.approx(statistics.median(r["swr_after"] for r in ok))
        else:
            assert b["median_swr_after"] is None
        assert b["memory_hit_rate"] == pytest.approx(sum(r["memory_hit"] for r in rs) / len(rs))
    assert (out / "plots" / "swr_by_band.png").stat().st_size > 5000
    # The CLI reads the same logbook.
    r = run_cli("report", "--db", res["db"], "--json")
    assert r.returncode == 0
    assert json.loads(r.stdout)["tunes"] == len(rows)


def _station(tmp_path, **kw):
    st = load_station()
    return VirtualBoard(st, tmp_path / "flash", **kw), st


def test_faulty_link_reset_mid_tune_and_killed_logger(tmp_path):
    vs, st = _station(tmp_path)
    rng = random.Random(4)

    def mangle(data: bytes) -> bytes:
        b = bytearray(data)
        i = 0
        while i < len(b):
            x = rng.random()
            if x < 0.0006:
                b[i] ^= 1 << rng.randrange(8)  # flipped bit
            elif x < 0.0009:
                del b[i]  # dropped byte
                continue
            elif x < 0.0011:
                del b[i:b.find(b"\n", i) if b.find(b"\n", i) > 0 else len(b)]  # truncated line
                continue
            i += 1
        return bytes(b)

    vs.mangle_out = mangle
    pty = vs.start()
    db = str(tmp_path / "log.sqlite")
    try:
        # Garbage on the line before anything else.
        with serial.Serial(pty, 115200, timeout=0.1) as s:
            s.write(b"\x00\xff\xfe garbage \n Q1 status {}*0000\n" + os.urandom(300) + b"\n")
            time.sleep(0.3)
        lg = Logger(pty, db)
        stop = threading.Event()
        th = threading.Thread(target=lg.run, args=(stop,), daemon=True)
        th.start()
        assert _wait(lambda: lg.status.get("board_id"), 10)
        steps = st.script[:6]
        for step in steps[:3]:
            vs.play(step, 1.5)
        # A reset in the middle of a tune: key a carrier, wait for relays to move, cut power.
        fired = threading.Event()
        count = [0]

        def cut_power():
            count[0] += 1
            if count[0] == 3 and not fired.is_set():
                fired.set()
                threading.Thread(target=vs.reset).start()
        vs.on_set = cut_power
        vs.key(10, 28.4e6)
        assert fired.wait(5)
        time.sleep(0.3)
        vs.on_set = None
        vs.key(0)
        time.sleep(1.0)
        for step in steps[3:]:
            vs.play(step, 1.5)
        stop.set()
        th.join(10)
        assert not th.is_alive()
        # The logger is killed hard while the board keeps tuning, then restarted.
        p = subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", db],
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(2.0)
        for step in st.script[6:9]:
            vs.play(step, 1.5)
        p.send_signal(signal.SIGKILL)
        p.wait()
        for step in st.script[9:11]:
            vs.play(step, 1.5)  # nobody is listening now
        lg2 = Logger(pty, db)
        stop2 = threading.Event()
        th2 = threading.Thread(target=lg2.run, args=(stop2,), daemon=True)
        th2.start()
        want = vs.records_on_flash()
        assert _wait(lambda: lg2.last_committed >= want, 20), (lg2.last_committed, want, lg2.status,
                                                                th2.is_alive(), p.returncode, lg2.last_error)
        stop2.set()
        th2.join(10)
        assert not th2.is_alive()
        # The board ends safe: not seeking, no relay ever switched hot.
        with serial.Serial(pty, 115200, timeout=0.2):
            pass
    finally:
        vs.stop()
    rows = logbook_rows(db)
    seqs = [r["seq"] for r in rows]
    assert seqs == list(range(1, want + 1))  # every record exactly once
    assert any(r["outcome"] == "reset" for r in rows)
    assert vs.hardware.violations == []
    assert lg.corrupt + lg2.corrupt > 0  # the faults really happened and were counted
    assert vs.resets >= 1
    assert vs.proc.poll() is not None  # no process left behind


def test_operator_commands_over_the_pty(tmp_path):
    lg = None  # so a failure before the logger starts still stops the virtual board below
    p = subprocess.Popen([str(BIN / "feedmatch"), "virtual-board", "--carrier", "10@14.2e6",
                          "--dir", str(tmp_path / "flash")], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
    try:
        pty = p.stdout.readline().strip()
        assert pty.startswith("/dev/")
        r = run_cli("tune", "--port", pty, "--freq", "14.2e6", "--json", timeout=60)
        assert r.returncode == 0, r.stderr
        rec = json.loads(r.stdout)
        assert rec["outcome"] == "locked" and rec["swr_after"] <= 1.5
        r = run_cli("status", "--port", pty)
        assert r.returncode == 0 and "locked" in r.stdout and "14.2000 MHz" in r.stdout
        r = run_cli("memory", "--port", pty, "--json")
        assert len(json.loads(r.stdout)["entries"]) == 1
        # The carrier is on: the bypass relay may not move (below the hot limit it may).
        r = run_cli("bypass", "--port", pty)
        assert r.returncode == 0 and "through" in r.stdout
        # The logger with --json: one JSON object when it stops (SIGTERM like a service
        # manager), and the board's element values kept so report speaks uH and pF.
        db = tmp_path / "station.sqlite"
        lg = subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", str(db), "--json"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        def logged():
            try:
                return db.exists() and len(logbook_rows(str(db))) >= 1
            except sqlite3.Error:
                return False  # the logger is creating it
        assert _wait(logged, 20)
        lg.send_signal(signal.SIGTERM)
        out, err = lg.communicate(timeout=20)
        assert lg.returncode == 0, err
        summary = json.loads(out)
        assert summary["added"] == len(logbook_rows(str(db))) >= 1 and summary["db"] == str(db), summary
        r = run_cli("report", "--db", str(db), "--json")
        vals = json.loads(r.stdout)["bands"][0]["most_used_values"]
        assert vals is not None and vals["l_uh"] > 0 and vals["c_pf"] > 0
        exported = tmp_path / "memory.json"
        r = run_cli("memory", "--port", pty, "--export", str(exported))
        doc = json.loads(exported.read_text())
        assert r.returncode == 0 and doc["format"] == "feedmatch-memory" and len(doc["entries"]) == 1
        assert abs(doc["entries"][0][0] - 14.2e6) < doc["bin_hz"] and doc["board"].startswith("hollow-oak-1")
        r = run_cli("memory", "--port", pty, "--clear", "--json")  # no terminal to ask on: refused
        assert r.returncode == 2 and "--yes" in r.stderr
        r = run_cli("memory", "--port", pty, "--json")
        assert len(json.loads(r.stdout)["entries"]) == 1
        r = run_cli("memory", "--port", pty, "--clear", "--yes", "--json")
        assert r.returncode == 0 and json.loads(r.stdout) == {"cleared": True}
        r = run_cli("memory", "--port", pty, "--json")
        assert json.loads(r.stdout)["entries"] == []
        # What was exported goes back: the same states in the same bins, kept on the board's flash.
        r = run_cli("memory", "--port", pty, "--import", str(exported), "--json")
        assert r.returncode == 0 and json.loads(r.stdout)["imported"] == 1, r.stderr
        r = run_cli("memory", "--port", pty, "--json")
        assert json.loads(r.stdout)["entries"] == doc["entries"]
        # A file from another board, a malformed one, a code beyond the banks: one line, exit 2.
        other = tmp_path / "other.json"
        other.write_text(json.dumps({**doc, "board": "elm-yard-2/0a1b2c3d4e5f"}))
        broken = tmp_path / "broken.json"
        broken.write_text(exported.read_text()[:-30])
        wild = tmp_path / "wild.json"
        wild.write_text(json.dumps({**doc, "entries": [[7.1e6, 4096, 1, 0, 1.2, 1]]}))
        for f, words in ((other, "comes from board elm-yard-2"), (broken, "is not valid JSON"),
                         (wild, "l code not in 0..127")):
            r = run_cli("memory", "--port", pty, "--import", str(f))
            assert r.returncode == 2 and words in r.stderr and len(r.stderr.strip().splitlines()) == 1, r.stderr
        r = run_cli("memory", "--port", pty, "--import", str(other), "--mismatch-ok", "--json")
        assert r.returncode == 0 and json.loads(r.stdout)["kept"] == 1  # the board's own state stays
    finally:
        if lg is not None and lg.poll() is None:
            lg.kill()
        p.send_signal(signal.SIGINT)
        p.wait(10)
    assert p.returncode == 0


def test_the_firmware_dies_with_a_killed_virtual_board(tmp_path):
    # SIGKILL leaves the host no chance to clean up: the kernel must end the child
    # (the firmware under MicroPython) so no orphan keeps the port and the flash.
    p = subprocess.Popen([str(BIN / "feedmatch"), "virtual-board", "--dir", str(tmp_path / "flash")],
                         stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    pty = p.stdout.readline().strip()
    assert pty.startswith("/dev/")
    kids = [int(x) for x in Path(f"/proc/{p.pid}/task/{p.pid}/children").read_text().split()]
    assert kids, "the virtual board runs its firmware as a child process"
    p.send_signal(signal.SIGKILL)
    p.wait(10)

    def gone(pid):
        st = Path(f"/proc/{pid}/status")
        return not st.exists() or "zombie" in st.read_text().lower()
    assert _wait(lambda: all(gone(k) for k in kids), 10), "the firmware outlived its host"


def test_bad_ports_logbooks_and_station_files(tmp_path):
    r = run_cli("status", "--port", str(tmp_path / "no-such-port"))
    assert r.returncode == 2 and "cannot open port" in r.stderr and "Traceback" not in r.stderr
    bad = tmp_path / "notes.sqlite"
    bad.write_text("these are my notes, not a database\n")
    before = bad.read_bytes()
    r = run_cli("log", "--port", "loop://", "--db", str(bad))
    assert r.returncode == 2 and "not an SQLite logbook" in r.stderr
    assert bad.read_bytes() == before
    r = run_cli("report", "--db", str(bad))
    assert r.returncode == 2 and bad.read_bytes() == before
    r = run_cli("report", "--db", str(tmp_path / "missing.sqlite"))
    assert r.returncode == 2 and "does not exist" in r.stderr
    st = tmp_path / "st.json"
    st.write_text('{"antenna": {"kind": "monopole", "height_m": 4}, "script": []}')
    r = run_cli("virtual-board", "--station", str(st))
    assert r.returncode == 2 and "radius_m" in r.stderr
    st.write_text('{"antenna": {"kind": "fixed", "r_ohm": 20, "x_ohm": 5}, "script": [{"band": "2m"}]}')
    r = run_cli("virtual-board", "--station", str(st))
    assert r.returncode == 2 and "unknown band" in r.stderr


def test_busy_port_is_reported(tmp_path):
    vs, st = _station(tmp_path)
    pty = vs.start()
    try:
        with serial.Serial(pty, 115200, timeout=0.1, exclusive=True):
            r = run_cli("status", "--port", pty)
        assert r.returncode == 2 and "busy" in r.stderr
    finally:
        vs.stop()


def test_firmware_under_cpython_too(tmp_path):
    vs, st = _station(tmp_path, use_python=True)
    pty = vs.start()
    try:
        from feedmatch.board.link import BoardLink

        with BoardLink(pty) as ln:
            assert _wait(lambda: _try_status(ln), 10)
            vs.play(st.script[0], 1.5)
            recs = ln.records_since(0)
        assert recs and recs[0]["outcome"] == "locked"
    finally:
        vs.stop()
    assert vs.hardware.violations == []


def _try_status(ln):
    try:
        return ln.request("status", timeout=1.0)["board_id"] == "hollow-oak-1"
    except Exception:
        return False


def test_no_stray_processes_after_station_stop(tmp_path):
    vs, st = _station(tmp_path)
    vs.start()
    pid = vs.proc.pid
    vs.stop()
    assert vs.proc.poll() is not None
    assert not Path(f"/proc/{pid}").exists() or "zombie" in Path(f"/proc/{pid}/status").read_text().lower()
