"""The `feedmatch` command: one sub-command per job; the work lives in the modules."""

from __future__ import annotations

import argparse
import math
import sys

from feedmatch import __version__
from feedmatch.cli.output import emit_json
from feedmatch.errors import InputError, LinkError
from feedmatch.outpaths import output_file

# Corpus sizes beyond these are a typo, not a bench run (a million loads score in about an hour).
MAX_SMITH = 1_000_000
MAX_VERTICALS = 100_000


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        sys.stderr.write(f"feedmatch: error: {message}\n")
        sys.exit(2)


def _watts(text: str) -> float:
    """argparse type: a transmitter power in W."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"needs a power in W, got '{text}'") from None
    if not (math.isfinite(v) and 0.0 < v <= 10000.0):
        raise argparse.ArgumentTypeError(f"needs a power above 0 and up to 10000 W, got '{text}'")
    return v


def _seed(text: str) -> int:
    """argparse type: a random seed (numpy takes 0 to 2**32 - 1)."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"needs a whole number, got '{text}'") from None
    if not 0 <= v < 2 ** 32:
        raise argparse.ArgumentTypeError(f"needs 0 to {2 ** 32 - 1}, got '{text}'")
    return v


def _parse_load(text: str) -> complex:
    try:
        z = complex(text.replace(" ", "").replace("i", "j"))
    except ValueError:
        raise InputError(f"--load must be a complex impedance like 12-150j, got '{text}'") from None
    if not (math.isfinite(z.real) and math.isfinite(z.imag)) or not 0.01 <= z.real <= 1e6 or abs(z.imag) > 1e6:
        raise InputError(f"--load needs a resistance of 0.01 ohm to 1 Mohm and a reactance within 1 Mohm, "
                         f"got '{text}'")
    return z


def _rl_text(rl_db: float) -> str:
    """Return loss for the table: beyond 60 dB no bridge or detector tells one value from
    another (common practice), and a perfect match's 300 dB is a clip, not a figure."""
    return f"{'>60':>6}" if rl_db > 60.0 else f"{rl_db:6.1f}"


# -- simulate ----------------------------------------------------------------------
def cmd_simulate(a: argparse.Namespace) -> int:
    from feedmatch.rf import bands
    from feedmatch.rf.antenna import FixedLoad, load_antenna
    from feedmatch.rf.network import load_network, parse_shunt
    from feedmatch.sim.simulate import best_point, point, ratings

    net = load_network(a.network)
    if (a.load is None) == (a.antenna is None):
        raise InputError("give exactly one of --load or --antenna")
    ant = FixedLoad(*(lambda z: (z.real, z.imag))(_parse_load(a.load))) if a.load else \
        load_antenna(a.antenna)
    if a.ratings:
        names = [b.name for b in bands.HF_BANDS] if a.bands == "all" else a.bands.split(",")
        rows = ratings(net, ant, names, a.power or 100.0)
        if a.json:
            emit_json({"ratings": rows})
        else:
            print(f"{'band':>5} {'worst SWR':>9} {'V cap pk':>9} {'I ind rms':>10}"
                  f"   at {rows[0]['power_w']:g} W")
            for r in rows:
                flag = "" if r["matchable"] else "  (not matchable: figures at best state)"
                print(f"{r['band']:>5} {r['worst_best_swr']:9.2f} {r['v_cap_peak_max']:8.0f}V "
                      f"{r['i_ind_rms_max']:9.2f}A{flag}")
            print("(worst SWR: the best state's SWR at the band's hardest frequency; voltage and current:\n"
                  " the largest over the band at the best states)")
        return 0
    if a.sweep:
        freqs = bands.parse_sweep(a.sweep)
    else:
        freqs = [bands.parse_freq(a.freq or "40m")]
    zs = ant.impedance(freqs)
    pts = []
    for f, z in zip(freqs, zs):
        if a.best:
            pts.append(best_point(net, f, complex(z), a.power))
        else:
            if a.l_code is None or a.c_code is None:
                raise InputError("give --l-code and --c-code (and --shunt), or --best")
            pts.append(point(net, f, complex(z), a.l_code, a.c_code, parse_shunt(a.shunt), a.power))
    if a.json:
        emit_json(pts[0] if len(pts) == 1 else {"points": pts})
        return 0
    print(f"network: {net.name or a.network}   antenna: {ant.describe()}")
    hdr = (f"{'MHz':>9} {'load ohm':>18} {'L':>4} {'C':>4} {'sh':>3} {'Zin ohm':>18} "
           f"{'SWR':>6} {'RL dB':>6} {'eff %':>6}")
    if a.power:
        hdr += f" {'Vc pk':>7} {'I_L':>6}"
    print(hdr)
    for p in pts:
        zl = complex(*p["z_load_ohm"])
        zi = complex(*p["z_in_ohm"])
        line = (f"{p['freq_hz'] / 1e6:9.4f} {zl.real:8.2f}{zl.imag:+9.2f}j {p['l_code']:4d} "
                f"{p['c_code']:4d} {p['shunt']:>3} {zi.real:8.2f}{zi.imag:+9.2f}j {p['swr']:6.2f} "
                f"{_rl_text(p['return_loss_db'])} {100 * p['efficiency']:6.1f}")
        if a.power:
            line += f" {p['v_cap_peak']:6.0f}V {p['i_ind_rms']:5.2f}A"
        print(line)
    return 0


