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


def smith_axes(ax) -> None:
    """Draw a plain Smith chart grid (constant-r and constant-x circles) on ax."""
    t = np.linspace(0, 2 * np.pi, 400)
    ax.plot(np.cos(t), np.sin(t), color="0.3", lw=1)
    for r in (0.2, 0.5, 1, 2, 5):
        c = r / (1 + r)
        rad = 1 / (1 + r)
        ax.plot(c + rad * np.cos(t), rad * np.sin(t), color="0.85", lw=0.6)
    for x in (0.2, 0.5, 1, 2, 5):
        for s in (1, -1):
            z = 1j * s * x + np.linspace(0, 50, 800)
            g = (z - 1) / (z + 1)
            ax.plot(g.real, g.imag, color="0.85", lw=0.6)
    ax.axhline(0, color="0.85", lw=0.6)
    ax.set_aspect("equal")
    ax.set_xlim(-1.05, 1.05)
    ax.set_ylim(-1.05, 1.05)
    ax.set_xticks([])
    ax.set_yticks([])


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
    fig, ax = plt.subplots(figsize=(7, 4))
    for o in out:
        m = [r["measurements"] for r in o["results"] if r["oracle_swr"] <= target]
        if m:
            ax.hist(m, bins=np.arange(0, max(m) + 2) - 0.5, histtype="step", label=o["strategy"])
    ax.set_xlabel("measurements per tune")
    ax.set_ylabel("loads")
    ax.set_yscale("log")
    ax.legend()
    ax.set_title("measurements per tune (matchable loads)")
    f = d / "measurements.png"
    fig.savefig(f, dpi=110, bbox_inches="tight")
    plt.close(fig)
    files.append(f)
    files.append(match_range_plot(d / "match_range.png", net, target))
    return files


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


def design_plot(path: str | Path, res: dict[str, Any], design_swr: float) -> None:
    """Coverage map of a design: per band, the best state's SWR over frequency for
    the bank you have and the proposal (nominal, and the worst drawn box)."""
    plt = _plt()
    loads = res["loads"]
    names = loads.names
    fig, axes = plt.subplots(1, len(names), figsize=(2.2 * len(names) + 1, 3.8), sharey=True, squeeze=False)
    for b, (ax, name) in enumerate(zip(axes[0], names)):
        m = loads.band == b
        f = loads.f_hz[m] / 1e6
        ax.plot(f, swr_of(res["score_current"]["best_gamma_boxes_worst"][m]), color="0.55", lw=1.5,
                label="now (worst box)")
        ax.plot(f, swr_of(res["score"]["best_gamma_nominal"][m]), color="tab:blue", lw=1, ls="--",
                label="proposed (nominal)")
        ax.plot(f, swr_of(res["score"]["best_gamma_boxes_worst"][m]), color="tab:blue", lw=1.8,
                label="proposed (worst box)")
        ax.axhline(design_swr, color="tab:green", lw=0.8)
        ax.axhline(1.5, color="tab:red", lw=0.8)
        ax.set_title(name, fontsize=9)
        ax.set_yscale("log")
        ax.set_ylim(1.0, 3.0)
        ax.set_yticks([1.0, 1.3, 1.5, 2.0, 3.0])
        ax.yaxis.set_major_formatter(matplotlib_ticker().ScalarFormatter())
        ax.yaxis.set_minor_formatter(matplotlib_ticker().NullFormatter())
        ax.tick_params(labelsize=7)
        ax.set_xlabel("MHz", fontsize=8)
    axes[0][0].set_ylabel(f"best SWR (green: design {design_swr:g}, red: 1.5)", fontsize=8)
    axes[0][0].legend(fontsize=6, loc="upper left")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def matplotlib_ticker():
    import matplotlib.ticker

    return matplotlib.ticker
