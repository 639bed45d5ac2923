"""The `score` command: strategies x loads (x drawn boxes), tables, JSON and plots."""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace
from typing import Any

from feedmatch.cli.common import seed_number, watts
from feedmatch.errors import InputError
from feedmatch.outpaths import output_dir
from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import load_network
from feedmatch.seam.logic import STRATEGY_NAMES  # the firmware's own list
from feedmatch.sim.loads import read_loads, smith_loads
from feedmatch.sim.scorer import ScoreConfig, score, summarise


def run_score_job(a: argparse.Namespace) -> int:
    from feedmatch.cli.output import Progress, emit_json

    names = list(STRATEGY_NAMES) if a.strategy == "all" else [a.strategy]
    for n in names:
        if n not in STRATEGY_NAMES:
            raise InputError(f"unknown strategy '{n}' (choose from {', '.join(STRATEGY_NAMES)}, all)")
    if not 1.0 < a.target < 10:
        raise InputError(f"--target must be an SWR between 1 and 10, got {a.target}")
    if a.budget < 1:
        raise InputError("--budget must be at least 1")
    if a.boxes < 0 or not 0 <= a.tolerance < 0.3:
        raise InputError("--boxes must be >= 0 and --tolerance in 0..0.3")
    if a.fitted and not a.boxes:
        raise InputError("--fitted needs --boxes N: it gives each drawn box its fitted element values")
    if not (a.settle_ms == a.settle_ms and 0.0 <= a.settle_ms <= 1000.0):
        raise InputError(f"--settle-ms must be 0 to 1000 ms (relay settling time), got {a.settle_ms:g}")
    if a.workers is not None and not 1 <= a.workers <= 256:
        raise InputError(f"--workers must be 1 to 256 processes, got {a.workers}")
    if a.plots:
        output_dir(a.plots, "--plots")
    net = load_network(a.network)
    from feedmatch.sim.faults import NONE as NO_FAULTS
    from feedmatch.sim.faults import Faults, parse_faults

    faults = parse_faults(a.fault, net)
    if a.mark_failed and not faults:
        raise InputError("--mark-failed needs --fault: it marks the fault's stuck elements failed in the box's config")
    failed = Faults(tuple(f for f in faults.items if f[1] != "drift")) if a.mark_failed else NO_FAULTS
    if a.loads:
        loads, bad = read_loads(a.loads, a.skip_bad)
        for b in bad:
            sys.stderr.write(f"feedmatch: skipped {b}\n")
    else:
        loads = smith_loads(2000, seed=a.seed)
    progress = Progress()
    d = a.directivity
    if d is not None and not (d == d and 5.0 <= d <= 80.0):
        raise InputError(f"--directivity must be 5 to 80 dB, got {d:g}")
    det = replace(DetectorModel(ideal=a.ideal_detector), directivity_flat_db=d)
    out: list[dict[str, Any]] = []
    boxes_json = []
    box_list: list[tuple[int, Any, DetectorModel, Any]] = []
    if a.boxes:
        from feedmatch.sim.boxes import draw_box, fit_from_scores

        for k in range(a.boxes):
            box = draw_box(net, a.seed * 7919 + k, a.tolerance, a.strays, ideal=a.ideal_detector)
            # --fitted: the box's element values as fit-box would learn them from 200 earlier tunes.
            nominal = fit_from_scores(net, box, smith_loads(200, seed=a.seed + 1000 + k)) if a.fitted else net
            box_list.append((k, box.network, replace(box.detector, directivity_flat_db=d), nominal))
            boxes_json.append(box.to_json(k))
    else:
        box_list.append((None, net, det, net))
    for name in names:
        rows: list[dict[str, Any]] = []
        progress.stage(f"scoring {name} on {len(loads)} loads" + (f" x {a.boxes} boxes" if a.boxes else ""))
        for k, true_net, bdet, nominal in box_list:
            cfg = ScoreConfig(strategy=name, target_swr=a.target, budget=a.budget,
                              settle_ms=a.settle_ms, tune_power_w=a.power, seed=a.seed + (k or 0),
                              detector=bdet, faults=faults, failed=failed)
            part = score(loads, true_net, nominal, cfg, det=bdet, workers=a.workers,
                         progress=progress)
            if k is not None:
                for r in part:
                    r["box"] = k
            rows += part
        for r in rows:
            r.pop("trace", None)
        out.append({"strategy": name, "results": rows, "summary": summarise(rows, a.target)})
        if faults:
            out[-1]["faults"] = faults.spec()
    progress.close()
    written = []
    if a.plots:
        from feedmatch.plots import score_plots

        written = score_plots(a.plots, out, net, a.target)
    if a.json:
        # "wrote" lines go where the other commands put them: stdout, stderr under --json.
        for f in written:
            sys.stderr.write(f"wrote {f}\n")
        if len(out) == 1 and not boxes_json:
            emit_json(out[0])
        else:
            doc: dict[str, Any] = {"strategies": out}
            if boxes_json:
                doc["boxes"] = boxes_json
            emit_json(doc)
        return 0
    if faults:
        print(f"damaged box: {faults.spec()} (the oracle is the best state it still reaches)")
    _print_table(out, a.target, len(loads), len(box_list))
    for f in written:
        print(f"wrote {f}")
    return 0


