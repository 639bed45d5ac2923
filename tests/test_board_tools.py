"""Deployment, calibration, ratings, drawn boxes and fit-box."""

from __future__ import annotations

import json
import math
import random
import shutil
import statistics
import subprocess
import threading
import time

import pytest
from feedmatch.board import deploy
from feedmatch.errors import InputError, LinkError
from feedmatch.resources import DATA
from feedmatch.rf.antenna import FixedLoad
from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import Network, evaluate, load_network, network_from_dict
from feedmatch.sim.boxes import draw_box
from feedmatch.sim.loads import smith_loads
from feedmatch.sim.scorer import ScoreConfig, score

from .conftest import FIRMWARE, run_cli, run_mpy
from .fakes import FakeBoard, board_config

NET = load_network()


# -- deploy -----------------------------------------------------------------------
def _fw_copy(tmp_path, monkeypatch):
    fw = tmp_path / "fw"
    shutil.copytree(FIRMWARE, fw, ignore=shutil.ignore_patterns("__pycache__"))
    monkeypatch.setattr(deploy, "FIRMWARE", fw)
    return fw


def test_deploy_stages_verifies_switches_and_skips_matching(tmp_path, monkeypatch):
    fw = _fw_copy(tmp_path, monkeypatch)
    board = tmp_path / "board"
    board.mkdir()
    r = run_cli("deploy", "--port", str(board), "--dry-run", "--json")
    assert r.returncode == 0, r.stderr
    assert list(board.iterdir()) == []  # a dry run writes nothing
    t = deploy.DirTarget(board)
    cfg = deploy.CONFIGS / "rp2040.json"
    p = deploy.plan("rp2040", cfg, False, t, tmp_path / "w1")
    assert all(i.action == "send" for i in p["items"])
    deploy.apply(p, t)
    v1 = (board / "fm" / "current").read_text()
    assert (board / "main.py").read_text() == (fw / "loader.py").read_text()
    assert json.loads((board / "config.json").read_text())["board"] == "rp2040"
    p = deploy.plan("rp2040", cfg, False, t, tmp_path / "w2")
    assert {i.action for i in p["items"]} == {"keep"} and p["config_action"] == "keep"
    # One changed file: only it crosses the link; the rest are copied on the board.
    (fw / "fmlogic" / "swr.py").write_text((fw / "fmlogic" / "swr.py").read_text() + "\n# changed\n")
    p = deploy.plan("rp2040", cfg, False, t, tmp_path / "w3")
    sent = [i.remote for i in p["items"] if i.action == "send"]
    assert len(sent) == 1 and sent[0].endswith("fmlogic/swr.py")
    assert all(i.action.startswith("copy:") for i in p["items"] if i.action != "send")
    deploy.apply(p, t)
    v2 = (board / "fm" / "current").read_text()
    assert v2 != v1 and (board / "fm" / v1).is_dir()  # the previous version stays for rollback


def test_deploy_never_switches_to_a_half_written_version(tmp_path, monkeypatch):
    _fw_copy(tmp_path, monkeypatch)
    board = tmp_path / "board"
    board.mkdir()
    t = deploy.DirTarget(board)
    cfg = deploy.CONFIGS / "rp2040.json"
    deploy.apply(deploy.plan("rp2040", cfg, False, t, tmp_path / "w"), t)
    before = (board / "fm" / "current").read_text()

    class Flaky(deploy.DirTarget):
        def put(self, local, remote):
            super().put(local, remote)
            if remote.endswith("search.mpy"):
                (self.root / remote).write_bytes(b"torn")  # the link dropped mid-file

    ft = Flaky(board)
    p = deploy.plan("rp2040", cfg, True, ft, tmp_path / "w2")
    with pytest.raises(LinkError, match="verification failed"):
        deploy.apply(p, ft)
    assert (board / "fm" / "current").read_text() == before


