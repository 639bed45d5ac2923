"""Bench-test the firmware's search strategies against the exhaustive oracle.

The strategies are the firmware's own objects (fmlogic.search); they see only
what a real box sees: the firmware's calibration applied to simulated detector
counts, the nominal (or fitted) element values, and the coupler leakage that
`feedmatch calibrate` would report on that box.  How a tune ends (locked,
best-effort, through) and what is kept in memory is the controller's own
decision (fmlogic.controller.conclude); with memory on, the loads are tuned in
order and each tune's hint is what the firmware's memory code
(fmlogic.memory.Memory) holds from the earlier ones.  Nothing is ever derived
from the oracle, the true load or the true box.

For each load the whole state table of the true box is computed once
(vectorised), so every reading is a table look-up plus the detector model.
"""

from __future__ import annotations

import os
import random
import statistics
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import Network, StateTable, oracle, swr_of
from feedmatch.seam.bank import side_name
from feedmatch.sim.faults import NONE as NO_FAULTS
from feedmatch.sim.faults import Faults
from feedmatch.sim.loads import Load


def _fw_default(section: str, key: str):
    from fmlogic.config import DEFAULTS

    return DEFAULTS[section][key]


@dataclass
class ScoreConfig:
    strategy: str = "model"
    target_swr: float = field(default_factory=lambda: _fw_default("tune", "target_swr"))
    budget: int = field(default_factory=lambda: _fw_default("tune", "budget"))
    settle_ms: float = 10.0
    sample_ms: float = 2.0
    tune_power_w: float = 10.0
    hot_switch_w: float = field(default_factory=lambda: _fw_default("power", "hot_switch_w"))
    seed: int = 1
    detector: DetectorModel = field(default_factory=DetectorModel)
    # The coupler leakage |d| the firmware is told; None: what calibrate would
    # measure on this box's detector (at 14.2 MHz into a dummy load).
    leak: float | None = None
    # Tune the loads in order with the firmware's memory carried from one to the next.
    memory: bool = False
    # Faults of the true box (sim.faults): stuck relays and drifted elements.
    faults: Faults = NO_FAULTS
    # Elements the box's config marks failed (network.failed): the search keeps to what still switches.
    failed: Faults = NO_FAULTS
    # The coupler's complex error as the calibration learned it (config
    # detector.coupler), or None: magnitudes only (the dummy-load passes).
    learned: tuple | None = None


def _popcount(x: int) -> int:
    return bin(x).count("1")


def relay_ops(a: tuple[int, int, int], b: tuple[int, int, int]) -> int:
    """Relays that change between two states (the shunt relay counts too)."""
    return _popcount(a[0] ^ b[0]) + _popcount(a[1] ^ b[1]) + (1 if a[2] != b[2] else 0)


def new_memory():
    """The firmware's memory of states, in RAM, with the firmware's own bins."""
    from fmlogic import memory
    from fmlogic.config import DEFAULTS

    m = DEFAULTS["memory"]
    return memory.Memory(None, m["bin_hz"], m["max_entries"])


