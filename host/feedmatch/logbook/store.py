"""The station logbook: SQLite in WAL mode, one row per tune record, never twice.

Records are unique by (board, seq); each is committed in its own transaction
as it arrives, so a killed logger loses nothing already committed and a
replay or backfill only fills the gaps.
"""

from __future__ import annotations

import datetime as dt
import json
import socket
import sqlite3
from pathlib import Path
from typing import Any

from feedmatch.errors import InputError
from feedmatch.rf import bands

SCHEMA_VERSION = 4
# The oldest schema report and fit-box read as it is (what it lacks is left out).
READABLE_FROM = 2

_MIGRATIONS = {
    1: [
        "CREATE TABLE boards (id INTEGER PRIMARY KEY, board_id TEXT NOT NULL UNIQUE,"
        " first_seen TEXT NOT NULL, last_seen TEXT NOT NULL)",
        "CREATE TABLE sessions (id INTEGER PRIMARY KEY, board INTEGER REFERENCES boards(id),"
        " started TEXT NOT NULL, ended TEXT, port TEXT, host TEXT)",
        "CREATE TABLE tunes (id INTEGER PRIMARY KEY, board INTEGER NOT NULL REFERENCES boards(id),"
        " seq INTEGER NOT NULL, session INTEGER REFERENCES sessions(id), time TEXT NOT NULL,"
        " boot INTEGER, freq_hz REAL, band TEXT, before_l INTEGER, before_c INTEGER,"
        " before_shunt INTEGER, before_bypass INTEGER, after_l INTEGER, after_c INTEGER,"
        " after_shunt INTEGER, after_bypass INTEGER, swr_before REAL, swr_after REAL,"
        " measurements INTEGER, duration_ms INTEGER, outcome TEXT, reason TEXT,"
        " UNIQUE (board, seq))",
        "CREATE INDEX tunes_band_time ON tunes (band, time)",
    ],
    2: [
        "ALTER TABLE tunes ADD COLUMN memory_hit INTEGER NOT NULL DEFAULT 0",
        "ALTER TABLE tunes ADD COLUMN strategy TEXT",
        "ALTER TABLE tunes ADD COLUMN raw TEXT",
    ],
    # The element values a board said it has (nominal and learned), kept so the
    # report can speak uH and pF: codes alone mean nothing to the builder.
    3: [
        "CREATE TABLE banks (board INTEGER PRIMARY KEY REFERENCES boards(id), seen TEXT NOT NULL,"
        " bank TEXT NOT NULL)",
    ],
    # What the radio said it was on (feedmatch follow), and whether the relays
    # were preset from memory before the carrier came.
    4: [
        "ALTER TABLE tunes ADD COLUMN rig_hz REAL",
        "ALTER TABLE tunes ADD COLUMN rig_mode TEXT",
        "ALTER TABLE tunes ADD COLUMN preset INTEGER NOT NULL DEFAULT 0",
    ],
}


def _now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="milliseconds")


def board_key(obj: dict[str, Any]) -> str:
    """The logbook's name for the board a status or record comes from: its
    configured id plus the identity it made on its first boot (older firmware
    has none), so two boards sharing a config never share their records."""
    bid = str(obj.get("board_id") or "unknown")
    uid = obj.get("uid")
    return f"{bid}/{uid}" if isinstance(uid, str) and uid else bid


