"""Guided detector calibration into a dummy load.

At each transmit power the operator confirms (or types) what their trusted
wattmeter reads; the board's raw forward and reflected readings are averaged.
The forward curve becomes the (counts, watts) table; it must rise with power.
The reflected reading into a dummy load is the coupler's leakage: it gives
the effective directivity and so the lowest SWR the box can resolve.
The first pass writes the forward table into both detectors (alike when
built alike).  The second pass (--reflected) calibrates the reflected detector
on its own: with the box reversed (transmitter into the antenna port, dummy
load on the transmitter port) the reflected detector sees the wave and the
forward one sees the leakage, so a mismatched diode or divider no longer reads
as SWR.
"""

from __future__ import annotations

import math

from feedmatch.errors import InputError
from feedmatch.rf.network import swr_of


def fit_table(points: list[tuple[float, float]], side: str = "forward") -> list[list[float]]:
    """Check and sort the (counts, watts) points into a calibration table."""
    pts = sorted(points, key=lambda p: p[1])
    for (c0, w0), (c1, w1) in zip(pts, pts[1:]):
        if w1 <= w0:
            raise InputError(f"two readings at the same power ({w0:g} W): repeat one")
        if c1 <= c0:
            raise InputError(f"{side} reading did not rise from {w0:g} W to {w1:g} W "
                             f"({c0:.1f} -> {c1:.1f} counts): detector or wiring fault")
    if len(pts) < 3:
        raise InputError("at least 3 powers are needed for a calibration")
    if pts[0][0] < 5:
        raise InputError(f"the lowest power reads only {pts[0][0]:.1f} counts: raise it above the noise floor")
    return [[round(c, 3), w] for c, w in pts]


def leak_for_config(gamma: float) -> float:
    """The coupler leakage |d| the search allows for (config detector.leak):
    the measured residual, kept inside the validator's range and never below
    0.005 (a 46 dB coupler; below that the diode floor dominates)."""
    return round(min(0.5, max(0.005, gamma)), 4)


def residual_directivity(fwd_w: float, ref_w: float) -> dict[str, float]:
    g = math.sqrt(ref_w / fwd_w) if fwd_w > 0 and ref_w > 0 else 0.0
    return {"gamma": g, "directivity_db": -20 * math.log10(g) if g > 0 else 99.0,
            "lowest_swr": float(swr_of(g))}