def score_one(load: Load, true_net: Network, nominal: Network, cfg: ScoreConfig,
              seed: int, det: DetectorModel | None = None, mem=None) -> dict[str, Any]:
    """Run one strategy on one load; true figures come from true_net.

    mem: the firmware memory carried between tunes (recall takes its hint
    there, and the tune's result is kept there as the controller keeps it)."""
    from fmlogic import controller, search

    det = det or cfg.detector
    rng = random.Random(seed)
    if cfg.faults:
        # The damaged box: drifted values, and every commanded state read where
        # the stuck relays really leave it (the oracle then is the best the damaged box reaches).
        tg = cfg.faults.remap(_table_for(cfg.faults.apply_net(true_net)).gamma(load.freq_hz, load.z))
        gm = np.abs(tg)
    else:
        table = _table_for(true_net)
        gm = table.gamma_mag(load.freq_hz, load.z)
        tg = table._g
    o_l, o_c, o_sh, oracle_g = oracle(gm)
    z0 = true_net.z0_ohm
    g_through = (load.z - z0) / (load.z + z0)
    bypass_g = abs(g_through)
    bank = nominal.firmware_bank()
    meter = det.meter()
    from fmlogic.coupler import Coupler

    # What calibrate tells the box: the leakage magnitudes of both passes, and
    # the learned complex error when given; never the plant's own vectors.
    from feedmatch.rf.detector import floor_watts

    leak = Coupler(cfg.leak if cfg.leak is not None else det.calibrated_leak(),
                   cfg.leak if cfg.leak is not None else det.calibrated_leak_fwd(), learned=cfg.learned,
                   floor_w=floor_watts(meter))
    hint = mem.lookup(load.freq_hz) if (mem is not None and cfg.strategy == "recall") else None
    dmg = None
    if cfg.failed:
        # The box's config marks these elements failed: the controller's own mapping (fmlogic.selftest.Damage).
        from fmlogic.selftest import Damage

        dmg = Damage(list(cfg.failed.items), bank)
        bank = dmg.bank
        if hint is not None:
            hint = dmg.reduced(hint[:3]) + (hint[3],)
    s = search.make(cfg.strategy, bank, load.freq_hz, cfg.target_swr, cfg.budget,
                    hint[:4] if hint else None, leak)
    prev = (0, 0, 1)
    ops = 0
    hot = 0
    t0 = time.perf_counter()
    while not s.done:
        st = s.propose()
        if s.done:
            break
        if dmg is not None and st != search.BYPASS:
            st = dmg.full(st)  # as the controller: failed relays never driven against their state
        n_ops = relay_ops(prev, st)
        ops += n_ops
        # The controller drops to tune power before switching; count a hot
        # switch whenever relays change with forward power above the limit.
        if n_ops and cfg.tune_power_w > cfg.hot_switch_w:
            hot += 1
        prev = st
        # BYPASS is the bypass relay (the antenna alone), as the controller switches it.
        g = g_through if st == search.BYPASS else complex(tg[st[2], st[0], st[1]])
        fwd, ref = det.read(cfg.tune_power_w, g, load.freq_hz, rng)
        pf, pr = meter.powers(fwd, ref)
        s.observe(pf, pr)
    compute_s = time.perf_counter() - t0
    outcome, final, through, est_swr, keep, _note = controller.conclude(s)
    if dmg is not None and final is not None and not through:
        final = dmg.full(final)
    if final is None or through:
        final, true_g = (0, 0, 1), bypass_g
        through = True
    else:
        true_g = float(gm[final[2], final[0], final[1]])
    if mem is not None and keep:
        mem.store(load.freq_hz, final, est_swr, 0)
    l, c, sh = final
    n = s.n
    from feedmatch.sim.cost import board_ms

    est_ms = n * (cfg.settle_ms + cfg.sample_ms) + board_ms(s)
    return {"freq_hz": load.freq_hz, "r_ohm": load.r_ohm, "x_ohm": load.x_ohm,
            "l_code": l, "c_code": c, "shunt": side_name(sh), "through": bool(through),
            "outcome": outcome, "swr": _swr(true_g), "estimated_swr": est_swr,
            "swr_bound": controller.bound(s),
            "oracle_swr": _swr(oracle_g), "bypass_swr": _swr(bypass_g),
            "oracle_state": [int(o_l), int(o_c), side_name(int(o_sh))],
            "hint": bool(hint), "measurements": n, "relay_ops": ops, "hot_switches": hot,
            "tune_ms": round(est_ms, 1), "board_compute_ms": round(board_ms(s), 1),
            "host_compute_ms": round(compute_s * 1e3, 3),
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
    return float(swr_of(g))


def _worker(args):
    loads, true_net, nominal, cfg, seeds, det = args
    mem = new_memory() if cfg.memory else None
    return [score_one(ld, true_net, nominal, cfg, sd, det, mem) for ld, sd in zip(loads, seeds)]


def score(loads: list[Load], true_net: Network, nominal: Network, cfg: ScoreConfig,
          det: DetectorModel | None = None, workers: int | None = None,
          progress: Callable[[int, int], None] | None = None) -> list[dict[str, Any]]:
    """Score every load; seeds derive from cfg.seed and the load's index.

    With cfg.memory the loads are one session, tuned in order in one process."""
    seeds = [cfg.seed * 1_000_003 + i for i in range(len(loads))]
    workers = workers if workers is not None else min(2, os.cpu_count() or 1)
    if workers <= 1 or len(loads) < 50 or cfg.memory:
        out = []
        mem = new_memory() if cfg.memory else None
        for i, (ld, sd) in enumerate(zip(loads, seeds)):
            out.append(score_one(ld, true_net, nominal, cfg, sd, det, mem))
            if progress is not None and (i % 20 == 0 or i == len(loads) - 1):
                progress(i + 1, len(loads))
        return out
    chunks = max(workers * 8, 1)
    size = (len(loads) + chunks - 1) // chunks
    jobs = [(loads[i:i + size], true_net, nominal, cfg, seeds[i:i + size], det)
            for i in range(0, len(loads), size)]
    out = []
    with ProcessPoolExecutor(max_workers=workers) as ex:
        for k, part in enumerate(ex.map(_worker, jobs)):
            out.extend(part)
            if progress is not None:
                progress(k + 1, len(jobs))
    return out


def run_parallel(jobs: list[tuple], workers: int = 2) -> list[list[dict[str, Any]]]:
    """Several independent score() runs (boxes, sessions) spread over processes:
    each job is (loads, true_net, nominal, cfg, det)."""
    args = [(ld, tn, nm, cfg, [cfg.seed * 1_000_003 + i for i in range(len(ld))], det)
            for ld, tn, nm, cfg, det in jobs]
    if workers <= 1:
        return [_worker(a) for a in args]
    with ProcessPoolExecutor(max_workers=workers) as ex:
        return list(ex.map(_worker, args))


def summarise(results: list[dict[str, Any]], target_swr: float,
              matchable_swr: float | None = None) -> dict[str, Any]:
    """Figures over the matchable loads (oracle SWR at or below matchable_swr,
    the target by default); unmatchable ones are counted apart.  The false-lock
    and worse-than-bypass rates are over every tune."""
    lim = target_swr if matchable_swr is None else matchable_swr
    ok = [r for r in results if r["oracle_swr"] <= lim]
    bad = len(results) - len(ok)
    n_all = max(len(results), 1)
    from fmlogic.controller import LOCKED

    false_locks = sum(1 for r in results if r["outcome"] == LOCKED and r["swr"] > target_swr)
    worse = sum(1 for r in results if not r["through"] and r["swr"] > r["bypass_swr"] * (1 + 1e-9))
    base = {"loads": len(results), "matchable": len(ok), "unmatchable": bad,
            "matchable_swr": lim, "false_lock_rate": false_locks / n_all,
            "worse_than_bypass_rate": worse / n_all,
            "hot_switches": sum(r["hot_switches"] for r in results)}
    if not ok:
        return base
    meas = sorted(r["measurements"] for r in ok)
    succ = sum(1 for r in ok if r["swr"] <= target_swr)
    ratio = [r["swr"] / r["oracle_swr"] for r in ok]
    base.update({
        "success_rate": succ / len(ok),
        "median_measurements": statistics.median(meas),
        "p95_measurements": float(np.percentile(meas, 95)),
        "max_measurements": meas[-1],
        "median_relay_ops": statistics.median(r["relay_ops"] for r in ok),
        "median_tune_ms": statistics.median(r["tune_ms"] for r in ok),
        "median_swr": statistics.median(r["swr"] for r in ok),
        "median_swr_over_oracle": statistics.median(ratio),
    })
    return base
