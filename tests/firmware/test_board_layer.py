"""The hardware board drivers against a fake `machine` module (no hardware needed)."""

from __future__ import annotations

import importlib
import json
import sys
import types

import pytest

from ..conftest import FIRMWARE

EVENTS: list = []


class Pin:
    OUT, IN, PULL_UP, IRQ_RISING = 1, 0, 2, 4

    def __init__(self, n, mode=None, pull=None, value=None):
        self.n = n
        self.v = value
        if value is not None:
            EVENTS.append(("pin", n, value))

    def value(self, v=None):
        if v is None:
            return 1 if self.v is None else self.v
        self.v = v
        EVENTS.append(("pin", self.n, v))

    def irq(self, *a):
        pass


class SPI:
    def __init__(self, *a, **k):
        pass

    def write(self, buf):
        EVENTS.append(("spi", bytes(buf)))


class ADC:
    ATTN_11DB = 3

    def __init__(self, pin, atten=None):
        pass

    def read_u16(self):
        return 1000 * 16


class _Mem:
    def __init__(self):
        self.d = {}

    def __setitem__(self, k, v):
        self.d[k] = v

    def __getitem__(self, k):
        return self.d.get(k, 0)


def _fake_machine():
    m = types.ModuleType("machine")
    m.Pin, m.SPI, m.ADC = Pin, SPI, ADC
    m.WDT = lambda timeout: types.SimpleNamespace(feed=lambda: None)
    m.UART = lambda *a, **k: types.SimpleNamespace(read=lambda: None, write=lambda d: None)
    m.mem32 = _Mem()
    return m


@pytest.fixture
def fake_hw(monkeypatch):
    EVENTS.clear()
    monkeypatch.setitem(sys.modules, "machine", _fake_machine())
    mp = types.ModuleType("micropython")
    mp.const = lambda x: x
    monkeypatch.setitem(sys.modules, "micropython", mp)
    monkeypatch.syspath_prepend(str(FIRMWARE))
    for name in ("board_common", "board_rp2040", "board_esp32"):
        sys.modules.pop(name, None)
    time_mod = importlib.import_module("time")
    monkeypatch.setattr(time_mod, "sleep_ms", lambda ms: None, raising=False)
    yield
    for name in ("board_common", "board_rp2040", "board_esp32"):
        sys.modules.pop(name, None)


@pytest.mark.parametrize("kind", ["rp2040", "esp32"])
def test_relays_are_held_off_until_cleared_then_words_are_right(fake_hw, kind):
    from fmlogic.config import merged

    cfg = merged(json.loads((FIRMWARE.parent / "host/feedmatch/data/boards" / f"{kind}.json").read_text()))
    mod = importlib.import_module(f"board_{kind}")
    b = mod.Board(cfg)
    oe = cfg["pins"]["relay_oe"]
    first_oe = next(i for i, e in enumerate(EVENTS) if e[0] == "pin" and e[1] == oe)
    first_spi = next(i for i, e in enumerate(EVENTS) if e[0] == "spi")
    oe_low = next(i for i, e in enumerate(EVENTS) if e == ("pin", oe, 0))
    # /OE high before any register write; low only after the all-zero word is latched.
    assert EVENTS[first_oe] == ("pin", oe, 1) and first_oe < first_spi < oe_low
    assert EVENTS[first_spi] == ("spi", b"\x00\x00")
    EVENTS.clear()
    b.set_relays(5, 3, 1, False)
    word = 5 | (3 << 7) | (1 << 14) | (1 << 15)  # in-line bit set: network in circuit
    assert ("spi", word.to_bytes(2, "big")) in EVENTS
    EVENTS.clear()
    b.set_relays(0, 0, 1, True)
    assert ("spi", (1 << 14).to_bytes(2, "big")) in EVENTS  # bypassed: in-line bit clear
    assert b.read_detectors() == (1000.0, 1000.0)  # read_u16 scaled back to 12-bit counts