def test_deploy_refuses_bad_config(tmp_path):
    bad = json.loads((deploy.CONFIGS / "rp2040.json").read_text())
    bad["power"]["hot_switch_w"] = 5
    p = tmp_path / "bad.json"
    p.write_text(json.dumps(bad))
    board = tmp_path / "b"
    board.mkdir()
    r = run_cli("deploy", "--port", str(board), "--config", str(p))
    assert r.returncode == 2 and "hot_switch" in r.stderr and list(board.iterdir()) == []
    r = run_cli("deploy", "--port", str(board), "--board", "esp32", "--config",
                str(deploy.CONFIGS / "rp2040.json"))
    assert r.returncode == 2 and "not 'esp32'" in r.stderr


@pytest.mark.parametrize("compiled", [False, True])
def test_deployed_tree_boots_on_the_unix_port_up_to_the_hardware(tmp_path, micropython, compiled):
    board = tmp_path / "board"
    board.mkdir()
    t = deploy.DirTarget(board)
    # Compiled for the unix port's own architecture: the viper kernels are machine code.
    deploy.apply(deploy.plan("rp2040", deploy.CONFIGS / "rp2040.json", compiled, t, tmp_path / "w", arch="x64"), t)
    r = subprocess.run([micropython, "main.py"], cwd=str(board), capture_output=True, text=True, timeout=60)
    # The loader found the version, imported the app and the logic; only 'machine' is missing here.
    assert "machine" in (r.stderr + r.stdout), r.stderr + r.stdout
    assert "fmlogic" not in (r.stderr + r.stdout).split("machine")[0].split("ImportError")[-1]


def test_board_validator_same_under_unix_port(micropython):
    cfgs = [json.loads((deploy.CONFIGS / n).read_text()) for n in ("rp2040.json", "esp32.json")]
    bad = json.loads(json.dumps(cfgs[0]))
    bad["tune"]["target_swr"] = 0.2
    bad["pins"]["led"] = 99
    bad["colour"] = "red"
    cases = cfgs + [bad]
    from fmlogic import config as fcfg

    ours = [fcfg.validate(c) for c in cases]
    code = ("import json\nfrom fmlogic import config\n"
            f"for c in json.loads({json.dumps(cases)!r}):\n print(json.dumps(config.validate(c)))")
    theirs = [json.loads(x) for x in run_mpy(micropython, code).strip().splitlines()]
    assert ours == theirs and ours[0] == [] and len(ours[2]) == 3


# -- calibration -------------------------------------------------------------------
def _cal_args(pty, cfgp):
    import argparse

    return argparse.Namespace(port=pty, baud=115200, timeout=2.0, powers="2,5,10,25,50,100",
                              config=str(cfgp), samples=16, yes=True, reflected=False)


def test_calibration_against_the_virtual_station(tmp_path):
    from feedmatch.cli.calibrate import run_calibrate
    from feedmatch.sim.station import load_station
    from feedmatch.sim.virtual import VirtualStation

    st = load_station()
    st.antenna = FixedLoad(50.0, 0.0)  # the dummy load
    vs = VirtualStation(st, tmp_path / "flash")
    pty = vs.start()
    cfgp = tmp_path / "cfg.json"
    cfgp.write_text((deploy.CONFIGS / "rp2040.json").read_text())
    old = cfgp.read_text()

    A = _cal_args(pty, cfgp)
    import io

    out = io.StringIO()
    from feedmatch.board.link import BoardLink

    try:
        time.sleep(1.0)
        with BoardLink(pty) as ln:  # the box in line, as an operator would have it
            ln.request("bypass", {"on": False})
        run_calibrate(A, io.StringIO(), out, on_prompt=lambda p: (vs.key(p, 14.2e6), time.sleep(0.2)))
        with BoardLink(pty) as ln:
            relays = ln.request("status")["relays"]
    finally:
        vs.key(0)
        vs.stop()
    # Calibration runs in bypass and puts the box back in line once the carrier is gone.
    assert relays[3] == 0 and "the box is back in line" in out.getvalue()
    assert vs.model.violations == []
    assert (tmp_path / "cfg.json.bak").read_text() == old
    cfg = json.loads(cfgp.read_text())
    from fmlogic.swr import Calibration

    cal = Calibration(cfg["detector"]["fwd"], 2.0)
    det = DetectorModel()
    # Check values: the station's own detector curve (the simulator's known truth).
    for p in (3.0, 7.0, 20.0, 70.0):
        assert cal.watts(det.nominal_counts(p)) == pytest.approx(p, rel=0.04)
    # The dummy-load reflection is the coupler leakage: 25 dB at 28 MHz + 20 dB/decade -> 30.9 dB.
    text = out.getvalue()
    d = float(text.split("effective directivity ")[1].split(" dB")[0])
    assert d == pytest.approx(det.directivity_db(14.2e6), abs=2.5)


