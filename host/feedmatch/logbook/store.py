"""The station logbook: SQLite in WAL mode, one row per tune record, never twice.

Records are unique by (board, seq); each is committed in its own transaction
as it arrives, so a killed logger loses nothing already committed and a
replay or backfill only fills the gaps.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import socket
import sqlite3
from pathlib import Path
from typing import Any

from feedmatch.errors import InputError
from feedmatch.rf import bands

SCHEMA_VERSION = 5
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
    # What a board said it found damaged or lost at a start (part of its history
    # gone, a new identity), once per board, boot and text.
    5: [
        "CREATE TABLE notes (id INTEGER PRIMARY KEY, board INTEGER NOT NULL REFERENCES boards(id),"
        " time TEXT NOT NULL, boot INTEGER, text TEXT NOT NULL, UNIQUE (board, boot, text))",
    ],
}


# The write-ahead log is checkpointed into the logbook every WAL_PAGES pages and
# truncated back to WAL_LIMIT bytes, so a backfill never grows it past about
# 256 KiB (SQLite's defaults let it reach 4 MiB: more than a small disk holds).
WAL_PAGES = 64
WAL_LIMIT = 256 * 1024
# `log` will not start with less than this free beside the logbook, and stops
# (before SQLite meets a full disk) when less than RUN_FLOOR is left: a logger
# restarted on a nearly full disk must not take what other programs need.
START_FLOOR = 1024 * 1024
RUN_FLOOR = 256 * 1024

# SQLite's primary result codes (sqlite3.h, "Result and Error Codes").
_SQLITE_READONLY, _SQLITE_IOERR, _SQLITE_FULL, _SQLITE_CANTOPEN = 8, 10, 13, 14
_KEPT = ("the board keeps its records and the next `feedmatch log` fetches them; "
         "nothing already in the logbook was lost")


class LogbookUnwritable(InputError):
    """The logbook's disk refused a write: full, gone or read-only.  One line for the
    operator; every record committed before stays, the rest waits on the board."""


def write_failure(path: str | Path, e: BaseException) -> LogbookUnwritable:
    """The one-line account of a failed write to the logbook at path."""
    code = getattr(e, "sqlite_errorcode", None)
    prim = code & 0xFF if isinstance(code, int) else None
    err = getattr(e, "errno", None)
    if prim == _SQLITE_FULL or err in (28, 122):  # ENOSPC, EDQUOT
        why = "the disk holding it is full"
    elif prim == _SQLITE_READONLY or err == 30 or _read_only_fs(path):  # EROFS
        why = "it is read-only now (a file system remounted read-only?)"
    elif prim in (_SQLITE_IOERR, _SQLITE_CANTOPEN) or err in (5, 2, 19, 6):  # EIO, ENOENT, ENODEV, ENXIO
        why = f"its disk failed or went away ({e})"
    else:
        why = str(e)
    return LogbookUnwritable(f"logbook {path} cannot be written: {why}; {_KEPT}")


def _read_only_fs(path: str | Path) -> bool:
    p = Path(path)
    try:
        return bool(os.statvfs(p.parent if str(p.parent) else ".").f_flag & os.ST_RDONLY)
    except OSError:
        return False


def free_bytes(path: str | Path) -> int | None:
    """Bytes an unprivileged writer may still use on the file system of path
    (None where that cannot be known)."""
    p = Path(path)
    d = p if p.is_dir() else (p.parent if str(p.parent) else Path("."))
    try:
        st = os.statvfs(d)
    except OSError:
        return None
    return st.f_bavail * st.f_frsize


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
            self.db.execute(f"PRAGMA wal_autocheckpoint={WAL_PAGES}")
            self.db.execute(f"PRAGMA journal_size_limit={WAL_LIMIT}")
            self.db.execute("PRAGMA foreign_keys=ON")
            self._migrate()
        except sqlite3.OperationalError as e:
            raise write_failure(self.path, e) from None
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
            raise write_failure(self.path, e) from None
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

    @contextlib.contextmanager
    def writing(self):
        """Every write goes through here: a refused write (full disk, lost disk,
        read-only file system) becomes LogbookUnwritable, one line for the operator."""
        try:
            yield
        except (sqlite3.OperationalError, OSError) as e:
            raise write_failure(self.path, e) from None

    def check_room(self, floor: int = RUN_FLOOR) -> None:
        """Stop before the disk is full: raise LogbookUnwritable when less than floor
        bytes are left beside the logbook, or the logbook file is gone."""
        if not self.path.exists():
            raise LogbookUnwritable(f"logbook {self.path} is gone (deleted, or its disk went away); {_KEPT}")
        free = free_bytes(self.path)
        if free is not None and free < floor:
            raise LogbookUnwritable(f"logbook {self.path}: only {free // 1024} KiB left on its disk (the logger "
                                    f"stops below {floor // 1024} KiB rather than fill it); {_KEPT}")

    def close(self) -> None:
        """End the session and give the write-ahead log's space back; on a disk
        that refuses, close anyway (what was committed is in the logbook)."""
        try:
            if self.session is not None:
                self.db.execute("UPDATE sessions SET ended=? WHERE id=?", (_now(), self.session))
            self.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        except sqlite3.Error:
            pass
        self.db.close()

    def board(self, board_id: str) -> int:
        with self.writing():
            return self._board(board_id)

    def _board(self, board_id: str) -> int:
        now = _now()
        self.db.execute("INSERT INTO boards (board_id, first_seen, last_seen) VALUES (?, ?, ?) "
                        "ON CONFLICT(board_id) DO UPDATE SET last_seen=excluded.last_seen",
                        (board_id, now, now))
        return self.db.execute("SELECT id FROM boards WHERE board_id=?", (board_id,)).fetchone()[0]

    def start_session(self, board_id: str, port: str) -> int:
        b = self.board(board_id)
        with self.writing():
            cur = self.db.execute("INSERT INTO sessions (board, started, port, host) VALUES (?, ?, ?, ?)",
                                  (b, _now(), port, socket.gethostname()))
        self.session = cur.lastrowid
        return self.session

    def set_bank(self, board_id: str, bank: dict[str, Any]) -> None:
        """Keep the element values the board reported (its "network" and any
        "correction" config sections, and its memory's bin width as "memory"); the latest
        report wins."""
        b = self.board(board_id)
        with self.writing():
            self.db.execute("INSERT INTO banks (board, seen, bank) VALUES (?, ?, ?) ON CONFLICT(board) DO UPDATE "
                            "SET seen=excluded.seen, bank=excluded.bank",
                            (b, _now(), json.dumps(bank, sort_keys=True)))

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

    def count(self, board_id: str) -> int:
        """How many of a board's records the logbook holds."""
        return int(self.db.execute("SELECT COUNT(*) FROM tunes JOIN boards ON boards.id = tunes.board "
                                   "WHERE boards.board_id=?", (board_id,)).fetchone()[0])

    def seqs(self, board_id: str, lo: int = 0, hi: int | None = None) -> set[int]:
        """The record numbers of a board in the logbook, from lo to hi (inclusive)."""
        rows = self.db.execute("SELECT seq FROM tunes JOIN boards ON boards.id = tunes.board "
                               "WHERE boards.board_id=? AND seq BETWEEN ? AND ?",
                               (board_id, lo, (1 << 62) if hi is None else hi))
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
        with self.writing():
            cur = self.db.execute(
                "INSERT OR IGNORE INTO tunes (board, seq, session, time, boot, freq_hz, band, before_l, "
                "before_c, before_shunt, before_bypass, after_l, after_c, after_shunt, after_bypass, "
                "swr_before, swr_after, measurements, duration_ms, outcome, reason, memory_hit, strategy, "
                "raw, rig_hz, rig_mode, preset) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                row)
        return cur.rowcount == 1

    def note(self, board_id: str, boot: int | None, text: str) -> bool:
        """Keep what a board said it lost or found damaged; False if already noted."""
        b = self.board(board_id)
        cur = self.db.execute("INSERT OR IGNORE INTO notes (board, time, boot, text) VALUES (?, ?, ?, ?)",
                              (b, _now(), boot, text))
        return cur.rowcount == 1

    def notes(self) -> list[tuple[str, str, int | None, str]]:
        """(board, time, boot, text) of every note, oldest first."""
        rows = self.db.execute("SELECT boards.board_id, notes.time, notes.boot, notes.text FROM notes "
                               "JOIN boards ON boards.id = notes.board ORDER BY notes.id").fetchall()
        return [tuple(r) for r in rows]

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
