"""The `feedmatch` command: one table of sub-commands; the work lives in the modules.

COMMANDS maps each command's name to the module that adds its parser and runs it
(mpremote's model: one table, read top to bottom). Each such module has PARSERS:
name -> the function that adds the command's options and sets fn, the function that
runs it. A new command is one entry here and one parser and function in the
module of its kind:

    simulate, loads, score, bench, antenna, design, demo   the simulation and the bench: no board
    status, tune, selftest, bypass, memory                 one-shot board commands (cli/board.py)
    virtual-board, follow, log, serve                      long-running services (cli/services.py)
    report                                                 the logbook
    fit-box, deploy, calibrate                             putting a box into service
"""

from __future__ import annotations

import argparse
import importlib
import sys

from feedmatch import __version__
from feedmatch.errors import InputError, LinkError

# In the order `feedmatch --help` lists them.
COMMANDS: dict[str, str] = {
    "simulate": "feedmatch.cli.simulate",
    "loads": "feedmatch.cli.loads",
    "score": "feedmatch.cli.score",
    "bench": "feedmatch.cli.bench",
    "antenna": "feedmatch.cli.antenna",
    "design": "feedmatch.cli.design",
    "virtual-board": "feedmatch.cli.services",
    "follow": "feedmatch.cli.services",
    "status": "feedmatch.cli.board",
    "tune": "feedmatch.cli.board",
    "selftest": "feedmatch.cli.board",
    "bypass": "feedmatch.cli.board",
    "memory": "feedmatch.cli.board",
    "log": "feedmatch.cli.services",
    "serve": "feedmatch.cli.services",
    "report": "feedmatch.cli.report",
    "demo": "feedmatch.cli.demo",
    "fit-box": "feedmatch.cli.fitbox",
    "deploy": "feedmatch.cli.deploy",
    "calibrate": "feedmatch.cli.calibrate",
}


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        sys.stderr.write(f"feedmatch: error: {message}\n")
        sys.exit(2)


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="feedmatch", description="Remote L-network matching unit: simulate, "
                "score, run and log the tuner.")
    p.add_argument("--version", action="version", version=f"feedmatch {__version__}")
    sub = p.add_subparsers(dest="cmd", required=True, parser_class=_Parser)
    for name, module in COMMANDS.items():
        # Imported plainly: a broken module is an error, never a missing command.
        importlib.import_module(module).PARSERS[name](sub)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.fn(args) or 0)
    except (InputError, LinkError) as e:
        sys.stderr.write(f"feedmatch: error: {e}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("feedmatch: interrupted\n")
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
