"""The antenna measured from the box's own tunes (sim/curve.py, `antenna --logbook`).

The worked example is checked against an independent three-circle solution:
the readings come from scikit-rf's cascade of a series inductor and a shunt
capacitor (no project code), and the load is solved from them with plain
numpy/scipy least squares on the circles |S11(state, gamma_L)| = reading
(the multi-state reflectometer's solution: Engen, IEEE T-MTT 25, 1977 and
T-MTT 28, 1980), written apart from the firmware's Moebius model.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from feedmatch.seam.bank import DEFAULT_SECTION
from scipy.optimize import least_squares

Z0 = 50.0
IND = list(DEFAULT_SECTION["inductors_uh"])  # uH, the shipped network's banks
CAP = list(DEFAULT_SECTION["capacitors_pf"])  # pF
F = 14.2e6
Z_TRUE = 20 - 60j  # a short vertical's feed point near 20 m (invented for the example)
# The states a model search might have read around the match (l_code, c_code, shunt).
STATES = [(0, 0, 1), (12, 20, 0), (16, 20, 0), (12, 30, 0), (20, 26, 0), (14, 24, 0)]


def _value(code: int, table: list[float]) -> float:
    return sum(v for i, v in enumerate(table) if code >> i & 1)


def _skrf_s11(state, z_load: complex, f: float = F) -> complex:
    """S11 of the state terminated in z_load, through scikit-rf's own two-port cascade."""
    import skrf

    freq = skrf.Frequency.from_f([f], unit="hz")
    med = skrf.media.DefinedGammaZ0(freq, z0=Z0)
    l_h, c_f = _value(state[0], IND) * 1e-6, _value(state[1], CAP) * 1e-12
    ser = med.inductor(l_h) if l_h > 0 else med.thru()
    sh = med.shunt_capacitor(c_f) if c_f > 0 else med.thru()
    load = med.load((z_load - Z0) / (z_load + Z0))
    net = (ser ** sh ** load) if state[2] == 1 else (sh ** ser ** load)
    return complex(net.s[0, 0, 0])


def _skrf_two_ports(state):
    import skrf

    freq = skrf.Frequency.from_f([F], unit="hz")
    med = skrf.media.DefinedGammaZ0(freq, z0=Z0)
    l_h, c_f = _value(state[0], IND) * 1e-6, _value(state[1], CAP) * 1e-12
    ser = med.inductor(l_h) if l_h > 0 else med.thru()
    sh = med.shunt_capacitor(c_f) if c_f > 0 else med.thru()
    return (ser ** sh) if state[2] == 1 else (sh ** ser)


def _three_circles(readings) -> complex:
    """Independent solution: gamma_in = S11 + S12 S21 gL / (1 - S22 gL) per state (the
    two-port's input reflection, Pozar 4th ed. eq. 11.3 form), least squares over gL on a
    coarse grid start, then scipy; returns the load impedance."""
    s = [_skrf_two_ports(st).s[0] for st in STATES]

    def gin(gl):
        return np.array([m[0, 0] + m[0, 1] * m[1, 0] * gl / (1 - m[1, 1] * gl) for m in s])

    def res(p):
        return np.abs(gin(complex(p[0], p[1]))) - readings

    grid = [complex(x, y) for x in np.linspace(-0.98, 0.98, 50) for y in np.linspace(-0.98, 0.98, 50)
            if x * x + y * y < 0.98]
    g0 = min(grid, key=lambda g: float(np.sum(res([g.real, g.imag]) ** 2)))
    p = least_squares(res, [g0.real, g0.imag], xtol=1e-12, ftol=1e-12).x
    gl = complex(p[0], p[1])
    return Z0 * (1 + gl) / (1 - gl)


def _solver(sigma=0.02):
    from feedmatch.sim.curve import LoadSolver
    from fmlogic import lnet

    return LoadSolver(lnet.Bank(Z0, IND, CAP), sigma, leak_cal=0.02)


