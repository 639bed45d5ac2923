"""The per-band health check on synthetic logbook rows."""

from __future__ import annotations

import pytest
from feedmatch.logbook.report import band_table, health


def _row(seq, f, l, c, swr=1.2):
    return {"seq": seq, "freq_hz": f, "band": "40m", "outcome": "locked", "after_l": l, "after_c": c,
            "after_shunt": 0, "swr_after": swr, "duration_ms": 6, "measurements": 1, "memory_hit": 1}


def test_recall_jitter_is_steady_and_a_real_shift_is_flagged():
    steady = [_row(i, 7.15e6, 101 + (i % 3) - 1, 91 + (i % 2)) for i in range(8)]
    assert health(steady) == {"flag": False, "note": "steady"}
    shifted = [_row(i, 7.15e6, 101 if i < 4 else 111, 91) for i in range(8)]
    h = health(shifted)
    assert h["flag"] and "L code moved 101 -> 111" in h["note"]
    worse = [_row(i, 7.15e6, 101, 91, 1.1 if i < 4 else 1.6) for i in range(8)]
    assert "SWR after tune rose" in health(worse)["note"]
    # Different frequencies are never compared with each other.
    mixed = [_row(i, 7.04e6 if i % 2 else 7.15e6, 104 if i % 2 else 101, 89) for i in range(8)]
    assert not health(mixed)["flag"]


def test_band_table_counts():
    rows = [_row(i, 7.1e6, 100, 90) for i in range(3)] + [dict(_row(9, 7.1e6, 5, 5), outcome="best-effort")]
    b = band_table(rows)[0]
    assert b["tunes"] == 4 and b["success_rate"] == 0.75 and b["most_used_state"] == [100, 90, "tx"]


def _logbook_with_one_tune(path):
    from feedmatch.logbook.store import Logbook

    book = Logbook(path)
    book.start_session("hollow-oak-1", "/dev/null")
    book.add({"board_id": "hollow-oak-1", "seq": 1, "freq_hz": 7.1e6, "swr_before": 3.0, "swr_after": 1.2,
              "outcome": "locked", "n": 5, "ms": 400})
    book.close()


def test_readers_leave_a_foreign_database_untouched(tmp_path):
    import sqlite3

    import pytest
    from feedmatch.errors import InputError
    from feedmatch.logbook.report import make_report
    from feedmatch.sim.fitbox import traces_from_logbook

    foreign = tmp_path / "other.sqlite"
    db = sqlite3.connect(foreign)
    db.execute("CREATE TABLE contacts (call TEXT)")
    db.commit()
    db.close()
    before = foreign.read_bytes()
    for reader in (make_report, traces_from_logbook):
        with pytest.raises(InputError, match="not a feedmatch logbook"):
            reader(str(foreign))
    assert foreign.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["other.sqlite"]  # no -wal, no -shm


def test_a_reader_does_not_write_a_real_logbook(tmp_path):
    from feedmatch.logbook.report import make_report

    book = tmp_path / "station.sqlite"
    _logbook_with_one_tune(book)
    book.chmod(0o444)  # a reader must manage without write access
    before = book.read_bytes()
    assert make_report(str(book))["tunes"] == 1
    assert book.read_bytes() == before