def test_reflected_pass_calibrates_a_mismatched_reflected_detector(tmp_path):
    # A station whose reflected detector reads 1.5 dB hot (another diode, a divider off by
    # 19 %): the forward pass alone copies the forward curve to both, so the reflected power
    # reads wrong; the reversed pass recovers the reflected detector's own curve.
    import io

    from feedmatch.cli.calibrate import run_calibrate
    from feedmatch.sim.station import load_station
    from feedmatch.sim.virtual import VirtualStation
    from fmlogic.swr import Calibration

    st = load_station()
    st.antenna = FixedLoad(50.0, 0.0)
    st.detector = DetectorModel(ref_gain_db=1.5)
    vs = VirtualStation(st, tmp_path / "flash")
    pty = vs.start()
    cfgp = tmp_path / "cfg.json"
    cfgp.write_text((deploy.CONFIGS / "rp2040.json").read_text())

    A = _cal_args(pty, cfgp)
    out = io.StringIO()
    try:
        time.sleep(1.0)
        run_calibrate(A, io.StringIO(), out, on_prompt=lambda p: (vs.key(p, 14.2e6), time.sleep(0.2)))
        vs.key(0)
        after_forward = json.loads(cfgp.read_text())["detector"]
        A.reflected = True
        run_calibrate(A, io.StringIO(), out,
                      on_prompt=lambda p: (vs.key_reverse(p, 14.2e6), time.sleep(0.2)))
    finally:
        vs.key(0)
        vs.key_reverse(0)
        vs.stop()
    det = st.detector
    text = out.getvalue()
    assert "reverse the box" in text and "reflected points" in text
    final = json.loads(cfgp.read_text())["detector"]
    assert final["fwd"] == after_forward["fwd"]  # the reflected pass leaves the forward table alone
    ref_cal = Calibration(final["ref"], 2.0)
    copied = Calibration(after_forward["ref"], 2.0)
    for p in (3.0, 7.0, 20.0, 70.0):
        c = det.nominal_counts(p, "ref")  # the station's reflected detector (simulator truth)
        assert ref_cal.watts(c) == pytest.approx(p, rel=0.04)
        assert abs(copied.watts(c) / p - 1) > 0.15  # what the forward table alone would read
    d = float(text.rsplit("effective directivity ", 1)[1].split(" dB")[0])
    assert d == pytest.approx(det.directivity_db(14.2e6), abs=2.5)  # same coupler, other direction


@pytest.mark.parametrize("typed,ok", [
    ("", 10.0), ("9.6", 9.6), ("nan", None), ("-5", None), ("0", None), ("1e9", None), ("ten", None),
    ("inf", None),
])
def test_wattmeter_readings_are_checked(typed, ok):
    # Entered with 10 W asked: Enter takes 10 W; what no wattmeter reads stops the run.
    from feedmatch.cli.calibrate import _watts
    from feedmatch.errors import InputError

    if ok is None:
        with pytest.raises(InputError, match="calibration stopped, the config is unchanged"):
            _watts(typed + "\n", 10.0)
    else:
        assert _watts(typed + "\n", 10.0) == ok


