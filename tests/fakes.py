"""An in-process board on the host's station model, with virtual time."""

from __future__ import annotations

import copy

from feedmatch.rf.antenna import Monopole
from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import load_network
from feedmatch.seam.bank import DEFAULT_SECTION, ELEMENT_KEYS
from feedmatch.sim.hardware import SimulatedHardware
from feedmatch.sim.inproc import InProcessBoard as FakeBoard  # noqa: F401 (the tests' name)


def make_model(antenna=None, ideal=False, hot=25.0, seed=3):
    net = load_network()
    return SimulatedHardware(net, antenna or Monopole(4.5, 0.012, 6.0), DetectorModel(ideal=ideal), hot, seed)


def board_config(**over):
    det = DetectorModel()
    pts = [list(p) for p in det.calibration_points()]
    cfg = {
        "board": "virtual", "board_id": "test-1",
        "network": copy.deepcopy({k: DEFAULT_SECTION[k] for k in ELEMENT_KEYS}),  # the shipped bank
        "detector": {"fwd": pts, "ref": pts, "floor_counts": 2.0},
        "power": {"min_tune_w": 2, "max_tune_w": 20, "hot_switch_w": 25, "max_w": 150},
        "tune": {"strategy": "recall", "target_swr": 1.5, "retune_swr": 2.0, "budget": 60,
                 "time_limit_ms": 4000, "settle_ms": 5, "rf_wait_ms": 2000},
        "memory": {"bin_hz": 25000, "max_entries": 50},
    }
    for k, v in over.items():
        sec, key = k.split("__")
        cfg[sec][key] = v
    return cfg
