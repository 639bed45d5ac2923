"""The `antenna` command: impedance over frequency, per-band table, plot, Touchstone export."""

from __future__ import annotations

import argparse
from typing import Any

import numpy as np

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
    ant = load_antenna(a.antenna)
    f = np.array(bands.parse_sweep(a.sweep or DEFAULT_SWEEP))
    how = None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        top = getattr(ant, "max_hz", None)
        if a.sweep is None and top is not None and f[-1] > top():
            # The default sweep, not the user's: end it where the model holds, and say so.
            f = f[f <= top()]
            warnings.warn(f"sweep ends at {f[-1] / 1e6:.3f} MHz, the highest frequency this antenna "
                          f"model holds at", stacklevel=1)
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
