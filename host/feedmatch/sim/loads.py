"""Load corpora for the scorer: CSV files and generated sets."""

from __future__ import annotations

import csv
import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from feedmatch.errors import InputError
from feedmatch.rf import bands

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


# Soil for the drawn verticals: conductivity S/m, relative permittivity.  The usual
# modelling classes of the trade (poor / average / very good ground; common practice,
# values from memory).
SOILS = ((0.001, 5.0), (0.005, 13.0), (0.03, 20.0))
# Corpus verticals stop short of the closed form's own limit (antenna.MAX_H_OVER_LAMBDA,
# 0.45): short and medium verticals, below the half-wave anti-resonance.
CORPUS_H_OVER_LAMBDA = 0.42


def _draw_band_freqs(rng, h: float, k: int) -> list[float]:
    fit = [b for b in bands.HF_BANDS if h * b.high_hz / 299_792_458.0 <= CORPUS_H_OVER_LAMBDA]
    out = []
    for _ in range(k):
        b = fit[int(rng.integers(len(fit)))]
        out.append(round(b.low_hz + (b.high_hz - b.low_hz) * rng.random(), 1))
    return out


def vertical_loads(n: int, seed: int = 1, model: str = "nec",
                   progress: Callable[[int, int], None] | None = None) -> list[Load]:
    """n feed-point impedances of verticals 2.5-9 m tall at random frequencies in the amateur
    bands (heights up to 0.42 wavelength): the strongly reactive short-vertical loads this box
    exists for.

    model "nec" (the default) draws whole antennas and solves them with NEC-2: a radiator
    12-40 mm thick (thinner on the shortest), 4, 8 or 16 radials of 2-8 m over poor, average
    or very good soil, a quarter of them with a four-wire top hat, 40 frequencies each
    (results are cached on disk).
    model "closed-form" is the fast fallback: the induced-EMF monopole with 1-20 ohm of ground
    loss, one antenna per load.
    progress(done, total), when given, is called after each NEC-2 antenna.
    """
    rng = np.random.default_rng(seed)
    out: list[Load] = []
    if model == "closed-form":
        from feedmatch.rf.antenna import Monopole

        while len(out) < n:
            h = rng.uniform(2.5, 9.0)
            loss = rng.uniform(1.0, 20.0)
            b = bands.HF_BANDS[int(rng.integers(len(bands.HF_BANDS)))]
            f = b.low_hz + (b.high_hz - b.low_hz) * rng.random()
            if h * f / 299_792_458.0 > CORPUS_H_OVER_LAMBDA:
                continue
            z = complex(Monopole(h, 0.012, loss).impedance(f))
            out.append(Load(round(f, 1), z.real, z.imag))
        return out
    if model != "nec":
        raise InputError(f"vertical model must be 'nec' or 'closed-form', got {model!r}")
    from feedmatch.rf.nec import sweep

    drawn = drawn_verticals(n, rng)
    for k, (desc, fs) in enumerate(drawn):
        z = sweep(desc, fs)
        out.extend(Load(f, zz.real, zz.imag) for f, zz in zip(fs, z))
        if progress is not None:
            progress(k + 1, len(drawn))
    return out


def drawn_verticals(n: int, rng, per: int = 40) -> list[tuple[dict, list[float]]]:
    """The NEC-2 antennas behind vertical_loads: (validated description, frequencies) pairs
    with n frequencies in all."""
    from feedmatch.rf.nec import validate

    out: list[tuple[dict, list[float]]] = []
    left = n
    while left > 0:
        k = min(per, left)
        h = round(float(rng.uniform(2.5, 9.0)), 2)
        sigma, er = SOILS[int(rng.integers(len(SOILS)))]
        d = {"kind": "nec",
             # thin enough that a segment stays eight radii long (NEC-2's thin-wire rule)
             "radiator": {"height_m": h, "diameter_m": round(float(rng.uniform(0.012, min(0.04, h / 90))), 4)},
             "ground": {"type": "radials", "conductivity_s_m": sigma, "permittivity": er,
                        "radials": int(rng.choice([4, 8, 16])),
                        "radial_length_m": round(float(rng.uniform(2.0, 8.0)), 2)}}
        if rng.random() < 0.25:
            d["top_hat"] = {"wires": 4, "length_m": round(float(rng.uniform(0.5, 1.5)), 2)}
        out.append((validate(d, "drawn vertical"), _draw_band_freqs(rng, h, k)))
        left -= k
    return out


def session_frequencies(rng, band_list: list, n: int) -> list[float]:
    """An operator's evening on the bands in band_list: mostly small steps within
    a band (1-30 kHz either way), now and then a jump within it, sometimes a move
    to another band; every frequency inside a band (an invented pattern for the
    scorer, not a survey)."""
    b = band_list[int(rng.integers(len(band_list)))]
    f = b.low_hz + (b.high_hz - b.low_hz) * rng.random()
    out = [round(f, 1)]
    for _ in range(n - 1):
        x = rng.random()
        if x < 0.6:
            step = (1.0 if rng.random() < 0.5 else -1.0) * (1e3 + 29e3 * rng.random())
            f = min(max(f + step, b.low_hz), b.high_hz)
        elif x < 0.8:
            f = b.low_hz + (b.high_hz - b.low_hz) * rng.random()
        else:
            b = band_list[int(rng.integers(len(band_list)))]
            f = b.low_hz + (b.high_hz - b.low_hz) * rng.random()
        out.append(round(f, 1))
    return out


def vertical_sessions(n_sessions: int, per: int, seed: int = 1) -> list[list[Load]]:
    """Operating sessions on drawn NEC-2 verticals (as in vertical_loads): for each
    antenna, per tunes in the order an operator makes them (session_frequencies)."""
    from feedmatch.rf.nec import sweep, validate

    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n_sessions):
        (desc, _fs), = drawn_verticals(1, rng, per=1)
        h = desc["radiator"]["height_m"]
        fit = [b for b in bands.HF_BANDS if h * b.high_hz / 299_792_458.0 <= CORPUS_H_OVER_LAMBDA]
        fs = session_frequencies(rng, fit, per)
        z = sweep(validate(desc, "drawn vertical"), fs)
        out.append([Load(f, float(zz.real), float(zz.imag)) for f, zz in zip(fs, z)])
    return out