# -- loads ---------------------------------------------------------------------------
def cmd_loads(a: argparse.Namespace) -> int:
    from feedmatch.rf import bands
    from feedmatch.rf.antenna import load_antenna
    from feedmatch.sim.loads import Load, smith_loads, write_loads

    if a.out and a.out != "-":
        output_file(a.out, "--out", (".csv",))
    if sum(x is not None for x in (a.smith, a.antenna, a.verticals)) != 1:
        raise InputError("give exactly one of --smith N, --verticals N or --antenna FILE")
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
        if not 1 <= a.points <= 10000:
            raise InputError(f"--points needs 1 to 10000 frequencies per band, got {a.points}")
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


# -- score ---------------------------------------------------------------------------
def cmd_score(a: argparse.Namespace) -> int:
    from feedmatch.cli.score import run_score_job

    return run_score_job(a)


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


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="feedmatch", description="Remote L-network matching unit: simulate, "
                "score, run and log the tuner.")
    p.add_argument("--version", action="version", version=f"feedmatch {__version__}")
    sub = p.add_subparsers(dest="cmd", required=True, parser_class=_Parser)

    s = sub.add_parser("simulate", help="figures of one network state, or the best state")
    s.add_argument("--network", help="network JSON (default: the shipped demo network)")
    s.add_argument("--freq", help="frequency in Hz or a band name such as 40m")
    s.add_argument("--sweep", help="start:stop:points in Hz, e.g. 7e6:7.3e6:31")
    s.add_argument("--load", help="load impedance, e.g. 12-150j")
    s.add_argument("--antenna", help="antenna JSON or .s1p file instead of --load")
    s.add_argument("--l-code", type=int, help="inductor relay code (0 = no inductance; bit n = inductor n)")
    s.add_argument("--c-code", type=int, help="capacitor relay code (0 = no capacitance; bit n = capacitor n)")
    s.add_argument("--shunt", default="ant", choices=["tx", "ant"],
                   help="side of the network the capacitor is on (default ant)")
    s.add_argument("--best", action="store_true", help="search all states exhaustively")
    s.add_argument("--power", type=_watts, help="forward power in W for voltage/current figures")
    s.add_argument("--ratings", action="store_true",
                   help="worst capacitor voltage / inductor current per band at the best states")
    s.add_argument("--bands", default="all", help="bands for --ratings, e.g. 40m,20m (default all)")
    s.add_argument("--json", action="store_true", help="print JSON instead of the table")
    s.set_defaults(fn=cmd_simulate)

    s = sub.add_parser("loads", help="write a load corpus CSV for the scorer")
    s.add_argument("--smith", type=int, help="N loads spread evenly over the reflection disc")
    s.add_argument("--verticals", type=int, help="N feed-point loads of short and medium verticals")
    s.add_argument("--vertical-model", choices=["nec", "closed-form"], default="nec",
                   help="--verticals from NEC-2 antennas with radials (default) or the closed-form monopole")
    s.add_argument("--antenna", help="loads of an antenna over the bands")
    s.add_argument("--bands", default="all", help="bands for --antenna, e.g. 40m,20m (default all)")
    s.add_argument("--points", type=int, default=11, help="frequencies per band with --antenna (default 11)")
    s.add_argument("--seed", type=_seed, default=1, help="random seed (default 1): the same seed, the same corpus")
    s.add_argument("--out", help="output CSV (default: standard output)")
    s.set_defaults(fn=cmd_loads)

    s = sub.add_parser("score", help="bench-test search strategies against the oracle")
    s.add_argument("--strategy", default="all", help="grid, model, recall or all (default all)")
    s.add_argument("--loads", help="loads CSV (freq_hz,r_ohm,x_ohm); default: 2000 generated")
    s.add_argument("--network", help="network JSON (default: shipped)")
    s.add_argument("--target", type=float, default=1.5, help="SWR a tune aims for (default 1.5)")
    s.add_argument("--budget", type=int, default=80, help="most measurements one tune may take (default 80)")
    s.add_argument("--settle-ms", type=float, default=10.0,
                   help="relay settling time in ms charged per switch (default 10)")
    s.add_argument("--power", type=_watts, default=10.0, help="tune carrier power in W (default 10)")
    s.add_argument("--seed", type=_seed, default=1, help="random seed for the detector noise (default 1)")
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
    s.set_defaults(fn=cmd_score)

    s = sub.add_parser("bench", help="speed and memory benchmarks")
    s.add_argument("--json", action="store_true", help="print one JSON object (the bench's keys)")
    s.add_argument("--quick", action="store_true", help="fewer repetitions")
    s.add_argument("--only", help="comma-separated keys to run")
    s.add_argument("--save-costs", action="store_true",
                   help="with rp2040: write the fitted board cost model into the package data")
    s.set_defaults(fn=cmd_bench)

    s = sub.add_parser("antenna", help="antenna impedance over frequency (NEC-2 or closed form, or as the box "
                       "measured it from the logbook)")
    s.add_argument("--antenna", help="antenna JSON or .s1p (with --logbook: the model drawn beside the measurement)")
    s.add_argument("--logbook", metavar="DB", help="the antenna as the box measured it from its logged tunes")
    s.add_argument("--since", help="with --logbook: tunes from this ISO date or time on, e.g. 2026-11-01")
    s.add_argument("--until", help="with --logbook: tunes before this ISO date or time")
    s.add_argument("--network", help="with --logbook: nominal network JSON where the logbook has no element values")
    s.add_argument("--sweep", help="start:stop:points in Hz (default: 1.8e6:30e6:300, within the model's range)")
    s.add_argument("--plot", help="plot of R, X and SWR (.png, .svg or .pdf)")
    s.add_argument("--s1p", help="export the sweep as a Touchstone one-port")
    s.add_argument("--exact", action="store_true",
                   help="solve NEC-2 at every frequency instead of sampling adaptively and interpolating")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    s.set_defaults(fn=cmd_antenna)

    s = sub.add_parser("design", help="propose element values for an antenna and its bands")
    s.add_argument("--antenna", required=True, help="antenna JSON (NEC-2 or closed form) or .s1p")
    s.add_argument("--bands", default="40m,30m,20m,17m,15m,12m,10m",
                   help="bands to cover, e.g. 80m,40m,20m (default 40m,30m,20m,17m,15m,12m,10m)")
    s.add_argument("--power", type=_watts, default=100.0, help="transmitter power for the ratings in W (default 100)")
    s.add_argument("--inductors", type=int, default=7, help="inductor relays, 2 to 10 (default 7)")
    s.add_argument("--capacitors", type=int, default=7, help="capacitor relays, 2 to 10 (default 7)")
    s.add_argument("--tolerance", type=float, default=0.05,
                   help="part tolerance as a fraction, 0 to 0.25 (default 0.05 = 5 %%)")
    s.add_argument("--design-swr", type=float, default=1.3,
                   help="SWR the best state must reach for a frequency to count as covered, 1.05 to 2 (default 1.3)")
    s.add_argument("--boxes", type=int, default=4, help="drawn boxes each candidate is scored on, 1 to 50 (default 4)")
    s.add_argument("--points", type=int, default=31, help="frequencies per band, 3 to 401 (default 31)")
    s.add_argument("--seed", type=_seed, default=1,
                   help="random seed for the drawn boxes and the optimiser (default 1)")
    s.add_argument("--network", help="the bank you have now, for comparison (default: the shipped one)")
    s.add_argument("--out", help="write the proposal as a network JSON (for simulate, score and design --network)")
    s.add_argument("--into-config", metavar="CONFIG",
                   help="also write the proposal into this board config's network section (a .bak is kept): "
                        "what `deploy --config` takes")
    s.add_argument("--plot", help="coverage map (.png, .svg or .pdf)")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    s.set_defaults(fn=cmd_design)

    _more_commands(sub)
    return p


def cmd_design(a: argparse.Namespace) -> int:
    from feedmatch.cli.design import run_design

    if not 1 <= a.boxes <= 50:
        raise InputError(f"--boxes must be 1 to 50, got {a.boxes}")
    if not 3 <= a.points <= 401:
        raise InputError(f"--points must be 3 to 401 frequencies per band, got {a.points}")
    return run_design(a)


def cmd_antenna(a: argparse.Namespace) -> int:
    from feedmatch.cli.antenna import run_antenna

    return run_antenna(a)


def _more_commands(sub) -> None:
    """The commands that talk to a board or the logbook, from their own modules.
    Imported plainly: a broken module is an error, never a missing command."""
    from feedmatch.cli.board import add_board_commands
    from feedmatch.cli.station import add_commands

    add_commands(sub)
    add_board_commands(sub)


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
