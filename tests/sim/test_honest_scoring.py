"""The search on boxes that are not its model, scored honestly.

Reference for every success figure: the exhaustive oracle over all 32768 states of
the *true* (drawn) box.  The strategies see only what the box could know: nominal
element values, the coupler leakage as calibrate measures it, and the memory the
firmware's own code kept from earlier tunes.  Coupler: a flat 25 dB directivity,
typical of a home-built tandem coupler (common practice, from memory).
"""

from __future__ import annotations

import statistics
from dataclasses import replace

import pytest
from feedmatch.rf.network import load_network
from feedmatch.sim.boxes import draw_box
from feedmatch.sim.loads import Load, smith_loads, vertical_loads, vertical_sessions
from feedmatch.sim.scorer import ScoreConfig, run_parallel, score, score_one, summarise

NET = load_network()


def _jobs(loads_per_box, strategy, seed0, memory=False):
    jobs = []
    for k, loads in enumerate(loads_per_box):
        box = draw_box(NET, seed0 + k, 0.05, "default")
        det = replace(box.detector, directivity_flat_db=25.0)
        jobs.append((loads, box.network, NET, ScoreConfig(strategy=strategy, detector=det, seed=k, memory=memory),
                     det))
    return jobs


def _hard_corpus():
    """Loads of the kinds that failed before the search knew its coupler: near the edge
    of the chart (|gamma| 0.9-0.97 at every angle) and vertical-like ones with abs(X)/R
    from 10 to 50 (short verticals on the low bands), drawn here, not taken from a run."""
    edge = [ld for ld in smith_loads(600, seed=41) if abs((ld.z - 50) / (ld.z + 50)) > 0.8][:90]
    vert = [ld for ld in vertical_loads(500, seed=42) if 10 <= abs(ld.x_ohm) / ld.r_ohm <= 50][:90]
    return edge, vert


@pytest.fixture(scope="module")
def hard():
    edge, vert = _hard_corpus()
    out = {}
    for label, loads in (("edge", edge), ("vert", vert)):
        rows = [r for part in run_parallel(_jobs([loads] * 3, "model", 6100), 2) for r in part]
        out[label] = (rows, summarise(rows, 1.5, 1.4))
    return out


def test_cold_start_on_drawn_boxes_behind_a_25_db_coupler(hard):
    # Asserted at the level this search reaches (measured 0.98 and 1.00 on this corpus),
    # with a margin for the few loads that change with the boxes.
    for label, floor in (("edge", 0.97), ("vert", 0.97)):
        rows, s = hard[label]
        assert s["matchable"] > 120, label
        assert s["success_rate"] >= floor, (label, s["success_rate"])
        for r in rows:
            assert r["swr"] >= r["oracle_swr"] - 1e-9  # nobody beats the oracle
            assert r["hot_switches"] == 0


def test_no_false_locks_and_never_worse_than_the_antenna_alone(hard):
    rows = hard["edge"][0] + hard["vert"][0]
    s = summarise(rows, 1.5)
    assert s["false_lock_rate"] <= 0.01       # the target
    assert s["worse_than_bypass_rate"] <= 0.005
    # A lock is a claim: the reading it rests on is at or below the search's accept level.
    for r in rows:
        if r["outcome"] == "locked":
            assert r["estimated_swr"] <= 1.5


def test_memory_sessions_through_the_firmwares_memory():
    # Operating sessions on drawn verticals: each tune's hint is what
    # fmlogic.memory.Memory kept of the earlier ones; cold start on the same loads beside.
    sess = vertical_sessions(4, 30, seed=43)
    mem = [r for part in run_parallel(_jobs(sess, "recall", 6200, memory=True), 2) for r in part]
    cold = [r for part in run_parallel(_jobs(sess, "model", 6200), 2) for r in part]
    sm, sc = summarise(mem, 1.5, 1.4), summarise(cold, 1.5, 1.4)
    ok = [r for r in mem if r["oracle_swr"] <= 1.4]
    assert len(ok) > 40 and sum(r["hint"] for r in ok) > 0.7 * len(ok)
    assert sm["median_measurements"] <= 2             # the target
    assert sm["success_rate"] >= sc["success_rate"]        # the target: not below the cold start


def test_no_hint_without_memory():
    # recall with nothing remembered is the cold model search, reading for reading.
    ld = Load(7.1e6, 12.0, -150.0)
    a = score_one(ld, NET, NET, ScoreConfig(strategy="recall"), 3)
    b = score_one(ld, NET, NET, ScoreConfig(strategy="model"), 3)
    assert not a["hint"] and a["trace"] == b["trace"]


def test_a_stored_state_above_target_is_a_start_not_an_answer():
    # The memory holds a poor state for this frequency: recall measures it, then searches on.
    from feedmatch.sim.scorer import new_memory

    mem = new_memory()
    mem.store(14.2e6, (5, 5, 1), 2.4, 0)
    ld = Load(14.2e6, 30.0, -40.0)
    r = score_one(ld, NET, NET, ScoreConfig(strategy="recall"), 5, mem=mem)
    assert r["hint"] and r["trace"][0][:3] == [5, 5, 1]
    assert r["measurements"] > 1 and r["swr"] <= 1.5
    # ...and what it found replaces the poor state.
    assert mem.lookup(14.2e6)[3] <= 1.5


def test_memory_reaches_a_few_percent_in_frequency():
    # An operator's step of 1 % (70 kHz at 7 MHz, three 25 kHz bins) still finds the state.
    from feedmatch.sim.scorer import new_memory

    mem = new_memory()
    mem.store(7.10e6, (60, 80, 0), 1.2, 0)
    assert mem.lookup(7.17e6) is not None
    assert mem.lookup(7.40e6) is None  # beyond 2 %


def test_scores_use_the_firmwares_budget_and_target():
    from fmlogic.config import DEFAULTS

    cfg = ScoreConfig()
    assert cfg.budget == DEFAULTS["tune"]["budget"] and cfg.target_swr == DEFAULTS["tune"]["target_swr"]


def test_readings_counted_for_every_tune_in_a_smith_corpus_on_boxes():
    rows = score(smith_loads(60, seed=44), NET, NET, ScoreConfig(strategy="model"), workers=1)
    assert all(1 <= r["measurements"] <= ScoreConfig().budget for r in rows)
    assert statistics.median(r["measurements"] for r in rows) <= 8