def test_calibration_can_be_rehearsed_on_the_virtual_board(tmp_path):
    from .conftest import run_cli

    cfg = tmp_path / "cfg.json"
    cfg.write_text((deploy.CONFIGS / "rp2040.json").read_text())
    r = run_cli("calibrate", "--rehearse", "--yes", "--powers", "2,10,50", "--config", str(cfg), timeout=120)
    assert r.returncode == 0, r.stderr
    assert "rehearsal: virtual board" in r.stdout and "wrote 3 forward" in r.stdout
    assert len(json.loads(cfg.read_text())["detector"]["fwd"]) == 3


def test_coupler_calibration_rehearsed_on_the_virtual_board(tmp_path):
    # The multi-state pass on the virtual station (dummy load on the antenna port):
    # the box steps through its states and the fitted error box goes into the config.
    from fmlogic.config import validate

    from .conftest import run_cli

    cfg = tmp_path / "cfg.json"
    cfg.write_text((deploy.CONFIGS / "rp2040.json").read_text())
    r = run_cli("calibrate", "--rehearse", "--coupler", "--samples", "1", "--config", str(cfg), timeout=120)
    assert r.returncode == 0, r.stderr
    assert "reflected port leakage" in r.stdout and "wrote detector.coupler" in r.stdout
    c = json.loads(cfg.read_text())
    assert validate(c) == [] and len(c["detector"]["coupler"]) == 6
    # The demo station's coupler: 25 dB at 28 MHz, 20 dB per decade better below
    # (feedmatch.rf.detector): about 31 dB at 14.2 MHz, |d| 0.028; the fit sees the
    # input strays too, so only its order is checked.
    d = abs(complex(c["detector"]["coupler"][0], c["detector"]["coupler"][1]))
    assert 0.005 < d < 0.08


def test_calibration_rejects_a_non_monotonic_detector():
    from feedmatch.board.calibrate import fit_table

    with pytest.raises(InputError, match="did not rise"):
        fit_table([(100, 2), (90, 5), (300, 10)])
    with pytest.raises(InputError, match="at least 3"):
        fit_table([(100, 2), (200, 5)])


# -- ratings -----------------------------------------------------------------------
def test_ratings_against_hand_calculation():
    # At a lossless match all power reaches the load: P = I^2 R = V^2 / R (power conservation;
    # L-network design, e.g. Bowick, RF Circuit Design, 2nd ed., ch. 4). For R_L = 12.5 ohm with
    # the capacitor across the 50 ohm side: V_C = sqrt(P * 50), I_L = sqrt(P / 12.5).
    lossless = Network(50, [0.02 * 2**i for i in range(10)], [2.0 * 2**i for i in range(10)])
    from feedmatch.sim.simulate import best_point

    p = best_point(lossless, 7.1e6, 12.5 + 0j, 100.0)
    assert p["shunt"] == "tx" and p["swr"] < 1.02
    assert p["v_cap_peak"] == pytest.approx(math.sqrt(2) * math.sqrt(100 * 50), rel=0.02)
    assert p["i_ind_rms"] == pytest.approx(math.sqrt(100 / 12.5), rel=0.02)
    # R_L = 200 ohm: the capacitor is across the load: V_C = sqrt(P * 200), I_L = sqrt(P / 50).
    p = best_point(lossless, 7.1e6, 200 + 0j, 100.0)
    assert p["shunt"] == "ant"
    assert p["v_cap_peak"] == pytest.approx(math.sqrt(2) * math.sqrt(100 * 200), rel=0.02)
    assert p["i_ind_rms"] == pytest.approx(math.sqrt(100 / 50), rel=0.02)
    r = run_cli("simulate", "--antenna", str(DATA / "antennas" /
                                              "hollow_oak_closed_form.json"),
                "--ratings", "--bands", "40m,20m", "--power", "100", "--json")
    assert r.returncode == 0, r.stderr
    rows = json.loads(r.stdout)["ratings"]
    assert [x["band"] for x in rows] == ["40m", "20m"] and all(x["v_cap_peak_max"] > 100 for x in rows)


