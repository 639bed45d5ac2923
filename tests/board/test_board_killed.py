"""The board killed mid-tune, and the link's sequence numbers wrapping, end to end.

The real firmware runs on the virtual station over a pseudo-terminal; SIGKILL
of its process is a power cut: no code of the board runs after it.
"""

from __future__ import annotations

import sqlite3
import threading
import time

from feedmatch.board.hub import LinkHub
from feedmatch.board.link import BoardLink
from feedmatch.logbook.logger import Logger
from feedmatch.sim.demo import _wait
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualBoard


def _rows(db: str) -> list[sqlite3.Row]:
    con = sqlite3.connect(db)
    con.row_factory = sqlite3.Row
    try:
        return con.execute("SELECT seq, outcome, reason, freq_hz FROM tunes ORDER BY seq").fetchall()
    finally:
        con.close()


def test_a_board_killed_mid_tune_leaves_one_reset_record_in_the_logbook(tmp_path):
    st = load_station()
    vs = VirtualBoard(st, tmp_path / "flash")
    pty = vs.start()
    db = str(tmp_path / "station.sqlite")
    lg = Logger(pty, db)
    stop = threading.Event()
    th = threading.Thread(target=lg.run, args=(stop,), daemon=True)
    try:
        th.start()
        assert _wait(lambda: lg.status.get("board_id"), 15)
        vs.play(st.script[0], 1.5)  # one ordinary tune first
        assert _wait(lambda: lg.last_committed >= 1, 10)
        switched = [0]
        cut = threading.Event()

        def on_set() -> None:  # the third relay change of the next tune: power cut
            switched[0] += 1
            if switched[0] == 3 and not cut.is_set():
                cut.set()
                threading.Thread(target=vs.reset).start()
        vs.on_set = on_set
        f_hz = 28.45e6  # a frequency the first tune did not store
        vs.key(10, f_hz)
        assert cut.wait(10), "the tune never switched three times"
        time.sleep(0.5)
        vs.on_set = None
        vs.key(0)
        assert _wait(lambda: vs.records_on_flash() >= 2, 15)
        time.sleep(1.0)  # the booted board may tune again on a still-keyed carrier: let it settle
        want = vs.records_on_flash()
        assert _wait(lambda: lg.last_committed >= want, 20), (lg.last_committed, want, lg.last_error)
        # Restart the logger: the backfill must not add the reset record a second time.
        stop.set()
        th.join(10)
        lg2 = Logger(pty, db)
        stop2 = threading.Event()
        th2 = threading.Thread(target=lg2.run, args=(stop2,), daemon=True)
        th2.start()
        assert _wait(lambda: lg2.status.get("seq") is not None and lg2.last_committed >= want, 15)
        stop2.set()
        th2.join(10)
    finally:
        stop.set()
        vs.stop()
    rows = _rows(db)
    assert [r["seq"] for r in rows] == list(range(1, want + 1))  # every record once
    resets = [r for r in rows if r["outcome"] == "reset"]
    assert len(resets) == 1 and resets[0]["reason"] == "board reset during tune"
    assert abs(resets[0]["freq_hz"] - f_hz) < 0.01 * f_hz  # the tune that was cut, by its frequency
    assert vs.resets == 1 and vs.hardware.violations == []


def test_the_sequence_number_wraps_at_65535_directly_and_through_the_hub(tmp_path):
    # docs/protocol.md: SEQ is 1..65535 for requests (0 is the events'); after 65535 comes 1.
    vs = VirtualBoard(load_station(), tmp_path / "flash")
    pty = vs.start()
    hub = None
    try:
        def ask_across_the_wrap(ln: BoardLink) -> list[int]:
            used = []
            ln.seq = 65531
            for i in range(10):
                word = "status" if i % 2 else "mem-list"
                ans = ln.request(word, {"start": 0} if word == "mem-list" else None)
                used.append(ln.seq)
                # The answer belongs to the request just made, not to the one 65535 before.
                assert ("board_id" in ans) if word == "status" else ("entries" in ans), (i, word, ans)
            return used

        with BoardLink(pty).open() as ln:
            used = ask_across_the_wrap(ln)
        # (a request asked again after a garbled line takes the next number)
        assert used[0] >= 65532 and used[-1] <= 12 and all(1 <= u <= 65535 for u in used), used
        hub = LinkHub(pty).start()
        hub.seq = 65533  # the hub renumbers: its own counter wraps too
        with BoardLink(f"fmhub://{hub.path}").open() as ln:
            used = ask_across_the_wrap(ln)
        assert used[-1] <= 12, used
        assert 1 <= hub.seq <= 10 and hub.dropped == 0 and not hub.pending
    finally:
        if hub is not None:
            hub.close()
        vs.stop()
