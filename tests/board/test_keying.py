"""What follow --tune-carrier checks before it may key (board/keying.py), without a radio.

Band edges: ITU Radio Regulations, Article 5, Table of Frequency Allocations
(edition 2020), from memory.  Band plan: IARU Region 1 HF band plan, from memory.
"""

from __future__ import annotations

import os
import subprocess

import pytest
from feedmatch.board.keying import KeyerLock, KeyPolicy, check_mode, check_power, parse_segments
from feedmatch.errors import InputError
from feedmatch.rf import bands
from feedmatch.rf.antenna import Monopole
from feedmatch.rf.network import load_network

from ..conftest import BIN


@pytest.mark.parametrize("f_hz, region, band", [
    (1.830e6, 1, "160m"), (1.900e6, 1, None), (1.900e6, 2, "160m"),   # Region 1: 1810-1850 kHz
    (3.850e6, 1, None), (3.850e6, 2, "80m"), (3.850e6, 3, "80m"), (3.950e6, 3, None),
    (7.250e6, 1, None), (7.250e6, 2, "40m"), (7.250e6, 3, None),       # 7100-7200 since WRC-03
    (5.360e6, 1, "60m"), (5.400e6, 2, None),                             # WRC-15: 5351.5-5366.5 kHz
    (10.125e6, 3, "30m"), (27.185e6, 1, None), (27.185e6, 2, None),     # CB: no amateur band
    (51.0e6, 1, "6m"), (53.0e6, 1, None), (53.0e6, 2, "6m"),           # WRC-19: 50-52 MHz in Region 1
    (145.0e6, 1, "2m"), (147.0e6, 1, None), (147.0e6, 2, "2m"),
])
def test_article_5_edges_per_region(f_hz, region, band):
    a = bands.allocation(f_hz, region)
    assert (a[0].name if a else None) == band


def test_the_logbook_bands_are_the_widest_edges_of_the_same_table():
    hf = {b.name: (b.low_hz, b.high_hz) for b in bands.HF_BANDS}
    assert hf["160m"] == (1.8e6, 2.0e6) and hf["80m"] == (3.5e6, 4.0e6) and hf["40m"] == (7.0e6, 7.3e6)
    assert bands.band_of(5.3305e6) == "60m"   # national 60 m channels still count in the logbook


def test_segments_from_a_list_or_a_file(tmp_path):
    assert parse_segments("7.0-7.2, 14.0-14.35") == [(7.0e6, 7.2e6), (14.0e6, 14.35e6)]
    f = tmp_path / "mine.txt"
    f.write_text("# my privileges\n14.0-14.35\n7.0-7.2  # 40 m\n")
    assert parse_segments(str(f)) == [(7.0e6, 7.2e6), (14.0e6, 14.35e6)]
    for bad in ("7.2-7.0", "7.0", "abc-7", "7000000-7200000", ""):
        with pytest.raises(InputError):
            parse_segments(bad)


def test_modes_and_power():
    assert check_mode("cw") == "CW"
    with pytest.raises(InputError, match="not a Hamlib mode"):
        check_mode("XYZ")
    with pytest.raises(InputError, match="no steady carrier"):
        check_mode("USB")
    check_power(10, {"min_tune_w": 2, "max_tune_w": 20, "hot_switch_w": 25}, "test")
    for w in (1, 21, 50):
        with pytest.raises(InputError, match="tune window"):
            check_power(w, {"min_tune_w": 2, "max_tune_w": 30, "hot_switch_w": 20}, "test")


def test_declared_segments_must_lie_in_an_amateur_band_of_the_region():
    with pytest.raises(InputError, match="40m is 7.0000-7.2000 MHz there"):
        KeyPolicy(parse_segments("7.0-7.3"), 1, "CW", 10).check_declared()
    KeyPolicy(parse_segments("7.0-7.3"), 2, "CW", 10).check_declared()
    with pytest.raises(InputError, match="not inside an amateur band"):
        KeyPolicy(parse_segments("26.9-27.4"), 1, "CW", 10).check_declared()
    # FM is in the band plan only in 29.510-29.700 MHz on HF: none of these segments has it
    with pytest.raises(InputError, match="FM is allowed for a tune carrier in none"):
        KeyPolicy(parse_segments("10.1-10.15,5.3515-5.3665,14.0-14.35"), 1, "FM", 10).check_declared()
    notes = KeyPolicy(parse_segments("10.1-10.15,29.51-29.7"), 1, "FM", 10).check_declared()
    assert len(notes) == 1 and "10.1000-10.1500" in notes[0]


def test_refusals_name_their_reason():
    pol = KeyPolicy(parse_segments("7.0-7.2,10.1-10.15,29.51-29.7"), 1, "FM", 10, network=load_network())
    assert "in no amateur band" in pol.refusal(27.185e6)
    assert "outside your declared segments" in pol.refusal(14.2e6)
    assert "not in the band plan" in pol.refusal(10.12e6)
    # FM's necessary bandwidth, 16 kHz (16K0F3E), is the margin: wider than the 2 kHz floor
    assert "within 16 kHz of the edge" in pol.refusal(29.69e6)
    assert pol.refusal(29.6e6) is None
    cw = KeyPolicy(parse_segments("7.0-7.2"), 1, "CW", 10, network=load_network())
    assert "within 2 kHz" in cw.refusal(7.1985e6) and cw.refusal(7.1975e6) is None


