"""The `demo` command: the main job on the built-in simulated station."""

from __future__ import annotations


def cmd_demo(a) -> int:
    from feedmatch.sim.demo import run_demo

    res = run_demo(a.out, use_python=a.python, station_file=a.station, say=print)
    return 1 if res["violations"] else 0


def _parser_demo(sub) -> None:
    s = sub.add_parser("demo", help="the main job on the built-in simulated station")
    s.add_argument("--out", default="demo-out",
                   help="directory for the demo's logbook, plots and CSV (default demo-out)")
    s.add_argument("--python", action="store_true", help="firmware under CPython")
    s.add_argument("--station", help="station JSON (default: built-in)")
    s.set_defaults(fn=cmd_demo)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "demo": _parser_demo,
}
