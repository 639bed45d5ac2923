"""fit-box: the box's effective element values recovered from a logbook of its tunes."""

from __future__ import annotations

import json
import random

import pytest
from feedmatch.board import deploy
from feedmatch.rf.antenna import FixedLoad
from feedmatch.rf.network import load_network
from feedmatch.sim.boxes import draw_box
from feedmatch.sim.loads import smith_loads

from ..conftest import run_cli
from ..fakes import FakeBoard, board_config

NET = load_network()


# -- fit-box -----------------------------------------------------------------------
def test_fit_box_recovers_drawn_values_from_a_logbook(tmp_path):
    """Draw a box, run tunes on the (in-process) virtual station, log them, fit, compare."""
    from feedmatch.logbook.store import Logbook
    from feedmatch.sim.hardware import SimulatedHardware
    from fmlogic.controller import Controller

    box = draw_box(NET, 21, 0.05, "none")
    m = SimulatedHardware(box.network, FixedLoad(50, 0), box.detector, 25.0, seed=2)
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