def test_the_box_range_comes_from_the_network_and_the_antenna():
    # A 4.5 m vertical (radius 12 mm, 6 ohm ground loss) is about 0.05 wavelength on 80 m:
    # a few ohms and about -j1000 ohm, beyond the shipped 12.7 uH bank (X_L = 287 ohm at
    # 3.6 MHz; X = wL, common practice); near resonance on 15 m it matches easily.
    pol = KeyPolicy(parse_segments("3.5-3.8,21.0-21.45"), 1, "CW", 10, network=load_network(),
                    antenna=Monopole(4.5, 0.012, 6.0))
    assert "cannot match the antenna" in pol.refusal(3.6e6)
    assert pol.refusal(21.2e6) is None
    # No antenna known: the network alone decides, and matches every load within SWR 3 on 80 m
    assert KeyPolicy(parse_segments("3.5-3.8"), 1, "CW", 10, network=load_network()).refusal(3.6e6) is None
    assert "network is not known" in KeyPolicy(parse_segments("3.5-3.8"), 1, "CW", 10).refusal(3.6e6)
    # The network alone: every load within SWR 3 matched to the retune SWR, or no carrier.  On
    # 2 m the bank's smallest step, 0.1 uH, is 91 ohm (X = 2 pi f L, common practice): too coarse.
    wide = KeyPolicy(parse_segments("7.0-7.2,144-146"), 1, "CW", 10, network=load_network(),
                     box_range_hz=(1e6, 200e6))
    assert wide.refusal(7.1e6) is None
    assert "network cannot match every load within SWR 3" in wide.refusal(145e6)


def test_one_keyer_per_radio_and_board(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path))
    a, b = KeyerLock("127.0.0.1:4532", "/dev/ttyACM0"), KeyerLock("127.0.0.1:4532", "/dev/ttyACM1")
    assert a.acquire() is None and a.held
    held = b.acquire()   # another board, the same radio
    assert held == f"another follower (pid {os.getpid()}) is the keyer for the radio at 127.0.0.1:4532"
    c = KeyerLock("127.0.0.1:4533", "/dev/ttyACM0")   # another radio, the same board
    assert "the board on /dev/ttyACM0" in c.acquire()
    a.release()
    assert b.acquire() is None
    b.release()


@pytest.mark.parametrize("more, words", [
    ([], "--segments"),
    (["--segments", "7.0-7.2"], "--region"),
    (["--segments", "7.0-7.3", "--region", "1"], "not inside an amateur band of ITU Region 1"),
    (["--segments", "7.0-7.2", "--region", "1", "--carrier-mode", "XYZ"], "not a Hamlib mode"),
    (["--segments", "7.0-7.2", "--region", "1", "--carrier-mode", "USB"], "no steady carrier"),
    (["--segments", "10.1-10.15", "--region", "1", "--carrier-mode", "FM"], "allowed for a tune carrier in none"),
    (["--segments", "7.0-7.2", "--region", "1", "--tune-carrier", "50"], "tune window"),
    (["--segments", "7.0-7.2", "--region", "4"], "invalid choice"),
])
def test_follow_refuses_to_start_before_connecting(more, words):
    # The port and the rig do not exist: every refusal here comes before anything connects.
    args = ["follow", "--port", "/nonexistent/board", "--rig", "127.0.0.1:1", "--tune-carrier", "10", *more]
    if "--tune-carrier" in more:
        args.remove("10")
        args.remove("--tune-carrier")
    p = subprocess.run([str(BIN / "feedmatch"), *args], capture_output=True, text=True, timeout=60)
    assert p.returncode == 2 and len(p.stderr.strip().splitlines()) == 1, p.stderr
    assert words in p.stderr and "Traceback" not in p.stderr and p.stdout == ""


def test_the_station_file_may_hold_the_segments_and_the_region(tmp_path):
    import json

    from feedmatch.resources import DATA
    from feedmatch.sim.station import load_station

    d = json.loads((DATA / "station_demo.json").read_text())
    d["network"] = str(DATA / "network_default.json")
    d |= {"segments": ["7.0-7.2", [14.0, 14.35]], "region": 1}
    f = tmp_path / "station.json"
    f.write_text(json.dumps(d))
    st = load_station(f)
    assert st.segments == [(7.0e6, 7.2e6), (14.0e6, 14.35e6)] and st.region == 1
    for bad, words in [({"region": 4}, "field 'region'"), ({"segments": "7.0-7.2"}, "field 'segments'"),
                       ({"segments": ["7.2-7.0"]}, "needs 0 < low < high")]:
        f.write_text(json.dumps(d | bad))
        with pytest.raises(InputError, match=words):
            load_station(f)
    # follow takes them from the file: a segment outside Region 1's 40 m is refused at start
    f.write_text(json.dumps(d | {"segments": ["7.0-7.3"]}))
    p = subprocess.run([str(BIN / "feedmatch"), "follow", "--port", "/nonexistent/board", "--rig", "127.0.0.1:1",
                        "--tune-carrier", "10", "--station", str(f)], capture_output=True, text=True, timeout=60)
    assert p.returncode == 2 and "not inside an amateur band of ITU Region 1" in p.stderr, p.stderr
