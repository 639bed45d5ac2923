"""Reading and checking our JSON files with errors that name the field."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from feedmatch.errors import InputError


def load_json(path: str | Path, what: str) -> dict[str, Any]:
    """Load a JSON object from path; any failure is an InputError naming the file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{what} file not found: {p}") from None
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"{what} file {p} cannot be read: {e}") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as e:
        raise InputError(f"{what} file {p} is not valid JSON (line {e.lineno}: {e.msg})") from None
    if not isinstance(data, dict):
        raise InputError(f"{what} file {p} must hold a JSON object")
    return data


def check_keys(data: dict[str, Any], allowed: set[str], required: set[str], where: str) -> None:
    for k in data:
        if k not in allowed:
            raise InputError(f"{where}: unknown field '{k}'")
    for k in sorted(required):
        if k not in data:
            raise InputError(f"{where}: missing field '{k}'")


def number(data: dict[str, Any], key: str, where: str, *, positive: bool = False,
           minimum: float | None = None, maximum: float | None = None,
           optional: bool = False, default: float | None = None) -> float | None:
    if key not in data or data[key] is None:
        if optional:
            return default
        raise InputError(f"{where}: missing field '{key}'")
    v = data[key]
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise InputError(f"{where}: field '{key}' must be a number, got {json.dumps(v)}")
    if positive and v <= 0:
        raise InputError(f"{where}: field '{key}' must be > 0, got {v}")
    if minimum is not None and v < minimum:
        raise InputError(f"{where}: field '{key}' must be >= {minimum}, got {v}")
    if maximum is not None and v > maximum:
        raise InputError(f"{where}: field '{key}' must be <= {maximum}, got {v}")
    return float(v)


def number_list(data: dict[str, Any], key: str, where: str, *, max_len: int | None = None,
                min_len: int = 1) -> list[float]:
    if key not in data:
        raise InputError(f"{where}: missing field '{key}'")
    v = data[key]
    if not isinstance(v, list):
        raise InputError(f"{where}: field '{key}' must be a list of numbers")
    if len(v) < min_len:
        raise InputError(f"{where}: field '{key}' must not be empty")
    if max_len is not None and len(v) > max_len:
        raise InputError(f"{where}: field '{key}' has {len(v)} entries, at most {max_len} allowed")
    out = []
    for i, x in enumerate(v):
        if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
            raise InputError(f"{where}: field '{key}[{i}]' must be a number, got {json.dumps(x)}")
        if x <= 0:
            raise InputError(f"{where}: field '{key}[{i}]' must be > 0, got {x}")
        out.append(float(x))
    return out


def write_json_with_backup(path: str | Path, data: dict[str, Any]) -> None:
    """Replace a JSON file atomically, keeping the previous copy as <name>.bak."""
    import shutil

    p = Path(path)
    if p.exists():
        shutil.copy2(p, str(p) + ".bak")
    tmp = p.with_suffix(p.suffix + ".tmp")
    tmp.write_text(json.dumps(data, indent=1) + "\n")
    tmp.replace(p)
