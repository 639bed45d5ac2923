"""The `loads` command: a load corpus CSV for the scorer."""

from __future__ import annotations

import argparse
import sys

from feedmatch.cli.common import (
    seed_number,
)
from feedmatch.errors import InputError
from feedmatch.outpaths import output_file

# Corpus sizes beyond these are a typo, not a bench run (a million loads score in about an hour).
MAX_SMITH = 1_000_000
MAX_VERTICALS = 100_000


# -- loads ---------------------------------------------------------------------------
def cmd_loads(a: argparse.Namespace) -> int:
    from feedmatch.rf import bands
    from feedmatch.rf.antenna import load_antenna
    from feedmatch.sim.loads import Load, smith_loads, write_loads

    if a.out and a.out != "-":
        output_file(a.out, "--out", (".csv",))
    if sum(x is not None for x in (a.smith, a.antenna, a.verticals)) != 1:
        raise InputError("give exactly one of --smith N, --verticals N or --antenna FILE")
    # Checked whatever the source: an option given a value it cannot take is refused, not ignored.
    if not 1 <= a.points <= 10000:
        raise InputError(f"--points needs 1 to 10000 frequencies per band, got {a.points}")
    if a.verticals is not None:
        if not 1 <= a.verticals <= MAX_VERTICALS:
            raise InputError(f"--verticals needs a count from 1 to {MAX_VERTICALS}")
        from feedmatch.cli.output import Progress
        from feedmatch.sim.loads import vertical_loads

        p = Progress()
        p.stage(f"drawing {a.verticals} vertical loads ({a.vertical_model})")
        loads = vertical_loads(a.verticals, seed=a.seed, model=a.vertical_model, progress=p)
        p.close()
    elif a.smith is not None:
        if not 1 <= a.smith <= MAX_SMITH:
            raise InputError(f"--smith needs a count from 1 to {MAX_SMITH}")
        loads = smith_loads(a.smith, seed=a.seed)
    else:
        ant = load_antenna(a.antenna)
        names = [b.name for b in bands.HF_BANDS] if a.bands == "all" else a.bands.split(",")
        loads = []
        for name in names:
            b = bands.by_name(name)
            fs = [b.low_hz + (b.high_hz - b.low_hz) * i / max(a.points - 1, 1) for i in range(a.points)]
            try:
                zs = ant.impedance(fs)
            except InputError as e:
                sys.stderr.write(f"feedmatch: skipping {name}: {e}\n")
                continue
            loads += [Load(f, complex(z).real, complex(z).imag) for f, z in zip(fs, zs)]
    out = a.out or "-"
    if out == "-":
        import csv

        w = csv.writer(sys.stdout, lineterminator="\n")
        w.writerow(["freq_hz", "r_ohm", "x_ohm"])
        for ld in loads:
            w.writerow([f"{ld.freq_hz:.1f}", f"{ld.r_ohm:.6g}", f"{ld.x_ohm:.6g}"])
    else:
        write_loads(out, loads)
        print(f"wrote {len(loads)} loads to {out}")
    return 0


def _parser_loads(sub) -> None:
    s = sub.add_parser("loads", help="write a load corpus CSV for the scorer")
    s.add_argument("--smith", type=int, help="N loads spread evenly over the reflection disc")
    s.add_argument("--verticals", type=int, help="N feed-point loads of short and medium verticals")
    s.add_argument("--vertical-model", choices=["nec", "closed-form"], default="nec",
                   help="--verticals from NEC-2 antennas with radials (default) or the closed-form monopole")
    s.add_argument("--antenna", help="loads of an antenna over the bands")
    s.add_argument("--bands", default="all", help="bands for --antenna, e.g. 40m,20m (default all)")
    s.add_argument("--points", type=int, default=11, help="frequencies per band with --antenna (default 11)")
    s.add_argument("--seed", type=seed_number, default=1,
                   help="random seed (default 1): the same seed, the same corpus")
    s.add_argument("--out", help="output CSV (default: standard output)")
    s.set_defaults(fn=cmd_loads)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "loads": _parser_loads,
}