def _print_table(out: list[dict[str, Any]], target: float, n_loads: int, n_boxes: int) -> None:
    s0 = out[0]["summary"]
    where = f" on {n_boxes} drawn boxes" if n_boxes > 1 else ""
    print(f"{n_loads} loads{where}; matchable at SWR <= {target:g}: {s0['matchable']} "
          f"(unmatchable, counted apart: {s0['unmatchable']})")
    print(f"{'strategy':>9} {'success':>8} {'median':>7} {'p95':>5} {'max':>5} {'relays':>7} "
          f"{'tune ms':>8} {'SWR':>6} {'/oracle':>8} {'hot':>4}")
    for o in out:
        s = o["summary"]
        if not s.get("matchable"):
            print(f"{o['strategy']:>9}  no matchable loads")
            continue
        print(f"{o['strategy']:>9} {100 * s['success_rate']:7.1f}% {s['median_measurements']:7.1f} "
              f"{s['p95_measurements']:5.0f} {s['max_measurements']:5d} {s['median_relay_ops']:7.0f} "
              f"{s['median_tune_ms']:8.0f} {s['median_swr']:6.2f} {s['median_swr_over_oracle']:8.3f} "
              f"{s['hot_switches']:4d}")
    print("(median/p95/max: measurements per tune; relays: relay operations; SWR: true final SWR)")


def _parser_score(sub) -> None:
    s = sub.add_parser("score", help="bench-test search strategies against the oracle")
    s.add_argument("--strategy", default="all", help="grid, model, recall or all (default all)")
    s.add_argument("--loads", help="loads CSV (freq_hz,r_ohm,x_ohm); default: 2000 generated")
    s.add_argument("--network", help="network JSON (default: shipped)")
    s.add_argument("--target", type=float, default=1.5, help="SWR a tune aims for (default 1.5)")
    s.add_argument("--budget", type=int, default=80, help="most measurements one tune may take (default 80)")
    s.add_argument("--settle-ms", type=float, default=10.0,
                   help="relay settling time in ms charged per switch (default 10)")
    s.add_argument("--power", type=watts, default=10.0, help="tune carrier power in W (default 10)")
    s.add_argument("--seed", type=seed_number, default=1, help="random seed for the detector noise (default 1)")
    s.add_argument("--ideal-detector", action="store_true", help="noiseless, perfectly calibrated detectors")
    s.add_argument("--directivity", type=float, metavar="DB",
                   help="flat coupler directivity in dB (default: frequency-dependent, 25 dB at 28 MHz)")
    s.add_argument("--skip-bad", action="store_true", help="skip malformed rows of --loads instead of refusing")
    s.add_argument("--boxes", type=int, default=0,
                   help="score on N drawn non-ideal boxes (default 0: the ideal box the model describes)")
    s.add_argument("--tolerance", type=float, default=0.05,
                   help="with --boxes: part tolerance as a fraction (default 0.05 = 5 %%)")
    s.add_argument("--strays", default="default", choices=["default", "none"],
                   help="with --boxes: the drawn boxes' stray capacitances (default) or none")
    s.add_argument("--fitted", action="store_true",
                   help="with --boxes: give the strategies each box's fitted element values")
    s.add_argument("--workers", type=int, help="processes to score in (default: one per core)")
    s.add_argument("--fault", metavar="SPEC",
                   help="score on a damaged box, e.g. L3:stuck-out,C5:stuck-in,L6:drift=-30%%,side:stuck-ant")
    s.add_argument("--mark-failed", action="store_true",
                   help="with --fault: the box's config marks its stuck elements failed (as selftest --write does)")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    s.add_argument("--plots", help="directory for PNG plots")
    s.set_defaults(fn=run_score_job)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "score": _parser_score,
}
