"""The host under faults: a full, lost or read-only disk under `log`.

The rule is the guide's: one clear line, exit 2, nothing lost.  Records the
logbook could not take stay on the board and the next `log` fetches them.
"""

from __future__ import annotations

import os
import shutil
import signal
import sqlite3
import subprocess
import threading
from pathlib import Path

import pytest
from feedmatch.logbook.logger import Logger
from feedmatch.logbook.store import WAL_LIMIT, Logbook, LogbookUnwritable
from feedmatch.sim.demo import _wait
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualBoard

from ..conftest import BIN, run_cli


def _seqs(db) -> list[int]:
    """The record numbers in the logbook ([] while the logger is still making it)."""
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return [r[0] for r in con.execute("SELECT seq FROM tunes ORDER BY seq")]
    except sqlite3.OperationalError:
        return []
    finally:
        con.close()


def _board_with_records(tmp_path, n: int):
    """A virtual board that has tuned n times with nobody logging."""
    st = load_station()
    vs = VirtualBoard(st, tmp_path / "flash")
    pty = vs.start()
    for step in st.script[:n]:
        vs.play(step, 1.5)
    assert _wait(lambda: vs.records_on_flash() >= 1, 10)
    return vs, pty


def _run_logger(lg: Logger, stop: threading.Event, cap_pages: bool = False) -> tuple[threading.Thread, list]:
    failure: list = []

    def go():
        try:
            if cap_pages:  # SQLite objects belong to the thread that made them
                # Small pages, so each record needs new ones, and room for a few more.
                con = sqlite3.connect(lg.db_path)
                con.execute("PRAGMA page_size=512")
                con.execute("CREATE TABLE x (a)")
                con.execute("DROP TABLE x")
                con.close()
                lg.book = Logbook(lg.db_path)
                pages = lg.book.db.execute("PRAGMA page_count").fetchone()[0]
                lg.book.db.execute(f"PRAGMA max_page_count={pages + 4}")
            lg.run(stop, first_connect_s=10.0)
        except Exception as e:  # noqa: BLE001 (the test reads what ended it)
            failure.append(e)
    th = threading.Thread(target=go, daemon=True)
    th.start()
    return th, failure


def test_sqlite_full_mid_backfill_is_one_line_and_the_next_run_fetches_the_rest(tmp_path):
    # SQLite's own SQLITE_FULL, made here without a small disk: max_page_count caps the
    # file (sqlite.org/pragma.html#pragma_max_page_count: "attempts to grow the database
    # beyond it fail with SQLITE_FULL").
    vs, pty = _board_with_records(tmp_path, 6)
    db = tmp_path / "station.sqlite"
    try:
        want = vs.records_on_flash()
        lg = Logger(pty, str(db))
        stop = threading.Event()
        th, failure = _run_logger(lg, stop, cap_pages=True)
        th.join(30)
        assert not th.is_alive() and failure, "the logger went on with a full logbook"
        e = failure[0]
        assert isinstance(e, LogbookUnwritable) and "full" in str(e) and "\n" not in str(e)
        assert "the board keeps its records" in str(e)
        got = _seqs(db)
        assert got == list(range(1, len(got) + 1)) and 0 < len(got) < want, (got, want)  # whole, in order
        # Space again: a new run fetches exactly what is missing, each record once.
        lg2 = Logger(pty, str(db))
        stop2 = threading.Event()
        th2, failure2 = _run_logger(lg2, stop2)
        assert _wait(lambda: lg2.last_committed >= want, 20), (lg2.last_committed, want, failure2)
        stop2.set()
        th2.join(10)
        assert not failure2
        assert _seqs(db) == list(range(1, want + 1))
    finally:
        vs.stop()


def test_a_logbook_deleted_under_the_logger_stops_it_with_one_line(tmp_path):
    vs, pty = _board_with_records(tmp_path, 1)
    db = tmp_path / "station.sqlite"
    try:
        p = subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", str(db)],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        assert _wait(lambda: db.exists() and _seqs(db), 20)
        db.unlink()
        out, err = p.communicate(timeout=20)
        assert p.returncode == 2, err
        assert err.count("\n") == 1 and "is gone" in err and "Traceback" not in err
    finally:
        if p.poll() is None:
            p.kill()
        vs.stop()


def _mount_tmpfs(where: Path, size: str) -> bool:
    if os.geteuid() != 0 or shutil.which("mount") is None:
        return False
    where.mkdir()
    return subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
                          capture_output=True).returncode == 0


