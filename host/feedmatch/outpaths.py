"""Output paths checked before any work starts, so a bad one costs nothing.

Every command that writes a file or a directory asks here first: the answer is
the path, or an InputError naming the option and what is wrong with it.  A
missing parent is an error, not a reason to create directories up to the
root (a typo in a path should not quietly build a tree somewhere).
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from pathlib import Path

from feedmatch.errors import InputError


def _parent_ok(p: Path, option: str) -> None:
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.exists():
        raise InputError(f"{option} {p}: the directory {parent} does not exist")
    if not parent.is_dir():
        raise InputError(f"{option} {p}: {parent} is not a directory")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"{option} {p}: cannot write in {parent}")


def output_file(path: str | Path, option: str, suffixes: Iterable[str]) -> Path:
    """A file the command will write: its directory exists and is writable, the
    path is not a directory, and its ending is one of suffixes (lower case, with
    the dot); an existing file is replaced only if it is writable."""
    p = Path(path)
    allowed = tuple(suffixes)
    if p.suffix.lower() not in allowed:
        raise InputError(f"{option} {p}: the file name must end in {' or '.join(allowed)}")
    if p.is_dir():
        raise InputError(f"{option} {p} is a directory; give a file name")
    _parent_ok(p, option)
    if p.exists() and not os.access(p, os.W_OK):
        raise InputError(f"{option} {p} exists and cannot be written")
    return p


def output_dir(path: str | Path, option: str) -> Path:
    """A directory the command will write into: it exists and is writable, or
    its parent does (the directory itself is then made, and nothing above it)."""
    p = Path(path)
    if p.exists():
        if not p.is_dir():
            raise InputError(f"{option} {p} exists and is not a directory")
        if not os.access(p, os.W_OK | os.X_OK):
            raise InputError(f"{option} {p}: cannot write in it")
        return p
    _parent_ok(p, option)
    return p
