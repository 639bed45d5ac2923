"""Following the radio through Hamlib's real rigctld (its built-in dummy radio, -m 1),
driven by rigctld's own protocol while the virtual board runs the firmware.

rigctld's protocol: the Hamlib rigctld(1) manual (one command per line; a get
answers with its values, a set with "RPRT 0").  The dummy radio keys through
"-P RIG" (Hamlib's PTT type "RIG").
"""

from __future__ import annotations

import json
import shutil
import signal
import subprocess
import threading
import time

import pytest
from feedmatch.board.follow import Follower
from feedmatch.board.link import BoardLink
from feedmatch.board.rigctl import RigClient
from feedmatch.sim.demo import _wait
from feedmatch.sim.radio import RigBridge
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualStation

from .conftest import BIN, free_port

pytestmark = pytest.mark.skipif(shutil.which("rigctld") is None,
                                reason="Hamlib's rigctld is not installed (Debian package libhamlib-utils; "
                                       "`make test` installs it where it may run apt-get)")


@pytest.fixture
def rig():
    port = free_port()
    p = subprocess.Popen(["rigctld", "-m", "1", "-P", "RIG", "-T", "127.0.0.1", "-t", str(port)],
                         stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)

    def up():
        try:
            RigClient("127.0.0.1", port, timeout=1).open().close()
            return True
        except Exception:
            return False
    assert _wait(up, 10), "rigctld did not start"
    yield ("127.0.0.1", port, p)
    p.kill()
    p.wait(5)


@pytest.fixture
def station(tmp_path):
    vs = VirtualStation(load_station(), tmp_path / "flash")
    pty = vs.start()
    time.sleep(1.0)
    yield vs, pty
    vs.stop()


def _learn(ctl: RigClient, vs, freqs):
    """Tune each frequency by keying the dummy radio at 10 W (the bridge makes it RF)."""
    for f in freqs:
        n = vs.records_on_flash()
        ctl.set_freq(f)
        ctl.set_power(0.1)
        ctl.set_ptt(True)
        assert _wait(lambda n=n: vs.records_on_flash() > n, 15)
        ctl.set_ptt(False)
        time.sleep(0.5)


def _records(pty):
    with BoardLink(pty) as ln:
        return ln.records_since(0)


def test_a_band_change_presets_the_box_and_the_first_carrier_confirms_it(rig, station):
    host, port, _ = rig
    vs, pty = station
    bridge = RigBridge(vs, RigClient(host, port)).start()
    ctl = RigClient(host, port).open()
    _learn(ctl, vs, [7.1e6, 14.2e6])
    said: list[str] = []
    fo = Follower(pty, RigClient(host, port), said.append)
    th = threading.Thread(target=fo.run, daemon=True)
    th.start()
    try:
        # At 14.2 MHz, where the box last tuned, nothing has to move, and it says so.
        assert _wait(lambda: any("14.2000 MHz" in s and "already on its stored state" in s for s in said), 10), said
        ctl.set_freq(7.105e6)  # back to 40 m, no RF: the stored state goes in at once
        assert _wait(lambda: any("7.1050 MHz" in s and "preset L" in s for s in said), 10), said
        with BoardLink(pty) as ln:  # attached through the follower's hub
            st = ln.request("status")
            mem = ln.request("mem-list")["entries"]
        near = [e for e in mem if abs(e[0] - 7.1e6) < 50e3][0]
        assert st["relays"][:3] == near[1:4] and st["relays"][3] == 0
        n = vs.records_on_flash()
        ctl.set_ptt(True)   # the first carrier: one confirming reading
        assert _wait(lambda: vs.records_on_flash() > n, 15)
        ctl.set_ptt(False)
        rec = _records(pty)[-1]
        assert rec["preset"] is True and rec["n"] == 1 and rec["outcome"] == "locked"
        assert rec["rig_hz"] == 7.105e6 and rec["rig_mode"]
        ctl.set_freq(24.94e6)  # nothing stored there: left as it is, and said
        assert _wait(lambda: any("24.9400 MHz" in s and "nothing stored" in s for s in said), 10), said
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
        bridge.close()
    assert vs.model.violations == []  # nothing ever switched under RF
    assert fo.presets == 1


