"""Drawn non-ideal boxes (sim/boxes.py): tolerances, strays, and the SWR they report."""

from __future__ import annotations

import json
import statistics

import pytest
from feedmatch.rf.network import Network, evaluate, load_network, network_from_dict
from feedmatch.sim.boxes import draw_box
from feedmatch.sim.loads import smith_loads
from feedmatch.sim.scorer import ScoreConfig, score

from ..conftest import run_cli

NET = load_network()


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