def _trace(readings, states=STATES, f=F):
    from feedmatch.sim.fitbox import Trace

    return Trace(f, np.array(states, dtype=int), np.asarray(readings, dtype=float))


def test_worked_example_matches_an_independent_three_circle_solution():
    exact = np.array([abs(_skrf_s11(st, Z_TRUE)) for st in STATES])
    # The logbook keeps readings to 0.001 (the firmware's trace), so the example does too.
    logged = np.round(exact, 3)
    ref = _three_circles(logged)
    est = _solver().solve(_trace(logged))
    assert est is not None and est.readings == len(STATES)
    # The two solutions of the same circles agree far inside the readings' rounding.
    assert abs(est.z - ref) < 0.02 * abs(ref)
    # Both land on the true load: 10 % of |Z| is the bound; a thousandth in |gamma| does far better.
    assert abs(est.z - Z_TRUE) < 0.02 * abs(Z_TRUE)
    assert abs(ref - Z_TRUE) < 0.02 * abs(Z_TRUE)
    # The stated one-sigma errors are neither absurdly small nor large for 0.1 % readings.
    assert 0.05 < np.sqrt(est.cov[0, 0]) < 10 and 0.05 < np.sqrt(est.cov[1, 1]) < 10


def test_noisy_readings_the_truth_within_twice_the_stated_error_mostly():
    rng = np.random.default_rng(5)
    exact = np.array([abs(_skrf_s11(st, Z_TRUE)) for st in STATES])
    solver = _solver()
    inside = 0
    for _ in range(40):
        m = np.clip(exact + rng.normal(0, 0.01, len(exact)), 0, 1)
        e = solver.solve(_trace(np.round(m, 3)))
        d = e.z - Z_TRUE
        inside += abs(d.real) <= 2 * np.sqrt(e.cov[0, 0]) and abs(d.imag) <= 2 * np.sqrt(e.cov[1, 1])
    # Reading noise of 0.01 is below the solver's assumed 0.015: nearly every draw covered.
    assert inside >= 36


def test_one_reading_gives_the_matched_load_with_its_circle_as_error():
    from feedmatch.sim.curve import LoadSolver
    from fmlogic import lnet

    st = (12, 24, 0)  # near the match of Z_TRUE
    m = abs(_skrf_s11(st, Z_TRUE))
    solver = LoadSolver(lnet.Bank(Z0, IND, CAP), 0.02, leak_cal=0.02)
    e = solver.solve(_trace([round(m, 3)], [st]))
    assert e is not None and e.readings == 1
    d = e.z - Z_TRUE
    assert abs(d.real) <= 2 * np.sqrt(e.cov[0, 0]) and abs(d.imag) <= 2 * np.sqrt(e.cov[1, 1])
    # One reading says less than six: wider errors.
    six = solver.solve(_trace(np.round([abs(_skrf_s11(s, Z_TRUE)) for s in STATES], 3)))
    assert np.trace(e.cov) > np.trace(six.cov)


def _logbook(path, loads, learned=False):
    """A logbook whose tunes carry traces computed from known loads through scikit-rf."""
    from feedmatch.logbook.store import Logbook

    book = Logbook(path)
    book.start_session("hollow-oak-1/0123456789ab", "/dev/null")
    sec = {"network": {"z0_ohm": Z0, "inductors_uh": IND, "capacitors_pf": CAP}}
    if learned:
        sec["correction"] = {"inductors_uh": IND, "capacitors_pf": CAP}
    book.set_bank("hollow-oak-1/0123456789ab", sec)
    seq = 0
    for f, z in loads:
        for st_set in (STATES, STATES[1:4]):
            seq += 1
            trace = []
            for st in st_set:
                m = abs(_skrf_s11(st, z, f))
                trace += [st[0], st[1], st[2], int(m * 1000 + 0.5)]
            book.add({"board_id": "hollow-oak-1", "uid": "0123456789ab", "seq": seq, "freq_hz": f,
                      "swr_before": 3.0, "swr_after": 1.2, "outcome": "locked", "n": len(st_set), "ms": 40,
                      "trace": trace, "after": [12, 20, 0, 0]})
    book.close()


