"""Per-band report and antenna-health flags from the logbook."""

from __future__ import annotations

import csv
import json
import statistics
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

from feedmatch.logbook.store import open_existing
from feedmatch.rf import bands
from feedmatch.seam.bank import BOARD_DEFAULTS, bank_or_none, code_value, load_matched_by, side_name, state_values
from feedmatch.seam.logic import LOCKED, bin_of, bin_width

# A band is flagged when its recent tunes differ from its own earlier ones by
# more than these (common practice for trend alarms: a fixed margin over a
# per-band baseline, not a global threshold).
SWR_DRIFT = 0.25
PRESET = "preset"  # the outcome of a preset record (feedmatch follow)
AS_PREDICTED = "preset as predicted"  # how the board's why starts when a first reading bore a computed preset out
STATE_DRIFT_FRACTION = 0.06
MIN_TUNES_FOR_HEALTH = 4


def _get(row: Any, key: str) -> Any:
    """A column that older logbooks lack reads as None."""
    try:
        return row[key]
    except (KeyError, IndexError):
        return None


def swr_bound(row: Any) -> list[float] | None:
    """The true SWR range the board said the final reading allows (record
    swr_bound, fmlogic.coupler), from the stored record; None when absent."""
    raw = _get(row, "raw")
    if not raw:
        return None
    try:
        b = json.loads(raw).get("swr_bound")
    except (ValueError, AttributeError):
        return None
    if isinstance(b, list) and len(b) == 2 and all(isinstance(x, (int, float)) for x in b):
        return [float(b[0]), float(b[1])]
    return None


def _median(xs: list[float]) -> float | None:
    return statistics.median(xs) if xs else None


