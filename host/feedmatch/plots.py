"""PNG plots for the scorer and the logbook report (matplotlib, no screen needed)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from feedmatch.rf.network import Network, all_states_zin, gamma, swr_of

# The file types a plot option takes (matplotlib writes each from its name).
PLOT_SUFFIXES = (".png", ".svg", ".pdf")


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


SMITH_R = (0.2, 0.5, 1, 2, 5)  # the constant-resistance circles drawn (normalised r)
SMITH_X = (0.2, 0.5, 1, 2, 5)  # the constant-reactance arcs drawn, each sign (normalised x)
_LABEL_BOX = {"boxstyle": "square,pad=0.1", "fc": "white", "ec": "none", "alpha": 0.75}  # legible over points


def smith_axes(ax, z0_ohm: float = 50.0) -> None:
    """Draw a Smith chart grid on ax: constant-r circles and constant-x arcs, each
    labelled with its normalised value (r where its circle meets the real axis,
    +jx/-jx where its arc meets the rim), and the reference impedance said."""
    t = np.linspace(0, 2 * np.pi, 400)
    ax.plot(np.cos(t), np.sin(t), color="0.3", lw=1)
    for r in SMITH_R:
        c = r / (1 + r)
        rad = 1 / (1 + r)
        ax.plot(c + rad * np.cos(t), rad * np.sin(t), color="0.85", lw=0.6)
        # Where the circle crosses the real axis on the left: gamma = (r - 1) / (r + 1).
        ax.text((r - 1) / (r + 1), 0.02, f"{r:g}", fontsize=6, color="0.25", rotation=90,
                ha="right", va="bottom", gid="smith-r", zorder=5, bbox=_LABEL_BOX)
    for x in SMITH_X:
        for s in (1, -1):
            z = 1j * s * x + np.linspace(0, 50, 800)
            g = (z - 1) / (z + 1)
            ax.plot(g.real, g.imag, color="0.85", lw=0.6)
            rim = (1j * s * x - 1) / (1j * s * x + 1)  # the arc's end on the rim (r = 0)
            ax.text(1.1 * rim.real, 1.1 * rim.imag, f"{'+' if s > 0 else '-'}j{x:g}", fontsize=6, color="0.35",
                    ha="center", va="center", gid="smith-x")
    ax.axhline(0, color="0.85", lw=0.6)
    ax.text(0.0, -1.24, f"r + jx = Z / {z0_ohm:g} ohm", fontsize=6, color="0.35", ha="center", va="center",
            gid="smith-z0")
    ax.set_aspect("equal")
    ax.set_xlim(-1.22, 1.22)
    ax.set_ylim(-1.3, 1.22)
    ax.set_xticks([])
    ax.set_yticks([])
    for side in ax.spines.values():
        side.set_visible(False)


def score_plots(outdir: str | Path, out: list[dict[str, Any]], net: Network,
                target: float) -> list[Path]:
    plt = _plt()
    d = Path(outdir)
    d.mkdir(exist_ok=True)  # its parent was checked (feedmatch.outpaths)
    files = []
    for o in out:
        fig, ax = plt.subplots(figsize=(6, 6))
        smith_axes(ax)
        groups = {"success": [], "fail": [], "unmatchable": []}
        for r in o["results"]:
            z = complex(r["r_ohm"], r["x_ohm"])
            g = (z - net.z0_ohm) / (z + net.z0_ohm)
            key = ("unmatchable" if r["oracle_swr"] > target else
                   "success" if r["swr"] <= target else "fail")
            groups[key].append(g)
        for key, col in (("unmatchable", "0.6"), ("success", "tab:green"), ("fail", "tab:red")):
            g = np.array(groups[key])
            if len(g):
                ax.scatter(g.real, g.imag, s=4, color=col, label=f"{key} ({len(g)})")
        ax.legend(loc="lower left", fontsize=8)
        ax.set_title(f"loads by outcome: {o['strategy']} (target SWR {target:g})")
        f = d / f"smith_{o['strategy']}.png"
        fig.savefig(f, dpi=110, bbox_inches="tight")
        plt.close(fig)
        files.append(f)
    fig = measurements_figure(out, target)
    f = d / "measurements.png"
    fig.savefig(f, dpi=110, bbox_inches="tight")
    plt.close(fig)
    files.append(f)
    files.append(match_range_plot(d / "match_range.png", net, target))
    return files


def measurements_figure(out: list[dict[str, Any]], target: float):
    """Measurements per tune on the matchable loads, one bar per strategy side by
    side in each count (bars never hide one another as overlaid outlines did), the
    key outside the axes so it covers no bar."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(8, 4))
    runs = [(o["strategy"], [r["measurements"] for r in o["results"] if r["oracle_swr"] <= target]) for o in out]
    runs = [(name, m) for name, m in runs if m]
    width = 0.8 / max(len(runs), 1)
    for k, (name, m) in enumerate(runs):
        counts = np.bincount(np.asarray(m, dtype=int))
        n = np.nonzero(counts)[0]
        ax.bar(n - 0.4 + width * (k + 0.5), counts[n], width=width, color=f"C{k}",
               label=f"{name} (median {float(np.median(m)):g})")
    ax.set_xlabel("measurements per tune (readings of the coupler)")
    ax.set_ylabel("loads (log scale)")
    ax.set_yscale("log")
    ax.set_ylim(bottom=0.7)  # a count of one still shows
    ax.yaxis.set_major_formatter(matplotlib_ticker().FuncFormatter(lambda v, _p: f"{v:g}"))
    ax.xaxis.set_major_locator(matplotlib_ticker().MaxNLocator(integer=True))
    if runs:
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, title="strategy", title_fontsize=8)
    ax.set_title(f"measurements per tune (matchable loads, target SWR {target:g})", fontsize=10)
    fig.tight_layout()
    return fig


