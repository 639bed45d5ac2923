"""The host's link client: answers go to the request that awaits them, refusals carry their reason."""

from __future__ import annotations

import pytest
from feedmatch.board.link import BoardLink
from feedmatch.errors import BoardRefused, LinkError
from fmlogic import link as frames


def _link() -> BoardLink:
    # pyserial's loop:// URL: what is written comes back (requests echo and are ignored).
    return BoardLink("loop://", timeout=0.2).open()


def test_a_late_answer_is_never_handed_to_a_later_request():
    ln = _link()
    with pytest.raises(LinkError, match="no answer to status"):
        ln.request("status", retries=0)
    late = ln.seq
    ln.ser.write(frames.encode("A", late, "ok", {"state": "from the timed-out request"}))
    ln.pump()
    assert ln.stale_answers == 1
    ln.seq = late - 1  # the sequence number comes round again (it wraps at 65535)
    with pytest.raises(LinkError, match="no answer"):
        ln.request("status", retries=0)


def test_the_awaited_answer_is_taken_and_others_dropped():
    ln = _link()
    nxt = ln.seq + 1
    ln.ser.write(frames.encode("A", nxt + 7, "ok", {"who": "someone else"}))
    ln.ser.write(frames.encode("A", nxt, "ok", {"who": "me"}))
    assert ln.request("status", retries=0) == {"who": "me"}
    assert ln.stale_answers == 1


def test_a_refusal_is_data():
    ln = _link()
    ln.ser.write(frames.encode("A", ln.seq + 1, "err", {"why": "busy", "msg": "tuning"}))
    with pytest.raises(BoardRefused) as e:
        ln.request("tune", {"freq_hz": 7.1e6}, retries=0)
    assert (e.value.request, e.value.why) == ("tune", "busy")
    assert isinstance(e.value, LinkError)  # one exception tree for every link failure


def test_each_link_failure_has_its_own_type_chosen_where_it_arises(tmp_path):
    """pyserial's model: one base (LinkError), a subclass per failure a caller acts on;
    the type, never the message's words, tells them apart."""
    import os

    from feedmatch.board.link import open_serial
    from feedmatch.errors import LinkTimeout, PortBusy, PortError, PortMissing

    with pytest.raises(PortMissing, match="cannot open port"):
        open_serial(str(tmp_path / "ttyUSB9"), 115200)
    (tmp_path / "notes.txt").write_text("not a port")
    with pytest.raises(PortError) as e:
        open_serial(str(tmp_path / "notes.txt"), 115200)
    assert not isinstance(e.value, (PortMissing, PortBusy))  # a file that is no tty: just unopenable
    master, slave = os.openpty()
    try:
        held = open_serial(os.ttyname(slave), 115200)  # exclusive: pyserial's flock
        with pytest.raises(PortBusy, match="busy"):
            open_serial(os.ttyname(slave), 115200)
        held.close()
        open_serial(os.ttyname(slave), 115200).close()  # free again once let go
    finally:
        os.close(master)
        os.close(slave)
    with pytest.raises(LinkTimeout):
        _link().request("status", retries=0)
    for t in (PortError, PortMissing, PortBusy, LinkTimeout, BoardRefused):
        assert issubclass(t, LinkError)