def _banks(sections: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """{board key: firmware Bank} from the config sections the logbook kept; an unusable
    entry is left out (that board's codes are shown alone)."""
    out = {}
    for key, m in sections.items():
        b = bank_or_none(m)
        if b is not None:
            out[key] = b
    return out


def band_table(rows: list, banks: dict[str, Any] | None = None,
               bin_widths: dict[str, float] | None = None) -> list[dict[str, Any]]:
    """Per band: tunes, success, medians, the usual state and the health check; banks and
    bin_widths ({board key: ...}) give the board's element values and memory bins."""
    by = defaultdict(list)
    for r in rows:
        by[r["band"]].append(r)
    order = [b.name for b in bands.HF_BANDS] + ["out", "none"]
    out = []
    for name in sorted(by, key=lambda n: order.index(n) if n in order else 99):
        rs = by[name]
        presets = [r for r in rs if r["outcome"] == PRESET]
        rs = [r for r in rs if r["outcome"] != PRESET]  # a preset is not a tune: no reading was taken
        ok = [r for r in rs if r["outcome"] == LOCKED]
        tuned = [r for r in rs if r["outcome"] not in ("refused",)]
        states = Counter((r["after_l"], r["after_c"], r["after_shunt"]) for r in ok)
        top = states.most_common(1)[0][0] if states else None
        board = _get(ok[-1], "board_id") if ok else None  # the board that tuned the band last
        bank = banks.get(board) if banks else None
        bin_hz = (bin_widths or {}).get(board, BOARD_DEFAULTS["memory"]["bin_hz"])
        v = state_values(bank, top[0], top[1]) if top else None
        vals = {"l_uh": round(v[0], 4), "c_pf": round(v[1], 2)} if v else None
        out.append({
            "band": name, "tunes": len(rs),
            "success_rate": len(ok) / len(tuned) if tuned else None,
            "median_swr_after": _median([r["swr_after"] for r in ok if r["swr_after"] is not None]),
            "median_tune_ms": _median([r["duration_ms"] for r in tuned if r["duration_ms"] is not None]),
            "median_measurements": _median([r["measurements"] for r in tuned if r["measurements"]]),
            "most_used_state": ([top[0], top[1], side_name(top[2])] if top else None),
            "most_used_values": vals,
            "memory_hit_rate": (sum(1 for r in tuned if r["memory_hit"]) / len(tuned)) if tuned else None,
            "presets": len(presets),
            "presets_confirmed": sum(1 for r in rs if _get(r, "preset") and r["outcome"] == LOCKED
                                     and r["measurements"] == 1),
            # Computed presets whose first reading bore the host's prediction out without proving
            # the target (the board's why, fmlogic.controller): best-effort, no relay moved.
            "presets_as_predicted": sum(1 for r in rs if _get(r, "preset")
                                        and str(_get(r, "reason") or "").startswith(AS_PREDICTED)),
            "health": health(ok, bin_hz=bin_hz, bank=bank),
            # Tunes the readings could not prove (the coupler's bounds): how many,
            # and the median of the highest true SWR each one allows.
            "best_effort": sum(1 for r in rs if r["outcome"] == "best-effort"),
            "best_effort_true_swr_max": _median([b[1] for b in (swr_bound(r) for r in rs
                                                                if r["outcome"] == "best-effort") if b]),
        })
    return out


def health(ok: list, bin_hz: float = BOARD_DEFAULTS["memory"]["bin_hz"], bank: Any = None) -> dict[str, Any]:
    """Compare a band's recent matched tunes with its own baseline (its earlier ones).

    Like is compared with like: tunes are grouped by the board's memory bins (bin_hz,
    fmlogic.memory's numbering), and in each bin with enough tunes the later half is
    compared with the earlier half.  With the
    board's bank (a firmware Bank) a moved state is told in uH and pF.
    """
    if len(ok) < MIN_TUNES_FOR_HEALTH:
        return {"flag": False, "note": "too few tunes for a baseline"}
    bins = defaultdict(list)
    for r in ok:
        bins[bin_of(r["freq_hz"], bin_hz)].append(r)
    notes = []
    compared = 0
    for b in sorted(bins):
        rs = bins[b]
        if len(rs) < 4:
            continue
        compared += 1
        half = len(rs) // 2
        base, recent = rs[:half], rs[half:]
        mhz = rs[0]["freq_hz"] / 1e6
        sb = _median([r["swr_after"] for r in base if r["swr_after"] is not None]) or 1.0
        sr = _median([r["swr_after"] for r in recent if r["swr_after"] is not None]) or 1.0
        if sr - sb > SWR_DRIFT:
            notes.append(f"{mhz:.3f} MHz: SWR after tune rose {sb:.2f} -> {sr:.2f}")
        for name, key in (("L", "after_l"), ("C", "after_c")):
            a = _median([r[key] for r in base]) or 0
            c = _median([r[key] for r in recent]) or 0
            if abs(c - a) > max(3.0, STATE_DRIFT_FRACTION * max(a, c)):
                va, vc = code_value(bank, name, a), code_value(bank, name, c)
                if va is not None and vc is not None:
                    unit, fmt = ("uH", ".2f") if name == "L" else ("pF", ".0f")
                    notes.append(f"{mhz:.3f} MHz: matched {name} moved {va:{fmt}} -> {vc:{fmt}} {unit} "
                                 f"(code {a:.0f} -> {c:.0f})")
                else:
                    notes.append(f"{mhz:.3f} MHz: matched {name} code moved {a:.0f} -> {c:.0f}")
    if not compared:
        return {"flag": False, "note": "too few tunes per frequency for a baseline"}
    return {"flag": bool(notes), "note": "; ".join(notes) or "steady"}


def make_report(db: str, since: str | None = None) -> dict[str, Any]:
    from feedmatch.logbook.watch import watch_logbook

    book = open_existing(db)
    rows = book.tunes(since)
    sections = book.banks()
    book.close()
    banks = _banks(sections)
    widths = {k: bin_width(m) for k, m in sections.items()}
    n = sum(1 for r in rows if r["outcome"] != PRESET)
    return {"tunes": n, "bands": band_table(rows, banks, widths), "rows": rows, "banks": banks, "bin_widths": widths,
            "first": rows[0]["time"] if rows else None, "last": rows[-1]["time"] if rows else None,
            # The passive watch: an element that stopped acting or moved, from the tunes' traces.
            "watch": watch_logbook(rows, sections)}


def report_lines(rep: dict[str, Any]) -> list[str]:
    """The per-band table as text lines (the command line prints them)."""
    out = [f"{rep['tunes']} tunes logged" + (f", {rep['first'][:19]} .. {rep['last'][:19]} UTC"
                                             if rep["tunes"] else "")]
    out.append(f"{'band':>5} {'tunes':>5} {'locked':>7} {'SWR':>5} {'ms':>5} {'meas':>5} {'memory':>7}"
          f"  {'usual state':<26} health")
    for b in rep["bands"]:
        def pct(x):
            return f"{100 * x:6.0f}%" if x is not None else "     -"
        st = b["most_used_state"]
        sts = f"L{st[0]} C{st[1]} {st[2]}" if st else "-"
        v = b.get("most_used_values")
        if v:
            sts += f" {v['l_uh']:.2f}uH {v['c_pf']:.0f}pF"
        swr = f"{b['median_swr_after']:5.2f}" if b["median_swr_after"] is not None else "    -"
        ms = f"{b['median_tune_ms']:5.0f}" if b["median_tune_ms"] is not None else "    -"
        meas = f"{b['median_measurements']:5.0f}" if b["median_measurements"] is not None else "    -"
        h = b["health"]
        flag = ("CHECK: " + h["note"]) if h["flag"] else h["note"]
        ah = b.get("antenna_health")  # the measured antenna's own change (sim.curve.add_antenna)
        if ah and ah["flag"]:
            flag = "CHECK antenna: " + ah["note"] + ("; " + flag if h["flag"] else "")
        out.append(f"{b['band']:>5} {b['tunes']:5d} {pct(b['success_rate'])} {swr} {ms} {meas} "
                   f"{pct(b['memory_hit_rate'])}  {sts:<26} {flag}")
    for note in rep.get("antenna_notes") or []:
        out.append(f"antenna: {note}")
    from feedmatch.logbook.watch import watch_lines

    out += watch_lines(rep.get("watch") or {})
    presets = sum(b["presets"] for b in rep["bands"])
    be = [b for b in rep["bands"] if b.get("best_effort")]
    if be:
        out.append("best-effort (the readings could not prove the target): " + ", ".join(
            f"{b['band']} {b['best_effort']}" + (f" (true SWR up to {b['best_effort_true_swr_max']:.2f}, median)"
                                                 if b["best_effort_true_swr_max"] is not None else "")
            for b in be))
    if presets:
        ok = sum(b["presets_confirmed"] for b in rep["bands"])
        pred = sum(b.get("presets_as_predicted", 0) for b in rep["bands"])
        out.append(f"presets from the radio's frequency: {presets}, confirmed by the first reading: {ok}"
                   + (f", best-effort as predicted by the first reading (no relay moved): {pred}" if pred else ""))
    return out


def write_csv(path: str, rows: list, banks: dict[str, Any] | None = None) -> None:
    """The tune rows as CSV; with banks ({board key: firmware Bank}, as make_report
    gives them) the matched state also in uH and pF, as the builder measures it."""
    cols = ["time", "board_id", "seq", "band", "freq_hz", "outcome", "reason", "swr_before", "swr_after",
            "measurements", "duration_ms", "after_l", "after_c", "after_l_uh", "after_c_pf", "after_shunt",
            "after_bypass", "memory_hit", "preset", "rig_hz", "rig_mode", "true_swr_low", "true_swr_high"]
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(cols)
        for r in rows:
            # The capacitor side as the tables say it (tx/ant), not the relay's 0/1.
            b = swr_bound(r) or [None, None]
            bank = (banks or {}).get(_get(r, "board_id"))
            lc = (_get(r, "after_l"), _get(r, "after_c"))
            v = state_values(bank, *lc) if None not in lc and not _get(r, "after_bypass") else None
            vals = {"after_l_uh": round(v[0], 3) if v else None, "after_c_pf": round(v[1], 1) if v else None}
            w.writerow([side_name(r[c]) if c == "after_shunt" and r[c] is not None
                        else b[0] if c == "true_swr_low" else b[1] if c == "true_swr_high"
                        else vals[c] if c in vals else _get(r, c)
                        for c in cols])


# The shipped tune.target_swr (fmlogic/config.py): the logbook does not keep the board's.
TARGET_SWR = BOARD_DEFAULTS["tune"]["target_swr"]
BIN_HZ = BOARD_DEFAULTS["memory"]["bin_hz"]  # the shipped memory bins, where the logbook has not the board's


def _bin_key(r: Any, bin_widths: dict[str, float] | None) -> int:
    """The memory bin of a tune row, in its board's bins (a series joins only tunes of one bin)."""
    w = (bin_widths or {}).get(_get(r, "board_id"), BIN_HZ)
    return bin_of(r["freq_hz"] or 0.0, w)


def _band_order(names) -> list[str]:
    from feedmatch.rf.bands import ALL_BANDS

    rank = {b.name: i for i, b in enumerate(ALL_BANDS)}
    return sorted(names, key=lambda n: (rank.get(n, len(rank)), n))


def _colours(n: int) -> list:
    from matplotlib import colormaps

    cmap = colormaps["tab10"]
    return [cmap(i % 10) for i in range(n)]


def draw_swr_by_band(ax, by: dict, missed: list, bin_widths: dict[str, float] | None = None) -> None:
    """SWR after each locked tune over time: one colour per band (in band order), one
    line per memory bin (a line never joins two frequencies; bin_widths: {board key: Hz},
    the shipped width for the others), the target drawn, the time axis in UTC."""
    import datetime as dt

    import matplotlib.dates as mdates

    def when(r):
        t = dt.datetime.fromisoformat(r["time"])
        return t if t.tzinfo else t.replace(tzinfo=dt.UTC)
    order = _band_order(by)
    for band, colour in zip(order, _colours(len(order))):
        bins = defaultdict(list)
        for r in by[band]:
            bins[_bin_key(r, bin_widths)].append(r)
        for i, (_k, rs) in enumerate(sorted(bins.items())):
            ax.plot([when(r) for r in rs], [r["swr_after"] for r in rs], "o-", ms=3, color=colour,
                    label=band if i == 0 else None)
    with_swr = [r for r in missed if r["swr_after"] is not None and r["swr_after"] > 0]
    if with_swr:
        ax.plot([when(r) for r in with_swr], [min(r["swr_after"], 10.0) for r in with_swr],
                "x", color="red", ms=6, label="not locked (best effort, through)")
    no_result = [r for r in missed if r not in with_swr]
    if no_result:
        # No SWR to show (aborted, fault): marked along the top edge so they are not lost.
        top = max([r["swr_after"] for rs in by.values() for r in rs] + [2.0])
        ax.plot([when(r) for r in no_result], [top] * len(no_result), "v",
                color="0.4", ms=6, label="no result (aborted, fault)")
    ax.axhline(TARGET_SWR, color="0.3", ls="--", lw=1, label=f"target SWR {TARGET_SWR:g}")
    ax.set_ylabel("SWR after tune (1 = perfect match)")
    ax.set_xlabel("time (UTC)")
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m-%d %H:%M", tz=dt.UTC))
    widths = {(bin_widths or {}).get(_get(r, "board_id"), BIN_HZ) for rs in by.values() for r in rs} or {BIN_HZ}
    per = f"{widths.pop() / 1e3:g} kHz frequency bin" if len(widths) == 1 else "memory bin of its board"
    ax.set_title(f"SWR after tune by band (one line per {per})")
    ax.legend(fontsize=8, ncol=4)


def draw_states_by_band(ax, by: dict) -> None:
    """The matched relay states per band, the capacitor's side told apart."""
    order = _band_order(by)
    for band, colour in zip(order, _colours(len(order))):
        for side, mark, word in ((0, "o", "C on tx side"), (1, "^", "C on ant side")):
            rs = [r for r in by[band] if (r["after_shunt"] or 0) == side]
            if rs:
                ax.scatter([r["after_l"] for r in rs], [r["after_c"] for r in rs], s=18, marker=mark, color=colour,
                           label=f"{band}, {word}")
    ax.set_xlabel("inductor relay code (L)")
    ax.set_ylabel("capacitor relay code (C)")
    ax.set_title("matched states per band (o: C on the transmitter side, ^: on the antenna side)")
    if by:
        ax.legend(fontsize=7)


def report_plots(outdir: str, rows: list, bin_widths: dict[str, float] | None = None) -> list[Path]:
    """The report's figures into outdir; bin_widths as make_report gives them."""
    from feedmatch.plots import _plt

    plt = _plt()
    d = Path(outdir)
    d.mkdir(exist_ok=True)  # its parent was checked (feedmatch.outpaths)
    by = defaultdict(list)
    missed = []     # tunes that ended without a lock: they belong in the picture too
    for r in rows:
        if r["outcome"] == PRESET:
            continue  # not a tune: no reading was taken
        if r["outcome"] == LOCKED and r["swr_after"] is not None:
            by[r["band"]].append(r)
        else:
            missed.append(r)
    files = []
    fig, ax = plt.subplots(figsize=(8, 4))
    draw_swr_by_band(ax, by, missed, bin_widths)
    fig.autofmt_xdate()
    f = d / "swr_by_band.png"
    fig.savefig(f, dpi=110, bbox_inches="tight")
    plt.close(fig)
    files.append(f)
    fig, ax = plt.subplots(figsize=(6, 5))
    draw_states_by_band(ax, by)
    f = d / "states_by_band.png"
    fig.savefig(f, dpi=110, bbox_inches="tight")
    plt.close(fig)
    files.append(f)
    return files


def station_view(db: str, last: int = 2000) -> dict[str, Any]:
    """What the live page shows from the logbook: the per-band table with its health
    flags, each band's SWR after tune over time (the last `last` tunes), and the
    matched states as the load each one matches (a reflection coefficient against
    50 ohm, for a Smith chart), from the board's own element values where the
    logbook has them (else the shipped network's)."""
    from feedmatch.rf.network import Z0_OHM, gamma, load_network

    rep = make_report(db)
    rows, banks = rep["rows"], rep["banks"]
    default_bank = load_network(None).firmware_bank()
    series: dict[str, list] = defaultdict(list)
    smith: dict[str, list] = defaultdict(list)
    for r in rows[-last:]:
        if r["outcome"] == PRESET:
            continue  # no reading was taken
        if r["swr_after"] is not None:
            # [time, SWR after, outcome, memory bin]: the page joins a bin's points only.
            series[r["band"]].append([r["time"], r["swr_after"], r["outcome"], _bin_key(r, rep["bin_widths"])])
        if r["outcome"] == LOCKED and r["after_l"] is not None and not r["after_bypass"] and r["freq_hz"]:
            bank = banks.get(r["board_id"], default_bank)
            z = load_matched_by(bank, r["freq_hz"] / 1e6, int(r["after_l"]), int(r["after_c"]),
                                     int(r["after_shunt"]))
            if z is not None and z.real > 0:
                g = complex(gamma(z, Z0_OHM))
                # [re, im, side]: side 0 the capacitor on the transmitter side, 1 on the antenna side.
                smith[r["band"]].append([round(g.real, 4), round(g.imag, 4), int(r["after_shunt"])])
    from feedmatch.logbook.watch import watch_lines

    return {"tunes": rep["tunes"], "bands": rep["bands"], "series": series, "smith": smith,
            "lines": report_lines(rep), "band_order": _band_order(set(series) | set(smith)),
            "target_swr": TARGET_SWR, "watch": watch_lines(rep.get("watch") or {}),
            "watch_flag": any(bool(w.get("finding")) for w in (rep.get("watch") or {}).values())}
