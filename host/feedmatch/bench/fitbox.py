"""Can fit-box's stated uncertainty be trusted?  Per drawn box (5 % parts with
strays, the default coupler), two logbooks of independent tunes are fitted apart;
each element's two values must agree within their combined stated uncertainty.
Also how often fit-box would refuse --write at that many tunes."""

from __future__ import annotations

from typing import Any

import numpy as np


def agreement(seed: int, tunes: int) -> tuple[np.ndarray, list[bool]]:
    """z = |a - b| / sqrt(sa^2 + sb^2) per element exercised by both fits (>= 20
    readings each), and whether each fit was refused for --write."""
    from feedmatch.rf.network import load_network
    from feedmatch.sim.boxes import draw_box
    from feedmatch.sim.fitbox import WRITE_MIN_USES, fit_elements, traces_from_scoring, write_refusal
    from feedmatch.sim.loads import smith_loads

    net = load_network()
    names = [f"L{i}" for i in range(net.n_l)] + [f"C{i}" for i in range(net.n_c)]
    box = draw_box(net, seed, 0.05, "default")
    fits = [fit_elements(net, traces_from_scoring(net, box, smith_loads(tunes, seed=seed * 10 + j)), split=True)
            for j in (0, 1)]
    v = [np.array(f["inductors_uh"] + f["capacitors_pf"]) for f in fits]
    s = [np.array(f["inductor_sigma_pct"] + f["capacitor_sigma_pct"]) / 100 for f in fits]
    n = [np.array(f["inductor_readings"] + f["capacitor_readings"]) for f in fits]
    used = (n[0] >= WRITE_MIN_USES) & (n[1] >= WRITE_MIN_USES)
    z = np.abs(v[0] / v[1] - 1) / np.sqrt(s[0] ** 2 + s[1] ** 2)
    return z[used], [write_refusal(f, names) is not None for f in fits]


def bench_fitbox(quick: bool = False) -> dict[str, Any]:
    seeds = (31, 32) if quick else (31, 32, 33, 34)
    tunes = 60 if quick else 200
    zs, refused = [], []
    for sd in seeds:
        z, r = agreement(sd, tunes)
        zs.extend(z.tolist())
        refused.extend(r)
    zs_a = np.array(zs)
    return {"fitbox_boxes": len(seeds), "fitbox_tunes_per_logbook": tunes,
            "fitbox_within_2sigma_rate": round(float(np.mean(zs_a <= 2)), 3),
            "fitbox_within_3sigma_rate": round(float(np.mean(zs_a <= 3)), 3),
            "fitbox_max_z": round(float(zs_a.max()), 2),
            "fitbox_refused_rate": round(sum(refused) / len(refused), 3)}
