"""Bench-test the firmware's search strategies against the exhaustive oracle.

The strategies are the firmware's own objects (fmlogic.search); they see only
what a real box sees: the firmware's calibration applied to simulated detector
counts.  For each load the whole state table is computed once (vectorised),
so every reading is a table look-up plus the detector model.
"""

from __future__ import annotations

import os
import random
import statistics
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .detector import DetectorModel
from .loads import Load
from .network import SHUNTS, Network, StateTable, all_states_zin, gamma

# Rough ratio of the RP2040's MicroPython float speed to CPython on this kind
# of code, for the estimated tune time (from memory, an order of magnitude).
BOARD_COMPUTE_FACTOR = 60.0


@dataclass
class ScoreConfig:
    strategy: str = "model"
    target_swr: float = 1.5
    budget: int = 80
    settle_ms: float = 10.0
    sample_ms: float = 2.0
    tune_power_w: float = 10.0
    hot_switch_w: float = 20.0
    seed: int = 1
    stale_hint_fraction: float = 0.2
    detector: DetectorModel = field(default_factory=DetectorModel)


def _popcount(x: int) -> int:
    return bin(x).count("1")


def relay_ops(a: tuple[int, int, int], b: tuple[int, int, int]) -> int:
    """Relays that change between two states (the shunt relay counts too)."""
    return _popcount(a[0] ^ b[0]) + _popcount(a[1] ^ b[1]) + (1 if a[2] != b[2] else 0)


def _hint_for(net: Network, load: Load, rng: random.Random, cfg: ScoreConfig) -> tuple[int, int, int]:
    """A stored state as memory would hold it: the optimum half a bin away
    (here 1 % in frequency, load held), or with some probability a stale one."""
    if rng.random() < cfg.stale_hint_fraction:
        return (rng.randrange(1 << net.n_l), rng.randrange(1 << net.n_c), rng.randrange(2))
    gm = np.abs(gamma(all_states_zin(net, load.freq_hz * 1.01, load.z), net.z0_ohm))
    sh, l, c = np.unravel_index(int(np.argmin(gm)), gm.shape)
    return (int(l), int(c), int(sh))


def score_one(load: Load, true_net: Network, nominal: Network, cfg: ScoreConfig,
              seed: int, det: DetectorModel | None = None) -> dict[str, Any]:
    """Run one strategy on one load; true figures come from true_net."""
    from fmlogic import search

    det = det or cfg.detector
    rng = random.Random(seed)
    st = _table_for(true_net)
    gm = st.gamma_mag(load.freq_hz, load.z)
    table = st._g
    idx = int(np.argmin(gm))
    o_sh, o_l, o_c = np.unravel_index(idx, gm.shape)
    oracle_g = float(gm.flat[idx])
    bank = nominal.firmware_bank()
    meter = det.meter()
    hint = _hint_for(true_net, load, rng, cfg) if cfg.strategy == "recall" else None
    s = search.make(cfg.strategy, bank, load.freq_hz, cfg.target_swr, cfg.budget, hint)
    prev = (0, 0, 1)
    ops = 0
    hot = 0
    t0 = time.perf_counter()
    while not s.done:
        st = s.propose()
        n_ops = relay_ops(prev, st)
        ops += n_ops
        # The controller drops to tune power before switching; count a hot
        # switch whenever relays change with forward power above the limit.
        if n_ops and cfg.tune_power_w > cfg.hot_switch_w:
            hot += 1
        prev = st
        g = complex(table[st[2], st[0], st[1]])
        fwd, ref = det.read(cfg.tune_power_w, g, load.freq_hz, rng)
        pf, pr = meter.powers(fwd, ref)
        s.observe(pf, pr)
    compute_s = time.perf_counter() - t0
    (l, c, sh), est_swr = s.result()
    true_g = float(gm[sh, l, c])
    n = s.n
    est_ms = n * (cfg.settle_ms + cfg.sample_ms) + compute_s * 1e3 * BOARD_COMPUTE_FACTOR
    return {"freq_hz": load.freq_hz, "r_ohm": load.r_ohm, "x_ohm": load.x_ohm,
            "l_code": l, "c_code": c, "shunt": SHUNTS[sh], "swr": _swr(true_g),
            "estimated_swr": est_swr, "oracle_swr": _swr(oracle_g),
            "oracle_state": [int(o_l), int(o_c), SHUNTS[int(o_sh)]],
            "measurements": n, "relay_ops": ops, "hot_switches": hot,
            "tune_ms": round(est_ms, 1), "compute_ms": round(compute_s * 1e3, 3),
            "trace": [[st[0], st[1], st[2], s.seen[st]] for st in s.order]}


