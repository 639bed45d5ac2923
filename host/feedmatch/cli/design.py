"""The `design` command: propose element values for an antenna and its bands."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from feedmatch.cli.common import seed_number, watts
from feedmatch.errors import InputError
from feedmatch.outpaths import output_file
from feedmatch.plots import PLOT_SUFFIXES

DEFAULT_BANDS = "40m,30m,20m,17m,15m,12m,10m"


def _pct(x: float | None) -> str:
    return "     -" if x is None else f"{100 * x:5.1f}%"


def _f(x: float | None, fmt: str) -> str:
    return "-" if x is None else format(x, fmt)


def run_design(a: argparse.Namespace) -> int:
    from feedmatch.cli.output import Progress, emit_json
    from feedmatch.rf import bands
    from feedmatch.rf.antenna import load_antenna
    from feedmatch.rf.network import load_network
    from feedmatch.sim.design import DesignSpec, antenna_uncertainty, design, relay_count

    if not 1 <= a.boxes <= 50:
        raise InputError(f"--boxes must be 1 to 50, got {a.boxes}")
    if not 3 <= a.points <= 401:
        raise InputError(f"--points must be 3 to 401 frequencies per band, got {a.points}")
    names = [b.strip() for b in a.bands.split(",") if b.strip()]
    if not names:
        raise InputError("--bands needs at least one band, e.g. 40m,20m")
    names = [bands.by_name(n).name for n in names]
    if not 2 <= a.inductors <= 10 or not 2 <= a.capacitors <= 10:
        raise InputError("--inductors and --capacitors need 2 to 10 relays each")
    if not 0.0 <= a.tolerance <= 0.25:
        raise InputError(f"--tolerance must be 0 to 0.25 (a fraction: 0.05 is 5 %), got {a.tolerance:g}")
    if not 1.05 <= a.design_swr <= 2.0:
        raise InputError(f"--design-swr must be 1.05 to 2, got {a.design_swr:g}")
    if a.out:
        output_file(a.out, "--out", (".json",))
    if a.plot:
        output_file(a.plot, "--plot", PLOT_SUFFIXES)
    if a.into_config:
        _board_config(a.into_config)  # a wrong file is refused before the design runs
    current = load_network(a.network)
    ant = load_antenna(a.antenna)
    p = Progress()
    p.stage("checking the antenna model (twice the segments)" if hasattr(ant, "convergence")
            else "antenna loads")
    unc = antenna_uncertainty(ant, names)
    spec = DesignSpec(names, power_w=a.power, n_l=a.inductors, n_c=a.capacitors, tolerance=a.tolerance,
                      design_swr=a.design_swr, boxes=a.boxes, seed=a.seed, points=a.points, uncertainty=unc,
                      inductor_q=current.inductor_q or 150.0, capacitor_q=current.capacitor_q or 1000.0)
    p.stage("optimising the banks (differential evolution)")
    res = design(ant, spec, current, progress=p)
    p.close()
    prop = res["proposal"]
    if a.out:
        coil = (f"; with a fixed {res['coil_uh']:g} uH coil in series with the antenna (outside the switched "
                "network)") if res["coil_uh"] else ""
        doc = prop.to_json() | {"name": prop.name, "comment": (
            f"feedmatch design for {ant.describe()}: {', '.join(names)}, {a.power:g} W, tolerance "
            f"{100 * a.tolerance:g} %, design SWR {a.design_swr:g}{coil}")}
        with open(a.out, "w", encoding="utf-8") as fh:
            json.dump(doc, fh, indent=2)
            fh.write("\n")
    if a.into_config:
        _put_network(a.into_config, prop.to_json())
    if a.plot:
        from feedmatch.plots import design_plot

        design_plot(a.plot, res, a.design_swr)
    summary = _summary(res, spec, unc, relay_count)
    if a.json:
        for f in (a.out, a.into_config, a.plot):
            if f:
                sys.stderr.write(f"wrote {f}\n")  # stdout is the JSON's alone
        emit_json(summary)
        return 0
    for line in _lines(summary, ant.describe(), a):
        print(line)
    return 0


def _summary(res: dict[str, Any], spec: Any, unc: dict[str, float], relay_count) -> dict[str, Any]:
    prop, cur = res["proposal"], res["current"]
    rows = []
    for rp, rc in zip(res["score"]["bands"], res["score_current"]["bands"]):
        rows.append({"band": rp["band"], "coverage_now": rc["coverage"], "coverage": rp["coverage"],
                     "worst_swr_now": rc["worst_swr"], "worst_swr": rp["worst_swr"],
                     "loss_db_now": rc["loss_db_common"], "loss_db": rp["loss_db_common"],
                     "v_cap_peak": rp["v_cap_peak_max"], "i_ind_rms": rp["i_ind_rms_max"],
                     "model_change": unc.get(rp["band"])})
    return {"bands": rows, "proposal": prop.to_json(), "current": cur.to_json(), "parts": res["parts"],
            "relays": relay_count(prop), "relays_now": relay_count(cur), "kept_current": res["kept_current"],
            "worse_bands": res["worse_bands"], "design_s": round(res["design_s"], 2),
            "evaluations": res["evaluations"], "power_w": spec.power_w, "tolerance": spec.tolerance,
            "fixed_coil_uh": res["coil_uh"], "fixed_coil_tried": res["coil_tried"],
            "capacitors_e24": res["proposal"].extra.get("capacitors") == "E24",
            "e24_alternative": None if res["kept_current"] else res["e24_alternative"],
            "design_swr": spec.design_swr, "boxes": spec.boxes, "rating_margin": spec.rating_margin}


def _lines(s: dict[str, Any], what: str, a: argparse.Namespace) -> list[str]:
    from feedmatch.rf.nec import CONVERGENCE_WARN

    out = [f"antenna: {what}",
           f"{s['relays']} relays ({a.inductors} L + {a.capacitors} C + capacitor side) at {s['power_w']:g} W; "
           f"parts {100 * s['tolerance']:g} %; covered = best state at SWR <= {s['design_swr']:g} on each of "
           f"{s['boxes']} drawn boxes (room to 1.5 for the detector and the search)"]
    unsure = [r for r in s["bands"] if (r["model_change"] or 0) > CONVERGENCE_WARN]
    if unsure:
        out.append("model uncertain (|Z| moves with twice the segments): " + ", ".join(
            f"{r['band']} {100 * r['model_change']:.0f} %" for r in unsure) + "; there Z x (1 -/+ that) must match too")
    at = f"needs at {s['power_w']:g} W"
    out.append(f"{'':5} {'covered':>15} {'worst SWR':>11} {'loss dB':>11} {at:>18}")
    out.append(f"{'band':>5} {'now':>7} {'new':>7} {'now':>5} {'new':>5} {'now':>5} {'new':>5} "
               f"{'V cap pk':>9} {'I L rms':>8}")
    for r in s["bands"]:
        out.append(f"{r['band']:>5} {_pct(r['coverage_now']):>7} {_pct(r['coverage']):>7} "
                   f"{r['worst_swr_now']:5.2f} {r['worst_swr']:5.2f} {_f(r['loss_db_now'], '5.2f'):>5} "
                   f"{_f(r['loss_db'], '5.2f'):>5} {r['v_cap_peak']:8.0f}V {r['i_ind_rms']:7.2f}A")
    out.append("(loss: median over the frequencies both banks match; worst SWR: the nominal bank's best state at "
               "the band's hardest frequency)")
    if s["kept_current"]:
        out.append(f"the optimiser found nothing better on every band (it lost on {', '.join(s['worse_bands'])}): "
                   "keep the bank you have")
    p = s["proposal"]
    out.append("proposed: L " + " ".join(f"{v:g}" for v in p["inductors_uh"]) + f" uH (up to "
               f"{sum(p['inductors_uh']):.3g} uH); C " + " ".join(f"{v:g}" for v in p["capacitors_pf"]) +
               f" pF (up to {sum(p['capacitors_pf']):.4g} pF)")
    if s["capacitors_e24"]:
        out.append("capacitors are E24 values (IEC 60063), scored as such; inductors are wound to value")
    alt = s["e24_alternative"]
    if alt:
        out.append("with the nearest E24 capacitors (" + " ".join(f"{v:g}" for v in alt["capacitors_pf"]) +
                   " pF) it would cover " + ", ".join(f"{k} {100 * v:.1f}%" for k, v in alt["coverage"].items()) +
                   "; pair or trim parts to keep the values above")
    if s["fixed_coil_uh"]:
        out.append(f"fixed extra element: a {s['fixed_coil_uh']:g} uH coil in series with the antenna, between the "
                   "box's antenna port and the radiator (part Lfix below); the figures above include it")
    elif s["fixed_coil_tried"]:
        out.append("a fixed series coil at the antenna was tried for the poorly covered bands: it does not pay")
    out.append(f"parts, rated {s['rating_margin']:g} x the worst stress computed at {s['power_w']:g} W:")
    for q in s["parts"]:
        if q["unit"] == "pF":
            out.append(f"  {q['part']:<3} {q['value']:9.4g} pF  {q['v_peak']:6.0f} V peak -> "
                       f"rate {q['rated_v_peak']:6.0f} V")
        else:
            out.append(f"  {q['part']:<3} {q['value']:9.4g} uH  {q['i_rms']:6.2f} A rms, {q['v_peak']:5.0f} V peak -> "
                       f"rate {q['rated_i_rms']:5.2f} A, {q['rated_v_peak']:5.0f} V")
    out.append("relays: a C relay stands its capacitor's voltage when open; an L relay (across its inductor) "
               "that inductor's voltage when open and the L current when closed")
    out.append(f"{s['evaluations']} candidates in {s['design_s']:.1f} s")
    if a.out:
        out.append(f"wrote {a.out}")
    if a.into_config:
        out.append(f"wrote the proposed banks into {a.into_config} (previous copy: {a.into_config}.bak); "
                   f"`feedmatch deploy --config {a.into_config}` puts them on the board")
    if a.plot:
        out.append(f"wrote {a.plot}")
    return out


def _board_config(path: str) -> dict:
    """A board config that `deploy --config` takes, or InputError."""
    from feedmatch.jsonfile import load_json
    from feedmatch.seam.bank import validate

    cfg = load_json(path, "--into-config board config")
    if not isinstance(cfg, dict) or "board" not in cfg:
        raise InputError(f"--into-config {path} is not a board config (no \"board\" field): give the config "
                         "you deploy, e.g. a copy of the shipped rp2040.json")
    errs = validate(cfg)
    if errs:
        raise InputError(f"--into-config {path}: {errs[0]}")
    return cfg


def _put_network(path: str, net: dict) -> None:
    """Replace the element values in a board config's network section with the
    proposal's (the rest of the section, such as failed elements, is kept)."""
    from feedmatch.jsonfile import write_json_with_backup
    from feedmatch.seam.bank import ELEMENT_KEYS, validate

    cfg = _board_config(path)
    sec = dict(cfg.get("network") or {})
    for k in ELEMENT_KEYS:
        sec[k] = net[k]
    cfg["network"] = sec
    errs = validate(cfg)
    if errs:
        raise InputError(f"the proposal does not fit a board config: {errs[0]}")
    write_json_with_backup(Path(path), cfg)


