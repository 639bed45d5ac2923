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
