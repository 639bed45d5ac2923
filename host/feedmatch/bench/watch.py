"""Bench group 'watch': the passive watch on drawn damaged boxes, from tunes alone.

Each case: a drawn box (5 % parts, the default strays, the bench's coupler),
one single fault (each kind on each element, as the selftest group) or none,
then 50 tunes on loads across the bands (the Smith corpus, the model search on
the damaged box, its traces as the board logs them), then the watch
(logbook.watch) on those records with what the box knows of itself (nominal
values, Qs, the calibrated leak, the typical strays): never the drawn values,
the fault or the loads.  Right: the faulty element and kind named (its value
in uH or pF with it), or nothing named on a healthy box.
"""

from __future__ import annotations

from concurrent.futures import ProcessPoolExecutor
from typing import Any

TUNES = 50


def _one(args) -> dict[str, Any]:
    spec, box_seed, load_seed = args
    from feedmatch.logbook.watch import watch
    from feedmatch.rf.network import load_network
    from feedmatch.sim.boxes import draw_box
    from feedmatch.sim.faults import NONE, parse_faults
    from feedmatch.sim.loads import smith_loads
    from feedmatch.sim.scorer import ScoreConfig, score_one
    from feedmatch.sim.selftest import model_of

    net = load_network()
    box = draw_box(net, box_seed, 0.05, "default")
    faults = parse_faults(spec, net) if spec else NONE
    recs = []
    for i, ld in enumerate(smith_loads(TUNES, seed=load_seed)):
        r = score_one(ld, box.network, net, ScoreConfig(strategy="model", detector=box.detector, faults=faults),
                      seed=i)
        tr = [x for s in (r.get("trace") or []) for x in (int(s[0]), int(s[1]), int(s[2]), int(round(s[3] * 1000)))]
        recs.append({"freq_hz": ld.freq_hz, "trace": tr})
    res = watch(model_of(net, box.detector.calibrated_leak()), recs)
    f = res["finding"]
    named = (f["element"], f["kind"]) if f else None
    want = None
    if spec:
        el, kind = spec.split(":")
        want = (el, kind.split("=")[0])
    return {"spec": spec, "named": named, "right": named == want, "value_said": bool(f and ("value" in f or
                                                                                          f["element"] == "side")),
            "tunes": f["tunes"] if f else None}


def bench_watch(quick: bool = False, workers: int = 2) -> dict[str, Any]:
    from feedmatch.sim.selftest import fault_cases

    if quick:
        specs = ["L3:stuck-out", "C5:stuck-in", "L2:drift=-30%", "C3:stuck-out", "side:stuck-ant", "side:stuck-tx"]
        n_healthy = 3
    else:
        specs = fault_cases(7, 7)
        n_healthy = 30
    jobs = [(s, 7000 + i, 900 + i) for i, s in enumerate(specs)]
    jobs += [("", 7500 + i, 1900 + i) for i in range(n_healthy)]
    with ProcessPoolExecutor(max_workers=workers) as ex:
        rows = list(ex.map(_one, jobs))
    faulty = [r for r in rows if r["spec"]]
    healthy = [r for r in rows if not r["spec"]]
    out: dict[str, Any] = {"watch_cases": len(rows), "watch_tunes": TUNES,
                           "watch_right_rate": round(sum(r["right"] for r in faulty) / len(faulty), 4)}
    for kind in ("stuck-out", "stuck-in", "drift", "stuck-tx", "stuck-ant"):
        rs = [r for r in faulty if r["spec"].split(":")[1].split("=")[0] == kind]
        out[f"watch_{kind.replace('-', '_')}_right_rate"] = round(sum(r["right"] for r in rs) / len(rs), 4)
    out["watch_wrong_named_rate"] = round(sum(1 for r in faulty if r["named"] and not r["right"]) / len(faulty), 4)
    out["watch_healthy_clean_rate"] = round(sum(r["right"] for r in healthy) / len(healthy), 4)
    out["watch_missed"] = sorted(r["spec"] for r in faulty if not r["right"])
    return out
