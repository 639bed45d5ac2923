"""The `antenna` command: impedance over frequency, per-band table, plot, Touchstone export."""

from __future__ import annotations

import argparse
import sys
from typing import Any

import numpy as np

from feedmatch.errors import InputError
from feedmatch.outpaths import output_file
from feedmatch.plots import PLOT_SUFFIXES
from feedmatch.rf import bands
from feedmatch.rf.antenna import load_antenna, write_s1p
from feedmatch.rf.network import Z0_OHM, gamma, swr_of

DEFAULT_SWEEP = "1.8e6:30e6:300"


def resonances(f: np.ndarray, z: np.ndarray) -> list[dict[str, Any]]:
    """Frequencies where the reactance crosses zero (series resonance rising, or anti-resonance)."""
    out = []
    x = z.imag
    for i in range(len(f) - 1):
        if x[i] == 0 or x[i] * x[i + 1] < 0:
            t = x[i] / (x[i] - x[i + 1]) if x[i] != x[i + 1] else 0.0
            fr = f[i] + t * (f[i + 1] - f[i])
            r = z.real[i] + t * (z.real[i + 1] - z.real[i])
            out.append({"freq_hz": float(fr), "r_ohm": float(r),
                        "kind": "series" if x[i + 1] > x[i] else "parallel"})
    return out


def run_antenna(a: argparse.Namespace) -> int:
    import warnings

    from feedmatch.cli.output import emit_json

    if a.s1p:
        output_file(a.s1p, "--s1p", (".s1p",))
    if a.plot:
        output_file(a.plot, "--plot", PLOT_SUFFIXES)
    if getattr(a, "logbook", None):
        return run_measured(a)
    for opt in ("since", "until", "network"):
        if getattr(a, opt, None):
            raise InputError(f"--{opt} goes with --logbook")
    if not a.antenna:
        raise InputError("give --antenna FILE (a model or a .s1p) or --logbook DB (the antenna as the box measured it)")
    f = np.array(bands.parse_sweep(a.sweep or DEFAULT_SWEEP))  # a typo costs nothing: before the model
    ant = load_antenna(a.antenna)
    how = None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        top = getattr(ant, "max_hz", None)
        if a.sweep is None and top is not None and f[-1] > top():
            # The default sweep, not the user's: end it where the model holds, and say so.
            f = f[f <= top()]
            warnings.warn(f"sweep ends at {f[-1] / 1e6:.3f} MHz, the highest frequency this antenna "
                          f"model holds at", stacklevel=1)
        low = getattr(ant, "f", None)
        if a.sweep is None and low is not None and f[0] < low[0]:
            # A measured sweep (.s1p) says nothing below its first frequency.
            f = np.concatenate([[low[0]], f[f > low[0]]])
            warnings.warn(f"sweep starts at {f[0] / 1e6:.3f} MHz, the lowest frequency in the file", stacklevel=1)
        if hasattr(ant, "sweep"):
            how = ant.sweep(f, exact=a.exact)
            z = how.z
        else:
            z = np.asarray(ant.impedance(f), dtype=complex)
    notes = [str(w.message) for w in caught]
    method = None
    if how is not None:
        method = {"engine": f"necpp {how.engine}", "solved": how.n_solved, "points": len(f),
                  "est_err": how.est_err}
    swr = swr_of(np.abs(gamma(z, Z0_OHM)))
    rows = []
    for b in bands.HF_BANDS:
        fc = b.centre_hz
        if not f[0] <= fc <= f[-1]:
            continue
        zc = complex(np.interp(fc, f, z.real) + 1j * np.interp(fc, f, z.imag))
        rows.append({"band": b.name, "freq_hz": fc, "r_ohm": zc.real, "x_ohm": zc.imag,
                     "swr_50": float(swr_of(abs(gamma(zc, Z0_OHM))))})
    res = resonances(f, z)
    check = _segment_check(ant, rows, res)
    if a.s1p:
        comment = f"feedmatch antenna sweep: {ant.describe()}"
        if method is not None:
            comment += "\n" + _method_line(method)
        write_s1p(a.s1p, f, z, comment=comment)
    if a.plot:
        _plot(a.plot, f, z, swr, ant.describe())
    if a.json:
        for w in (a.s1p, a.plot):
            if w:
                sys.stderr.write(f"wrote {w}\n")  # stdout is the JSON's alone
        emit_json({"antenna": ant.describe(), "method": method, "bands": rows, "resonances": res,
                   "warnings": notes, "segment_check": check,
                   "sweep": {"freq_hz": f.tolist(), "r_ohm": z.real.tolist(), "x_ohm": z.imag.tolist()}})
        return 0
    print(ant.describe())
    if method is not None:
        print(_method_line(method))
    for n in notes:
        print(f"warning: {n}")
    print(f"{'band':>5} {'MHz':>8} {'R ohm':>9} {'X ohm':>10} {'SWR 50':>8}")
    for r in rows:
        s = f"{r['swr_50']:8.1f}" if r["swr_50"] is not None and r["swr_50"] < 1000 else "   >1000"
        print(f"{r['band']:>5} {r['freq_hz'] / 1e6:8.3f} {r['r_ohm']:9.2f} {r['x_ohm']:+10.2f} {s}")
    for r in res:
        print(f"{r['kind']} resonance at {r['freq_hz'] / 1e6:.3f} MHz, R = {r['r_ohm']:.1f} ohm")
    for line in _check_lines(check):
        print(line)
    if a.s1p:
        print(f"wrote {a.s1p}")
    if a.plot:
        print(f"wrote {a.plot}")
    return 0


