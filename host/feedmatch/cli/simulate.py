"""The `simulate` command: the figures of one network state, or of the best one."""

from __future__ import annotations

import argparse
import math

from feedmatch.cli.common import (
    watts,
)
from feedmatch.cli.output import emit_json
from feedmatch.errors import InputError
from feedmatch.seam.bank import SIDES


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
    from feedmatch.rf.network import load_network
    from feedmatch.seam.bank import parse_side
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
            pts.append(point(net, f, complex(z), a.l_code, a.c_code, parse_side(a.shunt), a.power))
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


def _parser_simulate(sub) -> None:
    s = sub.add_parser("simulate", help="figures of one network state, or the best state")
    s.add_argument("--network", help="network JSON (default: the shipped demo network)")
    s.add_argument("--freq", help="frequency in Hz or a band name such as 40m")
    s.add_argument("--sweep", help="start:stop:points in Hz, e.g. 7e6:7.3e6:31")
    s.add_argument("--load", help="load impedance, e.g. 12-150j")
    s.add_argument("--antenna", help="antenna JSON or .s1p file instead of --load")
    s.add_argument("--l-code", type=int, help="inductor relay code (0 = no inductance; bit n = inductor n)")
    s.add_argument("--c-code", type=int, help="capacitor relay code (0 = no capacitance; bit n = capacitor n)")
    s.add_argument("--shunt", default="ant", choices=list(SIDES),
                   help="side of the network the capacitor is on (default ant)")
    s.add_argument("--best", action="store_true", help="search all states exhaustively")
    s.add_argument("--power", type=watts, help="forward power in W for voltage/current figures")
    s.add_argument("--ratings", action="store_true",
                   help="worst capacitor voltage / inductor current per band at the best states")
    s.add_argument("--bands", default="all", help="bands for --ratings, e.g. 40m,20m (default all)")
    s.add_argument("--json", action="store_true", help="print JSON instead of the table")
    s.set_defaults(fn=cmd_simulate)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "simulate": _parser_simulate,
}
