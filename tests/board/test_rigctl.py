"""The rigctld client and the keyed tune's refusals, against a radio that misbehaves
in ways Hamlib's dummy cannot (its answers framed as the rigctld(1) manual says:
values one per line for a get, "RPRT n" for a set or a failure)."""

from __future__ import annotations

import socket
import threading

import pytest
from feedmatch.board.follow import Follower
from feedmatch.board.keying import KeyPolicy, parse_segments
from feedmatch.board.rigctl import RigClient, RigError, parse_hostport
from feedmatch.errors import InputError


class _Radio:
    """A one-connection rigctld stand-in whose RF power level reads back as `reads`."""

    def __init__(self, reads: float, refuse_tx: bool = False):
        self.reads, self.ptt, self.log, self.refuse_tx = reads, 0, [], refuse_tx
        self.srv = socket.socket()
        self.srv.bind(("127.0.0.1", 0))
        self.srv.listen(1)
        self.port = self.srv.getsockname()[1]
        threading.Thread(target=self._serve, daemon=True).start()

    def _serve(self):
        conn, _ = self.srv.accept()
        f = conn.makefile("rwb")
        for raw in f:
            cmd = raw.decode().strip()
            self.log.append(cmd)
            if cmd == "f":
                out = "7100000\n"
            elif cmd == "m":
                out = "USB\n2400\n"
            elif cmd == "t":
                out = f"{self.ptt}\n"
            elif cmd == "l RFPOWER":
                out = f"{self.reads:.6f}\n"
            elif cmd == "T 1" and self.refuse_tx:
                out = "RPRT -9\n"   # Hamlib's RIG_ERJCTED: the radio would not transmit
            elif cmd.startswith("T "):
                self.ptt = int(cmd[2:])
                out = "RPRT 0\n"
            elif cmd[:1] in "FML":
                out = "RPRT 0\n"
            else:
                out = "RPRT -11\n"
            f.write(out.encode())
            f.flush()


def test_the_client_reads_and_sets_as_the_protocol_says():
    r = _Radio(0.5)
    c = RigClient("127.0.0.1", r.port).open()
    assert c.freq() == 7.1e6 and c.mode() == ("USB", 2400) and c.ptt() is False and c.power() == 0.5
    c.set_ptt(True)
    assert c.ptt() is True
    with pytest.raises(RigError, match="RPRT -11"):
        c.command("\\get_powerstat", 1)
    c.close()


_POLICY = KeyPolicy(parse_segments("7.0-7.2"), 1, "CW", 10.0)


def test_no_key_when_the_power_does_not_read_back():
    r = _Radio(0.9)   # the radio ignores the power it is given
    said = []
    fo = Follower("unused", RigClient("127.0.0.1", r.port), said.append, tune_carrier_w=10.0, policy=_POLICY)
    fo.limits = {"hot_switch_w": 30.0, "min_tune_w": 2.0, "max_tune_w": 20.0}
    assert fo.keyed_tune(None, 7.1e6) is None
    assert any("reads back 0.900" in s for s in said) and "T 1" not in r.log
    assert r.log[-2:] == ["L RFPOWER 0.900000", "M USB 2400"]  # power and mode restored


class _Board:
    """Just enough of a BoardLink for keyed_tune to reach the key."""

    def request(self, word, args=None):
        return {"seq": 0}


def test_a_radio_that_will_not_transmit_is_said_in_words_and_not_asked_again():
    r = _Radio(0.1, refuse_tx=True)
    said = []
    fo = Follower("unused", RigClient("127.0.0.1", r.port), said.append, tune_carrier_w=10.0, policy=_POLICY)
    fo.limits = {"hot_switch_w": 30.0, "min_tune_w": 2.0, "max_tune_w": 20.0}
    assert fo.keyed_tune(_Board(), 7.1e6) is None
    msg = [s for s in said if s.startswith("cannot key")]
    assert msg and "RPRT -9: command rejected by the rig" in msg[0] and "may transmit" in msg[0], said
    assert "T 0" in r.log and r.log[-2:] == ["L RFPOWER 0.100000", "M USB 2400"]  # unkeyed, restored anyway
    assert "refused to key" in fo.may_key(7.1e6)   # and not asked to key again this session


def test_no_key_above_the_box_limits():
    said = []
    fo = Follower("unused", RigClient("127.0.0.1", 1), said.append, tune_carrier_w=25.0, policy=_POLICY)
    fo.limits = {"hot_switch_w": 30.0, "min_tune_w": 2.0, "max_tune_w": 20.0}
    assert fo.keyed_tune(None, 7.1e6) is None and "outside the box's tune window" in said[0]
    with pytest.raises(InputError):
        Follower("unused", RigClient("127.0.0.1", 1), said.append, tune_carrier_w=500.0, policy=_POLICY)
    with pytest.raises(InputError, match="--segments"):  # no keying without declared segments
        Follower("unused", RigClient("127.0.0.1", 1), said.append, tune_carrier_w=10.0)


@pytest.mark.parametrize("text,want", [("localhost:4532", ("localhost", 4532)), ("rig.lan", ("rig.lan", 4532)),
                                       (":4600", ("127.0.0.1", 4600))])
def test_rig_addresses(text, want):
    assert parse_hostport(text) == want
    with pytest.raises(InputError):
        parse_hostport("host:99999")
