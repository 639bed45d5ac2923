"""Faults in the simulation (--fault): one spec grammar, shared with the firmware.

The expected states follow from the definitions of the fault kinds (a stuck-out
element's bit never reaches the circuit, a stuck-in one's always does); the
impedances come from the network model, itself held to scikit-rf in
test_network.py, evaluated on the state the damaged box really reaches.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from feedmatch.errors import InputError
from feedmatch.rf.antenna import FixedLoad
from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import evaluate, load_network
from feedmatch.sim.faults import parse_faults
from feedmatch.sim.hardware import SimulatedHardware
from feedmatch.sim.loads import Load
from feedmatch.sim.scorer import ScoreConfig, score_one

from ..conftest import run_mpy

NET = load_network()


def test_the_spec_names_each_fault_and_its_reached_states():
    f = parse_faults("L3:stuck-out,C5:stuck-in,L6:drift=-30%,side:stuck-ant", NET)
    assert f.spec() == "L3:stuck-out,C5:stuck-in,L6:drift=-30%,side:stuck-ant"
    # L3 (bit 3) never in, C5 (bit 5) always in, the capacitor always on the antenna side.
    assert f.reach(0b1111111, 0, 0) == (0b1110111, 0b0100000, 1)
    assert f.reach(0, 0b0000001, 1) == (0, 0b0100001, 1)
    net = f.apply_net(NET)
    assert net.inductors_uh[6] == pytest.approx(NET.inductors_uh[6] * 0.7)
    assert net.inductors_uh[:6] == NET.inductors_uh[:6] and net.capacitors_pf == NET.capacitors_pf


@pytest.mark.parametrize("spec", ["", "L3", "L7:stuck-out", "C1:drift=-100%", "C1:drift=0%", "side:drift=5%",
                                  "L1:stuck-out,", "Q1:stuck-in"])
def test_bad_specs_are_one_input_error(spec):
    if not spec:
        assert not parse_faults(spec, NET)
        return
    with pytest.raises(InputError, match="^--fault: "):
        parse_faults(spec, NET)


def test_the_station_model_reads_the_state_the_damaged_box_reaches():
    z = complex(12, -80)
    f_hz = 14.1e6
    faults = parse_faults("L2:stuck-in,C4:stuck-out,C0:drift=+50%", NET)
    m = SimulatedHardware(NET, FixedLoad(z.real, z.imag), DetectorModel(ideal=True), 30.0, faults=faults)
    m.key(10.0, f_hz)
    m.set(0b0000001, 0b0010011, 1, 0)
    net = replace(NET, capacitors_pf=[NET.capacitors_pf[0] * 1.5, *NET.capacitors_pf[1:]])
    want = complex(evaluate(net, f_hz, z, 0b0000101, 0b0000011, 1)["gamma"])
    assert m.gamma() == pytest.approx(want, abs=1e-12)
    assert m.read()[1] == pytest.approx(10.0 * abs(want) ** 2)


def test_the_scorer_on_a_damaged_box_counts_its_oracle_among_reachable_states():
    """With the side relay stuck on the transmitter side, the oracle is the best
    transmitter-side state, and the search (told nothing) is scored on the states
    it really reaches."""
    faults = parse_faults("side:stuck-tx", NET)
    ld = Load(7.1e6, 8.0, -120.0)
    cfg = ScoreConfig(strategy="model", detector=DetectorModel(ideal=True), faults=faults)
    r = score_one(ld, NET, NET, cfg, seed=1)
    from feedmatch.rf.network import all_states_zin, gamma, oracle

    gm = np.abs(gamma(all_states_zin(NET, ld.freq_hz, ld.z), NET.z0_ohm))
    healthy = oracle(gm)
    tx_only = oracle(np.stack([gm[0], gm[0]]))
    assert r["oracle_swr"] == pytest.approx((1 + tx_only[3]) / (1 - tx_only[3]))
    assert tx_only[3] >= healthy[3]
    fin = (r["l_code"], r["c_code"], 0)
    if not r["through"]:
        assert r["swr"] == pytest.approx(float((1 + gm[fin[2], fin[0], fin[1]]) / (1 - gm[fin[2], fin[0], fin[1]])))


def test_the_firmware_parses_alike_under_the_unix_port(micropython):
    code = ("from fmlogic import selftest as t\n"
            "f = t.parse_faults('L3:stuck-out,C5:stuck-in,L6:drift=-30%,side:stuck-ant', 7, 7)\n"
            "m = t.masks(f)\n"
            "print(f, t.reach(m, (127, 0, 0)), len(t.plan((5, 9, 1), 7, 7)))\n"
            "try:\n    t.parse_fault('C7:stuck-in', 7, 7)\nexcept ValueError as e:\n    print(e)\n")
    out = run_mpy(micropython, code).split("\n")
    from fmlogic import selftest as t

    f = t.parse_faults("L3:stuck-out,C5:stuck-in,L6:drift=-30%,side:stuck-ant", 7, 7)
    assert out[0] == f"{f} {t.reach(t.masks(f), (127, 0, 0))} {len(t.plan((5, 9, 1), 7, 7))}".replace("'", "'")
    assert out[1] == "element C7: the bank has C0..C6"
    two = len(t.plan((5, 9, 1), 7, 7)) + len(t.plan((5, 9, 0), 7, 7, False)) + 1  # and the bypass reading
    assert two == t.readings_needed(7, 7) == 32 <= t.MAX_READINGS
