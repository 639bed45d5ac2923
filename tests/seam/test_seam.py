"""The host/firmware seam (feedmatch.seam): one translator of the banks, the firmware's
defaults and ranges the only ones, the host's files and names held to them."""

from __future__ import annotations

import json

import pytest
from feedmatch.errors import InputError
from feedmatch.resources import DATA
from feedmatch.rf.network import DEFAULT_NETWORK, load_network, network_from_dict
from feedmatch.seam import bank as seam
from fmlogic import config as fcfg
from fmlogic import lnet, search


def test_the_shipped_network_file_is_the_firmwares_default_bank():
    # The default bank is written once (fmlogic/config.py); the network file the host ships
    # must describe the same box, or a simulation would not be of the box a board runs.
    net = load_network(DEFAULT_NETWORK)
    d = fcfg.DEFAULTS["network"]
    assert net.z0_ohm == d["z0_ohm"]
    assert net.inductors_uh == d["inductors_uh"] and net.capacitors_pf == d["capacitors_pf"]
    assert net.inductor_q == d["inductor_q"] and net.capacitor_q == d["capacitor_q"]
    assert seam.network_section(net) == {k: v for k, v in d.items() if k != "failed"}


def test_the_shipped_board_configs_take_the_default_bank_from_the_firmware():
    for name in ("rp2040", "esp32"):
        cfg = json.loads((DATA / "boards" / f"{name}.json").read_text())
        assert fcfg.validate(cfg) == [], name
        assert "network" not in cfg, f"{name}.json repeats the default bank"
        assert fcfg.merged(cfg)["network"] == fcfg.DEFAULTS["network"]


def _host_refuses(**over) -> bool:
    d = {"z0_ohm": 50, "inductors_uh": [1.0], "capacitors_pf": [10.0]} | over
    try:
        network_from_dict(d)
    except InputError:
        return True
    return False


def _board_refuses(**over) -> bool:
    sec = {"z0_ohm": 50, "inductors_uh": [1.0], "capacitors_pf": [10.0]} | over
    return bool(fcfg.validate({"board": "virtual", "network": sec}))


@pytest.mark.parametrize("key,value", [
    ("z0_ohm", 0.5), ("z0_ohm", 1.0), ("z0_ohm", 1000.0), ("z0_ohm", 1000.5),
    ("inductor_q", 0.5), ("inductor_q", 1.0), ("inductor_q", 100000.0), ("inductor_q", 100001.0),
    ("capacitor_q", 0.9), ("capacitor_q", 150.0), ("capacitor_q", 2e5),
    ("inductors_uh", [0.1] * fcfg.MAX_BITS), ("inductors_uh", [0.1] * (fcfg.MAX_BITS + 1)),
    ("capacitors_pf", [10.0] * (fcfg.MAX_BITS + 1)),
])
def test_the_host_and_the_board_refuse_the_same_networks(key, value):
    # One set of ranges (fmlogic.config.RANGES, MAX_BITS): a network file the host reads is
    # one a board config takes, and the other way round.
    assert _host_refuses(**{key: value}) == _board_refuses(**{key: value})


def test_codes_and_values_cross_the_seam_one_way():
    net = load_network()
    bank = seam.bank_of_network(net)
    # Binary weighting: code 5 is elements 0 and 2 (0.1 + 0.4 uH, 10 + 40 pF: the shipped bank).
    assert seam.state_values(bank, 5, 5) == pytest.approx((0.5, 50.0))
    assert seam.code_value(bank, "L", 4.6) == pytest.approx(0.5) and seam.code_value(bank, "C", 127) == 1270.0
    assert seam.state_values(bank, 128, 0) is None and seam.code_value(bank, "C", 128) is None
    assert seam.state_values(None, 1, 1) is None and seam.code_value(None, "L", 1) is None
    # Board config sections -> Bank, with the learned correction in place of the nominal values.
    sections = {"network": seam.network_section(net),
                "correction": {"inductors_uh": [v * 1.1 for v in net.inductors_uh],
                               "capacitors_pf": net.capacitors_pf}}
    learned = seam.bank_of_sections(sections)
    assert learned.lv[1] == pytest.approx(0.11) and learned.nominal_l == bank.nominal_l
    assert seam.bank_or_none({"network": {"z0_ohm": 50}}) is None and seam.bank_or_none(None) is None
    # A board's section back to a network file: a Q of 0 is the board's "lossless".
    back = network_from_dict(seam.network_of_section(seam.network_section(net) | {"inductor_q": 0.0}))
    assert back.inductor_q is None and back.capacitors_pf == net.capacitors_pf


def test_side_names_are_the_firmwares_shunt_numbers():
    assert seam.SIDES[lnet.SHUNT_TX] == "tx" and seam.SIDES[lnet.SHUNT_ANT] == "ant"
    assert [seam.parse_side(s) for s in ("tx", "ant", 0, 1)] == [0, 1, 0, 1]
    assert seam.side_name(lnet.SHUNT_ANT) == "ant"
    with pytest.raises(InputError, match="'tx' or 'ant'"):
        seam.parse_side("left")


def test_the_strategy_names_are_one_list():
    # The validator's list (fmlogic.config) and the strategies the search has.
    assert fcfg.STRATEGIES == search.NAMES == tuple(search.STRATEGIES)


def test_the_hosts_frequency_bins_are_the_boards():
    from feedmatch.seam.logic import bin_of, bin_width
    from fmlogic.memory import Memory

    mem = Memory(None, 10000, 4)
    for f in (1.8e6, 7.0999e6, 7.1e6, 14.2049e6, 29.7e6):
        assert bin_of(f, 10000) == mem.bin_of(f)
    # 7.151 and 7.161 MHz: one 25 kHz bin, two 10 kHz bins (arithmetic).
    assert bin_of(7.151e6, 25000) == bin_of(7.161e6, 25000) and bin_of(7.151e6, 10000) != bin_of(7.161e6, 10000)
    assert bin_width({"memory": {"bin_hz": 10000}}) == 10000.0
    shipped = float(fcfg.DEFAULTS["memory"]["bin_hz"])
    assert bin_width({"network": {}}) == bin_width(None) == bin_width({"memory": {"bin_hz": -1}}) == shipped
