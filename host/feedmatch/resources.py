"""Where the package's own files are: its data and the firmware it deploys.

Both are package data found through importlib.resources, so a wheel install and
a checkout (editable install) give the same answer and nothing edits sys.path.
"""

from __future__ import annotations

from importlib.resources import files
from pathlib import Path


def _dir(package: str) -> Path:
    root = files(package)
    if not isinstance(root, Path):
        # A zipped install: the firmware is run and copied from disk.
        raise RuntimeError(f"feedmatch must be installed unpacked ({package} is inside an archive)")
    return root


FIRMWARE: Path = _dir("feedmatch.firmware")
DATA: Path = _dir("feedmatch") / "data"