def _parser_design(sub) -> None:
    s = sub.add_parser("design", help="propose element values for an antenna and its bands")
    s.add_argument("--antenna", required=True, help="antenna JSON (NEC-2 or closed form) or .s1p")
    s.add_argument("--bands", default=DEFAULT_BANDS,
                   help="bands to cover, e.g. 80m,40m,20m (default 40m,30m,20m,17m,15m,12m,10m)")
    s.add_argument("--power", type=watts, default=100.0, help="transmitter power for the ratings in W (default 100)")
    s.add_argument("--inductors", type=int, default=7, help="inductor relays, 2 to 10 (default 7)")
    s.add_argument("--capacitors", type=int, default=7, help="capacitor relays, 2 to 10 (default 7)")
    s.add_argument("--tolerance", type=float, default=0.05,
                   help="part tolerance as a fraction, 0 to 0.25 (default 0.05 = 5 %%)")
    s.add_argument("--design-swr", type=float, default=1.3,
                   help="SWR the best state must reach for a frequency to count as covered, 1.05 to 2 (default 1.3)")
    s.add_argument("--boxes", type=int, default=4, help="drawn boxes each candidate is scored on, 1 to 50 (default 4)")
    s.add_argument("--points", type=int, default=31, help="frequencies per band, 3 to 401 (default 31)")
    s.add_argument("--seed", type=seed_number, default=1,
                   help="random seed for the drawn boxes and the optimiser (default 1)")
    s.add_argument("--network", help="the bank you have now, for comparison (default: the shipped one)")
    s.add_argument("--out", help="write the proposal as a network JSON (for simulate, score and design --network)")
    s.add_argument("--into-config", metavar="CONFIG",
                   help="also write the proposal into this board config's network section (a .bak is kept): "
                        "what `deploy --config` takes")
    s.add_argument("--plot", help="coverage map (.png, .svg or .pdf)")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    s.set_defaults(fn=run_design)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "design": _parser_design,
}
