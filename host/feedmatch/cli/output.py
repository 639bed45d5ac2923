"""Output shared by every command: machine-readable (--json) and progress of long jobs."""

from __future__ import annotations

import json
import math
import sys
from typing import Any, TextIO


def _jsonable(o: Any) -> Any:
    if isinstance(o, float) and not math.isfinite(o):
        return None
    if isinstance(o, dict):
        return {k: _jsonable(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_jsonable(v) for v in o]
    return o


def emit_json(obj: Any) -> None:
    sys.stdout.write(json.dumps(_jsonable(obj), indent=None, separators=(",", ":")) + "\n")


class Progress:
    """Progress of a long job on stderr: a bar on a terminal (tqdm), otherwise one line
    as each stage starts and one as it ends, so a log shows where a run is.

    The layers below take it as a plain callable progress(done, total) and, where a
    job has stages, call progress.stage(label) first; they never print."""

    def __init__(self, stream: TextIO | None = None) -> None:
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._bar: Any = None
        self._label: str | None = None

    def stage(self, label: str) -> None:
        self.close()
        self._label = label
        if not self.tty:
            self.stream.write(f"feedmatch: {label} ...\n")
            self.stream.flush()

    def __call__(self, done: int, total: int) -> None:
        if not self.tty:
            return
        if self._bar is None:
            from tqdm import tqdm

            self._bar = tqdm(total=total, desc=self._label or "", file=self.stream, leave=False,
                             dynamic_ncols=True)
        self._bar.total = total
        self._bar.n = done
        self._bar.refresh()

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None
        if self._label is not None:
            if not self.tty:
                self.stream.write(f"feedmatch: {self._label}: done\n")
                self.stream.flush()
            self._label = None
