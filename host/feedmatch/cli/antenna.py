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
    if a.s1p:
        comment = f"feedmatch antenna sweep: {ant.describe()}"
        if method is not None:
            comment += "\n" + _method_line(method)
        write_s1p(a.s1p, f, z, comment=comment)
    if a.plot:
        _plot(a.plot, f, z, swr, ant.describe())
    if a.json:
        emit_json({"antenna": ant.describe(), "method": method, "bands": rows, "resonances": res,
                   "warnings": notes,
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
    if a.s1p:
        print(f"wrote {a.s1p}")
    if a.plot:
        print(f"wrote {a.plot}")
    return 0


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