class Logbook:
    def __init__(self, path: str | Path, create: bool = True):
        self.path = Path(path)
        if not self.path.exists() and not create:
            raise InputError(f"logbook {self.path} does not exist")
        if self.path.exists():
            with self.path.open("rb") as f:
                head = f.read(16)
            if head and head != b"SQLite format 3\x00":
                raise InputError(f"{self.path} is not an SQLite logbook; nothing was changed")
        try:
            self.db = sqlite3.connect(str(self.path), timeout=10, isolation_level=None)
            self.db.execute("PRAGMA journal_mode=WAL")
            self.db.execute("PRAGMA synchronous=NORMAL")
            self.db.execute("PRAGMA foreign_keys=ON")
            self._migrate()
        except sqlite3.DatabaseError as e:
            raise InputError(f"{self.path} is not a usable SQLite logbook: {e}") from None
        try:
            # A write lock now, not at the first record: a read-only or immutable
            # logbook is refused before the port is opened and any record fetched.
            self.db.execute("BEGIN IMMEDIATE")
            self.db.execute(f"PRAGMA user_version={SCHEMA_VERSION}")  # a real write, same value
            self.db.execute("COMMIT")
        except sqlite3.OperationalError as e:
            self.db.close()
            raise InputError(f"logbook {self.path} cannot be written ({e}); nothing was changed") from None
        self.session: int | None = None

    def _migrate(self) -> None:
        v = self.db.execute("PRAGMA user_version").fetchone()[0]
        if v > SCHEMA_VERSION:
            raise InputError(f"logbook {self.path} has schema {v}, newer than this program's "
                             f"{SCHEMA_VERSION}")
        while v < SCHEMA_VERSION:
            v += 1
            self.db.execute("BEGIN IMMEDIATE")
            try:
                for sql in _MIGRATIONS[v]:
                    self.db.execute(sql)
                self.db.execute(f"PRAGMA user_version={v}")
                self.db.execute("COMMIT")
            except Exception:
                self.db.execute("ROLLBACK")
                raise

    def close(self) -> None:
        if self.session is not None:
            self.db.execute("UPDATE sessions SET ended=? WHERE id=?", (_now(), self.session))
        self.db.close()

    def board(self, board_id: str) -> int:
        now = _now()
        self.db.execute("INSERT INTO boards (board_id, first_seen, last_seen) VALUES (?, ?, ?) "
                        "ON CONFLICT(board_id) DO UPDATE SET last_seen=excluded.last_seen",
                        (board_id, now, now))
        return self.db.execute("SELECT id FROM boards WHERE board_id=?", (board_id,)).fetchone()[0]

    def start_session(self, board_id: str, port: str) -> int:
        b = self.board(board_id)
        cur = self.db.execute("INSERT INTO sessions (board, started, port, host) VALUES (?, ?, ?, ?)",
                              (b, _now(), port, socket.gethostname()))
        self.session = cur.lastrowid
        return self.session

    def set_bank(self, board_id: str, bank: dict[str, Any]) -> None:
        """Keep the element values the board reported (its "network" and any
        "correction" config sections); the latest report wins."""
        b = self.board(board_id)
        self.db.execute("INSERT INTO banks (board, seen, bank) VALUES (?, ?, ?) ON CONFLICT(board) DO UPDATE "
                        "SET seen=excluded.seen, bank=excluded.bank", (b, _now(), json.dumps(bank, sort_keys=True)))

    def other_identities(self, key: str) -> list[str]:
        """Keys already in the logbook with the same configured id but another identity."""
        bid = key.split("/", 1)[0]
        rows = self.db.execute("SELECT board_id FROM boards WHERE board_id = ? OR board_id LIKE ?",
                               (bid, bid + "/%")).fetchall()
        return [r[0] for r in rows if r[0] != key]

    def last_seq(self, board_id: str) -> int:
        row = self.db.execute("SELECT MAX(seq) FROM tunes JOIN boards ON boards.id = tunes.board "
                              "WHERE boards.board_id=?", (board_id,)).fetchone()
        return int(row[0] or 0)

    def seqs(self, board_id: str) -> set[int]:
        rows = self.db.execute("SELECT seq FROM tunes JOIN boards ON boards.id = tunes.board "
                               "WHERE boards.board_id=?", (board_id,))
        return {r[0] for r in rows}

    def add(self, rec: dict[str, Any], when: str | None = None) -> bool:
        """Insert one record in its own transaction; False if it was already there."""
        b = self.board(board_key(rec))
        bef = (list(rec.get("before") or []) + [None] * 4)[:4]
        aft = (list(rec.get("after") or []) + [None] * 4)[:4]
        f = float(rec.get("freq_hz") or 0.0)
        swr_b = rec.get("swr_before")
        swr_a = rec.get("swr_after")
        rig_hz, rig_mode = rec.get("rig_hz"), rec.get("rig_mode")
        row = (b, int(rec["seq"]), self.session, when or _now(), rec.get("boot"), f,
               bands.band_of(f) if f else "none", *bef, *aft,
               swr_b if isinstance(swr_b, (int, float)) and swr_b >= 0 else None,
               swr_a if isinstance(swr_a, (int, float)) and swr_a >= 0 else None,
               rec.get("n"), rec.get("ms"), rec.get("outcome"), rec.get("why"),
               1 if rec.get("mem") else 0, rec.get("strategy"), json.dumps(rec, sort_keys=True),
               rig_hz if isinstance(rig_hz, (int, float)) and not isinstance(rig_hz, bool) else None,
               rig_mode if isinstance(rig_mode, str) else None, 1 if rec.get("preset") is True else 0)
        cur = self.db.execute(
            "INSERT OR IGNORE INTO tunes (board, seq, session, time, boot, freq_hz, band, before_l, "
            "before_c, before_shunt, before_bypass, after_l, after_c, after_shunt, after_bypass, "
            "swr_before, swr_after, measurements, duration_ms, outcome, reason, memory_hit, strategy, "
            "raw, rig_hz, rig_mode, preset) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)", row)
        return cur.rowcount == 1

    def tunes(self, since: str | None = None) -> list[sqlite3.Row]:
        self.db.row_factory = sqlite3.Row
        q = "SELECT tunes.*, boards.board_id FROM tunes JOIN boards ON boards.id = tunes.board"
        args: tuple = ()
        if since:
            q += " WHERE time >= ?"
            args = (since,)
        rows = self.db.execute(q + " ORDER BY time, seq", args).fetchall()
        self.db.row_factory = None
        return rows


