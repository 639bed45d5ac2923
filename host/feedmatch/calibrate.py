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

import argparse
import math
from collections.abc import Callable
from pathlib import Path
from typing import TextIO

from .errors import InputError, LinkError
from .jsonfile import load_json, write_json_with_backup


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


def residual_directivity(fwd_w: float, ref_w: float) -> dict[str, float]:
    g = math.sqrt(ref_w / fwd_w) if fwd_w > 0 and ref_w > 0 else 0.0
    return {"gamma": g, "directivity_db": -20 * math.log10(g) if g > 0 else 99.0,
            "lowest_swr": (1 + g) / (1 - g) if g < 1 else math.inf}


def run_calibrate(a: argparse.Namespace, inp: TextIO, out: TextIO,
                  on_prompt: Callable[[float], None] | None = None) -> int:
    from fmlogic.swr import Calibration

    from .link import BoardLink

    cfg_path = Path(a.config)
    cfg = load_json(cfg_path, "board config")
    try:
        powers = [float(x) for x in a.powers.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--powers must be a list of watts, got '{a.powers}'") from None
    if len(powers) < 3 or any(p <= 0 for p in powers):
        raise InputError("--powers needs at least 3 positive powers")
    reflected = bool(getattr(a, "reflected", False))
    det_cfg = cfg.get("detector", {})
    if reflected and not isinstance(det_cfg.get("fwd"), list):
        raise InputError("run the forward pass first: the config has no detector.fwd table")
    if reflected:
        print("Reflected-detector calibration: reverse the box (transmitter into the ANT port, "
              "50 ohm dummy load on the TX port). Key each power; do not touch the box while keyed.",
              file=out)
    else:
        print("Calibration into a 50 ohm dummy load. Key each power with the transmitter into the box,"
              " with the dummy load on the antenna port. Do not touch the box while keyed.", file=out)
    main, leak = ("ref_counts", "fwd_counts") if reflected else ("fwd_counts", "ref_counts")
    points = []
    leaks = []
    with BoardLink(a.port, a.baud, timeout=a.timeout) as ln:
        ln.request("bypass", {"on": True})
        for p in powers:
            if on_prompt:
                on_prompt(p)
            if a.yes:
                watts = p
                print(f"{p:g} W keyed (taken as confirmed)", file=out)
            else:
                out.write(f"Key {p:g} W; type what your wattmeter reads (Enter = {p:g}): ")
                out.flush()
                line = inp.readline()
                if not line:
                    raise InputError("calibration stopped: no answer")
                watts = float(line.strip()) if line.strip() else p
            r = ln.request("cal-read", {"n": max(1, min(64, a.samples))})
            if r[main] <= 0:
                what = "reflected" if reflected else "forward"
                hint = " Is the box reversed?" if reflected else ""
                raise LinkError(f"no {what} reading at {watts:g} W: is the carrier keyed?{hint}")
            points.append((float(r[main]), watts))
            leaks.append((float(r[leak]), watts))
            print(f"  {watts:7.2f} W: forward {r['fwd_counts']:8.1f} counts, reflected "
                  f"{r['ref_counts']:6.1f} counts", file=out)
    table = fit_table(points, "reflected" if reflected else "forward")
    floor = float(det_cfg.get("floor_counts", 2.0))
    # The leakage at the highest power, read through the other detector's curve.
    other = Calibration(det_cfg["fwd"], floor) if reflected else Calibration(table, floor)
    c_leak, w = leaks[-1]
    res = residual_directivity(w, other.watts(c_leak))
    if reflected:
        cfg["detector"] = dict(det_cfg, ref=table, floor_counts=floor)
    else:
        cfg["detector"] = dict(det_cfg, fwd=table, ref=table, floor_counts=floor)
    from fmlogic import config as fcfg

    errs = fcfg.validate(cfg)
    if errs:
        raise InputError(f"the new calibration does not validate: {errs[0]}")
    write_json_with_backup(cfg_path, cfg)
    where = "towards the transmitter port" if reflected else "into the dummy load"
    print(f"residual leakage {where}: |gamma| {res['gamma']:.3f} "
          f"(effective directivity {res['directivity_db']:.1f} dB): SWR below "
          f"{res['lowest_swr']:.2f} cannot be told apart", file=out)
    side = "reflected" if reflected else "forward (and, until --reflected is run, reflected)"
    print(f"wrote {len(table)} {side} points into {cfg_path} (previous copy {cfg_path}.bak); "
          "deploy it with feedmatch deploy", file=out)
    return 0
