"""Two boards that share a config, or one whose flash was wiped, never lose each other's records."""

from __future__ import annotations

from fmlogic.controller import Controller

from ..fakes import FakeBoard, board_config, make_model


def _board(path):
    path.mkdir(exist_ok=True)
    return Controller(FakeBoard(make_model()), board_config(), str(path))


def test_the_identity_is_made_once_and_survives_a_restart(tmp_path):
    a = _board(tmp_path / "a")
    again = _board(tmp_path / "a")  # a reboot, or a firmware update (fm/<version> only)
    b = _board(tmp_path / "b")  # another board with the same config
    assert len(a.uid) == 12 and again.uid == a.uid
    assert b.uid != a.uid and a.cfg["board_id"] == b.cfg["board_id"]
    assert a._status()["uid"] == a.uid


def test_the_logbook_keeps_two_boards_with_one_id_apart(tmp_path):
    from feedmatch.logbook.store import Logbook, board_key

    book = Logbook(tmp_path / "station.sqlite")
    rec = {"board_id": "hollow-oak-1", "seq": 1, "freq_hz": 7.1e6, "outcome": "locked"}
    assert book.add(dict(rec, uid="0123456789ab"))
    assert book.add(dict(rec, uid="ba9876543210"))  # same id and seq, another board: kept
    assert not book.add(dict(rec, uid="0123456789ab"))  # the same record twice: once
    assert len(book.tunes()) == 2
    key = board_key({"board_id": "hollow-oak-1", "uid": "ba9876543210"})
    assert book.other_identities(key) == ["hollow-oak-1/0123456789ab"]
    assert board_key({"board_id": "old-firmware"}) == "old-firmware"  # no identity: as before
    book.close()