def _segment_check(ant, rows: list[dict[str, Any]], res: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The modelling-error estimate of a NEC-2 antenna: each band centre in the
    sweep and each anti-resonance re-solved with twice the segments (where NEC-2
    moves most).  Empty for a closed-form model or a measured file."""
    if not hasattr(ant, "convergence"):
        return []
    fs = [r["freq_hz"] for r in rows] + [r["freq_hz"] for r in res if r["kind"] == "parallel"]
    out = ant.convergence(fs)
    for c in out:
        c["band"] = bands.band_of(c["freq_hz"])
    return out


def _check_lines(check: list[dict[str, Any]]) -> list[str]:
    from feedmatch.rf.nec import CONVERGENCE_WARN

    if not check:
        return []
    n1, n2 = check[0]["segments"]
    worst = max(check, key=lambda c: c["change"])
    lines = [f"modelling error: {len(check)} frequencies re-solved with twice the segments ({n1} -> {n2}): "
             f"|Z| moved {100 * min(c['change'] for c in check):.1f} to {100 * worst['change']:.1f} %"]
    bad = [c for c in check if c["change"] > CONVERGENCE_WARN]
    if bad:
        where = ", ".join(f"{c['freq_hz'] / 1e6:.3f} MHz{'' if c['band'] == 'out' else ' (' + c['band'] + ')'} "
                          f"{100 * c['change']:.0f} %" for c in bad)
        lines.append(f"warning: the model is uncertain above {100 * CONVERGENCE_WARN:.0f} % at {where}; "
                     "trust its impedance less there (design widens its margin)")
    return lines


def _method_line(m: dict) -> str:
    if m["solved"] == m["points"]:
        return f"{m['engine']}: solved at all {m['points']} frequencies"
    return (f"{m['engine']}: solved at {m['solved']} of {m['points']} frequencies, the rest interpolated "
            f"(AAA rational fit, estimated error {100 * m['est_err']:.2f} % of |Z| + 5 ohm; --exact solves all)")


def _plot(path: str, f, z, swr, title: str) -> None:
    from feedmatch.plots import _plt

    plt = _plt()
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(8, 6), sharex=True)
    ax1.plot(f / 1e6, z.real, label="R")
    ax1.plot(f / 1e6, z.imag, label="X")
    ax1.set_ylabel("ohm")
    ax1.legend()
    ax1.set_title(title, fontsize=9)
    ax2.semilogy(f / 1e6, np.minimum(swr, 1e4))
    ax2.set_ylabel("SWR against 50 ohm")
    ax2.set_xlabel("MHz")
    for b in bands.HF_BANDS:
        ax2.axvspan(b.low_hz / 1e6, b.high_hz / 1e6, color="0.9")
    fig.savefig(path, dpi=110, bbox_inches="tight")
    plt.close(fig)


# -- the antenna as the box measured it ---------------------------------------------
def _iso(text: str | None, opt: str) -> str | None:
    from datetime import UTC, datetime

    if text is None:
        return None
    try:
        t = datetime.fromisoformat(text)
    except ValueError:
        raise InputError(f"{opt} needs an ISO date or time such as 2026-11-01 or 2026-11-01T18:00, "
                         f"got '{text}'") from None
    if t.tzinfo is not None:  # the logbook's times are UTC
        return t.astimezone(UTC).replace(tzinfo=None).isoformat()
    return text


def _pm(v: float, e: float, width: int, prec: int, sign: bool = False) -> str:
    s = f"{v:+.{prec}f}" if sign else f"{v:.{prec}f}"
    return f"{s} +- {e:.{prec}f}".rjust(width)


def run_measured(a: argparse.Namespace) -> int:
    from feedmatch.cli.output import emit_json
    from feedmatch.rf.network import load_network
    from feedmatch.sim.curve import measured_curve

    since, until = _iso(a.since, "--since"), _iso(a.until, "--until")
    if a.exact or a.sweep:
        raise InputError("--sweep and --exact belong to a model (--antenna alone); the measured curve has "
                         "the frequencies the box tuned")
    nominal = load_network(a.network).firmware_bank()
    model = load_antenna(a.antenna) if a.antenna else None
    cur = measured_curve(a.logbook, since, until, nominal)
    pts = cur["points"]
    if not pts:
        raise InputError(f"logbook {a.logbook} holds no tune with readings"
                         + (" in that period" if since or until else "") + "; nothing to measure")
    f = np.array([p.freq_hz for p in pts])
    z = np.array([p.z for p in pts])
    zm = _model_at(model, f) if model is not None else None
    band_rows = _measured_bands(pts)
    if a.s1p:
        write_s1p(a.s1p, f, z, comment=f"feedmatch antenna measured by the box from {cur['tunes']} tunes, "
                                       f"{cur['first']} .. {cur['last']} UTC")
    if a.plot:
        _plot_measured(a.plot, pts, model)
    if a.json:
        out = {"source": "logbook", "tunes": cur["tunes"], "first": cur["first"], "last": cur["last"],
               "element_values": "learned" if cur["learned"] else "nominal",
               "element_sigma": cur["element_sigma"], "points": [p.to_json() for p in pts],
               "bands": band_rows, "resonances": cur["resonances"]}
        if zm is not None:
            out["model"] = {"antenna": model.describe(), "r_ohm": [round(v, 3) for v in zm.real],
                            "x_ohm": [round(v, 3) for v in zm.imag]}
        for w in (a.s1p, a.plot):
            if w:
                sys.stderr.write(f"wrote {w}\n")  # stdout is the JSON's alone
        emit_json(out)
        return 0
    print(f"antenna as the box measured it: {cur['tunes']} tunes, {cur['first'][:19]} .. {cur['last'][:19]} UTC")
    print(f"element values: {'learned (fit-box)' if cur['learned'] else 'nominal'}, "
          f"+-{100 * cur['element_sigma']:.0f} % each; uncertainties are one standard deviation")
    hdr = f"{'MHz':>8} {'R ohm':>16} {'X ohm':>18} {'tunes':>5} {'SWR 50':>7}"
    if zm is not None:
        hdr += f"   {'model R':>8} {'model X':>9}"
    print(hdr)
    for i, p in enumerate(pts):
        j = p.to_json()
        swr = f"{j['swr_50']:7.1f}" if j["swr_50"] is not None and j["swr_50"] < 1000 else "  >1000"
        line = (f"{p.freq_hz / 1e6:8.3f} {_pm(p.z.real, p.r_err, 16, 1)} {_pm(p.z.imag, p.x_err, 18, 1, True)} "
                f"{p.tunes:5d} {swr}")
        if zm is not None:
            line += f"   {zm[i].real:8.1f} {zm[i].imag:+9.1f}"
        print(line)
    print("bare antenna's SWR on 50 ohm per band: " + ", ".join(
        f"{b['band']} {b['swr_50_text']}" for b in band_rows))
    for r in cur["resonances"]:
        print(f"{r['kind']} resonance at {r['freq_hz'] / 1e6:.3f} +- {r['freq_err_hz'] / 1e6:.3f} MHz "
              f"(between the points at {r['between_hz'][0] / 1e6:.3f} and {r['between_hz'][1] / 1e6:.3f} MHz), "
              f"R = {r['r_ohm']:.1f} ohm")
    if not cur["resonances"]:
        print("no resonance between the frequencies tuned (the reactance keeps its sign)")
    if a.s1p:
        print(f"wrote {a.s1p}")
    if a.plot:
        print(f"wrote {a.plot}")
    return 0


def _model_at(model, f: np.ndarray) -> np.ndarray | None:
    top = getattr(model, "max_hz", None)
    ok = f <= top() if top is not None else np.ones(len(f), dtype=bool)
    out = np.full(len(f), np.nan + 1j * np.nan)
    if ok.any():
        out[ok] = np.asarray(model.impedance(f[ok]), dtype=complex)
    return out


def _measured_bands(pts) -> list[dict[str, Any]]:
    by: dict[str, list] = {}
    for p in pts:
        by.setdefault(bands.band_of(p.freq_hz), []).append(p)
    rows = []
    for b in bands.HF_BANDS:
        ps = by.get(b.name)
        if not ps:
            continue
        s = [p.to_json()["swr_50"] for p in ps]
        s = [x if x is not None else float("inf") for x in s]
        lo, hi = min(s), max(s)

        def t(x):
            return f"{x:.1f}" if x < 1000 else ">1000"
        rows.append({"band": b.name, "points": len(ps), "swr_50_min": lo if lo < 1e9 else None,
                     "swr_50_max": hi if hi < 1e9 else None,
                     "swr_50_text": t(lo) if lo == hi or t(lo) == t(hi) else f"{t(lo)}-{t(hi)}"})
    return rows


def _plot_measured(path: str, pts, model) -> None:
    from feedmatch.plots import _plt

    plt = _plt()
    f = np.array([p.freq_hz for p in pts]) / 1e6
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(8, 6), sharex=True)
    ax1.errorbar(f, [p.z.real for p in pts], yerr=[p.r_err for p in pts], fmt="o", ms=4, capsize=3,
                 label="R measured (1 sigma)")
    ax2.errorbar(f, [p.z.imag for p in pts], yerr=[p.x_err for p in pts], fmt="o", ms=4, capsize=3,
                 color="C1", label="X measured (1 sigma)")
    if model is not None:
        top = getattr(model, "max_hz", None)
        hi = min(f.max() * 1.05, top() / 1e6) if top is not None else f.max() * 1.05
        fm = np.linspace(max(f.min() * 0.95, 1.0), hi, 300)
        zm = np.asarray(model.impedance(fm * 1e6), dtype=complex)
        ax1.plot(fm, zm.real, "-", color="C0", alpha=0.6, label="R model")
        ax2.plot(fm, zm.imag, "-", color="C1", alpha=0.6, label="X model")
        ax1.set_title(f"measured by the box; model: {model.describe()}", fontsize=9)
    else:
        ax1.set_title("antenna impedance measured by the box", fontsize=9)
    ax2.axhline(0, color="0.6", lw=0.8)
    ax1.set_ylabel("R, ohm")
    ax2.set_ylabel("X, ohm")
    ax2.set_xlabel("MHz")
    for ax in (ax1, ax2):
        ax.legend(fontsize=8)
        for b in bands.HF_BANDS:
            ax.axvspan(b.low_hz / 1e6, b.high_hz / 1e6, color="0.93")
    fig.savefig(path, dpi=110, bbox_inches="tight")
    plt.close(fig)


def _parser_antenna(sub) -> None:
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
    s.set_defaults(fn=run_antenna)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "antenna": _parser_antenna,
}
