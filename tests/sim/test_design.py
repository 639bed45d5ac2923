"""The bank designer and the antenna's modelling-error estimate, against outside sources.

Sources: Bowick, "RF Circuit Design", 2nd ed. (Newnes, 2008), ch. 4, the L-network
design equations Q = sqrt(Rhigh/Rlow - 1), Xs = Q Rlow, Xp = Rhigh / Q and its
worked example (100 ohm to 1000 ohm at 100 MHz: Q = 3, Xs = 300 ohm, Xp = 333 ohm;
the figures from memory); the same equations are the ARRL Handbook's.  Power
balance (conservation of energy in a lossless network) for the ratings.  Balanis,
"Antenna Theory", 3rd ed., sec. 4.7: a quarter-wave monopole over perfect ground
has a resistance of about 36.5 ohm at resonance (from memory).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from feedmatch.rf.antenna import FixedLoad
from feedmatch.rf.network import Network, evaluate, load_network
from feedmatch.sim.design import DesignSpec, Loads, best_gamma, closed_form_match, design, quick_best_gamma
from fmlogic import lnet

from ..conftest import run_cli


def _firmware_match(z: complex, f_hz: float, z0: float, shunt: int) -> tuple[float, float] | None:
    """The firmware's closed-form L match (fmlogic.lnet.analytic_match, the source of truth): (uH, pF)."""
    return lnet.analytic_match(lnet.Bank(z0, [1.0], [1.0]), f_hz / 1e6, z, shunt)


def _exact_solutions(z: complex, f_hz: float, z0: float = 50.0) -> list[tuple[float, float, int]]:
    """Every root of the host's closed form (sim.design.closed_form_match) that is a real
    match: (uH, pF, shunt) with both values positive and the lossless network at those
    values matching exactly in the project's model."""
    ls, cs = closed_form_match(np.array([f_hz]), np.array([z]), z0)
    out = []
    for k, (l_uh, c_pf) in enumerate(zip(ls[0], cs[0])):
        sh = lnet.SHUNT_ANT if k < 2 else lnet.SHUNT_TX
        if not (np.isfinite(l_uh) and np.isfinite(c_pf) and l_uh > 0 and c_pf > 0):
            continue
        g = float(evaluate(Network(z0, [l_uh], [c_pf]), f_hz, z, 1, 1, sh)["gamma_mag"])
        if g < 1e-6:
            out.append((float(l_uh), float(c_pf), sh))
    return out


def test_bowick_worked_example_is_reproduced():
    # 100 ohm source, 1000 ohm load, 100 MHz: Q = 3, Xs = 300 ohm, Xp = 333 ohm (Bowick ch. 4).
    w = 2 * math.pi * 100e6
    z = complex(1000, 0)
    assert _firmware_match(z, 100e6, 100.0, lnet.SHUNT_TX) is None  # no match with C across the low side
    l_uh, c_pf = _firmware_match(z, 100e6, 100.0, lnet.SHUNT_ANT)   # the shunt arm across the high resistance
    assert w * l_uh * 1e-6 == pytest.approx(300.0, rel=1e-9)
    assert 1 / (w * c_pf * 1e-12) == pytest.approx(1000 / 3, rel=1e-9)
    # The low-pass elements: L = Xs / w = 477 nH, C = 1 / (w Xp) = 4.77 pF.
    assert c_pf == pytest.approx(4.7746, rel=1e-4)
    # The project's exact network model with exactly those values matches perfectly.
    net = Network(100.0, [l_uh], [c_pf])
    assert float(evaluate(net, 100e6, z, 1, 1, "ant")["swr"]) == pytest.approx(1.0, abs=1e-9)
    # The host's vectorised twin finds the same, and only it.
    assert _exact_solutions(z, 100e6, 100.0) == [pytest.approx((l_uh, c_pf, lnet.SHUNT_ANT), rel=1e-9)]


@pytest.mark.parametrize("r_low,r_high", [(10.0, 50.0), (50.0, 200.0), (12.5, 50.0)])
def test_resistive_loads_follow_the_q_equations(r_low, r_high):
    # Bowick ch. 4: Q = sqrt(Rhigh/Rlow - 1), series X = Q Rlow, shunt X = Rhigh / Q.
    q = math.sqrt(r_high / r_low - 1)
    load = r_low if r_high == 50.0 else r_high
    w = 2 * math.pi * 14e6
    l_uh, c_pf = _firmware_match(complex(load, 0), 14e6, 50.0, lnet.SHUNT_TX if load < 50 else lnet.SHUNT_ANT)
    assert w * l_uh * 1e-6 == pytest.approx(q * r_low, rel=1e-9)
    assert 1 / (w * c_pf * 1e-12) == pytest.approx(r_high / q, rel=1e-9)


