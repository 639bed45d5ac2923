"""Shared helpers: paths, the MicroPython unix port, running the CLI."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FIRMWARE = ROOT / "firmware"
BIN = Path(sys.executable).parent


def micropython_path() -> str | None:
    p = BIN / "micropython"
    if p.exists():
        return str(p)
    return shutil.which("micropython")


@pytest.fixture(scope="session")
def micropython() -> str:
    p = micropython_path()
    if p is None:
        pytest.fail("the micropython unix port is missing: install the test extras")
    return p


def run_mpy(mp: str, code: str, timeout: float = 120) -> str:
    """Run code under the MicroPython unix port with the firmware on its path."""
    env = dict(os.environ, MICROPYPATH=f"{FIRMWARE}:.frozen")
    r = subprocess.run([mp, "-X", "heapsize=4M", "-c", code], capture_output=True, text=True,
                       timeout=timeout, env=env, cwd=str(FIRMWARE))
    if r.returncode != 0:
        raise AssertionError(f"micropython failed: {r.stderr or r.stdout}")
    return r.stdout


def run_cli(*args: str, timeout: float = 300, input: str | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([str(BIN / "feedmatch"), *args], capture_output=True, text=True,
                          timeout=timeout, input=input)


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    import socket

    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def logbook_rows(db) -> list:
    """Every tune row of a logbook, in record order (sqlite3.Row: by column name)."""
    import sqlite3

    con = sqlite3.connect(db)
    con.row_factory = sqlite3.Row
    rows = con.execute("SELECT * FROM tunes ORDER BY seq").fetchall()
    con.close()
    return rows
