"""Presets on frequencies with nothing stored: the state computed from the measured
antenna (sim/curvepreset.py), sent in a preset request, switched cold by the firmware
and confirmed by the first carrier with a recall."""

from __future__ import annotations

import numpy as np
from feedmatch.rf.antenna import Monopole
from feedmatch.rf.network import all_states_zin, best_state, gamma, load_network, swr_of
from feedmatch.sim.inproc import InProcessBoard
from feedmatch.sim.station import load_station
from fmlogic import link
from fmlogic.controller import Controller


def _run(ctl, steps=3000, until=lambda c: False):
    for _ in range(steps):
        ctl.step()
        if until(ctl):
            return True
    return False


def _answers(b):
    out, buf = {}, bytes(b.outbox)
    b.outbox.clear()
    for line in buf.split(b"\n"):
        fr = link.decode(line + b"\n") if line else None
        if fr and fr[0] == "A":
            out[fr[1]] = fr
    return out


def _records(ctl, since):
    return ctl.rec.since(since, 20)


def test_a_computed_state_is_preset_cold_and_confirmed_by_one_reading(tmp_path):
    st = load_station()
    model = st.hardware()
    b = InProcessBoard(model)
    ctl = Controller(b, st.board_config, str(tmp_path))
    f = 21.3e6
    # The host's computation (here on the station's own antenna and network, as a curve would give it).
    l, c, sh, g = best_state(st.network, f, complex(st.antenna.impedance(f)))
    swr = float(swr_of(g))
    assert ctl.mem.lookup(f) is None  # nothing stored anywhere
    sets = b.sets
    b.inbox += link.encode("Q", 7, "preset", {"freq_hz": f, "state": [l, c, sh], "swr": round(swr, 2)})
    _run(ctl, 5)
    kind, _s, word, ans = _answers(b)[7]
    assert word == "ok" and ans["preset"] is True and ans["source"] == "antenna curve"
    assert ans["relays"] == [l, c, sh, 0] and b.sets == sets + 1 and model.violations == []
    pre = _records(ctl, 0)[-1]
    assert pre["outcome"] == "preset" and pre["why"] == "preset from antenna curve" and pre["mem"] is False
    # The first carrier: a recall from the preset state, one reading, nothing switched under power.
    n, sets = ctl.rec.seq, b.sets
    model.key(10, f)
    assert _run(ctl, until=lambda c, n=n: c.rec.seq > n and c.tune is None)
    rec = _records(ctl, n)[-1]
    assert rec["preset"] is True and rec["strategy"] == "recall" and rec["outcome"] == "locked"
    assert rec["n"] <= 2 and model.violations == []


def test_a_bad_computed_state_moves_nothing(tmp_path):
    st = load_station()
    model = st.hardware()
    b = InProcessBoard(model)
    ctl = Controller(b, st.board_config, str(tmp_path))
    sets = b.sets
    for i, bad in enumerate(([999, 0, 0], [1, 2], [1, 2, 3], "L1C2", [1.5, 2, 0], [True, 2, 0])):
        b.inbox += link.encode("Q", 20 + i, "preset", {"freq_hz": 21.3e6, "state": bad, "swr": 1.2})
        _run(ctl, 5)
        kind, _s, word, ans = _answers(b)[20 + i]
        assert word == "ok" and ans["preset"] is False
    assert b.sets == sets
    # With a carrier on the line the computed preset is refused like any other.
    model.key(10, 21.3e6)
    b.inbox += link.encode("Q", 30, "preset", {"freq_hz": 21.3e6, "state": [1, 2, 1], "swr": 1.2})
    _run(ctl, 1)
    fr = _answers(b).get(30)
    assert fr is None or fr[2] == "err"


def test_the_curve_interpolates_between_measured_points():
    """Points of a closed-form vertical (Balanis' induced-EMF monopole, rf/antenna.py) with a
    few ohm of error: between them the computed state meets SWR 2 on the true antenna; far
    from every point nothing is offered."""
    from feedmatch.sim.curvepreset import CurvePresets

    ant = Monopole(4.5, 0.0125, 5.0)
    net = load_network()
    fs = np.array([7.05e6, 7.2e6, 10.12e6, 14.1e6, 14.3e6, 18.1e6, 21.1e6, 21.4e6, 24.9e6])
    rng = np.random.default_rng(2)
    z = ant.impedance(fs) * (1 + rng.normal(0, 0.005, len(fs)))
    cp = CurvePresets(fs, z, np.full(len(fs), 2.0), net)
    for f in (7.12e6, 14.2e6, 21.25e6):
        plan = cp.plan(f)
        assert plan is not None
        l, c, sh = plan["state"]
        g = abs(gamma(all_states_zin(net, f, complex(ant.impedance(f))), 50.0)[sh, l, c])
        assert float(swr_of(g)) <= 2.0
        zi, err = cp.impedance(f)
        assert abs(zi - complex(ant.impedance(f))) <= max(3 * err, 0.03 * abs(zi))
    assert cp.plan(3.6e6) is None  # far below every measured point


def test_the_computed_state_is_the_one_whose_first_reading_is_least_through_the_leaky_coupler():
    """A coupler of finite directivity reads |gamma_in + d| / |1 + gamma_in d| (the leakage d
    adds to the reflected wave and spoils the forward one: the directivity error term of the
    one-port error model, Engen's six-port papers and common practice); the firmware confirms a
    preset by that reading, so the plan picks the state it predicts least, which with 25 dB of
    leakage at 28 MHz is not the state of least |gamma_in|."""
    from feedmatch.sim.curvepreset import CurvePresets

    ant = Monopole(4.5, 0.0125, 5.0)
    net = load_network()
    fs = np.array([24.9e6, 28.3e6, 28.6e6, 29.0e6])
    z = ant.impedance(fs)
    d28 = 0.056 * np.exp(0.6j)  # 25 dB at 28 MHz, a phase of the build
    plain = CurvePresets(fs, z, np.full(len(fs), 2.0), net)
    leaky = CurvePresets(fs, z, np.full(len(fs), 2.0), net, leak28=d28)
    f = 28.45e6
    zc = plain.impedance(f)[0]
    g = gamma(all_states_zin(net, f, zc), 50.0)
    d = d28 * f / 28e6
    rd = np.abs(g + d) / np.abs(1 + g * d)
    p0, p1 = plain.plan(f), leaky.plan(f)
    l0, c0, s0 = p0["state"]
    l1, c1, s1 = p1["state"]
    assert abs(g[s0, l0, c0]) == np.abs(g).min()  # no leakage known: the least |gamma_in|
    assert rd[s1, l1, c1] == rd.min() and p1["reading"] == round(float(rd.min()), 4)
    assert (l0, c0, s0) != (l1, c1, s1) and rd[s1, l1, c1] < rd[s0, l0, c0]
    # The SWR sent is the predicted true one of the chosen state (what the firmware compares).
    assert p1["swr"] == round(float(swr_of(abs(g[s1, l1, c1]))), 2)
    # ... and the same SWR is what the preset request asks the first reading to bear out.
    assert p1["expect_swr"] == p1["swr"]