def test_a_corrupt_logbook_is_reported_not_read_as_empty(tmp_path):
    import pytest
    from feedmatch.errors import InputError
    from feedmatch.logbook.report import make_report

    book = tmp_path / "station.sqlite"
    _logbook_with_one_tune(book)
    raw = bytearray(book.read_bytes())
    # Overwrite the middle of the second page (the first table's b-tree): SQLite's
    # page layout, https://sqlite.org/fileformat2.html (page size at offset 16).
    page = int.from_bytes(raw[16:18], "big")
    raw[page + 8: page + page // 2] = b"\xa5" * (page // 2 - 8)
    book.write_bytes(bytes(raw))
    with pytest.raises(InputError, match="integrity|not a usable"):
        make_report(str(book))


def _red_pixels(png) -> int:
    import matplotlib.image as mpimg

    im = mpimg.imread(str(png))
    r, g, b = im[..., 0], im[..., 1], im[..., 2]
    return int(((r > 0.9) & (g < 0.15) & (b < 0.15)).sum())


def test_the_report_plot_shows_tunes_that_did_not_lock(tmp_path):
    # A tune that ended best-effort is drawn (red crosses), not dropped from the picture.
    from feedmatch.logbook.report import report_plots

    locked = [dict(_row(i, 7.1e6, 100, 90), time=f"2026-11-0{i + 1}T10:00:00") for i in range(3)]
    failed = dict(_row(9, 7.1e6, 5, 5, 2.4), outcome="best-effort", time="2026-11-05T10:00:00")
    aborted = dict(_row(10, 7.1e6, 5, 5, None), outcome="aborted", time="2026-11-06T10:00:00")
    only = report_plots(str(tmp_path / "a"), locked)[0]
    both = report_plots(str(tmp_path / "b"), locked + [failed, aborted])[0]
    assert _red_pixels(only) == 0 and _red_pixels(both) > 20


def test_the_csv_names_the_capacitor_side_as_the_tables_do(tmp_path):
    import csv

    from feedmatch.logbook.report import write_csv

    rows = [dict(_row(1, 7.1e6, 100, 90), time="2026-11-01T10:00:00", board_id="hollow-oak-1", reason="",
                 swr_before=3.0, after_bypass=0),
            dict(_row(2, 7.1e6, 100, 90), time="2026-11-01T11:00:00", board_id="hollow-oak-1", reason="",
                 swr_before=3.0, after_bypass=0, after_shunt=1)]
    write_csv(str(tmp_path / "t.csv"), rows)
    got = list(csv.DictReader(open(tmp_path / "t.csv", encoding="utf-8")))
    assert [r["after_shunt"] for r in got] == ["tx", "ant"]


def _shipped_bank():
    from feedmatch.rf.network import load_network
    from fmlogic import lnet

    net = load_network(None)
    return lnet.Bank(net.z0_ohm, net.inductors_uh, net.capacitors_pf)


def test_a_moved_state_is_told_in_microhenries_and_picofarads():
    # The shipped bank's binary weighting: L code 101 = 64+32+4+1 steps and 111 =
    # 64+32+8+4+2+1 steps of its smallest inductor (arithmetic of the bank, no model).
    bank = _shipped_bank()
    step = bank.lv[1]
    shifted = [_row(i, 7.15e6, 101 if i < 4 else 111, 91) for i in range(8)]
    note = health(shifted, bank=bank)["note"]
    assert f"matched L moved {101 * step:.2f} -> {111 * step:.2f} uH (code 101 -> 111)" in note


def test_the_logbook_keeps_the_board_values_for_the_report(tmp_path):
    from feedmatch.logbook.report import make_report
    from feedmatch.logbook.store import Logbook
    from feedmatch.rf.network import load_network

    bank = _shipped_bank()
    shipped = load_network(None)
    db = tmp_path / "station.sqlite"
    book = Logbook(db)
    book.start_session("hollow-oak-1", "/dev/null")
    net = {"z0_ohm": shipped.z0_ohm, "inductors_uh": shipped.inductors_uh, "capacitors_pf": shipped.capacitors_pf}
    # A learned correction (fit-box): the inductors 10 % high.
    corr = {"inductors_uh": [1.1 * v for v in net["inductors_uh"]], "capacitors_pf": net["capacitors_pf"]}
    book.set_bank("hollow-oak-1", {"network": net, "correction": corr})
    for i in range(8):
        book.add({"board_id": "hollow-oak-1", "seq": i + 1, "freq_hz": 7.15e6, "swr_before": 3.0,
                  "swr_after": 1.2, "outcome": "locked", "n": 1, "ms": 6, "after": [101, 91, 0, 0]})
    book.close()
    b = make_report(str(db))["bands"][0]
    # Code 101 with the corrected values: 1.1 x the nominal sum (see above).
    assert b["most_used_values"]["l_uh"] == pytest.approx(1.1 * 101 * bank.lv[1], rel=1e-6)
    assert b["most_used_values"]["c_pf"] == pytest.approx(91 * bank.cv[1], rel=1e-6)


@pytest.mark.parametrize("mhz,band", [
    (5.3305, "60m"),   # US channel 1 (from memory)
    (5.2585, "60m"),   # the lowest UK allocation edge (from memory)
    (5.4035, "60m"),   # US channel 5 (from memory)
    (5.3600, "60m"),   # inside the WRC-15 allocation, ITU RR 5.133B
    (5.5000, "out"),
    (5.1000, "out"),
])
def test_national_60m_channels_count_as_60m(mhz, band):
    from feedmatch.rf.bands import band_of

    assert band_of(mhz * 1e6) == band


def test_presets_are_counted_apart_from_tunes():
    pre = dict(_row(1, 7.1e6, 101, 94), outcome="preset", measurements=0, preset=0)
    conf = dict(_row(2, 7.1e6, 101, 94), preset=1, measurements=1)
    searched = dict(_row(3, 7.1e6, 101, 94), preset=1, measurements=6)
    plain = dict(_row(4, 7.1e6, 101, 94), preset=0)
    b = band_table([dict(pre, preset=0), conf, dict(pre, seq=5), searched, plain])[0]
    assert b["tunes"] == 3 and b["presets"] == 2 and b["presets_confirmed"] == 1
    assert b["median_measurements"] == 1 and b["presets_as_predicted"] == 0


def test_a_computed_preset_the_first_reading_bore_out_is_counted_and_said():
    # The board's why for a first reading that allowed the host's prediction (fmlogic.controller).
    from feedmatch.logbook.report import report_lines

    pred = dict(_row(1, 28.5e6, 10, 3), band="10m", outcome="best-effort", preset=1,
                reason="preset as predicted (SWR 1.62), no search; true SWR 1.29-1.64: the readings cannot prove 1.50")
    pre = dict(_row(2, 28.6e6, 10, 3), band="10m", outcome="preset", measurements=0, preset=0,
               reason="preset from antenna curve")
    searched = dict(pred, seq=3, measurements=7, reason="preset worse than predicted (SWR 1.05), searched; matched")
    b = band_table([pre, pred, searched])[0]
    assert b["presets"] == 1 and b["presets_as_predicted"] == 1
    lines = report_lines({"tunes": 3, "bands": [b], "first": "2026-11-05T09:00:00", "last": "2026-11-05T10:00:00"})
    assert any("as predicted by the first reading (no relay moved): 1" in ln for ln in lines)


def test_best_effort_tunes_carry_the_true_swr_they_allow(tmp_path):
    # The record's swr_bound (fmlogic.coupler) reaches the band table, its text and the CSV.
    import csv
    import json

    from feedmatch.logbook.report import report_lines, write_csv

    rows = [dict(_row(i, 7.1e6, 100, 90), raw=json.dumps({"swr_bound": [1.0, 1.3]})) for i in range(3)]
    rows += [dict(_row(9 + i, 7.1e6, 5, 5, 1.4), outcome="best-effort", time="2026-11-05T10:00:00",
                  raw=json.dumps({"swr_bound": [1.1, hi]})) for i, hi in enumerate((1.7, 1.8, 1.9))]
    b = band_table(rows)[0]
    assert b["best_effort"] == 3 and b["best_effort_true_swr_max"] == 1.8
    lines = report_lines({"tunes": 6, "bands": [b], "first": "2026-11-05T09:00:00", "last": "2026-11-05T10:00:00"})
    assert any("40m 3 (true SWR up to 1.80" in ln for ln in lines)
    for r in rows:
        r.setdefault("time", "2026-11-05T09:00:00")
        for k in ("board_id", "reason", "swr_before", "after_bypass", "preset", "rig_hz", "rig_mode"):
            r.setdefault(k, None)
    write_csv(str(tmp_path / "t.csv"), rows)
    got = list(csv.DictReader(open(tmp_path / "t.csv")))
    assert got[-1]["outcome"] == "best-effort" and got[-1]["true_swr_high"] == "1.9"


def test_the_csv_gives_the_matched_state_in_microhenries_and_picofarads(tmp_path):
    # The values are the bank's own sums of the switched elements (arithmetic of the bank).
    import csv

    from feedmatch.logbook.report import write_csv

    bank = _shipped_bank()
    rows = [dict(_row(1, 7.1e6, 100, 90), time="2026-11-01T10:00:00", board_id="hollow-oak-1", reason="",
                 swr_before=3.0, after_bypass=0),
            dict(_row(2, 7.1e6, 100, 90), time="2026-11-01T11:00:00", board_id="another-box", reason="",
                 swr_before=3.0, after_bypass=0)]
    write_csv(str(tmp_path / "t.csv"), rows, {"hollow-oak-1": bank})
    got = list(csv.DictReader(open(tmp_path / "t.csv", encoding="utf-8")))
    assert float(got[0]["after_l_uh"]) == pytest.approx(bank.lv[100], abs=1e-3)
    assert float(got[0]["after_c_pf"]) == pytest.approx(bank.cv[90], abs=0.1)
    assert got[1]["after_l_uh"] == "" and got[1]["after_c_pf"] == ""  # no values known for that board


def test_wrote_lines_go_to_stdout_and_to_stderr_under_json(tmp_path):
    """What a command wrote is said on standard output after its text, and on standard
    error under --json (whose standard output is one JSON object alone)."""
    import json

    from ..conftest import run_cli

    db = tmp_path / "station.sqlite"
    _logbook_with_one_tune(db)
    r = run_cli("report", "--db", str(db), "--csv", str(tmp_path / "t.csv"), "--plots", str(tmp_path))
    assert r.returncode == 0 and f"wrote {tmp_path / 't.csv'}" in r.stdout.splitlines()
    assert f"wrote {tmp_path / 'swr_by_band.png'}" in r.stdout.splitlines() and "wrote" not in r.stderr
    r = run_cli("report", "--db", str(db), "--csv", str(tmp_path / "u.csv"), "--plots", str(tmp_path), "--json")
    assert r.returncode == 0 and json.loads(r.stdout)["tunes"] == 1
    assert f"wrote {tmp_path / 'u.csv'}" in r.stderr.splitlines()
    assert f"wrote {tmp_path / 'states_by_band.png'}" in r.stderr.splitlines()


@pytest.mark.parametrize("bin_hz,flagged", [(None, True), (10000, False)])
def test_health_compares_tunes_within_the_boards_own_memory_bins(tmp_path, bin_hz, flagged):
    # 7.151 and 7.161 MHz share a bin of the shipped 25 kHz memory (7.150-7.175 MHz) but
    # not of a board set to 10 kHz bins (fmlogic.memory numbers bins from 0 Hz: arithmetic).
    # Four steady tunes on each: told apart, nothing moved; lumped together, the state "moved".
    from feedmatch.logbook.report import make_report
    from feedmatch.logbook.store import Logbook

    db = tmp_path / "station.sqlite"
    book = Logbook(db)
    book.start_session("hollow-oak-1", "/dev/null")
    sections = {"network": {"z0_ohm": 50.0, "inductors_uh": [0.1 * 2 ** k for k in range(7)],
                            "capacitors_pf": [10.0 * 2 ** k for k in range(7)]}}
    if bin_hz:
        sections["memory"] = {"bin_hz": bin_hz}
    book.set_bank("hollow-oak-1", sections)
    for i in range(8):
        f, l_code = (7.151e6, 101) if i < 4 else (7.161e6, 111)
        book.add({"board_id": "hollow-oak-1", "seq": i + 1, "freq_hz": f, "swr_before": 3.0,
                  "swr_after": 1.2, "outcome": "locked", "n": 1, "ms": 6, "after": [l_code, 91, 0, 0]})
    book.close()
    h = make_report(str(db))["bands"][0]["health"]
    assert h["flag"] is flagged, h
