"""Load corpora for the scorer: CSV files and generated sets."""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import bands
from .errors import InputError

HEADER = ["freq_hz", "r_ohm", "x_ohm"]


@dataclass
class Load:
    freq_hz: float
    r_ohm: float
    x_ohm: float
    line: int = 0

    @property
    def z(self) -> complex:
        return complex(self.r_ohm, self.x_ohm)


def read_loads(path: str | Path, skip_bad: bool = False) -> tuple[list[Load], list[str]]:
    """Read a loads CSV; bad rows stop the run unless skip_bad (then they are reported)."""
    p = Path(path)
    try:
        fh = p.open(newline="", encoding="utf-8")
    except OSError as e:
        raise InputError(f"loads file {p} cannot be read: {e.strerror or e}") from None
    loads: list[Load] = []
    bad: list[str] = []
    with fh:
        try:
            rows = list(csv.reader(fh))
        except (csv.Error, UnicodeDecodeError) as e:
            raise InputError(f"loads file {p} is not readable CSV: {e}") from None
    if not rows or [c.strip() for c in rows[0]] != HEADER:
        raise InputError(f"loads file {p}: line 1 must be the header {','.join(HEADER)}")
    for i, row in enumerate(rows[1:], start=2):
        if not row or all(not c.strip() for c in row):
            continue
        msg = _check_row(row)
        if msg:
            bad.append(f"{p}: line {i}: {msg}")
            if not skip_bad:
                raise InputError(bad[-1] + " (use --skip-bad to skip such rows)")
            continue
        f, r, x = (float(c) for c in row)
        loads.append(Load(f, r, x, i))
    if not loads:
        raise InputError(f"loads file {p} holds no valid load")
    return loads, bad


def _check_row(row: list[str]) -> str:
    if len(row) != 3:
        return f"expected 3 fields, got {len(row)}"
    try:
        f, r, x = (float(c) for c in row)
    except ValueError:
        return "fields must be numbers"
    if not all(math.isfinite(v) for v in (f, r, x)):
        return "fields must be finite numbers"
    if f <= 0:
        return "freq_hz must be > 0"
    if r <= 0:
        return "r_ohm must be > 0 (a passive antenna)"
    return ""


def write_loads(path: str | Path, loads: list[Load]) -> None:
    with Path(path).open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER)
        for ld in loads:
            w.writerow([f"{ld.freq_hz:.1f}", f"{ld.r_ohm:.6g}", f"{ld.x_ohm:.6g}"])


def smith_loads(n: int, seed: int = 1, z0: float = 50.0, gamma_max: float = 0.97,
                band_names: list[str] | None = None) -> list[Load]:
    """n loads spread evenly (by area) over the reflection disc |gamma| <= gamma_max,
    each at a random frequency inside a random amateur band."""
    rng = np.random.default_rng(seed)
    names = band_names or [b.name for b in bands.HF_BANDS]
    out = []
    for _ in range(n):
        rho = gamma_max * math.sqrt(rng.random())
        th = 2 * math.pi * rng.random()
        g = complex(rho * math.cos(th), rho * math.sin(th))
        z = z0 * (1 + g) / (1 - g)
        b = bands.by_name(names[int(rng.integers(len(names)))])
        f = b.low_hz + (b.high_hz - b.low_hz) * rng.random()
        out.append(Load(round(f, 1), z.real, z.imag))
    return out


def vertical_loads(n: int, seed: int = 1) -> list[Load]:
    """n feed-point impedances of verticals 2.5-9 m tall with 1-20 ohm of ground loss, at random
    frequencies in the amateur bands (closed-form monopole, heights up to 0.42 wavelength):
    the strongly reactive short-vertical loads this box exists for."""
    from .antenna import Monopole

    rng = np.random.default_rng(seed)
    out: list[Load] = []
    while len(out) < n:
        h = rng.uniform(2.5, 9.0)
        loss = rng.uniform(1.0, 20.0)
        b = bands.HF_BANDS[int(rng.integers(len(bands.HF_BANDS)))]
        f = b.low_hz + (b.high_hz - b.low_hz) * rng.random()
        if h * f / 299_792_458.0 > 0.42:
            continue
        z = complex(Monopole(h, 0.012, loss).impedance(f))
        out.append(Load(round(f, 1), z.real, z.imag))
    return out
