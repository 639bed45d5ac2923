"""Speed and memory benchmarks, each ratio measured in the same run."""

from __future__ import annotations

import statistics
import time
from typing import Any

import numpy as np

from feedmatch.rf.network import Network, StateTable, load_network


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


COLD_DIRECTIVITY_DB = 25.0   # the honest coupler: flat 25 dB, a home-built tandem
COLD_TOLERANCE = 0.05
MATCHABLE_SWR = 1.4          # cold-start success counts loads whose true best is at or below this


def bench_score(n: int = 2000) -> dict[str, Any]:
    """The nominal box with the default detector: model and grid on the Smith
    corpus and the NEC-2 verticals; recall on operating sessions, its hints
    from the firmware's own memory of the earlier tunes."""
    from feedmatch.sim.loads import smith_loads, vertical_loads
    from feedmatch.sim.scorer import ScoreConfig, score, summarise

    net = load_network()
    loads = smith_loads(n, seed=1)
    out: dict[str, Any] = {}
    for name in ("model", "grid"):
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
            out["model_board_ms_median"] = round(s["median_tune_ms"], 1)
    rec = _sessions(net, None, n // 100, 40, "recall", seed=3)
    s = summarise(rec, 1.5)
    out["recall_success_rate"] = round(s["success_rate"], 4)
    out["recall_median_measurements"] = s["median_measurements"]
    out["recall_p95_measurements"] = s["p95_measurements"]
    best = max(("model", "recall", "grid"),
               key=lambda k: (out[f"{k}_success_rate"], -out[f"{k}_median_measurements"]))
    out["best_strategy"] = best
    out["median_measurements"] = out[f"{best}_median_measurements"]
    vl = vertical_loads(n // 2, seed=2)
    s = summarise(score(vl, net, net, ScoreConfig(strategy="model"), workers=2), 1.5)
    out["verticals_model_success_rate"] = round(s["success_rate"], 4)
    out["verticals_model_median_measurements"] = s["median_measurements"]
    out["verticals_model_p95_measurements"] = s["p95_measurements"]
    return out


def _box_jobs(loads_per_box, strategy: str, directivity: float | None, seed0: int, memory: bool = False,
              fitted: bool = False):
    from dataclasses import replace

    from feedmatch.sim.boxes import draw_box, fit_from_scores
    from feedmatch.sim.loads import smith_loads
    from feedmatch.sim.scorer import ScoreConfig

    net = load_network()
    jobs = []
    for k, loads in enumerate(loads_per_box):
        box = draw_box(net, seed0 + k, COLD_TOLERANCE, "default")
        det = replace(box.detector, directivity_flat_db=directivity)
        known = fit_from_scores(net, box, smith_loads(200, seed=seed0 + k)) if fitted else net
        cfg = ScoreConfig(strategy=strategy, detector=det, seed=k, memory=memory)
        jobs.append((loads, box.network, known, cfg, det))
    return jobs


def _sessions(net, directivity, n_sessions: int, per: int, strategy: str, seed: int,
              boxes: bool = False) -> list[dict[str, Any]]:
    from feedmatch.sim.loads import vertical_sessions
    from feedmatch.sim.scorer import ScoreConfig, run_parallel

    sess = vertical_sessions(n_sessions, per, seed=seed)
    if boxes:
        jobs = _box_jobs(sess, strategy, directivity, 3001, memory=strategy == "recall")
    else:
        jobs = [(ld, net, net, ScoreConfig(strategy=strategy, memory=strategy == "recall", seed=k), None)
                for k, ld in enumerate(sess)]
    return [r for part in run_parallel(jobs, 2) for r in part]


def bench_cold(quick: bool = False) -> dict[str, Any]:
    """Cold start on drawn boxes (5 % tolerances, default strays) behind a flat
    25 dB coupler: the Smith corpus and vertical-like loads (NEC-2 verticals,
    abs(X)/R up to 50); then operating sessions on such boxes with the
    firmware's memory (recall) against the cold start on the same loads."""
    from feedmatch.sim.loads import smith_loads, vertical_loads
    from feedmatch.sim.scorer import run_parallel, summarise

    n_boxes = 3 if quick else 8
    sm = smith_loads(300 if quick else 1000, seed=11)
    vl = [ld for ld in vertical_loads(400 if quick else 1200, seed=12) if abs(ld.x_ohm) <= 50 * ld.r_ohm]
    out: dict[str, Any] = {"cold_directivity_db": COLD_DIRECTIVITY_DB, "cold_matchable_swr": MATCHABLE_SWR}
    every = []
    for label, loads in (("smith", sm), ("verticals", vl)):
        rows = [r for part in run_parallel(_box_jobs([loads] * n_boxes, "model", COLD_DIRECTIVITY_DB, 5101), 2)
                for r in part]
        every += rows
        s = summarise(rows, 1.5, MATCHABLE_SWR)
        out[f"cold_{label}_success_rate"] = round(s["success_rate"], 4)
        out[f"cold_{label}_median_measurements"] = s["median_measurements"]
        out[f"cold_{label}_p95_measurements"] = s["p95_measurements"]
        out[f"cold_{label}_matchable"] = s["matchable"]
    s = summarise(every, 1.5, MATCHABLE_SWR)
    out["false_lock_rate"] = round(s["false_lock_rate"], 4)
    out["worse_than_bypass_rate"] = round(s["worse_than_bypass_rate"], 4)
    net = load_network()
    ns = 6 if quick else 24
    mem = summarise(_sessions(net, COLD_DIRECTIVITY_DB, ns, 40, "recall", seed=13, boxes=True), 1.5, MATCHABLE_SWR)
    cold = summarise(_sessions(net, COLD_DIRECTIVITY_DB, ns, 40, "model", seed=13, boxes=True), 1.5, MATCHABLE_SWR)
    out["memory_success_rate"] = round(mem["success_rate"], 4)
    out["memory_median_measurements"] = mem["median_measurements"]
    out["memory_p95_measurements"] = mem["p95_measurements"]
    out["memory_cold_success_rate"] = round(cold["success_rate"], 4)
    out["memory_cold_median_measurements"] = cold["median_measurements"]
    return out


def bench_boxes(quick: bool = False) -> dict[str, Any]:
    """Drawn boxes (tolerance 0.05, default strays) behind the default coupler
    (frequency-dependent directivity), cold start on the Smith corpus; then the
    same with the element values fit-box learns from 200 earlier tunes."""
    from feedmatch.sim.loads import smith_loads
    from feedmatch.sim.scorer import run_parallel, summarise

    n_boxes = 4 if quick else 20
    loads = smith_loads(300 if quick else 1250, seed=5)
    out: dict[str, Any] = {}
    for label, fitted in (("boxes", False), ("boxes_fitted", True)):
        rows = [r for part in run_parallel(_box_jobs([loads] * n_boxes, "model", None, 7919, fitted=fitted), 2)
                for r in part]
        s = summarise(rows, 1.5)
        out[f"{label}_success_rate"] = round(s["success_rate"], 4)
        out[f"{label}_median_measurements"] = s["median_measurements"]
        out[f"{label}_p95_measurements"] = s["p95_measurements"]
        out[f"{label}_matchable_per_box"] = s["matchable"] // n_boxes
    return out


def bench_design() -> dict[str, Any]:
    """The issue's design target: the demo vertical (NEC-2), 40 m to 10 m at 100 W,
    7+7 relays, 5 % parts: the proposal against the shipped bank, per band, and
    how long one design run takes (the antenna's segment check included)."""
    import time

    from feedmatch.resources import DATA
    from feedmatch.rf.antenna import load_antenna
    from feedmatch.sim.design import DesignSpec, antenna_uncertainty, design

    t = time.perf_counter()
    ant = load_antenna(DATA / "antennas" / "hollow_oak_vertical.json")
    names = ["40m", "30m", "20m", "17m", "15m", "12m", "10m"]
    spec = DesignSpec(names, power_w=100.0, uncertainty=antenna_uncertainty(ant, names))
    res = design(ant, spec, load_network(None))
    out: dict[str, Any] = {"design_s": round(time.perf_counter() - t, 1)}
    gains, dloss = [], []
    for rp, rc in zip(res["score"]["bands"], res["score_current"]["bands"]):
        out[f"design_{rp['band']}_coverage"] = round(rp["coverage"], 3)
        out[f"design_{rp['band']}_coverage_default"] = round(rc["coverage"], 3)
        gains.append(rp["coverage"] - rc["coverage"])
        if rp["loss_db_common"] is not None and rc["loss_db_common"] is not None:
            dloss.append(rp["loss_db_common"] - rc["loss_db_common"])
    out["design_min_coverage_gain"] = round(min(gains), 3)
    out["design_max_loss_increase_db"] = round(max(dloss), 3) if dloss else None
    out["design_kept_default"] = res["kept_current"]
    return out


# The names --only takes: each selects the group of keys it belongs to.
ONLY_NAMES = ("all_states_ms", "speedup_vs_skrf", "score_2000_s", "median_measurements", "tune_heap_kib",
              "nec_sweep_300_s", "boxes", "cold", "false_lock_rate", "memory_success_rate", "rp2040", "design",
              "presets", "antenna_curve", "selftest", "watch", "coupler", "life", "fitbox")


def run_bench(quick: bool = False, only: str | None = None, save_costs: bool = False,
              stage=None) -> dict[str, Any]:
    """The benchmark groups --only selects; stage(label), when given, is called as
    each group starts (the command line shows it)."""
    keys = {k.strip() for k in only.split(",") if k.strip()} if only else None
    unknown = sorted((keys or set()) - set(ONLY_NAMES))
    if unknown:
        from feedmatch.errors import InputError

        raise InputError(f"--only: unknown {', '.join(unknown)} (choose from {', '.join(ONLY_NAMES)})")
    res: dict[str, Any] = {}

    def want(*names: str) -> bool:
        hit = keys is None or any(n in keys for n in names)
        if hit and stage is not None:
            stage("bench " + names[0])
        return hit

    if want("all_states_ms", "speedup_vs_skrf"):
        res.update(bench_all_states(10 if quick else 30))
    if want("score_2000_s", "median_measurements"):
        res.update(bench_score(400 if quick else 2000))
    if want("tune_heap_kib"):
        from feedmatch.bench.heap import tune_heap

        res.update(tune_heap())
    if want("nec_sweep_300_s"):
        from feedmatch.rf.nec import bench_nec_sweep

        res.update(bench_nec_sweep())
    if want("boxes"):

        res.update(bench_boxes(quick))
    if want("cold", "false_lock_rate", "memory_success_rate"):
        res.update(bench_cold(quick))
    if want("design"):
        res.update(bench_design())
    if want("fitbox"):
        from feedmatch.bench.fitbox import bench_fitbox

        res.update(bench_fitbox(quick))
    if want("coupler"):
        from feedmatch.bench.coupler import bench_coupler

        res.update(bench_coupler(quick))
    if want("presets"):
        from feedmatch.bench.presets import bench_presets

        res.update({"presets_" + k: v for k, v in bench_presets().items()})
        from feedmatch.bench.presets import bench_presets_new

        res.update({"presets_" + k: v for k, v in bench_presets_new(60 if quick else 200).items()})
    if want("antenna_curve"):
        from feedmatch.bench.curve import bench_antenna_curve

        res.update(bench_antenna_curve(quick))
    if want("selftest"):
        from feedmatch.bench.selftest import bench_damaged, bench_selftest

        res.update(bench_selftest(quick))
        res.update(bench_damaged(quick))
    if want("watch"):
        from feedmatch.bench.watch import bench_watch

        res.update(bench_watch(quick))
    if want("life"):
        from feedmatch.bench.life import bench_life
        from feedmatch.sim.emulator import EmulatorMissing

        try:
            res.update(bench_life(quick))
        except EmulatorMissing as e:
            res["life_chip_skipped"] = str(e)
    if want("rp2040"):
        from feedmatch.bench.chip import bench_rp2040
        from feedmatch.sim.emulator import EmulatorMissing

        try:
            res.update(bench_rp2040(quick, save_costs=save_costs))
        except EmulatorMissing as e:
            res["rp2040_skipped"] = str(e)
    return res
