"""The `bench` command: speed, memory and accuracy benchmarks (every key also under --quick --json)."""

from __future__ import annotations

import argparse

from feedmatch.cli.output import emit_json


# -- bench ---------------------------------------------------------------------------
def cmd_bench(a: argparse.Namespace) -> int:
    from feedmatch.bench.suite import run_bench
    from feedmatch.cli.output import Progress

    p = Progress()
    res = run_bench(quick=a.quick, only=a.only, save_costs=a.save_costs, stage=p.stage)
    p.close()
    if a.json:
        emit_json(res)
    else:
        for k, v in res.items():
            print(f"{k:>24}: {v}")
    return 0


def _parser_bench(sub) -> None:
    s = sub.add_parser("bench", help="speed and memory benchmarks")
    s.add_argument("--json", action="store_true", help="print one JSON object (the bench's keys)")
    s.add_argument("--quick", action="store_true", help="fewer repetitions")
    s.add_argument("--only", help="comma-separated keys to run")
    s.add_argument("--save-costs", action="store_true",
                   help="with rp2040: write the fitted board cost model into the package data")
    s.set_defaults(fn=cmd_bench)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "bench": _parser_bench,
}