def test_the_host_closed_form_is_the_firmwares():
    # design's vectorised closed form (every root, losses and strays folded in) against the
    # firmware's analytic_match (one root per side) on lossless loads across HF: every match
    # the firmware finds is one of the host's exact roots on the same side.
    rng = np.random.default_rng(29)
    found = 0
    for _ in range(300):
        f = float(rng.uniform(1.8e6, 30e6))
        z = complex(float(rng.uniform(2, 600)), float(rng.uniform(-900, 900)))
        host = _exact_solutions(z, f)
        for sh in (lnet.SHUNT_TX, lnet.SHUNT_ANT):
            fw = _firmware_match(z, f, 50.0, sh)
            if fw is None or min(fw) <= 0:
                continue
            found += 1
            assert any(s == sh and math.isclose(lh, fw[0], rel_tol=1e-9) and math.isclose(ch, fw[1], rel_tol=1e-9)
                       for lh, ch, s in host), (f, z, sh, fw, host)
    assert found > 150


def test_the_quick_evaluation_never_beats_the_exhaustive_one_and_mostly_agrees():
    from feedmatch.sim.boxes import draw_box
    from feedmatch.sim.loads import smith_loads

    net = load_network(None)
    loads = smith_loads(300, seed=11)
    f = np.array([ld.freq_hz for ld in loads])
    z = np.array([complex(ld.r_ohm, ld.x_ohm) for ld in loads])
    gd = 0.3 / 2.3  # SWR 1.3
    for n in (net, draw_box(net, 3, 0.05).network):
        q = quick_best_gamma(n, f, z)
        e = best_gamma(n, Loads(f, np.zeros(len(f), int), z[:, None], ["all"]))[:, 0]
        assert np.all(q >= e - 1e-12)           # a subset of the states can never do better
        assert np.mean((q <= gd) == (e <= gd)) >= 0.97


def _lossless_spec(bands_: list[str], **kw) -> DesignSpec:
    return DesignSpec(bands_, n_l=7, n_c=7, tolerance=0.0, boxes=1, points=9, maxiter=10, strays="none",
                      inductor_q=None, capacitor_q=None, **kw)


@pytest.mark.parametrize("z", [complex(12.5, 0), complex(200, 0), complex(10, -300), complex(30, 150)])
def test_designed_banks_hold_what_the_closed_form_needs(z):
    # Resistive and reactive loads across HF: where the proposal claims a match, the
    # bank must reach the series reactance and shunt susceptance the closed form
    # needs for one of its solutions (Bowick ch. 4), within the SWR 1.3 slack.
    names = ["80m", "40m", "20m", "15m", "10m"]
    spec = _lossless_spec(names)
    cur = Network(50.0, [0.1 * 2 ** k for k in range(7)], [10.0 * 2 ** k for k in range(7)], name="shipped")
    res = design(FixedLoad(z.real, z.imag), spec, cur)
    prop = res["proposal"]
    lmax, cmax = sum(prop.inductors_uh), sum(prop.capacitors_pf)
    covered = res["score"]["best_gamma_nominal"] <= 0.3 / 2.3
    assert covered.mean() >= 0.6, "a 7+7 bank covers most of HF for these loads"
    for f, ok in zip(res["loads"].f_hz, covered):
        if ok:
            need = _exact_solutions(z, float(f))
            assert any(l_uh <= 1.15 * lmax and c_pf <= 1.15 * cmax for l_uh, c_pf, _sh in need), (f, need, lmax, cmax)


def test_ratings_match_the_power_balance():
    # 100 W into a lossless network matched to 200 ohm: the capacitor sits across the
    # load, so V = sqrt(P R) rms (200 V peak); the series arm carries the current into
    # a 50 ohm real part, I = sqrt(P / 50) = 1.41 A rms (power balance).
    spec = _lossless_spec(["20m"], power_w=100.0)
    res = design(FixedLoad(200.0, 0.0), spec, load_network(None))
    band = res["score"]["bands"][0]
    assert band["coverage"] == 1.0
    assert band["v_cap_peak_max"] == pytest.approx(math.sqrt(2 * 100 * 200), rel=0.02)
    assert band["i_ind_rms_max"] == pytest.approx(math.sqrt(100 / 50), rel=0.12)
    parts = {p["part"]: p for p in res["parts"]}
    worst_c = max(p["v_peak"] for p in parts.values() if p["unit"] == "pF")
    assert worst_c == pytest.approx(band["v_cap_peak_max"], rel=1e-9)
    assert all(p["rated_v_peak"] == pytest.approx(spec.rating_margin * p["v_peak"]) for p in parts.values())


