"""Speed and memory benchmarks, each ratio measured in the same run."""

from __future__ import annotations

import statistics
import time
from typing import Any

import numpy as np

from .network import Network, StateTable, load_network


def _median_time(fn, reps: int) -> float:
    ts = []
    for _ in range(reps):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return statistics.median(ts)


def skrf_all_states(net: Network, f_hz: float, z_load: complex) -> np.ndarray:
    # |gamma| of every state through scikit-rf, for the speed comparison.
    """|gamma| of every state through a scikit-rf cascade.

    The state index rides on scikit-rf's frequency axis (each 'point' is one
    state at f_hz), so the cascade is vectorised there too: a fair comparison.
    """
    import skrf

    lt = net.l_table_uh()
    ct = net.c_table_pf()
    w = 2 * np.pi * f_hz
    ll, cc = np.meshgrid(lt, ct, indexing="ij")
    xl = w * ll.ravel() * 1e-6
    zs = (xl / net.inductor_q if net.inductor_q else 0) + 1j * xl
    bc = w * cc.ravel() * 1e-12
    yc = (bc / net.capacitor_q if net.capacitor_q else 0) + 1j * bc
    n = zs.size
    freq = skrf.Frequency.from_f(np.linspace(1.0, float(n), n), unit="hz")
    z0 = net.z0_ohm

    def two_port(abcd):
        return skrf.Network(frequency=freq, s=skrf.network.a2s(abcd, z0), z0=z0)

    one = np.ones(n, dtype=complex)
    zero = np.zeros(n, dtype=complex)
    ser = two_port(np.stack([np.stack([one, zs], -1), np.stack([zero, one], -1)], -2))
    sh = two_port(np.stack([np.stack([one, zero], -1), np.stack([yc, one], -1)], -2))
    gl = (z_load - z0) / (z_load + z0)
    load = skrf.Network(frequency=freq, s=np.full((n, 1, 1), gl), z0=z0)
    out = []
    for first, second in ((sh, ser), (ser, sh)):  # tx, then ant
        s11 = (first ** second ** load).s[:, 0, 0]
        out.append(np.abs(s11).reshape(len(lt), len(ct)))
    return np.stack(out)


def bench_all_states(reps: int = 30) -> dict[str, float]:
    net = load_network()
    f, z = 7.1e6, 12 - 150j
    table = StateTable(net)
    ours = _median_time(lambda: table.gamma_mag(f, z), reps)
    theirs = _median_time(lambda: skrf_all_states(net, f, z), max(3, reps // 5))
    return {"all_states_ms": round(ours * 1e3, 3), "skrf_all_states_ms": round(theirs * 1e3, 3),
            "speedup_vs_skrf": round(theirs / ours, 1)}


def bench_score(n: int = 2000) -> dict[str, Any]:
    from .loads import smith_loads
    from .scorer import ScoreConfig, score, summarise

    net = load_network()
    loads = smith_loads(n, seed=1)
    out: dict[str, Any] = {}
    for name in ("model", "recall", "grid"):
        cfg = ScoreConfig(strategy=name)
        t = time.perf_counter()
        res = score(loads, net, net, cfg, workers=2)
        dt = time.perf_counter() - t
        s = summarise(res, cfg.target_swr)
        out[f"{name}_success_rate"] = round(s["success_rate"], 4)
        out[f"{name}_median_measurements"] = s["median_measurements"]
        out[f"{name}_p95_measurements"] = s["p95_measurements"]
        if name == "model":
            out["score_2000_s"] = round(dt * 2000 / n, 2)
    # The best strategy by success rate (recall, when memory holds states from earlier tunes).
    best = max(("model", "recall", "grid"),
               key=lambda k: (out[f"{k}_success_rate"], -out[f"{k}_median_measurements"]))
    out["best_strategy"] = best
    out["median_measurements"] = out[f"{best}_median_measurements"]
    from .loads import vertical_loads

    vl = vertical_loads(n // 2, seed=2)
    for name in ("model", "recall"):
        s = summarise(score(vl, net, net, ScoreConfig(strategy=name), workers=2), 1.5)
        out[f"verticals_{name}_success_rate"] = round(s["success_rate"], 4)
        out[f"verticals_{name}_median_measurements"] = s["median_measurements"]
        out[f"verticals_{name}_p95_measurements"] = s["p95_measurements"]
    return out


def run_bench(quick: bool = False, only: str | None = None) -> dict[str, Any]:
    keys = set(only.split(",")) if only else None
    res: dict[str, Any] = {}

    def want(*names: str) -> bool:
        return keys is None or any(n in keys for n in names)

    if want("all_states_ms", "speedup_vs_skrf"):
        res.update(bench_all_states(10 if quick else 30))
    if want("score_2000_s", "median_measurements"):
        res.update(bench_score(400 if quick else 2000))
    if want("tune_heap_kib"):
        from .heap import tune_heap_kib

        res["tune_heap_kib"] = tune_heap_kib()
    if want("nec_sweep_300_s"):
        try:
            from .nec import bench_nec_sweep
        except ImportError:
            pass
        else:
            res.update(bench_nec_sweep())
    if want("boxes"):
        try:
            from .boxes import bench_boxes
        except ImportError:
            pass
        else:
            res.update(bench_boxes(quick))
    return res