def _fill(where: Path) -> Path:
    """Fill the file system of where to the last byte; returns the filler file."""
    filler = where / "filler"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT, 0o600)
    try:
        for chunk in (65536, 4096, 1):
            try:
                while True:
                    os.write(fd, b"\0" * chunk)
            except OSError:
                pass
    finally:
        os.close(fd)
    return filler


def test_a_real_full_then_read_only_disk(tmp_path):
    mnt = tmp_path / "small"
    if not _mount_tmpfs(mnt, "2m"):
        pytest.skip("cannot mount a 2 MB tmpfs here (needs root and mount rights); the SQLITE_FULL path is "
                    "tested without it above")
    vs = None
    procs: list[subprocess.Popen] = []
    try:
        vs, pty = _board_with_records(tmp_path, 2)
        db = mnt / "station.sqlite"

        def log() -> subprocess.Popen:
            p = subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", str(db)],
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            procs.append(p)
            return p

        p = log()
        assert _wait(lambda: db.exists() and len(_seqs(db)) >= 2, 20)
        filler = _fill(mnt)
        st = load_station()
        vs.play(st.script[2], 1.5)  # a record arrives for a disk with no room
        out, err = p.communicate(timeout=20)
        assert p.returncode == 2 and err.count("\n") == 1 and "Traceback" not in err, err
        assert "the board keeps its records" in err
        size = db.stat().st_size
        # Restarted on the full disk: refused at once, the disk not touched again.
        r = run_cli("log", "--port", pty, "--db", str(db), timeout=60)
        assert r.returncode == 2 and "KiB free" in r.stderr and r.stderr.count("\n") == 1
        wal = Path(str(db) + "-wal")
        assert db.stat().st_size == size and (wal.stat().st_size if wal.exists() else 0) <= WAL_LIMIT
        # Room again: the record that did not fit comes from the board, once.
        filler.unlink()
        want = vs.records_on_flash()
        p = log()
        assert _wait(lambda: _seqs(db) == list(range(1, want + 1)), 20), (_seqs(db), want)
        p.send_signal(signal.SIGTERM)
        out, err = p.communicate(timeout=20)
        assert p.returncode == 0, err
        # A disk that comes back read-only (a stick after a file-system error).
        subprocess.run(["mount", "-o", "remount,ro", str(mnt)], check=True)
        before = db.read_bytes()
        r = run_cli("log", "--port", pty, "--db", str(db), timeout=60)
        assert r.returncode == 2 and "read-only" in r.stderr and r.stderr.count("\n") == 1, r.stderr
        assert db.read_bytes() == before
    finally:
        for p in procs:
            if p.poll() is None:
                p.send_signal(signal.SIGKILL)
                p.wait(10)
        if vs is not None:
            vs.stop()
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)



def test_log_says_each_tune_it_logs_with_no_sentinel_as_a_number():
    import io

    out = io.StringIO()
    lg = Logger("loop://", "unused.sqlite", out=out)
    lg._say_record({"seq": 7, "freq_hz": 14.2e6, "outcome": "locked", "why": "matched", "swr_before": 999.0,
                    "swr_after": 1.21})
    lg._say_record({"seq": 8, "freq_hz": 7.1e6, "outcome": "refused", "why": "no RF", "swr_before": -1.0,
                    "swr_after": -1.0})
    lines = out.getvalue().replace("\r\x1b[K", "").splitlines()
    assert lines == ["#7 14.2000 MHz locked: SWR above 99 -> 1.21 (matched)",
                     "#8 7.1000 MHz refused: SWR - -> - (no RF)"]


@pytest.mark.parametrize("rec,worse", [
    # relays moved, SWR rose well past the reading's bound: worse
    ({"swr_before": 1.3, "swr_after": 1.9, "before": [1, 2, 0, 0], "after": [3, 4, 0, 0],
      "swr_bound": [1.8, 2.0]}, True),
    # the same state confirmed, a hair higher: noise
    ({"swr_before": 1.125, "swr_after": 1.134, "before": [11, 22, 0, 0], "after": [11, 22, 0, 0],
      "swr_bound": [1.01, 1.27]}, False),
    # moved, but within the bound
    ({"swr_before": 1.20, "swr_after": 1.25, "before": [1, 2, 0, 0], "after": [3, 4, 0, 0],
      "swr_bound": [1.1, 1.4]}, False),
    # a sentinel before (999: no reading) is never compared
    ({"swr_before": 999.0, "swr_after": 1.3, "before": [0, 0, 1, 1], "after": [3, 4, 0, 0]}, False),
])
def test_a_tune_that_ended_worse_is_told_apart_from_reading_noise(rec, worse):
    from feedmatch.cli.board import ended_worse

    assert ended_worse(rec) is worse
