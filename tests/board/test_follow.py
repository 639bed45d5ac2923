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
from feedmatch.board.keying import KeyerLock, KeyPolicy, parse_segments
from feedmatch.board.link import BoardLink
from feedmatch.board.rigctl import RigClient
from feedmatch.sim.demo import _wait
from feedmatch.sim.radio import RigBridge
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualBoard

from ..conftest import BIN, free_port

pytestmark = pytest.mark.skipif(shutil.which("rigctld") is None,
                                reason="Hamlib's rigctld is not installed (Debian package libhamlib-utils; "
                                       "`make test` installs it where it may run apt-get)")


def _start_rigctld(*ptt):
    port = free_port()
    p = subprocess.Popen(["rigctld", "-m", "1", *ptt, "-T", "127.0.0.1", "-t", str(port)],
                         stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)

    def up():
        try:
            RigClient("127.0.0.1", port, timeout=1).open().close()
            return True
        except Exception:
            return False
    assert _wait(up, 10), "rigctld did not start"
    return port, p


@pytest.fixture
def rig():
    port, p = _start_rigctld("-P", "RIG")
    yield ("127.0.0.1", port, p)
    p.kill()
    p.wait(5)


@pytest.fixture
def station(tmp_path):
    vs = VirtualBoard(load_station(), tmp_path / "flash")
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
        # The first carrier confirms the preset: one reading where it proves the
        # target with the coupler's bounds, else a short local search from it.
        ctl.set_ptt(True)
        assert _wait(lambda: vs.records_on_flash() > n, 15)
        ctl.set_ptt(False)
        rec = _records(pty)[-1]
        # search.py: the local search from a recalled state takes at most _LOCAL_STEPS (14) readings.
        assert rec["preset"] is True and rec["outcome"] == "locked" and 1 <= rec["n"] <= 14, rec
        assert rec["rig_hz"] == 7.105e6 and rec["rig_mode"]
        ctl.set_freq(24.94e6)  # nothing stored there: left as it is, and said
        assert _wait(lambda: any("24.9400 MHz" in s and "nothing stored" in s for s in said), 10), said
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
        bridge.close()
    assert vs.hardware.violations == []  # nothing ever switched under RF
    assert fo.presets == 1


# Segments a Region 1 operator might declare (MHz): 40, 30, 20, 15 m and 10 m FM, plus 6 m and
# 2 m, which are amateur bands (ITU Radio Regulations, Article 5, Table of Frequency
# Allocations, edition 2020: 50-52 MHz and 144-146 MHz in Region 1) that this HF box
# is not built for.
SEGMENTS = "7.0-7.2,10.1-10.15,14.0-14.35,21.0-21.45,29.51-29.7,50.0-50.5,144-146"


def _policy(mode="CW", segments=SEGMENTS, antenna=None):
    pol = KeyPolicy(parse_segments(segments), 1, mode, 10.0, antenna=antenna)
    pol.check_declared()
    return pol


def _keyed_follower(host, port, pty, said, max_key_s=3.0, mode="CW", lock=None):
    return Follower(pty, RigClient(host, port), said.append, tune_carrier_w=10.0, max_key_s=max_key_s,
                    carrier_mode=mode, policy=_policy(mode), lock=lock)


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
    assert vs.hardware.violations == []


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
            # the heartbeat's status is asked three times, 2 s each, before the board counts as lost
            assert _wait(lambda: any("lost the board" in s and "retrying" in s for s in said), 20), said
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
    assert not ctl.ptt()