def test_the_model_segment_check_is_quiet_at_resonance_and_warns_near_anti_resonance(tmp_path):
    # A 10 m radiator over perfect ground: quarter-wave resonance near 7 MHz with R about
    # 36 ohm (Balanis sec. 4.7), where NEC-2 converges; near its half-wave anti-resonance
    # (about 14 MHz) the impedance is thousands of ohms and moves with the segments
    # (common practice: convergence is worst at anti-resonance).
    ant = tmp_path / "v10.json"
    ant.write_text(json.dumps({"kind": "nec", "radiator": {"height_m": 10.0, "diameter_m": 0.01},
                               "ground": {"type": "perfect"}}))
    r = run_cli("antenna", "--antenna", str(ant), "--sweep", "5e6:16e6:60", "--json", timeout=300)
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    series = [x for x in out["resonances"] if x["kind"] == "series"][0]
    assert series["r_ohm"] == pytest.approx(36.5, rel=0.1)
    check = {round(c["freq_hz"] / 1e6, 3): c["change"] for c in out["segment_check"]}
    at40 = check[7.15]
    assert at40 < 0.05
    anti = [c for c in out["segment_check"] if c["band"] == "out" or c["freq_hz"] > 13e6]
    assert max(c["change"] for c in anti) > at40
    r = run_cli("antenna", "--antenna", str(ant), "--sweep", "5e6:16e6:60", timeout=300)
    assert "modelling error:" in r.stdout


def test_design_command_writes_a_network_the_project_reads(tmp_path):
    from feedmatch.resources import DATA

    out, plot = tmp_path / "bank.json", tmp_path / "map.png"
    board = tmp_path / "board.json"
    board.write_text((DATA / "boards" / "rp2040.json").read_text())
    r = run_cli("design", "--antenna", str(DATA / "antennas" / "hollow_oak_closed_form.json"),
                "--bands", "20m,15m", "--boxes", "2", "--points", "9", "--out", str(out), "--plot", str(plot),
                "--into-config", str(board), "--json", timeout=300)
    assert r.returncode == 0, r.stderr
    s = json.loads(r.stdout)
    net = load_network(out)
    assert net.inductors_uh == s["proposal"]["inductors_uh"] and len(net.capacitors_pf) == 7
    # The same banks in the board config that deploy takes, validated as deploy validates it.
    from fmlogic import config as fcfg

    cfg = json.loads(board.read_text())
    assert fcfg.validate(cfg) == [] and cfg["network"]["inductors_uh"] == net.inductors_uh
    assert cfg["network"]["capacitors_pf"] == net.capacitors_pf and (tmp_path / "board.json.bak").exists()
    r = run_cli("design", "--antenna", str(DATA / "antennas" / "hollow_oak_closed_form.json"),
                "--into-config", str(out), timeout=60)  # a network file is not a board config
    assert r.returncode == 2 and "not a board config" in r.stderr
    assert [b["band"] for b in s["bands"]] == ["20m", "15m"]
    # Never worse than the bank the builder has, on any band.
    assert all(b["coverage"] >= b["coverage_now"] for b in s["bands"])
    assert plot.stat().st_size > 10_000


@pytest.mark.parametrize("argv,words", [
    (["--bands", "20m,13m"], "unknown band '13m'"),
    (["--tolerance", "0.5"], "--tolerance must be 0 to 0.25"),
    (["--inductors", "1"], "--inductors and --capacitors need 2 to 10"),
    (["--out", "x.txt"], "must end in .json"),
    (["--points", "2"], "--points must be 3 to 401"),
])
def test_design_bad_input(argv, words, tmp_path):
    from feedmatch.resources import DATA

    argv = [a.replace("x.txt", str(tmp_path / "x.txt")) for a in argv]
    r = run_cli("design", "--antenna", str(DATA / "antennas" / "hollow_oak_closed_form.json"), *argv, timeout=60)
    assert r.returncode == 2 and words in r.stderr and "Traceback" not in r.stderr


def test_a_fixed_coil_adds_its_reactance_and_loss_to_the_load():
    # A series coil: X = 2 pi f L, R = X / Q (the definition of Q; common practice).
    from feedmatch.sim.design import with_coil

    ld = Loads(np.array([3.6e6]), np.array([0]), np.array([[complex(12, -600)]]), ["80m"])
    z = with_coil(ld, 20.0, 200.0).z[0, 0]
    x = 2 * math.pi * 3.6e6 * 20e-6
    assert z.imag == pytest.approx(-600 + x) and z.real == pytest.approx(12 + x / 200)


@pytest.mark.parametrize("v,want", [(8.633, 8.2), (16.61, 16.0), (437.9, 430.0), (118.3, 120.0), (95.0, 91.0),
                                    (97.0, 100.0)])
def test_capacitors_snap_to_the_e24_series(v, want):
    # The E24 preferred numbers of IEC 60063 (from memory: 1.0 1.1 1.2 1.3 1.5 1.6 1.8 2.0 2.2 2.4 2.7
    # 3.0 3.3 3.6 3.9 4.3 4.7 5.1 5.6 6.2 6.8 7.5 8.2 9.1); the nearest on a log scale.
    from feedmatch.sim.design import e24

    assert e24(v) == pytest.approx(want)
