"""The firmware on the emulated RP2040 (MicroPython's rp2 port in rp2040js).

Deployed by the project's own deploy code into the Pico's littlefs, with
board_rp2040.py driving the emulated peripherals.  The emulator runs 8-30 times
slower than a real Pico, so these tests are few and marked slow.  They need node,
npm (rp2040js is fetched once) and a MicroPython Pico image: ../shared/rp2040/ or
FEEDMATCH_PICO_UF2; without them they skip and say why.
"""

from __future__ import annotations

import json
import signal
import subprocess
import time
from pathlib import Path

import pytest
from feedmatch.board.link import BoardLink
from feedmatch.sim.emulator import EmulatorMissing, default_uf2, emu_dir
from feedmatch.sim.station import load_station, station_from_dict

from ..conftest import BIN, run_cli

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def kit():
    uf2 = default_uf2()
    if uf2 is None or not uf2.exists():
        pytest.skip("no MicroPython Pico image (../shared/rp2040/ or FEEDMATCH_PICO_UF2)")
    try:
        emu_dir()
    except EmulatorMissing as e:
        pytest.skip(f"emulator not available here: {e}")
    return uf2


def _status(ln, timeout=600.0):
    """For a board whose chip clock this process cannot read (a virtual-board process):
    the wall-clock limit only stops a hang, generous for a loaded machine."""
    t = time.monotonic() + timeout
    while time.monotonic() < t:
        try:
            return ln.request("status", timeout=2.0)
        except Exception:
            continue
    raise AssertionError("the emulated board never answered status")


# How long the host may wait is counted on the chip's own clock (the emulator reports
# its cycle count as time), so a loaded machine that runs the chip slowly only makes
# the wait longer in wall time, never a failure. WALL_GUARD_S only stops a hang.
WALL_GUARD_S = 1800.0


def _chip_s(vs) -> float:
    return vs.pico.nanos / 1e9


def _on_chip_clock(vs, chip_s: float, attempt):
    """attempt() until it returns something other than None, while the chip runs at
    most chip_s of its own seconds; None when it never did."""
    start, wall_end = _chip_s(vs), time.monotonic() + WALL_GUARD_S
    while _chip_s(vs) - start < chip_s and time.monotonic() < wall_end and not vs.pico.closed.is_set():
        got = attempt()
        if got is not None:
            return got
    return None


def _status_chip(ln, vs, chip_s=20.0):
    """The board's status within chip_s seconds of the chip's clock (a Pico boots in about 2)."""
    def ask():
        try:
            return ln.request("status", timeout=2.0, retries=0)
        except Exception:
            return None
    st = _on_chip_clock(vs, chip_s, ask)
    assert st is not None, f"the emulated board never answered status within {chip_s:g} s of its own clock"
    return st


def _station(tmp_path, kit, station=None):
    from feedmatch.sim.emulated import EmulatedBoard

    return EmulatedBoard(station or load_station(), tmp_path / "flash", uf2=kit)


def test_the_driver_on_the_emulated_chip(tmp_path, kit):
    vs = _station(tmp_path, kit)
    pty = vs.start()
    try:
        with BoardLink(pty, timeout=3.0) as ln:
            st = _status_chip(ln, vs)
            assert st["state"] == "wait-rf" and st["board_id"] == "hollow-oak-1"
            # Output enable held high (relays released) until an all-zero word is latched.
            (w0, oe0), (_w1, oe1) = vs.latches[0], vs.latches[1]
            assert (w0, oe0) == (0, 1) and oe1 == 0
            assert all(oe == 0 for _w, oe in vs.latches[1:])
            # Relays set as commanded: the word the chip shifted out is the state.
            ln.request("set", {"l": 37, "c": 5, "sh": 0})
            assert vs.hardware.relays == (37, 5, 0, 0)
            # Detector voltages on the ADC, converted by the board's calibration, and
            # the frequency counter on the PWM input.
            vs.key(10.0, 14.2e6)
            _on_chip_clock(vs, 0.5, lambda: time.sleep(0.05))  # half a second of the chip's readings
            st = ln.request("status")
            from fmlogic.config import merged, meter_from

            meter = meter_from(merged(vs.cfg))
            with vs.lock:
                fwd, ref = meter.powers(*vs.hardware.det.read(10.0, vs.hardware.gamma(), 14.2e6, None))
            assert st["fwd_w"] == pytest.approx(fwd, rel=0.02)  # the same counts through the same table
            assert st["ref_w"] == pytest.approx(ref, rel=0.05)
            assert st["freq_hz"] == pytest.approx(14.2e6, rel=0.001)
            vs.key(0.0)
    finally:
        vs.stop()
    assert vs.resets == 0


def test_a_tune_through_feedmatch_tune_on_the_emulated_board(tmp_path, kit):
    p = subprocess.Popen([str(BIN / "feedmatch"), "virtual-board", "--emulate", "rp2040", "--image", str(kit),
                          "--carrier", "10@20m", "--dir", str(tmp_path / "flash")],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        pty = p.stdout.readline().strip()
        assert pty.startswith("/dev/"), p.stderr.read()
        with BoardLink(pty, timeout=3.0) as ln:
            _status(ln)
        r = run_cli("tune", "--port", pty, "--freq", "14.175e6", "--json", timeout=120)
        assert r.returncode == 0, r.stderr
        rec = json.loads(r.stdout)
        assert rec["outcome"] == "locked" and rec["swr_after"] <= 1.5
        r = run_cli("status", "--port", pty)
        assert r.returncode == 0 and "locked" in r.stdout
    finally:
        p.send_signal(signal.SIGINT)
        p.wait(20)
    assert p.returncode == 0


def test_a_worst_case_tune_never_trips_the_watchdog(tmp_path, kit):
    # An unmatchable load (a 4.5 m vertical on 160 m: 2 - j1900 ohm, beyond the
    # bank's 12.7 uH) makes the longest search; the chip's 4 s watchdog must not fire.
    base = Path(__file__).resolve().parents[2] / "host" / "feedmatch" / "data"
    doc = json.loads((base / "station_demo.json").read_text())
    doc["antenna"] = {"kind": "fixed", "r_ohm": 2.1, "x_ohm": -1913.0}
    st = station_from_dict(doc, "worst-case station", base)
    vs = _station(tmp_path, kit, st)
    pty = vs.start()
    try:
        with BoardLink(pty, timeout=3.0) as ln:
            boot = _status_chip(ln, vs)["boot"]
            vs.key(10.0, 1.9e6)
            # The longest search, then its record: within 60 s of the chip's clock.
            rec = _on_chip_clock(vs, 60.0, lambda: ln.wait_event("record", timeout=0.5))
            assert rec is not None, "no tune record within 60 s of the chip's clock"
            assert rec["outcome"] in ("through", "best-effort")
            assert _status_chip(ln, vs)["boot"] == boot
    finally:
        vs.stop()
    assert vs.resets == 0
    assert vs.hardware.violations == []