class LogbookReader:
    """A logbook opened read-only, for report and fit-box: nothing is migrated,
    no journal mode is changed, and a database that is not a feedmatch logbook
    (or fails SQLite's integrity check) is refused untouched."""

    def __init__(self, path: str | Path):
        self.path = p = Path(path)
        if not p.exists():
            raise InputError(f"logbook {p} does not exist")
        if not p.is_file():
            raise InputError(f"logbook {p} is not a file")
        with p.open("rb") as f:
            head = f.read(16)
        if head != b"SQLite format 3\x00":
            raise InputError(f"{p} is not an SQLite logbook; nothing was changed")
        try:
            self.db = sqlite3.connect(p.resolve().as_uri() + "?mode=ro", uri=True, timeout=10)
            v = self.db.execute("PRAGMA user_version").fetchone()[0]
            tables = {r[0] for r in self.db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
            check = self.db.execute("PRAGMA quick_check").fetchone()[0]
        except sqlite3.DatabaseError as e:
            raise InputError(f"{p} is not a usable SQLite logbook: {e}") from None
        if v == 0 or not {"boards", "sessions", "tunes"} <= tables:
            self.db.close()
            raise InputError(f"{p} is an SQLite database but not a feedmatch logbook; nothing was changed")
        if v > SCHEMA_VERSION:
            self.db.close()
            raise InputError(f"logbook {p} has schema {v}, newer than this program's {SCHEMA_VERSION}")
        if v < READABLE_FROM:
            self.db.close()
            raise InputError(f"logbook {p} has the older schema {v}; `feedmatch log` upgrades it")
        self.has_banks = "banks" in tables
        if check != "ok":
            self.db.close()
            raise InputError(f"logbook {p} fails SQLite's integrity check ({check}); its rows cannot be "
                             "trusted: keep a copy and recover it with sqlite3's .recover")

    tunes = Logbook.tunes

    def banks(self) -> dict[str, dict[str, Any]]:
        """{board key: the config sections its element values came from}; empty
        for logbooks written before the values were kept, or unreadable ones."""
        if not self.has_banks:
            return {}
        out = {}
        for key, text in self.db.execute("SELECT boards.board_id, banks.bank FROM banks JOIN boards "
                                         "ON boards.id = banks.board"):
            try:
                m = json.loads(text)
            except ValueError:
                continue
            if isinstance(m, dict):
                out[key] = m
        return out

    def close(self) -> None:
        self.db.close()


def open_existing(path: str | Path) -> LogbookReader:
    """The logbook at path, read-only (see LogbookReader)."""
    return LogbookReader(path)
