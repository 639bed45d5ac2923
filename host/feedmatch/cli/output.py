"""Machine-readable output shared by every command (--json)."""

from __future__ import annotations

import json
import math
import sys
from typing import Any


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
