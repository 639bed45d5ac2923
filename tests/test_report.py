"""The per-band health check on synthetic logbook rows."""

from __future__ import annotations

from feedmatch.report import band_table, health


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
