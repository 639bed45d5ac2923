"""The report's plots read at a glance: what is drawn, checked on the figure itself.

Band order is the order of the amateur bands by frequency (common practice);
the target SWR 1.5 and the 25 kHz bins are the shipped config's (fmlogic/config.py).
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
from feedmatch.logbook.report import draw_states_by_band, draw_swr_by_band, report_plots  # noqa: E402


def _row(t: str, band: str, f: float, swr: float, l: int, c: int, sh: int) -> dict:
    return {"time": t, "band": band, "freq_hz": f, "swr_after": swr, "after_l": l, "after_c": c,
            "after_shunt": sh, "outcome": "locked"}


ROWS = {
    # 20m first in the logbook, two frequencies far apart; 40m later, one frequency.
    "20m": [_row("2026-11-01T10:00:00+00:00", "20m", 14.05e6, 1.2, 11, 22, 0),
            _row("2026-11-01T10:05:00+00:00", "20m", 14.30e6, 1.4, 9, 20, 0),
            _row("2026-11-02T10:00:00+00:00", "20m", 14.05e6, 1.3, 11, 22, 0)],
    "40m": [_row("2026-11-01T11:00:00+00:00", "40m", 7.10e6, 1.1, 100, 106, 1)],
}


def test_swr_over_time_has_units_zone_target_band_order_and_one_line_per_bin():
    fig, ax = plt.subplots()
    draw_swr_by_band(ax, dict(ROWS), [])
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels[:2] == ["40m", "20m"] and "target SWR 1.5" in labels
    lines = [ln for ln in ax.get_lines() if ln.get_linestyle() == "-"]
    # 20m: two bins (14.05 twice, 14.30 once) -> two lines; 40m: one.
    assert sorted(len(ln.get_xdata()) for ln in lines) == [1, 1, 2]
    target = [ln for ln in ax.get_lines() if ln.get_linestyle() == "--"]
    assert len(target) == 1 and list(target[0].get_ydata()) == [1.5, 1.5]
    assert "UTC" in ax.get_xlabel() and "SWR" in ax.get_ylabel()
    plt.close(fig)


def test_the_lines_follow_the_boards_own_memory_bins():
    # 7.151 and 7.161 MHz: one bin of the shipped 25 kHz memory, two of a board set to
    # 10 kHz bins (fmlogic.memory numbers bins from 0 Hz: arithmetic).
    rows = [dict(_row(f"2026-11-0{d}T10:00:00+00:00", "40m", f, 1.2, 100, 106, 1), board_id="hollow-oak-1")
            for d, f in ((1, 7.151e6), (2, 7.161e6), (3, 7.151e6))]
    for widths, lengths, words in ((None, [3], "25 kHz"), ({"hollow-oak-1": 10000.0}, [1, 2], "10 kHz")):
        fig, ax = plt.subplots()
        draw_swr_by_band(ax, {"40m": rows}, [], widths)
        lines = [ln for ln in ax.get_lines() if ln.get_linestyle() == "-"]
        assert sorted(len(ln.get_xdata()) for ln in lines) == lengths and words in ax.get_title()
        plt.close(fig)


def test_states_plot_names_its_axes_and_tells_the_capacitor_side_apart():
    fig, ax = plt.subplots()
    draw_states_by_band(ax, dict(ROWS))
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels == ["40m, C on ant side", "20m, C on tx side"]
    assert "inductor" in ax.get_xlabel() and "capacitor" in ax.get_ylabel()
    plt.close(fig)


def test_the_files_are_written(tmp_path):
    files = report_plots(str(tmp_path / "p"), [r for rs in ROWS.values() for r in rs])
    assert [f.name for f in files] == ["swr_by_band.png", "states_by_band.png"]
    assert all(f.stat().st_size > 5000 for f in files)


def _overlaps(fig) -> list[tuple[str, str]]:
    """Pairs of drawn texts (titles, axis and tick labels, keys, annotations) whose
    boxes on the rendered figure intersect: labels that print over each other."""
    fig.canvas.draw()
    r = fig.canvas.get_renderer()
    ticks, shown = set(), set()
    for ax in fig.axes:
        for axis, lim, k in ((ax.xaxis, ax.get_xlim(), 0), (ax.yaxis, ax.get_ylim(), 1)):
            lo, hi = min(lim), max(lim)
            for t in axis.get_ticklabels(which="both"):
                ticks.add(id(t))
                if lo <= t.get_position()[k] <= hi:  # a tick outside the view is never drawn
                    shown.add(id(t))
    texts = [t for t in fig.findobj(matplotlib.text.Text) if t.get_visible() and t.get_text().strip()
             and (id(t) not in ticks or id(t) in shown)]
    boxes = [(t.get_text(), t.get_window_extent(r)) for t in texts]
    out = []
    for i, (a, ba) in enumerate(boxes):
        for b, bb in boxes[i + 1:]:
            if ba.overlaps(bb) and ba.intersection(ba, bb).width > 1 and ba.intersection(ba, bb).height > 1:
                out.append((a, b))
    return out


def test_smith_charts_label_their_circles_where_they_are_drawn():
    """Each r label sits where its constant-r circle crosses the real axis and each
    x label beside the end of its arc on the rim: gamma = (z - 1) / (z + 1)
    (Pozar, Microwave Engineering, 4th ed., sec. 2.4)."""
    from feedmatch.plots import SMITH_R, SMITH_X, smith_axes

    fig, ax = plt.subplots(figsize=(5, 5))
    smith_axes(ax, 50.0)
    r_lab = {t.get_text(): t.get_position() for t in ax.texts if t.get_gid() == "smith-r"}
    x_lab = {t.get_text(): t.get_position() for t in ax.texts if t.get_gid() == "smith-x"}
    assert set(r_lab) == {f"{r:g}" for r in SMITH_R}
    assert set(x_lab) == {f"{s}j{x:g}" for x in SMITH_X for s in "+-"}
    for text, (gx, _gy) in r_lab.items():
        z = (1 + gx) / (1 - gx)  # the point on the real axis the label marks
        assert abs(z - float(text)) < 1e-9
    for text, (gx, gy) in x_lab.items():
        g = complex(gx, gy) / abs(complex(gx, gy))  # back onto the rim, where r = 0
        z = (1 + g) / (1 - g)
        assert abs(z.real) < 1e-9 and abs(z.imag - float(text.replace("j", ""))) < 1e-9
    assert "50 ohm" in [t.get_text() for t in ax.texts if t.get_gid() == "smith-z0"][0]
    assert _overlaps(fig) == []
    plt.close(fig)


def test_measurements_plot_shows_every_strategy_and_no_label_covers_another():
    from feedmatch.plots import measurements_figure

    # Two strategies with identical counts: overlaid outlines would hide one.
    same = [{"measurements": m, "oracle_swr": 1.1} for m in (1, 1, 2, 5, 5, 5, 9)]
    out = [{"strategy": "model", "results": same}, {"strategy": "recall", "results": list(same)},
           {"strategy": "grid", "results": [{"measurements": 60, "oracle_swr": 1.2}]}]
    fig = measurements_figure(out, 1.5)
    ax = fig.axes[0]
    bars = [p for p in ax.patches]
    assert len(bars) == 4 + 4 + 1  # one bar per strategy and count, side by side
    lefts = [round(b.get_x(), 6) for b in bars]
    assert len(set(lefts)) == len(lefts)  # none drawn over another
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels == ["model (median 5)", "recall (median 5)", "grid (median 60)"]
    fig.canvas.draw()
    r = fig.canvas.get_renderer()
    assert not ax.get_legend().get_window_extent(r).overlaps(ax.get_window_extent(r))  # the key covers no bar
    assert _overlaps(fig) == []
    plt.close(fig)


def test_design_coverage_map_draws_every_band_and_agrees_with_the_table():
    """Every band gets its panel, titled with the table's coverage, and the drawn
    worst line counts the uncertain model's widened loads as the table does: with
    one drawn box the share of frequencies at or below the design SWR on the
    line is the table's figure (was: the 12 m panel disagreed with 42.7 %)."""
    import numpy as np
    from feedmatch.plots import design_figure
    from feedmatch.rf.antenna import FixedLoad
    from feedmatch.rf.network import load_network
    from feedmatch.sim.design import DesignSpec, design

    spec = DesignSpec(["15m", "12m", "10m"], n_l=7, n_c=7, boxes=1, points=9, maxiter=5,
                      uncertainty={"12m": 0.4})
    res = design(FixedLoad(20.0, -150.0), spec, load_network(None))
    fig = design_figure(res, spec.design_swr)
    panels = [ax for ax in fig.axes if ax.get_title()]
    assert [ax.get_title().split(":")[0] for ax in panels] == ["15m", "12m", "10m"]
    for b, ax in enumerate(panels):
        now, prop = res["score_current"]["bands"][b]["coverage"], res["score"]["bands"][b]["coverage"]
        assert ax.get_title().startswith(f"{spec.band_names[b]}: {100 * now:.1f}% -> {100 * prop:.1f}%")
        lines = {ln.get_label(): np.asarray(ln.get_ydata()) for ln in ax.get_lines()}
        for key, cov in (("now (worst box)", now), ("proposed (worst box)", prop)):
            assert np.mean(lines[key] <= spec.design_swr + 1e-9) == __import__("pytest").approx(cov)
    assert "uncertain" in panels[1].get_title() and "uncertain" not in panels[0].get_title()
    assert _overlaps(fig) == []
    plt.close(fig)