def _keyed_follower(host, port, pty, said, max_key_s=3.0):
    return Follower(pty, RigClient(host, port), said.append, tune_carrier_w=10.0, max_key_s=max_key_s)


def test_a_keyed_tune_unkeys_and_restores_the_radio(rig, station):
    host, port, _ = rig
    vs, pty = station
    bridge = RigBridge(vs, RigClient(host, port)).start()
    ctl = RigClient(host, port).open()
    ctl.set_mode("USB", 2400)
    ctl.set_power(0.5)
    ctl.set_freq(21.2e6)
    said: list[str] = []
    fo = _keyed_follower(host, port, pty, said)
    th = threading.Thread(target=fo.run, daemon=True)
    th.start()
    try:
        assert _wait(lambda: any("tuned 21.2000 MHz" in s or "no tune result" in s for s in said), 20), said
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
        bridge.close()
    assert any("tuned 21.2000 MHz: locked" in s for s in said), said
    assert ctl.ptt() is False and ctl.mode()[0] == "USB" and ctl.power() == pytest.approx(0.5, abs=0.01)
    assert vs.model.violations == []


@pytest.mark.parametrize("fault", ["no RF reaches the box (timeout)", "the board dies mid-tune"])
def test_the_radio_is_unkeyed_when_the_tune_cannot_finish(fault, rig, station):
    host, port, _ = rig
    vs, pty = station
    ctl = RigClient(host, port).open()
    ctl.set_freq(21.2e6)   # no bridge: keying the radio puts no RF into the virtual box
    said: list[str] = []
    fo = _keyed_follower(host, port, pty, said)
    th = threading.Thread(target=fo.run, daemon=True)
    th.start()
    try:
        assert _wait(lambda: any("keying 10 W" in s for s in said), 10), said
        assert _wait(lambda: ctl.ptt(), 3)  # really keyed
        if fault == "the board dies mid-tune":
            vs.stop()
        assert _wait(lambda: not ctl.ptt(), 6), said  # unkeyed within the key limit
        if fault == "the board dies mid-tune":
            assert _wait(lambda: any("lost the board" in s and "retrying" in s for s in said), 10), said
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
    assert not ctl.ptt()


def _follow_cli(host, port, pty, *more):
    return subprocess.Popen([str(BIN / "feedmatch"), "follow", "--port", pty, "--rig", f"{host}:{port}",
                             "--tune-carrier", "10", *more], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)


def _wait_line(p, words, timeout=15.0):
    got = []
    t = time.monotonic() + timeout
    while time.monotonic() < t:
        line = p.stdout.readline()
        if not line:
            break
        got.append(line)
        if words in line:
            return got
    raise AssertionError(f"no '{words}' in {got}")


def test_ctrl_c_mid_tune_unkeys(rig, station):
    host, port, _ = rig
    vs, pty = station
    ctl = RigClient(host, port).open()
    ctl.set_freq(21.2e6)
    p = _follow_cli(host, port, pty, "--json")
    try:
        lines = _wait_line(p, "keying 10 W")
        assert _wait(lambda: ctl.ptt(), 3)
        p.send_signal(signal.SIGINT)
        out, err = p.communicate(timeout=15)
    finally:
        if p.poll() is None:
            p.kill()
    assert p.returncode == 0 and "Traceback" not in err, err
    assert not ctl.ptt()
    # --json: one object per line, each with its time and message
    msgs = [json.loads(x) for x in lines + out.splitlines() if x.strip()]
    assert any("KEY THE RADIO" in m["message"] for m in msgs) and all("time" in m for m in msgs)


def test_losing_rigctld_mid_tune_is_said_not_a_traceback(rig, station):
    host, port, proc = rig
    vs, pty = station
    ctl = RigClient(host, port).open()
    ctl.set_freq(21.2e6)
    p = _follow_cli(host, port, pty)
    try:
        _wait_line(p, "keying 10 W")
        proc.kill()   # the radio's control goes away while keyed
        lines = _wait_line(p, "retrying", timeout=20)
        p.send_signal(signal.SIGTERM)
        out, err = p.communicate(timeout=15)
    finally:
        if p.poll() is None:
            p.kill()
    text = "".join(lines) + out
    assert "COULD NOT UNKEY THE RADIO" in text and "Traceback" not in err, (text, err)
    assert p.returncode == 0
