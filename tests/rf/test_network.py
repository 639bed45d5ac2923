"""The network model against scikit-rf, published L-network examples and the firmware copy."""

from __future__ import annotations

import json
import math
import random

import numpy as np
import pytest
import skrf
from feedmatch.rf.network import (
    Network,
    all_states_zin,
    best_state,
    evaluate,
    gamma,
    load_network,
    mismatch_loss_db,
    network_from_dict,
    return_loss_db,
    swr_of,
)
from skrf.media import DefinedGammaZ0

from ..conftest import run_cli

NET = load_network()


def _skrf_zin(net: Network, f: float, zl: complex, l: int, c: int, shunt: int) -> complex:
    """Reference: scikit-rf's own lumped elements and cascade."""
    m = DefinedGammaZ0(skrf.Frequency(f, f, 1, "hz"), z0=net.z0_ohm)
    w = 2 * np.pi * f
    lh = net.l_table_uh()[l] * 1e-6
    cf = net.c_table_pf()[c] * 1e-12
    ser = m.inductor(lh) ** m.resistor(w * lh / net.inductor_q) if lh else m.thru()
    shn = m.shunt_capacitor(cf) ** m.shunt_resistor(net.capacitor_q / (w * cf)) if cf else m.thru()
    load = m.load((zl - net.z0_ohm) / (zl + net.z0_ohm))
    ntw = (ser ** shn ** load) if shunt == 1 else (shn ** ser ** load)
    s = ntw.s[0, 0, 0]
    return net.z0_ohm * (1 + s) / (1 - s)


def test_random_states_match_scikit_rf_cascade():
    # Check values: scikit-rf 2.x lumped-element media and network cascade.
    rng = random.Random(7)
    for _ in range(60):
        f = rng.uniform(1.8e6, 30e6)
        zl = complex(rng.uniform(1, 500), rng.uniform(-1500, 1500))
        l, c, sh = rng.randrange(128), rng.randrange(128), rng.randrange(2)
        ref = _skrf_zin(NET, f, zl, l, c, sh)
        ours = complex(evaluate(NET, f, zl, l, c, sh)["z_in"])
        table = all_states_zin(NET, f, zl)[sh, l, c]
        assert abs(ours - ref) / abs(ref) < 1e-9
        assert abs(table - ref) / abs(ref) < 1e-9


def test_firmware_scalar_model_agrees_with_numpy():
    from fmlogic import lnet

    bank = NET.firmware_bank()
    rng = random.Random(3)
    for _ in range(200):
        f = rng.uniform(1.8e6, 30e6)
        zl = complex(rng.uniform(1, 500), rng.uniform(-800, 800))
        l, c, sh = rng.randrange(128), rng.randrange(128), rng.randrange(2)
        a = lnet.z_in(bank, f / 1e6, zl, l, c, sh)
        b = complex(all_states_zin(NET, f, zl)[sh, l, c])
        # float32 element tables in the firmware: agreement to single precision.
        assert abs(a - b) / abs(b) < 1e-5


def _fine_net(z0, l_step_uh, c_step_pf, bits=8):
    return Network(z0, [l_step_uh * 2**i for i in range(bits)], [c_step_pf * 2**i for i in range(bits)])


def test_pozar_example_5_1_l_section():
    # Pozar, Microwave Engineering, 4th ed. (Wiley, 2012), section 5.1, Example 5.1
    # (from memory): Z_L = 200 - j100 ohm to a 100 ohm line at 500 MHz; the solution with
    # the shunt element across the load is C = 0.92 pF and series L = 38.8 nH.
    net = _fine_net(100.0, 0.0005, 0.01)
    l, c, sh, g = best_state(net, 500e6, 200 - 100j)
    assert sh == 1  # capacitor across the load ("ant" side)
    assert abs(net.l_table_uh()[l] * 1e3 - 38.8) <= 0.5 + 0.2
    assert abs(net.c_table_pf()[c] - 0.92) <= 0.01 + 0.01
    assert (1 + g) / (1 - g) < 1.05