def _follow_cli(host, port, pty, *more):
    return subprocess.Popen([str(BIN / "feedmatch"), "follow", "--port", pty, "--rig", f"{host}:{port}",
                             "--tune-carrier", "10", "--segments", SEGMENTS, "--region", "1", *more],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


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


class PttWatch:
    """Polls 't' through rigctld every 20 ms for the whole test; counts key-downs."""

    def __init__(self, host, port):
        self.c = RigClient(host, port)
        self.downs = self.samples = 0
        self.on = False
        self.stop = threading.Event()
        self._th = threading.Thread(target=self._loop, daemon=True)

    def start(self):
        self._th.start()
        assert _wait(lambda: self.samples > 0, 5)
        return self

    def _loop(self):
        while not self.stop.is_set():
            on = self.c.ptt()
            self.samples += 1
            if on and not self.on:
                self.downs += 1
            self.on = on
            self.stop.wait(0.02)

    def close(self):
        self.stop.set()
        self._th.join(2)
        self.c.close()


def _run(fo):
    th = threading.Thread(target=fo.run, daemon=True)
    th.start()
    return th


def _said(said, *words):
    return lambda: any(all(w in s for w in words) for s in said)


def test_no_carrier_outside_a_declared_matchable_segment_and_one_inside(rig, station):
    host, port, _ = rig
    vs, pty = station
    bridge = RigBridge(vs, RigClient(host, port)).start()
    ctl = RigClient(host, port).open()
    ctl.set_freq(27.185e6)   # a CB channel, in no amateur band
    watch = PttWatch(host, port).start()
    said: list[str] = []
    fo = Follower(pty, RigClient(host, port), said.append, tune_carrier_w=10.0, max_key_s=3.0,
                  policy=_policy(segments=SEGMENTS + ",3.5-3.8", antenna=vs.station.antenna))
    th = _run(fo)
    try:
        for f, why in [(27.185e6, "in no amateur band of ITU Region 1"),
                       (50.1e6, "outside the range the box is built for"),
                       (145.0e6, "outside the range the box is built for"),
                       (21.0005e6, "within 2 kHz of the edge of 21.0000-21.4500 MHz"),
                       (14.3495e6, "within 2 kHz of the edge"),
                       (3.6e6, "the box cannot match the antenna")]:  # a 4.5 m vertical on 80 m
            ctl.set_freq(f)
            assert _wait(_said(said, f"{f / 1e6:.4f} MHz: not keying", why), 15), said
        assert watch.downs == 0 and watch.samples > 20
        ctl.set_freq(21.2e6)  # inside a declared segment the box can match: keys, tunes, unkeys
        assert _wait(_said(said, "tuned 21.2000 MHz"), 20), said
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
        bridge.close()
        watch.close()
    assert any("tuned 21.2000 MHz: locked" in s for s in said), said
    assert watch.downs == 1 and not ctl.ptt()
    assert vs.hardware.violations == []


def test_no_fm_carrier_on_30_m(rig, station):
    host, port, _ = rig
    vs, pty = station
    ctl = RigClient(host, port).open()
    ctl.set_freq(10.12e6)
    watch = PttWatch(host, port).start()
    said: list[str] = []
    fo = _keyed_follower(host, port, pty, said, mode="FM")
    th = _run(fo)
    try:
        assert _wait(_said(said, "10.1200 MHz: not keying", "FM carrier", "not in the band plan"), 10), said
        time.sleep(1.0)
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
        watch.close()
    assert watch.downs == 0 and watch.samples > 20


def test_two_followers_one_key_down(rig, station):
    host, port, _ = rig
    vs, pty = station
    bridge = RigBridge(vs, RigClient(host, port)).start()
    ctl = RigClient(host, port).open()
    ctl.set_freq(21.2e6)
    watch = PttWatch(host, port).start()
    said1: list[str] = []
    said2: list[str] = []
    locks = [KeyerLock(f"{host}:{port}", pty), KeyerLock(f"{host}:{port}", pty)]
    fos = [_keyed_follower(host, port, pty, said1, lock=locks[0]),
           _keyed_follower(host, port, pty, said2, lock=locks[1])]
    ths = [_run(fo) for fo in fos]
    try:
        assert _wait(lambda: any("tuned 21.2000 MHz" in s for s in said1 + said2), 20), (said1, said2)
        assert _wait(lambda: any("another follower (pid" in s for s in said1 + said2), 10), (said1, said2)
    finally:
        for fo, th in zip(fos, ths):
            fo.stop.set()
            th.join(10)
            fo.close()
        for lk in locks:
            lk.release()
        bridge.close()
        watch.close()
    assert watch.downs == 1 and not ctl.ptt()
    assert any("following without keying" in s for s in said1 + said2)


def test_a_dummy_radio_without_ptt_is_followed_and_refused_for_keying_in_words(station):
    vs, pty = station
    port, proc = _start_rigctld()   # no -P RIG: 't' answers RPRT -11
    try:
        ctl = RigClient("127.0.0.1", port).open()
        ctl.set_freq(7.1e6)
        said: list[str] = []
        fo = Follower(pty, RigClient("127.0.0.1", port), said.append)
        th = _run(fo)
        try:
            assert _wait(_said(said, "RPRT -11", "-P RIG", "without knowing PTT"), 10), said
            assert _wait(_said(said, "7.1000 MHz", "nothing stored here"), 10), said  # still following
        finally:
            fo.stop.set()
            th.join(10)
            fo.close()
        p = subprocess.run([str(BIN / "feedmatch"), "follow", "--port", pty, "--rig", f"127.0.0.1:{port}",
                            "--tune-carrier", "10", "--segments", SEGMENTS, "--region", "1"],
                           capture_output=True, text=True, timeout=30)
        assert p.returncode == 2 and len(p.stderr.splitlines()) == 1, p.stderr
        assert "RPRT -11" in p.stderr and "-P RIG" in p.stderr and "Traceback" not in p.stderr
    finally:
        proc.kill()
        proc.wait(5)


def test_while_it_cannot_follow_it_says_so_again_and_again(rig, station):
    host, port, proc = rig
    vs, pty = station
    said: list[str] = []
    fo = Follower(pty, RigClient(host, port), said.append)
    fo.remind_s = 1.0   # 30 s in use
    th = _run(fo)
    try:
        assert _wait(lambda: fo.last_f is not None, 10)
        proc.kill()
        assert _wait(lambda: sum("still not following" in s for s in said) >= 2, 15), said
    finally:
        fo.stop.set()
        th.join(10)
        fo.close()
    assert any(s.startswith("not following: ") and "rigctld" in s for s in said), said


def test_a_refusal_is_a_json_object_with_json(rig, station):
    host, port, _ = rig
    vs, pty = station
    ctl = RigClient(host, port).open()
    ctl.set_freq(27.185e6)
    p = _follow_cli(host, port, pty, "--json")
    try:
        lines = _wait_line(p, "not keying")
        p.send_signal(signal.SIGTERM)
        out, err = p.communicate(timeout=15)
    finally:
        if p.poll() is None:
            p.kill()
    msgs = [json.loads(x) for x in lines + out.splitlines() if x.strip()]
    refusal = [m for m in msgs if "not keying" in m["message"]]
    assert refusal and "27.1850 MHz" in refusal[0]["message"] and "no amateur band" in refusal[0]["message"]
    assert not ctl.ptt() and p.returncode == 0 and "Traceback" not in err
