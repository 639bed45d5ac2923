"""How well the box measures the antenna from its own tunes (sim/curve.py).

Drawn boxes (5 % parts, default strays) behind the bench's realistic coupler
(frequency-dependent directivity, the leakage's phase drawn per box, gain
mismatch and offset): each box first learns its element values as a user
would, with fit-box on 200 earlier tunes; then it works operating sessions on
drawn NEC-2 verticals with its memory (cold tunes and one-reading recalls, as
a logbook holds them).  Every tune's trace is solved for its load with the
learned values and the calibrated leakage magnitude only (never the true box,
the true load or the leakage's phase), tunes are combined per memory bin as
`antenna --logbook` does, and each point where the box could match (the true
box's best SWR at or below 1.5) is compared with the true load.

Keys: the median relative error |Z - Z_true| / |Z_true| of the points; the
share of points within the issue's bound (10 % of |Z|, or |delta gamma| <=
0.05, whichever is looser); the coverage (the truth within twice the stated
one-sigma error in both R and X).
"""

from __future__ import annotations

import statistics
from typing import Any

import numpy as np

MATCHABLE_SWR = 1.5


def _box_points(seed: int, n_sessions: int, per: int) -> list[dict[str, Any]]:
    from dataclasses import replace

    from fmlogic.config import DEFAULTS

    from feedmatch.rf.network import load_network
    from feedmatch.sim.boxes import draw_box
    from feedmatch.sim.curve import (
        ELEMENT_SIGMA_LEARNED,
        Detectors,
        LoadSolver,
        curve_points,
        learn_extras,
        model_error_factor,
    )
    from feedmatch.sim.fitbox import Trace, fit_elements, traces_from_scoring
    from feedmatch.sim.loads import smith_loads, vertical_sessions
    from feedmatch.sim.scorer import ScoreConfig, score

    net = load_network()
    box = draw_box(net, seed, 0.05, "default")
    earlier = traces_from_scoring(net, box, smith_loads(200, seed=seed))
    fit = fit_elements(net, earlier)
    known = replace(net, inductors_uh=fit["inductors_uh"], capacitors_pf=fit["capacitors_pf"])
    leak = box.detector.calibrated_leak()  # what `feedmatch calibrate` tells the board
    sessions = []
    for k, sess in enumerate(vertical_sessions(n_sessions, per, seed=seed + 17)):
        cfg = ScoreConfig(strategy="recall", detector=box.detector, seed=seed * 100 + k, memory=True)
        rows = score(sess, box.network, known, cfg, det=box.detector, workers=1)
        trs = []
        for r in rows:
            t = np.asarray(r["trace"], dtype=float)
            trs.append(Trace(r["freq_hz"], t[:, :3].astype(int), np.round(t[:, 3], 3)) if len(t) else None)
        sessions.append((rows, trs))
    # The element values, strays and coupler, learned from the whole logbook (as `antenna --logbook` does).
    det = Detectors(box.detector.calibration_points(), box.detector.calibration_points())  # the box's table
    extras = learn_extras(known.firmware_bank(), earlier + [t for _, ts in sessions for t in ts if t is not None],
                          leak, det=det)
    solver = LoadSolver(known.firmware_bank(), ELEMENT_SIGMA_LEARNED, leak, extras)
    out = []
    bin_hz = float(DEFAULTS["memory"]["bin_hz"])
    per_session = []
    for rows, trs in sessions:
        ests, truth = [], {}
        for r, tr in zip(rows, trs):
            if tr is None:
                continue
            e = solver.solve(tr)
            if e is None:
                continue
            e.time = str(len(ests))
            truth[e.time] = (complex(r["r_ohm"], r["x_ohm"]), r["oracle_swr"])
            ests.append(e)
        per_session.append((curve_points(ests, bin_hz), truth))
    # The model-error factor from the whole logbook of the box, as `antenna --logbook` has it
    # (each session is a different antenna: its bins are its own).
    groups = [p.members for pts, _t in per_session for p in pts]
    k = model_error_factor(groups)
    for pts, truth in per_session:
        for p in pts:
            zt = np.mean([truth[e.time][0] for e in p.members])
            if max(truth[e.time][1] for e in p.members) > MATCHABLE_SWR:
                continue
            p.cov = p.cov * (k / max(model_error_factor([p.members for p in pts]), 1.0))
            out.append({"z": p.z, "z_true": complex(zt), "r_err": p.r_err, "x_err": p.x_err, "tunes": p.tunes,
                        "readings": p.readings})
    return out


def _gamma(z: complex) -> complex:
    return (z - 50.0) / (z + 50.0)


def bench_antenna_curve(quick: bool = False) -> dict[str, Any]:
    seeds = (8101, 8102) if quick else (8101, 8102, 8103, 8104, 8105, 8106)
    pts = []
    for s in seeds:
        pts += _box_points(s, 3 if quick else 6, 40)
    rel = [abs(p["z"] - p["z_true"]) / abs(p["z_true"]) for p in pts]
    dg = [abs(_gamma(p["z"]) - _gamma(p["z_true"])) for p in pts]
    within = [r <= 0.10 or d <= 0.05 for r, d in zip(rel, dg)]
    cov = [abs(p["z"].real - p["z_true"].real) <= 2 * p["r_err"] and
           abs(p["z"].imag - p["z_true"].imag) <= 2 * p["x_err"] for p in pts]
    one = [c for c, p in zip(cov, pts) if p["readings"] == p["tunes"]]
    return {"antenna_curve_boxes": len(seeds), "antenna_curve_points": len(pts),
            "antenna_curve_median_err": round(statistics.median(rel), 4) if rel else None,
            "antenna_curve_p90_err": round(float(np.percentile(rel, 90)), 4) if rel else None,
            "antenna_curve_median_dgamma": round(statistics.median(dg), 4) if dg else None,
            "antenna_curve_within_target_rate": round(sum(within) / len(within), 4) if within else None,
            "antenna_curve_coverage": round(sum(cov) / len(cov), 4) if cov else None,
            "antenna_curve_one_reading_points": len(one),
            "antenna_curve_one_reading_coverage": round(sum(one) / len(one), 4) if one else None}