def test_low_pass_l_network_q_formulas():
    # Bowick, RF Circuit Design, 2nd ed. (Newnes, 2008), chapter 4 (from memory):
    # match 100 ohm to 1000 ohm at 100 MHz with a low-pass L: Q = sqrt(1000/100 - 1) = 3,
    # series X = Q * 100 = 300 ohm (L = 477 nH), shunt X = 1000/Q = 333 ohm (C = 4.77 pF),
    # the capacitor across the high-resistance side.
    net = _fine_net(100.0, 0.002, 0.02, bits=9)
    l, c, sh, g = best_state(net, 100e6, 1000 + 0j)
    assert sh == 1
    assert abs(net.l_table_uh()[l] * 1e3 - 477) <= 2 + 1
    assert abs(net.c_table_pf()[c] - 4.77) <= 0.02 + 0.02
    # Reversed: a 10 ohm load on a 50 ohm system puts the capacitor on the 50 ohm side:
    # Q = 2, series X = 20 ohm, shunt X = 25 ohm at 10 MHz (same formulas).
    net = _fine_net(50.0, 0.002, 1.0, bits=10)
    l, c, sh, g = best_state(net, 10e6, 10 + 0j)
    assert sh == 0
    w = 2 * np.pi * 10e6
    assert abs(w * net.l_table_uh()[l] * 1e-6 - 20.0) < 0.2
    assert abs(1 / (w * net.c_table_pf()[c] * 1e-12) - 25.0) < 0.1


@pytest.mark.parametrize("swr,gmag,rl,ml", [
    # Standard SWR table (common practice; e.g. the ARRL Handbook's SWR conversion chart):
    (1.5, 0.2, 13.98, 0.177),
    (2.0, 1 / 3, 9.54, 0.512),
    (3.0, 0.5, 6.02, 1.249),
    (1.2, 1 / 11, 20.83, 0.036),
])
def test_swr_return_loss_mismatch_table(swr, gmag, rl, ml):
    assert float(swr_of(gmag)) == pytest.approx(swr, rel=1e-9)
    assert float(return_loss_db(gmag)) == pytest.approx(rl, abs=0.01)
    assert float(mismatch_loss_db(gmag)) == pytest.approx(ml, abs=0.001)
    from fmlogic import swr as fsw

    assert fsw.swr_from_powers(100.0, 100.0 * gmag**2) == pytest.approx(swr, rel=1e-9)
    assert fsw.return_loss_db(gmag) == pytest.approx(rl, abs=0.01)
    assert fsw.mismatch_loss_db(gmag) == pytest.approx(ml, abs=0.001)


def test_lossless_network_conserves_power_and_loss_lowers_efficiency():
    lossless = Network(50, NET.inductors_uh, NET.capacitors_pf)
    e = evaluate(lossless, 7.1e6, 12 - 150j, 38, 77, "tx")
    assert float(e["efficiency"]) == pytest.approx(1.0, abs=1e-12)
    lossy = evaluate(NET, 7.1e6, 12 - 150j, 38, 77, "tx")
    # With Q_L = 150 the series loss is X_L/150 = 171/150 ohm against 12 ohm of load,
    # about 8.7 % (hand calculation from the loss model).
    assert float(lossy["efficiency"]) == pytest.approx(12 / (12 + 2 * np.pi * 7.1 * 3.8 / 150), abs=0.01)


def test_voltage_and_current_at_power():
    # At a perfect match all forward power is accepted: 100 W into 50 ohm is 70.7 V RMS
    # (V = sqrt(P R)); with the capacitor across the input it sees that voltage.
    lossless = Network(50, NET.inductors_uh, NET.capacitors_pf)
    l, c, sh, g = best_state(lossless, 7.1e6, 12 - 150j)
    e = evaluate(lossless, 7.1e6, 12 - 150j, l, c, sh, power_w=100)
    assert sh == 0
    assert float(e["v_cap_rms"]) == pytest.approx(np.sqrt(100 * 50) * abs(1 + e["gamma"]), rel=1e-6)
    # Power into the load = I^2 R (lossless): matches accepted power.
    p_load = float(e["i_ind_rms"]) ** 2 * 12
    assert p_load == pytest.approx(100 * (1 - float(e["gamma_mag"]) ** 2), rel=1e-6)


def test_all_states_shape_and_broadcast_over_frequency():
    f = np.array([3.6e6, 7.1e6, 14.2e6])
    z = np.array([5 - 400j, 20 - 100j, 36 + 0j])
    zin = all_states_zin(NET, f, z)
    assert zin.shape == (3, 2, 128, 128)
    for i in range(3):
        assert np.allclose(zin[i], all_states_zin(NET, f[i], z[i]))
    # Code 0 / 0: the network is transparent.
    assert np.allclose(zin[:, :, 0, 0], z[:, None])
    assert np.all(np.abs(gamma(zin, 50)) <= 1 + 1e-12)


