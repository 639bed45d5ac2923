"""Readings are checked before they are used: every strategy, under adversarial readings.

A strategy must never raise, never ask for a state without a reading being taken,
always end within its budget, and never call a dead reflected detector a match.
"""

from __future__ import annotations

import math

import pytest
from feedmatch.rf.network import load_network
from fmlogic import search
from fmlogic.swr import BAD_READING, NO_RF, reading_gamma
from hypothesis import given, settings
from hypothesis import strategies as hs

NET = load_network()
BANK = NET.firmware_bank()
NAMES = list(search.NAMES)

# Powers a broken detector, a loose connector or a flipped sign can produce.
POWER = hs.one_of(hs.floats(allow_nan=True, allow_infinity=True), hs.just(0.0), hs.just(-0.0),
                  hs.floats(min_value=-1e3, max_value=0.0), hs.floats(min_value=1e-6, max_value=1e3))


def _valid(st):
    return (isinstance(st, tuple) and len(st) == 3 and 0 <= st[0] <= BANK.l_max
            and 0 <= st[1] <= BANK.c_max and st[2] in (0, 1))


def _drive(s, reading, limit):
    """Ask and tell until done; every propose is followed by exactly one observe."""
    k = 0
    while not s.done and k < limit:
        st = s.propose()
        assert _valid(st)
        if s.done:
            break
        fwd, ref = reading(k, st)
        s.observe(fwd, ref)
        k += 1
    return k


@pytest.mark.parametrize("name", NAMES)
@settings(max_examples=60, deadline=None)
@given(pairs=hs.lists(hs.tuples(POWER, POWER), min_size=1, max_size=40),
       budget=hs.integers(min_value=1, max_value=40), f_mhz=hs.sampled_from([1.9, 7.1, 14.2, 28.5]))
def test_any_readings_never_raise_and_end_within_budget(name, pairs, budget, f_mhz):
    s = search.make(name, BANK, f_mhz * 1e6, 1.5, budget, memory_hint=(40, 50, 0, 1.3))
    k = _drive(s, lambda i, st: pairs[i % len(pairs)], budget + 5)
    assert s.done, "the strategy must end by itself"
    assert k <= budget and s.n <= budget
    state, swr = s.result()
    assert _valid(state)
    assert swr == -1.0 or 1.0 <= swr <= 999.0


@pytest.mark.parametrize("name", NAMES)
def test_a_nan_every_third_reading_still_reads_and_ends(name):
    # A flaky ADC: the strategy measures again, counts it, and finishes within budget.
    zl = 20 - 60j
    from fmlogic import lnet

    def reading(i, st):
        if i % 3 == 2:
            return (10.0, float("nan"))
        g = lnet.gamma_state(BANK, 14.1, zl, *st) if st != search.BYPASS else abs((zl - 50) / (zl + 50))
        return (10.0, 10.0 * g * g)

    s = search.make(name, BANK, 14.1e6, 1.5, 40)
    k = _drive(s, reading, 200)
    assert s.done and k <= 40 and s.fault is None


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("bad", [(10.0, float("nan")), (float("inf"), 1.0), (10.0, -1.0), (-3.0, 1.0),
                                 (10.0, 50.0)])
def test_three_bad_readings_in_a_row_are_a_fault(name, bad):
    s = search.make(name, BANK, 7.1e6, 1.5, 40)
    k = _drive(s, lambda i, st: bad, 100)
    assert s.done and k == 3
    assert s.fault == "bad readings"
    assert s.result() == (search.BYPASS, -1.0)


@pytest.mark.parametrize("name", NAMES)
def test_a_dead_reflected_detector_is_a_fault_not_a_match(name):
    # Reflected 0 W at real forward power on every state: a perfect match cannot be
    # matched by two states a series reactance of z0 apart (common practice: a j1
    # step on a matched line reads |j1/(2 + j1)| = 0.45).
    s = search.make(name, BANK, 14.2e6, 1.5, 40)
    k = _drive(s, lambda i, st: (10.0, 0.0), 100)
    assert k == 2
    assert s.fault == "reflected detector reads nothing"
    assert s.result()[1] == -1.0


@pytest.mark.parametrize("name", NAMES)
def test_a_real_perfect_match_at_bypass_is_kept_after_one_contrast(name):
    # The antenna alone is matched (50 ohm): bypass reads nothing, the contrast state
    # reads 0.45, so bypass is the answer, after two readings.
    from fmlogic import lnet

    zl = complex(50.0, 0.0)

    def reading(i, st):
        g = 0.0 if st == search.BYPASS else lnet.gamma_state(BANK, 14.2, zl, *st)
        return (10.0, 10.0 * g * g)

    s = search.make(name, BANK, 14.2e6, 1.5, 40)
    k = _drive(s, reading, 100)
    assert k == 2 and s.fault is None
    assert s.result() == (search.BYPASS, 1.0)


def test_no_carrier_is_no_result():
    s = search.make("model", BANK, 7.1e6, 1.5, 60)
    s.propose()
    s.observe(0.0, 0.0)
    assert s.done and s.no_rf and s.result() == (search.BYPASS, -1.0)


@pytest.mark.parametrize("fwd,ref,want", [
    (10.0, 2.5, 0.5),                    # |gamma| = sqrt(Pr/Pf) (Pozar 4th ed. eq. 2.61)
    (10.0, 0.0, 0.0),
    (0.0, 0.0, NO_RF),
    (float("nan"), 1.0, BAD_READING),
    (10.0, float("inf"), BAD_READING),
    (10.0, -0.1, BAD_READING),
    (10.0, 14.5, BAD_READING),           # reflected 1.2x forward in voltage: not a passive load
    (10.0, 10.5, 0.998),                 # up to it: clipped to SWR 999 (gain mismatch at the edge)
])
def test_reading_gamma_table(fwd, ref, want):
    g = reading_gamma(fwd, ref)
    assert g == pytest.approx(want, abs=1e-3) if not math.isnan(want) else math.isnan(g)