def test_antenna_logbook_json_points_and_resonance(tmp_path, capsys):
    from feedmatch.cli import main

    db = tmp_path / "station.sqlite"
    # A series resonance between 14.1 and 14.3 MHz: X from -30 to +30 ohm.
    _logbook(db, [(14.1e6, 30 - 30j), (14.3e6, 34 + 30j)], learned=True)
    assert main(["antenna", "--logbook", str(db), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["element_values"] == "learned"
    pts = out["points"]
    assert [p["tunes"] for p in pts] == [2, 2]
    for p, z in zip(pts, (30 - 30j, 34 + 30j)):
        assert set(p) >= {"freq_hz", "r_ohm", "x_ohm", "r_err_ohm", "x_err_ohm", "tunes"}
        assert abs(p["r_ohm"] - z.real) <= max(2 * p["r_err_ohm"], 0.1 * abs(z))
        assert abs(p["x_ohm"] - z.imag) <= max(2 * p["x_err_ohm"], 0.1 * abs(z))
    (res,) = out["resonances"]
    assert res["kind"] == "series" and 14.15e6 < res["freq_hz"] < 14.25e6
    # The Touchstone export reads back through the antenna command (scikit-rf).
    s1p = tmp_path / "measured.s1p"
    assert main(["antenna", "--logbook", str(db), "--s1p", str(s1p)]) == 0
    text = capsys.readouterr().out
    assert "series resonance at 14.2" in text and "R ohm" in text
    from feedmatch.rf.antenna import load_antenna

    z = load_antenna(s1p).impedance([14.1e6])[0]
    assert abs(z - complex(pts[0]["r_ohm"], pts[0]["x_ohm"])) < 0.01


def test_antenna_logbook_bad_input_is_one_line(tmp_path, capsys):
    from feedmatch.cli import main

    db = tmp_path / "station.sqlite"
    _logbook(db, [(14.1e6, 30 - 30j)])
    assert main(["antenna", "--logbook", str(db), "--since", "yesterday"]) == 2
    assert "--since needs an ISO date" in capsys.readouterr().err
    assert main(["antenna", "--logbook", str(db), "--since", "2099-01-01"]) == 2
    assert "no tune with readings in that period" in capsys.readouterr().err
    assert main(["antenna", "--since", "2026-01-01"]) == 2
    assert "--since goes with --logbook" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["antenna", "--logbook"])


def test_health_in_ohms_flags_a_changed_antenna_and_not_a_steady_one(tmp_path):
    """Four tunes on an antenna, then four after its R rose by half (radials lost: more ground
    loss; invented figures): the change is said in ohms; the same logbook up to the change,
    and an antenna that never changed, raise no flag."""
    from feedmatch.logbook.report import make_report, report_lines
    from feedmatch.logbook.store import Logbook
    from feedmatch.sim.curve import add_antenna

    def book(path, loads):
        bk = Logbook(path)
        bk.start_session("hollow-oak-1", "/dev/null")
        bk.set_bank("hollow-oak-1", {"network": {"z0_ohm": Z0, "inductors_uh": IND, "capacitors_pf": CAP}})
        for i, z in enumerate(loads):
            trace = []
            for st in STATES:
                trace += [st[0], st[1], st[2], int(abs(_skrf_s11(st, z)) * 1000 + 0.5)]
            bk.add({"board_id": "hollow-oak-1", "seq": i + 1, "freq_hz": F, "swr_before": 3.0, "swr_after": 1.2,
                    "outcome": "locked", "n": len(STATES), "ms": 40, "trace": trace, "after": [12, 20, 0, 0]},
                   when=f"2026-11-0{i + 1}T12:00:00.000+00:00")
        bk.close()

    changed = tmp_path / "changed.sqlite"
    book(changed, [Z_TRUE] * 4 + [Z_TRUE + 10] * 4)
    rep = add_antenna(make_report(str(changed)), str(changed))
    (b,) = rep["bands"]
    assert b["antenna_health"]["flag"] and "R at 14.20 MHz 20.0 -> 30.0 ohm (+50 %)" in b["antenna_health"]["note"]
    assert any("CHECK antenna: R at 14.20 MHz" in line for line in report_lines(rep))
    steady = tmp_path / "steady.sqlite"
    book(steady, [Z_TRUE] * 8)
    rep = add_antenna(make_report(str(steady)), str(steady))
    assert rep["bands"][0]["antenna_health"] == {"flag": False, "note": "steady"}


def test_the_page_serves_the_measured_antenna(tmp_path):
    import signal
    import subprocess
    import urllib.request

    from ..conftest import BIN, free_port

    db = tmp_path / "station.sqlite"
    _logbook(db, [(14.1e6, 30 - 30j), (14.3e6, 34 + 30j)])
    http = free_port()
    p = subprocess.Popen([str(BIN / "feedmatch"), "serve", "--db", str(db), "--http-port", str(http)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        p.stdout.readline()
        with urllib.request.urlopen(f"http://127.0.0.1:{http}/api/antenna", timeout=30) as r:
            a = json.loads(r.read())
        assert [pt["tunes"] for pt in a["points"]] == [2, 2]
        assert abs(a["points"][0]["r_ohm"] - 30) < 3 and a["resonances"][0]["kind"] == "series"
        g = a["points"][0]["gamma"]
        assert g[0] ** 2 + g[1] ** 2 < 1.0  # a passive load, inside the Smith chart
        with urllib.request.urlopen(f"http://127.0.0.1:{http}/", timeout=30) as r:
            assert b'id="antrx"' in r.read()
    finally:
        p.send_signal(signal.SIGTERM)
        p.wait(15)


def test_the_box_model_of_a_state_is_the_stray_network_and_the_detectors_invert_their_tables():
    """The curve's model of a state (strays included) against rf/network.py's L-network with
    the same strays, and the detector chain: with the calibration's own gains and no offset
    the meter reads the true |gamma| (any leakage set to zero)."""
    from feedmatch.rf.network import Network, all_states_zin, gamma
    from feedmatch.sim.curve import _CIN, _COUT, _CREL, _LEAD, BoxModel, Detectors, _bits
    from fmlogic import lnet

    bank = lnet.Bank(Z0, IND, CAP, 150.0, 1000.0)
    md = BoxModel.unknown(bank)
    p = md.p.copy()
    ne = md.ne
    p[:ne] = np.linspace(-0.04, 0.04, ne)  # each element a few per cent off
    p[ne + _CIN], p[ne + _COUT], p[ne + _CREL], p[ne + _LEAD] = 0.6, 0.9, 1.5, 1.2  # 6, 9 pF, 1.5 pF, 12 nH
    md.p, md.learned = p, True
    net = md.network()
    assert isinstance(net, Network) and net.lead_nh == pytest.approx(12.0) and net.relay_open_pf == pytest.approx(1.5)
    states = np.array([(12, 20, 0), (16, 20, 1), (100, 5, 0), (3, 77, 1), (0, 0, 0), (127, 127, 1)])
    for f in (7.1e6, 28.5e6):
        for z in (20 - 60j, 600 + 300j):
            g = (z - Z0) / (z + Z0)
            ref = gamma(all_states_zin(net, f, z), Z0)
            want = np.array([ref[s[2], s[0], s[1]] for s in states])
            got = md.gin(p, np.full(len(states), f), _bits(states[:, 0], 7), _bits(states[:, 1], 7), states[:, 2],
                         np.full(len(states), g))
            assert np.max(np.abs(got - want)) < 1e-9
            co = md.coefs(p, f, states)
            assert np.max(np.abs((co[:, 0] * g + co[:, 1]) / (co[:, 2] * g + 1) - want)) < 1e-9
    pts = [(10.121, 0.05), (120.0, 1.0), (900.0, 20.0), (3000.0, 200.0)]
    det = Detectors(pts, pts)
    x = np.zeros(len(p) - ne)
    gm = np.array([0.02, 0.1, 0.5, 0.9])
    assert np.allclose(det.reading(np.full(4, 10.0), 10.0 * gm ** 2, x), gm, rtol=1e-9)


def test_a_zero_reading_is_censored_at_the_reflected_detectors_floor():
    """The board reads reflected counts at or below its floor as no power (fmlogic.swr's
    Calibration: a zero reading).  The curve's model puts the floor where the firmware's own
    meter does, compares a zero reading only with what a prediction exceeds it by, and gives a
    one-reading tune that read zero the floor's circle as its spread, not a circle of zero."""
    from feedmatch.sim.curve import Detectors, LoadSolver, censor
    from fmlogic import lnet
    from fmlogic.swr import Calibration, Meter, reading_gamma

    pts = [(10.121, 0.05), (120.0, 1.0), (900.0, 20.0), (3000.0, 200.0)]
    det = Detectors(pts, pts, floor_counts=2.0)
    x = np.zeros(10)
    gfl = float(det.floor_gamma(np.asarray(10.0), x))
    meter = Meter(Calibration(pts, 2.0), Calibration(pts, 2.0), 0.5)
    cf = float(np.exp(np.interp(np.log(10.0), np.log([w for _c, w in pts]), np.log([c for c, _w in pts]))))
    assert reading_gamma(*meter.powers(cf, 2.0)) == 0.0  # at the floor: no power
    assert reading_gamma(*meter.powers(cf, 2.0001)) == pytest.approx(gfl, rel=1e-3)  # just above it
    pred = np.array([0.5 * gfl, 2.0 * gfl, 0.3])
    got = censor(pred, np.array([0.0, 0.0, 0.25]), np.full(3, gfl))
    assert got[0] == 0.0 and got[1] == pytest.approx(gfl) and got[2] == 0.3
    solver = LoadSolver(lnet.Bank(Z0, IND, CAP), 0.02, leak_cal=0.02)
    e = solver.solve(_trace([0.0], [(12, 24, 0)]))
    assert e is not None and e.cov_own is not None and e.cov_own[0, 0] > 0.0


def test_recalls_of_one_state_count_as_one_beside_the_bins_cold_tune():
    """Tunes of a bin are averaged with weights from what each does not share with the others
    (the inverse-variance weighted mean, GUM JCGM 100:2008 practice): a cold tune whose several
    readings fixed the load (small random error) against three recalls of one state (each only
    on its reading's circle, and the same circle every time).  Weighted by the whole covariance
    (the shared systematic part included) the three recalls pulled the point three quarters
    of the way to their circle's centre."""
    from feedmatch.sim.curve import LoadEstimate, combine

    sys_ = np.diag([400.0, 400.0])  # element values and strays: shared by every tune of the bin
    cold = LoadEstimate(F, 85 + 174j, np.diag([1.0, 0.6]), sys_, 5)
    own = np.diag([300.0, 300.0])
    recalls = [LoadEstimate(F, 69 + 160j, np.diag([0.25, 0.25]), sys_ + own, 1, cov_own=own, state=(10, 9, 1))
               for _ in range(3)]
    p = combine([cold] + recalls)
    assert abs(p.z - cold.z) < 0.1 * abs(recalls[0].z - cold.z)
    assert p.tunes == 4 and p.readings == 8
    # The shared part stays in the point's error whatever the weights (it does not average down).
    assert p.cov[0, 0] >= 400.0 and p.cov[1, 1] >= 400.0
    # Two recalls of different states are independent circles: they do average.
    other = LoadEstimate(F, 75 + 170j, np.diag([0.25, 0.25]), sys_ + own, 1, cov_own=own, state=(11, 8, 1))
    two = combine([recalls[0], other])
    assert two.z == pytest.approx((recalls[0].z + other.z) / 2)
