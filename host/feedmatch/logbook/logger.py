"""The `log` job: follow the board, commit every tune record once, backfill gaps."""

from __future__ import annotations

import datetime as dt
import threading
import time
from typing import Any, TextIO

from feedmatch.board.hub import ensure_hub
from feedmatch.board.link import BoardLink
from feedmatch.errors import BoardRefused, LinkError, LinkTimeout, PortError, PortOwned
from feedmatch.logbook.store import Logbook, board_key


class Logger:
    def __init__(self, port: str, db_path: str, baud: int = 115200, out: TextIO | None = None,
                 status_every_s: float = 3.0):
        self.port = port
        self.db_path = db_path
        self.baud = baud
        self.out = out
        self.status_every_s = status_every_s
        self.book: Logbook | None = None
        self.link: BoardLink | None = None
        self.board_id = "unknown"
        self.status: dict[str, Any] = {}
        self.added = 0
        self.corrupt = 0
        self._pending: list[dict] = []
        self.last_committed = 0  # highest record seq in the logbook (for other threads)
        self.last_error = ""
        self._need_backfill = True
        self._stop: threading.Event | None = None
        self._floor = 1  # the lowest record seq the board may still hold
        self.notices: list[str] = []  # what the operator must hear (a reappearing board id)
        self.notices_for: set[str] = set()
        self.hub = None

    def _when(self, rec: dict[str, Any]) -> str:
        """Best estimate of when a record happened (the board has no clock)."""
        now = dt.datetime.now(dt.UTC)
        st = self.status
        if st.get("boot") == rec.get("boot") and isinstance(rec.get("t_ms"), int) and st.get("uptime_ms"):
            age = max(0.0, (st["uptime_ms"] - rec["t_ms"]) / 1000.0)
            if age < 86400 * 30:
                now -= dt.timedelta(seconds=age)
        return now.isoformat(timespec="milliseconds")

    def _on_event(self, word: str, obj: dict) -> None:
        if word == "record":
            self._pending.append(obj)
        elif word == "boot":
            self._need_backfill = True

    def _commit(self, rec: dict[str, Any], when: str | None = None) -> None:
        assert self.book is not None
        rec.setdefault("board_id", self.board_id)
        if self.book.add(rec, when):
            self.added += 1
            self._say_record(rec)
        self.last_committed = self.book.last_seq(self.board_id)

    def _say_record(self, rec: dict[str, Any]) -> None:
        """One line per tune logged, on a terminal (the status line is redrawn below it)."""
        if self.out is None:
            return
        f = rec.get("freq_hz") or 0.0

        def swr(x) -> str:
            return "-" if not isinstance(x, (int, float)) or x < 1.0 else ("above 99" if x >= 99 else f"{x:.2f}")
        self.out.write(f"\r\x1b[K#{rec.get('seq')} {f / 1e6:.4f} MHz {rec.get('outcome', '?')}: "
                       f"SWR {swr(rec.get('swr_before'))} -> {swr(rec.get('swr_after'))} "
                       f"({rec.get('why', '')})\n")
        self.out.flush()

    def _connect(self) -> None:
        # The logger owns the port unless another feedmatch process does; then it
        # attaches, and the others attach to it while it runs.
        self.hub = self.hub or ensure_hub(self.port, self.baud)
        self.link = BoardLink(self.port, self.baud, stop_event=self._stop)
        self.link.open()
        self.link.on_event = self._on_event
        self.link.request("status")  # a board answers before the logbook is touched
        if self.book is None:
            self.book = Logbook(self.db_path)
        self._sync()

    def _sync(self) -> None:
        """Ask the board where it is and fetch every record the logbook lacks."""
        assert self.link is not None and self.book is not None
        self.status = self.link.request("status")
        # A full, lost or read-only disk ends the run here, with one line, before a
        # write meets it; the board keeps what is not logged.
        self.book.check_room()
        bid = board_key(self.status)
        if bid != self.board_id or self.book.session is None:
            others = self.book.other_identities(bid)
            if others and bid not in self.notices_for:
                self.notices_for.add(bid)
                self.notices.append(f"board id {bid.split('/', 1)[0]} is logged before under "
                                    f"{', '.join(others)}: this is another board (or its flash was wiped); "
                                    f"its records are kept apart as {bid}")
                if self.out is not None:
                    self.out.write("\n" + self.notices[-1] + "\n")
            self.board_id = bid
            self.book.start_session(bid, self.port)
            sections = self.link.element_sections()
            if sections:
                try:  # the memory's bin width: the report's health check compares within its bins
                    mem = self.link.request("cfg-get", {"section": "memory"})["value"]
                    sections["memory"] = {"bin_hz": mem["bin_hz"]}
                except (BoardRefused, KeyError, TypeError):
                    pass  # not said: the report takes the shipped width
                self.book.set_bank(bid, sections)
        for w in self.status.get("warnings") or []:
            # The board lost part of its history (a damaged record segment, a new
            # identity) or got past a damaged file: the logbook keeps it, said once.
            if isinstance(w, str) and self.book.note(self.board_id, self.status.get("boot"), w[:200]):
                self.notices.append(f"board {self.board_id}: {w}")
                if self.out is not None:
                    self.out.write("\n" + self.notices[-1] + "\n")
        board_last = int(self.status.get("seq", 0))
        if board_last < self._floor:
            self._floor = 1  # a new board or a restarted sequence: everything may be asked again
        # Only the numbers the board may still send: years of logbook stay on disk.
        have = self.book.seqs(self.board_id, self._floor, board_last)
        missing = [s for s in range(self._floor, board_last + 1) if s not in have]
        if missing:
            got: list[int] = []

            def take(rec: dict) -> None:
                got.append(int(rec.get("seq", 0)))
                if rec.get("seq") not in have:
                    self._commit(rec, self._when(rec))
            self.link.records_since(min(missing) - 1, take)
            # What the board no longer holds (its ring was compacted) is never asked again:
            # the backfill then costs only what is really new.
            self._floor = max(self._floor, min(got) if got else board_last + 1)
        self._need_backfill = False
        self.last_committed = self.book.last_seq(self.board_id)

    def run(self, stop: threading.Event | None = None, duration_s: float | None = None,
            first_connect_s: float | None = None) -> int:
        """Follow the board until stop is set (or duration_s has passed).

        first_connect_s: give up, raising LinkError, when no board answers within
        that long at the start (a wrong, busy or silent port); the logbook is not
        created then.  Without it the logger waits for the board to appear."""
        stop = stop or threading.Event()
        self._stop = stop
        t_end = time.monotonic() + duration_s if duration_s else None
        t_give_up = time.monotonic() + first_connect_s if first_connect_s is not None else None
        try:
            while not stop.is_set():
                try:
                    self._connect()
                    break
                except LinkError as e:
                    if self.link is not None:
                        self.link.close()
                    # A port that cannot be opened ends it at once; a port another feedmatch
                    # process owns is attached to at the next try (its hub).
                    hopeless = isinstance(e, PortError) and not isinstance(e, PortOwned)
                    if t_give_up is not None and (time.monotonic() > t_give_up or hopeless):
                        if isinstance(e, LinkTimeout):
                            raise LinkTimeout(f"no feedmatch board answers on {self.port} (is it the right "
                                            "port, and is the board powered?)") from None
                        raise
                    if stop.wait(0.5) or (t_end is not None and time.monotonic() > t_end):
                        return self.added
            last_status = time.monotonic()
            while not stop.is_set() and (t_end is None or time.monotonic() < t_end):
                try:
                    self.link.pump()
                    while self._pending:
                        rec = self._pending.pop(0)
                        have_last = self.book.last_seq(self.board_id)
                        self._commit(rec)
                        if rec.get("seq", 0) > have_last + 1:
                            self._need_backfill = True
                    if self._need_backfill or time.monotonic() - last_status > self.status_every_s:
                        self._sync()
                        last_status = time.monotonic()
                        self._show()
                except LinkError as e:
                    # A lost answer, a pulled cable or a rebooting board: reopen and resync.
                    self.last_error = str(e)
                    self._need_backfill = True
                    if stop.is_set():
                        break
                    try:
                        self.link.reconnect(give_up_s=5.0)
                    except LinkError:
                        stop.wait(0.5)
        finally:
            if self.link is not None:
                self.corrupt = self.link.bad_frames
                self.link.close()
            if self.book is not None:
                self.book.close()
            if self.hub is not None:
                self.hub.close()
                self.hub = None
        return self.added

    def _show(self) -> None:
        if self.out is None:
            return
        s = self.status
        swr = s.get("swr")
        swr_t = "-" if not isinstance(swr, (int, float)) or swr < 1.0 else ("above 99" if swr >= 99 else f"{swr:.2f}")
        # The board numbers every record (refused and reset ones too); the logbook
        # holds what it could still fetch: the two counts need not agree.
        n = self.book.count(self.board_id)
        line = (f"\r\x1b[K{self.board_id} {s.get('state', '?'):<11} "
                f"{(s.get('freq_hz') or 0) / 1e6:8.4f} MHz  SWR {swr_t:>6}  "
                f"last record no. {self.book.last_seq(self.board_id)}, {n} in the logbook "
                f"(+{self.added} this run)  bad frames {self.link.bad_frames if self.link else 0}")
        self.out.write(line)
        self.out.flush()