BAD = [
    ("[1, 2]", "JSON object"),
    ("{not json", "not valid JSON"),
    ('{"z0_ohm": "50", "inductors_uh": [1], "capacitors_pf": [1]}', "'z0_ohm' must be a number"),
    ('{"z0_ohm": 50, "inductors_uh": [], "capacitors_pf": [1]}', "'inductors_uh' must not be empty"),
    ('{"z0_ohm": 50, "inductors_uh": [1, 0], "capacitors_pf": [1]}', "'inductors_uh[1]' must be > 0"),
    ('{"z0_ohm": 50, "inductors_uh": [1], "capacitors_pf": [-1]}', "'capacitors_pf[0]' must be > 0"),
    ('{"z0_ohm": 50, "inductors_uh": [1], "capacitors_pf": [1], "colour": 1}', "unknown field 'colour'"),
    ('{"z0_ohm": 50, "inductors_uh": [1], "capacitors_pf": [1], "inductor_q": true}', "'inductor_q'"),
    ('{"z0_ohm": 50, "inductors_uh": ' + json.dumps([1] * 13) + ', "capacitors_pf": [1]}',
     "at most 12"),
    ('{"inductors_uh": [1], "capacitors_pf": [1]}', "missing field 'z0_ohm'"),
]


@pytest.mark.parametrize("text,msg", BAD)
def test_bad_network_files_one_clear_line(tmp_path, text, msg):
    p = tmp_path / "net.json"
    p.write_text(text)
    r = run_cli("simulate", "--network", str(p), "--freq", "7.1e6", "--load", "12-150j", "--best")
    assert r.returncode == 2
    assert r.stdout == ""
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and msg in lines[0], r.stderr
    assert "Traceback" not in r.stderr


def test_network_round_trip_and_null_q_is_lossless():
    d = NET.to_json()
    assert network_from_dict(d) == NET
    n2 = network_from_dict({"z0_ohm": 50, "inductors_uh": [1], "capacitors_pf": [1],
                            "inductor_q": None, "capacitor_q": None})
    assert n2.inductor_q is None
    e = evaluate(n2, 7e6, 10 + 0j, 1, 1, "ant")
    assert float(e["efficiency"]) == pytest.approx(1.0)