_TABLES: dict[str, StateTable] = {}


def _table_for(net: Network) -> StateTable:
    """One reusable state table per network per process."""
    key = repr(net)
    t = _TABLES.get(key)
    if t is None:
        if len(_TABLES) > 8:
            _TABLES.clear()
        t = _TABLES[key] = StateTable(net)
    return t


def _swr(g: float) -> float:
    return float("inf") if g >= 1.0 else (1 + g) / (1 - g)


def _worker(args):
    loads, true_net, nominal, cfg, seeds, det = args
    return [score_one(ld, true_net, nominal, cfg, sd, det) for ld, sd in zip(loads, seeds)]


def score(loads: list[Load], true_net: Network, nominal: Network, cfg: ScoreConfig,
          det: DetectorModel | None = None, workers: int | None = None,
          progress: bool = False) -> list[dict[str, Any]]:
    """Score every load; seeds derive from cfg.seed and the load's index."""
    seeds = [cfg.seed * 1_000_003 + i for i in range(len(loads))]
    workers = workers if workers is not None else min(2, os.cpu_count() or 1)
    if workers <= 1 or len(loads) < 50:
        out = []
        for i, (ld, sd) in enumerate(zip(loads, seeds)):
            out.append(score_one(ld, true_net, nominal, cfg, sd, det))
            if progress and (i % 20 == 0 or i == len(loads) - 1):
                _bar(i + 1, len(loads))
        if progress:
            sys.stderr.write("\n")
        return out
    chunks = max(workers * 8, 1)
    size = (len(loads) + chunks - 1) // chunks
    jobs = [(loads[i:i + size], true_net, nominal, cfg, seeds[i:i + size], det)
            for i in range(0, len(loads), size)]
    out = []
    with ProcessPoolExecutor(max_workers=workers) as ex:
        for k, part in enumerate(ex.map(_worker, jobs)):
            out.extend(part)
            if progress:
                _bar(k + 1, len(jobs))
    if progress:
        sys.stderr.write("\n")
    return out


def _bar(i: int, n: int) -> None:
    w = 30
    k = int(w * i / max(n, 1))
    sys.stderr.write(f"\r[{'#' * k}{'.' * (w - k)}] {i}/{n}")
    sys.stderr.flush()


def summarise(results: list[dict[str, Any]], target_swr: float) -> dict[str, Any]:
    """Figures over the matchable loads; unmatchable ones are counted apart."""
    ok = [r for r in results if r["oracle_swr"] <= target_swr]
    bad = len(results) - len(ok)
    if not ok:
        return {"loads": len(results), "matchable": 0, "unmatchable": bad}
    meas = sorted(r["measurements"] for r in ok)
    succ = sum(1 for r in ok if r["swr"] <= target_swr)
    ratio = [r["swr"] / r["oracle_swr"] for r in ok]
    return {
        "loads": len(results),
        "matchable": len(ok),
        "unmatchable": bad,
        "success_rate": succ / len(ok),
        "median_measurements": statistics.median(meas),
        "p95_measurements": float(np.percentile(meas, 95)),
        "max_measurements": meas[-1],
        "median_relay_ops": statistics.median(r["relay_ops"] for r in ok),
        "median_tune_ms": statistics.median(r["tune_ms"] for r in ok),
        "median_swr": statistics.median(r["swr"] for r in ok),
        "median_swr_over_oracle": statistics.median(ratio),
        "hot_switches": sum(r["hot_switches"] for r in results),
    }