# -- boxes -------------------------------------------------------------------------
def test_zero_tolerance_no_strays_is_the_nominal_box():
    box = draw_box(NET, 3, 0.0, "none")
    loads = smith_loads(60, seed=4)
    cfg = ScoreConfig(strategy="model")
    a = score(loads, NET, NET, cfg, workers=1)
    b = score(loads, box.network, NET, cfg, det=box.detector, workers=1)
    for x, y in zip(a, b):
        assert x["swr"] == y["swr"] and x["measurements"] == y["measurements"]


def test_drawn_values_follow_the_stated_distribution():
    devs = []
    for s in range(300):
        b = draw_box(NET, s, 0.05, "none")
        devs += [v / n - 1 for v, n in zip(b.network.inductors_uh, NET.inductors_uh)]
        devs += [v / n - 1 for v, n in zip(b.network.capacitors_pf, NET.capacitors_pf)]
    assert statistics.pstdev(devs) == pytest.approx(0.05, rel=0.08)
    assert abs(statistics.mean(devs)) < 0.005
    assert max(abs(d) for d in devs) <= 0.15 + 1e-12  # clipped at 3 sigma


def test_reported_swr_recomputes_from_published_box_values(tmp_path):
    p = tmp_path / "l.csv"
    run_cli("loads", "--smith", "25", "--seed", "8", "--out", str(p))
    r = run_cli("score", "--strategy", "model", "--loads", str(p), "--boxes", "2", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    boxes = {b["box"]: b for b in d["boxes"]}
    rows = d["strategies"][0]["results"]
    assert {x["box"] for x in rows} == {0, 1}
    for row in rows[:20]:
        bn = dict(boxes[row["box"]]["network"])
        net = Network(**{k: bn[k] for k in ("z0_ohm", "inductors_uh", "capacitors_pf")},
                      inductor_q=NET.inductor_q, capacitor_q=NET.capacitor_q,
                      inductor_q_each=bn["inductor_q_each"], capacitor_q_each=bn["capacitor_q_each"],
                      relay_open_pf=bn["relay_open_pf"], lead_nh=bn["lead_nh"],
                      stray_in_pf=bn["stray_in_pf"], stray_out_pf=bn["stray_out_pf"])
        zl = complex(row["r_ohm"], row["x_ohm"])
        if row["through"]:
            # Through: the bypass relay, the antenna alone (Pozar 4th ed. eq. 2.35, 2.43).
            g = abs((zl - 50) / (zl + 50))
            assert (1 + g) / (1 - g) == pytest.approx(row["swr"], rel=1e-9)
            continue
        e = evaluate(net, row["freq_hz"], zl, row["l_code"], row["c_code"], row["shunt"])
        assert float(e["swr"]) == pytest.approx(row["swr"], rel=1e-9)


def test_strays_change_the_network():
    box = draw_box(NET, 3, 0.0, "default")
    a = complex(evaluate(NET, 28e6, 50 + 50j, 20, 10, "ant")["z_in"])
    b = complex(evaluate(box.network, 28e6, 50 + 50j, 20, 10, "ant")["z_in"])
    assert abs(a - b) > 1.0
    assert network_from_dict(NET.to_json()) == NET


# -- fit-box -----------------------------------------------------------------------
def test_fit_box_recovers_drawn_values_from_a_logbook(tmp_path):
    """Draw a box, run tunes on the (in-process) virtual station, log them, fit, compare."""
    from feedmatch.logbook.store import Logbook
    from feedmatch.sim.station import StationModel
    from fmlogic.controller import Controller

    box = draw_box(NET, 21, 0.05, "none")
    m = StationModel(box.network, FixedLoad(50, 0), box.detector, 25.0, seed=2)
    b = FakeBoard(m)
    ctl = Controller(b, board_config(tune__strategy="model", memory__bin_hz=100.0), str(tmp_path))
    rng = random.Random(5)
    book = Logbook(tmp_path / "log.sqlite")
    for ld in smith_loads(320, seed=12):  # the board keeps the last 256 records
        m.antenna = FixedLoad(ld.r_ohm, ld.x_ohm)
        m._zcache.clear()
        m._cache.clear()
        m.key(10, ld.freq_hz + rng.uniform(-1e3, 1e3))
        seq = ctl.rec.seq
        for _ in range(300):
            ctl.step()
            if ctl.rec.seq > seq:
                break
        m.key(0, 0)
        for _ in range(3):
            ctl.step()
    for rec in ctl.rec.since(0, 100000):
        book.add(rec)
    book.close()
    cfgp = tmp_path / "board.json"
    cfgp.write_text((deploy.CONFIGS / "rp2040.json").read_text())
    r = run_cli("fit-box", "--db", str(tmp_path / "log.sqlite"), "--json", "--write", str(cfgp))
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    # Stated error: within 5 % for every element the tunes exercised at least 20 times, through the
    # realistic detector with this box's drawn gain, offset and leakage errors (measured: 1.7 %).
    # Not every box is this kind to 256 tunes: box 22's largest inductor came out 17 % off from
    # them, and all of boxes 21-25 were within 1.9 % from 400; hence fit-box's caution below 400.
    for vals, drawn, n in ((res["inductors_uh"], box.network.inductors_uh, res["inductor_readings"]),
                           (res["capacitors_pf"], box.network.capacitors_pf, res["capacitor_readings"])):
        for v, d, k in zip(vals, drawn, n):
            if k >= 20:
                assert v == pytest.approx(d, rel=0.05)
    cfg = json.loads(cfgp.read_text())
    assert len(cfg["correction"]["inductors_uh"]) == 7 and (tmp_path / "board.json.bak").exists()
    r = run_cli("fit-box", "--db", str(tmp_path / "nope.sqlite"))
    assert r.returncode == 2 and "does not exist" in r.stderr


def test_deploy_through_mpremote_to_the_unix_port(tmp_path, micropython):
    """The real mpremote path: the unix port's raw REPL on a pseudo-terminal stands in for a board."""
    import os
    import pty
    import select
    import tty

    root = tmp_path / "flash"
    root.mkdir()

    def boot():
        m1, s1 = pty.openpty()
        tty.setraw(s1)
        p = subprocess.Popen([micropython], stdin=s1, stdout=s1, stderr=s1, cwd=str(root))
        return p, m1, s1

    m2, s2 = pty.openpty()
    tty.setraw(s2)
    state = {"board": boot(), "stop": False}

    def bridge():
        while not state["stop"]:
            p, m1, _ = state["board"]
            r, _, _ = select.select([m1, m2], [], [], 0.1)
            for fd in r:
                try:
                    d = os.read(fd, 4096)
                    os.write(m2 if fd == m1 else m1, d)
                except OSError:
                    pass
    th = threading.Thread(target=bridge, daemon=True)
    th.start()
    port = os.ttyname(s2)
    try:
        time.sleep(0.5)
        r = run_cli("deploy", "--port", port, "--board", "esp32", "--json", timeout=400)
        assert r.returncode == 0, r.stderr
        v = json.loads(r.stdout)["version"]
        assert (root / "fm" / "current").read_text() == v
        sent = root / "fm" / v / "fmlogic" / "search.py"
        assert sent.read_bytes() == (FIRMWARE / "fmlogic" / "search.py").read_bytes()
        assert json.loads((root / "config.json").read_text())["board"] == "esp32"
        # The board "reboots"; a second deploy of the same version sends nothing.
        state["board"][0].kill()
        state["board"] = boot()
        time.sleep(0.5)
        r = run_cli("deploy", "--port", port, "--board", "esp32", "--dry-run", "--json", timeout=200)
        assert r.returncode == 0, r.stderr
        plan = json.loads(r.stdout)
        assert plan["current"] == v and {f["action"] for f in plan["files"]} == {"keep"}
    finally:
        state["stop"] = True
        state["board"][0].kill()