def test_simulate_cli_json_contract():
    r = run_cli("simulate", "--freq", "7.1e6", "--load", "12-150j", "--l-code", "37", "--c-code", "5",
                "--shunt", "ant", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    for k in ("z_in_ohm", "gamma_mag", "swr", "return_loss_db", "efficiency"):
        assert k in d
    ref = _skrf_zin(NET, 7.1e6, 12 - 150j, 37, 5, 1)
    assert complex(*d["z_in_ohm"]) == pytest.approx(ref, rel=1e-9)
    r = run_cli("simulate", "--freq", "40m", "--load", "12-150j", "--best", "--json")
    d = json.loads(r.stdout)
    assert d["freq_hz"] == 7.15e6 and d["swr"] < 1.2
    r = run_cli("simulate", "--sweep", "7.0e6:7.3e6:4", "--load", "12-150j", "--best", "--json")
    assert len(json.loads(r.stdout)["points"]) == 4
    r = run_cli("simulate", "--freq", "99m", "--load", "1+1j", "--best")
    assert r.returncode == 2 and "unknown band" in r.stderr


def test_state_table_equals_the_model_with_and_without_strays():
    from feedmatch.rf.network import StateTable
    from feedmatch.sim.boxes import draw_box

    for net in (NET, draw_box(NET, 4, 0.05, "default").network):
        t = StateTable(net)
        for f, z in ((7.1e6, 12 - 150j), (28.4e6, 600 + 900j), (3.6e6, 3 - 900j)):
            ref = gamma(all_states_zin(net, f, z), net.z0_ohm)
            assert np.allclose(t.gamma(f, z), ref, rtol=1e-12, atol=1e-14)
            assert np.allclose(t.gamma_mag(f, z), np.abs(ref), rtol=1e-12, atol=1e-14)


def test_the_one_swr_conversion_and_its_edges():
    import math

    from feedmatch.rf.network import swr_of

    # SWR = (1 + |gamma|) / (1 - |gamma|): |gamma| 0.5 -> 3, 0.2 -> 1.5 (the standard
    # definition, e.g. the ARRL Handbook's transmission-line chapter; common practice).
    assert float(swr_of(0.5)) == 3.0 and math.isclose(float(swr_of(0.2)), 1.5)
    assert float(swr_of(0.0)) == 1.0 and float(swr_of(-1e-17)) == 1.0
    assert math.isinf(float(swr_of(1.0))) and math.isinf(float(swr_of(math.inf)))
    assert math.isnan(float(swr_of(math.nan)))  # no figure is never read as a match


def test_every_cascade_gives_the_same_answer():
    # The network's input impedance is computed four ways for speed (the exhaustive table,
    # its buffered twin, the per-state evaluation with branch currents, the fit's model);
    # all must agree.  Reference: the L-network cascade itself (series Z then shunt Y, or the
    # reverse), checked against scikit-rf in test_network_matches_skrf.
    import numpy as np
    from feedmatch.rf.network import StateTable, all_states_zin, evaluate, load_network, oracle
    from feedmatch.sim.fitbox import _bits, _predict

    net = load_network()
    f, zl = 7.1e6, complex(12.0, -150.0)
    full = all_states_zin(net, f, zl)
    assert np.allclose(StateTable(net).zin(f, zl), full, rtol=1e-12)
    rng = np.random.default_rng(4)
    for _ in range(20):
        sh, l, c = int(rng.integers(2)), int(rng.integers(1 << net.n_l)), int(rng.integers(1 << net.n_c))
        assert np.isclose(complex(evaluate(net, f, zl, l, c, sh)["z_in"]), full[sh, l, c], rtol=1e-9)
    # The fit's model has no strays: compare on a network without them.
    from dataclasses import replace

    bare = replace(net, relay_open_pf=0.0, lead_nh=0.0, stray_in_pf=0.0, stray_out_pf=0.0)
    full = all_states_zin(bare, f, zl)
    ls = np.arange(0, 1 << net.n_l, 7)
    cs = (ls * 3) % (1 << net.n_c)
    for sh in (0, 1):
        g = _predict(bare, np.ones(net.n_l), np.ones(net.n_c), np.full(len(ls), f), _bits(ls, net.n_l),
                     _bits(cs, net.n_c), np.full(len(ls), sh), np.full(len(ls), zl), complex_out=True)
        z = net.z0_ohm * (1 + g) / (1 - g)
        assert np.allclose(z, full[sh, ls, cs], rtol=1e-9)
    # The one oracle picks the table's minimum.
    gm = np.abs((full - 50) / (full + 50))
    l, c, sh, gbest = oracle(gm)
    assert gbest == gm.min() and gm[sh, l, c] == gbest


def test_the_firmwares_state_model_is_one_formula():
    # The firmware writes the cascade three ways for speed on the board (z_in, the
    # bilinear map the search fits, the inverse the memory's presets use); each is the
    # same network (Pozar, Microwave Engineering, 4th ed., sec. 4.3: a two-port's input
    # reflection is a Moebius transform of its load's), and the host's numpy twin
    # (all_states_zin, test_firmware_scalar_model_agrees_with_numpy) is held to z_in.
    from fmlogic import lnet

    bank = NET.firmware_bank()
    rng = random.Random(29)
    for _ in range(200):
        f = rng.uniform(1.8, 30.0)
        zl = complex(rng.uniform(1, 500), rng.uniform(-800, 800))
        l, c, sh = rng.randrange(128), rng.randrange(128), rng.randrange(2)
        zin = lnet.z_in(bank, f, zl, l, c, sh)
        g_in = (zin - bank.z0) / (zin + bank.z0)
        a, b, cc = lnet.mobius(bank, f, l, c, sh)
        gl = (zl - bank.z0) / (zl + bank.z0)
        assert abs((a * gl + b) / (cc * gl + 1) - g_in) < 1e-9
        zm = lnet.load_matched_by(bank, f, l, c, sh)
        if zm is not None and zm.real > 0:
            assert abs(lnet.z_in(bank, f, zm, l, c, sh) - bank.z0) < 1e-6 * abs(zm) + 1e-9


def test_the_hosts_swr_is_the_firmwares_below_its_sentinel():
    # One SWR formula: the host's numpy swr_of is the twin of fmlogic.swr.swr_from_gamma up to
    # the firmware's SWR_MAX sentinel (above it the board says 999, the host inf).
    from fmlogic import swr as fsw

    g = np.linspace(0.0, fsw.GAMMA_MAX * 0.999, 2001)
    assert np.allclose(swr_of(g), [fsw.swr_from_gamma(float(x)) for x in g], rtol=1e-12)
    assert fsw.swr_from_gamma(fsw.GAMMA_MAX) == fsw.SWR_MAX and math.isinf(float(swr_of(1.0)))
