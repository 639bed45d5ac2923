"""The network's voltage and current ratings (simulate --ratings) against a hand calculation."""

from __future__ import annotations

import json
import math

import pytest
from feedmatch.resources import DATA
from feedmatch.rf.network import Network, load_network

from ..conftest import run_cli

NET = load_network()


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