def match_range_plot(path: Path, net: Network, target: float,
                     freqs=(1.9e6, 3.7e6, 7.1e6, 14.2e6, 21.2e6, 28.5e6), n: int = 41) -> Path:
    """Which loads the network can match at each frequency, on the reflection disc."""
    plt = _plt()
    fig, axes = plt.subplots(2, 3, figsize=(10, 7))
    u = np.linspace(-0.99, 0.99, n)
    gu, gv = np.meshgrid(u, u)
    g = gu + 1j * gv
    inside = np.abs(g) < 0.99
    z = net.z0_ohm * (1 + g[inside]) / (1 - g[inside])
    for ax, f in zip(axes.flat, freqs):
        best = np.array([np.abs(gamma(all_states_zin(net, f, zz), net.z0_ohm)).min() for zz in z])
        swr = swr_of(best)
        smith_axes(ax)
        ok = swr <= target
        gi = g[inside]
        ax.scatter(gi.real[ok], gi.imag[ok], s=3, color="tab:green")
        ax.scatter(gi.real[~ok], gi.imag[~ok], s=3, color="0.75")
        ax.set_title(f"{f / 1e6:.1f} MHz: {100 * ok.mean():.0f}% of grid matchable", fontsize=9)
    fig.suptitle(f"match range of the network (green: best SWR <= {target:g})")
    fig.savefig(path, dpi=100, bbox_inches="tight")
    plt.close(fig)
    return path


SWR_TOP = 3.0  # the coverage map's SWR axis ends here; anything above is drawn on its top edge


def design_figure(res: dict[str, Any], design_swr: float):
    """The coverage map of a design, one panel per band (every band designed for,
    in the order given): the best state's SWR over frequency for the bank you
    have and the proposal, on the loads the coverage counts (the model's own
    and, where the antenna model is uncertain, its widened variants: the worst
    of them is drawn), the shaded range from the best to the worst drawn box,
    and each panel's title carrying the table's coverage figures, so the two
    cannot disagree. SWR above the axis is drawn on its top edge, not lost."""
    plt = _plt()
    loads = res["loads"]
    names = loads.names
    now, prop = res["score_current"], res["score"]
    fig, axes = plt.subplots(1, len(names), figsize=(2.3 * len(names) + 1, 4.0), sharey=True, squeeze=False)

    def top(g):
        return np.minimum(swr_of(np.asarray(g)), SWR_TOP)
    for b, (ax, name) in enumerate(zip(axes[0], names)):
        m = loads.band == b
        f = loads.f_hz[m] / 1e6
        ax.fill_between(f, top(prop["best_gamma_boxes_best_all"][m]), top(prop["best_gamma_boxes_worst_all"][m]),
                        color="tab:blue", alpha=0.15, lw=0, label="proposed (range of drawn boxes)")
        ax.plot(f, top(now["best_gamma_boxes_worst_all"][m]), color="0.55", lw=1.5, label="now (worst box)")
        ax.plot(f, top(prop["best_gamma_nominal_all"][m]), color="tab:blue", lw=1, ls="--",
                label="proposed (nominal)")
        ax.plot(f, top(prop["best_gamma_boxes_worst_all"][m]), color="tab:blue", lw=1.8,
                label="proposed (worst box)")
        ax.axhline(design_swr, color="tab:green", lw=0.8)
        ax.axhline(1.5, color="tab:red", lw=0.8)
        unc = bool(np.any(loads.z[m, 1] != loads.z[m, 0]))
        ax.set_title(f"{name}: {100 * now['bands'][b]['coverage']:.1f}% -> {100 * prop['bands'][b]['coverage']:.1f}%"
                     + ("\n(model uncertain: widened loads)" if unc else ""), fontsize=8)
        ax.set_yscale("log")
        ax.set_ylim(1.0, SWR_TOP * 1.03)
        ax.set_yticks([1.0, 1.3, 1.5, 2.0, SWR_TOP])
        ax.yaxis.set_major_formatter(matplotlib_ticker().FixedFormatter(["1.0", "1.3", "1.5", "2.0", "3+"]))
        ax.yaxis.set_minor_formatter(matplotlib_ticker().NullFormatter())
        ax.xaxis.set_major_locator(matplotlib_ticker().MaxNLocator(3))
        ax.tick_params(labelsize=7)
        ax.set_xlabel("MHz", fontsize=8)
    axes[0][0].set_ylabel(f"best SWR (green: design {design_swr:g}, red: 1.5)", fontsize=8)
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=4, fontsize=7, frameon=False)
    fig.suptitle("coverage per band: now -> proposed (share of frequencies and drawn boxes at or below "
                 f"SWR {design_swr:g})", fontsize=9)
    fig.tight_layout(rect=(0, 0.08, 1, 0.95))
    return fig


def design_plot(path: str | Path, res: dict[str, Any], design_swr: float) -> None:
    """Write design_figure to path."""
    plt = _plt()
    fig = design_figure(res, design_swr)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def matplotlib_ticker():
    import matplotlib.ticker

    return matplotlib.ticker
