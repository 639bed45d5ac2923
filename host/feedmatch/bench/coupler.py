"""The search behind couplers a builder makes: directivity drawn per box over
15-30 dB, each port with its own leakage phase, each detector's gain within
0.3 dB, 5 % parts with strays; cold start on the Smith corpus and the NEC-2
verticals, per directivity band.

cold:    the box knows what the dummy-load passes measure: |d_r|, |d_f|.
learned: the box knows the error box the multi-state calibration fits
         (sim.coupler_cal: the dummy load and the network's own states).
learned_log: the calibration's terms refined from the box's own logbook:
         the traces of up to 200 tunes it made with them (sim.coupler_cal.
         refine_from_traces), the loads unknown, as fit-box fits.
None ever sees the plant's leakage vectors, the true element values, the
true load or the optimum.  Success counts loads whose true best is at or
below SWR 1.4 and ends at true SWR <= 1.5; a false lock is a tune that ends
`locked` above 1.5, over every tune.
"""

from __future__ import annotations

import random
from dataclasses import replace
from typing import Any

BANDS = ((15, 20), (20, 25), (25, 30))
MODES = ("cold", "learned", "learned_log")
MATCHABLE_SWR = 1.4


def _boxes(lo: float, hi: float, n: int, seed0: int):
    from feedmatch.rf.network import load_network
    from feedmatch.sim.boxes import draw_box

    net = load_network()
    out = []
    for k in range(n):
        seed = seed0 + k
        rng = random.Random(seed * 7919 + 17)
        box = draw_box(net, seed, 0.05, "default")
        det = replace(box.detector, directivity_flat_db=rng.uniform(lo, hi),
                      fwd_phase_deg=rng.uniform(0.0, 360.0))
        out.append((net, box, det))
    return out


def bench_coupler(quick: bool = False, stage=None) -> dict[str, Any]:
    from feedmatch.sim.coupler_cal import calibrate_box, refine_from_traces, refine_refusal, traces_from_results
    from feedmatch.sim.loads import smith_loads, vertical_loads
    from feedmatch.sim.scorer import ScoreConfig, run_parallel, summarise

    n_boxes = 3 if quick else 8
    sm = smith_loads(60 if quick else 150, seed=41)
    vl = [ld for ld in vertical_loads(80 if quick else 200, seed=42) if abs(ld.x_ohm) <= 50 * ld.r_ohm]
    # The logbook each box keeps after its calibration: tunes on other loads than the ones
    # scored (other seeds), verticals and the Smith chart, across the bands.
    n_log = 160 if quick else 200
    logl = [ld for ld in vertical_loads(n_log, seed=43) if abs(ld.x_ohm) <= 50 * ld.r_ohm]
    logl = (logl[: n_log // 2] + smith_loads(n_log, seed=44))[:n_log]
    out: dict[str, Any] = {"coupler_matchable_swr": MATCHABLE_SWR, "coupler_log_tunes": len(logl)}
    errs: dict[str, list[float]] = {"learned": [], "learned_log": []}
    refused = 0
    for lo, hi in BANDS:
        boxes = _boxes(lo, hi, n_boxes, 6100 + 100 * lo)
        fits = [calibrate_box(net, box.network, det, seed=box.seed) for net, box, det in boxes]
        jobs = [(logl, box.network, net, ScoreConfig(strategy="model", detector=det, seed=900 + k,
                                                     learned=fit.learned()), det)
                for k, ((net, box, det), fit) in enumerate(zip(boxes, fits))]
        logs = run_parallel(jobs, 2)
        refined = []
        for (net, _box, _det), fit, res in zip(boxes, fits, logs):
            rf = refine_from_traces(net, traces_from_results(res, fit.learned()), fit)
            errs["learned"].append(fit.err)
            errs["learned_log"].append(rf["err"])
            if refine_refusal(rf) is not None:
                # fit-box --coupler would not write it: the box keeps the calibration's terms.
                refused += 1
                refined.append(fit.learned())
                continue
            refined.append(tuple(rf["config"]))
        for mode in MODES:
            jobs = []
            for k, ((net, box, det), fit, rfd) in enumerate(zip(boxes, fits, refined)):
                lrn = {"cold": None, "learned": fit.learned(), "learned_log": rfd}[mode]
                cfg = ScoreConfig(strategy="model", detector=det, seed=k, learned=lrn)
                jobs.append((sm, box.network, net, cfg, det))
                jobs.append((vl, box.network, net, cfg, det))
            parts = run_parallel(jobs, 2)
            smith = [r for p in parts[0::2] for r in p]
            vert = [r for p in parts[1::2] for r in p]
            key = f"coupler_{lo}_{hi}_{mode}"
            s_all = summarise(smith + vert, 1.5, MATCHABLE_SWR)
            s_sm = summarise(smith, 1.5, MATCHABLE_SWR)
            s_vl = summarise(vert, 1.5, MATCHABLE_SWR)
            out[f"{key}_success_rate"] = round(s_all["success_rate"], 4)
            out[f"{key}_smith_success_rate"] = round(s_sm["success_rate"], 4)
            out[f"{key}_verticals_success_rate"] = round(s_vl["success_rate"], 4)
            out[f"{key}_median_readings"] = s_all["median_measurements"]
            out[f"{key}_p95_readings"] = s_all["p95_measurements"]
            out[f"{key}_false_lock_rate"] = round(s_all["false_lock_rate"], 4)
            locked = sum(1 for r in smith + vert if r["outcome"] == "locked")
            out[f"{key}_lock_rate"] = round(locked / max(len(smith) + len(vert), 1), 4)
    out["coupler_learned_log_refused_rate"] = round(refused / (len(BANDS) * n_boxes), 4)
    # The error bound each learning step states (median over the boxes, |gamma|).
    for mode, v in errs.items():
        out[f"coupler_{mode}_median_err"] = round(sorted(v)[len(v) // 2], 4)
    return out
