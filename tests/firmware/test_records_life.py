"""Records and memory over a box's life: numbers never given twice whatever happens to
the record store, bounded RAM, damaged memory copies never promoted."""

from __future__ import annotations

import json
import random
import shutil

from fmlogic import memory
from fmlogic.controller import Controller

from ..fakes import FakeBoard, board_config, make_model


def _events(board, word):
    from fmlogic import link

    out = []
    for line in bytes(board.outbox).split(b"\n"):
        d = link.decode(line + b"\n") if line else (None, "")
        if d[0] == "E" and d[2] == word:
            out.append(d[3])
    board.outbox.clear()
    return out


def _backfill(ctl, book, key):
    """What the logger does after a reconnect (Logger._sync): ask from the first number it lacks."""
    have = book.seqs(key)
    missing = [s for s in range(1, ctl.rec.seq + 1) if s not in have]
    if not missing:
        return
    since = min(missing) - 1
    while True:
        ok, ans = ctl._handle("records", {"since": since})
        assert ok
        for r in ans["records"]:
            book.add(r)
            since = r["seq"]
        if not ans["more"] or not ans["records"]:
            return


def _damage(d, rnd):
    """One of the things a box's flash meets, at a random moment."""
    segs = sorted((d / "rec").glob("*.log"), key=lambda p: int(p.stem)) if (d / "rec").exists() else []
    q = sorted((d / "rec" / "q").glob("*"), key=lambda p: int(p.name)) if (d / "rec" / "q").exists() else []
    kind = rnd.choice(["cut", "random", "empty", "gone", "all-gone", "top-gone", "top-random", "none",
                       "q-gone", "q-random"])
    if kind in ("q-gone", "q-random") and q:
        # A record still in its own file (rec/q, not yet moved into its segment).
        if kind == "q-gone":
            q[-1].unlink()
        else:
            q[-1].write_bytes(bytes(rnd.getrandbits(8) for _ in range(40)))
    elif kind in ("cut", "random", "empty", "gone") and segs:
        p = segs[-1]
        raw = p.read_bytes()
        if kind == "cut":
            p.write_bytes(raw[: rnd.randrange(0, max(1, len(raw)))])
        elif kind == "random":
            p.write_bytes(bytes(rnd.getrandbits(8) for _ in range(max(8, len(raw) // 3))))
        elif kind == "empty":
            p.write_bytes(b"")
        else:
            p.unlink()
    elif kind == "all-gone":
        shutil.rmtree(d / "rec", ignore_errors=True)
    elif kind == "top-gone":
        (d / "rec.top").unlink(missing_ok=True)
    elif kind == "top-random":
        (d / "rec.top").write_bytes(bytes(rnd.getrandbits(8) for _ in range(6)))
    return kind


def test_damage_at_random_moments_loses_and_doubles_nothing(tmp_path):
    """A logging session on a box whose record store is damaged between resets: every
    record the board produced is in the logbook once, under the number it was sent with."""
    from feedmatch.logbook.store import Logbook, board_key

    rnd = random.Random(2323)
    d = tmp_path / "board"
    d.mkdir()
    book = Logbook(tmp_path / "log.sqlite")
    produced = {}
    m = make_model()
    cfg = board_config()
    cfg["records"] = {"keep": 60}
    kinds = []
    freqs = [3.6e6, 7.1e6, 10.12e6, 14.2e6, 18.1e6, 21.2e6]
    for _session in range(18):
        b = FakeBoard(m)
        ctl = Controller(b, cfg, str(d))
        key = board_key({"board_id": ctl.cfg["board_id"], "uid": ctl.uid})
        book.start_session(key, "test")
        for w in ctl.warnings:
            book.note(key, ctl.boot, w)
        _backfill(ctl, book, key)
        for _ in range(rnd.randrange(1, 7)):
            m.key(10.0, rnd.choice(freqs) * (1 + rnd.uniform(-0.01, 0.01)))
            seq = ctl.rec.seq
            for _ in range(400):
                ctl.step()
                if ctl.rec.seq > seq:
                    break
            m.key(0.0, 0.0)
            for _ in range(3):
                ctl.step()
            for r in _events(b, "record"):
                k = (board_key(r), r["seq"])
                assert k not in produced, f"number {k} given twice (after {kinds})"
                produced[k] = (r["t_ms"], r["freq_hz"], r["boot"])
                # The logger misses some events (a busy port): backfill must find them.
                if rnd.random() < 0.7:
                    book.add(r)
        _backfill(ctl, book, key)
        kinds.append(_damage(d, rnd))
    held = {}
    for row in book.tunes():
        raw = json.loads(row["raw"])
        held[(row["board_id"], row["seq"])] = (raw["t_ms"], raw["freq_hz"], raw["boot"])
    lost = [k for k in produced if held.get(k) != produced[k]]
    doubled = [k for k in held if k not in produced]
    assert len(produced) > 40 and set(kinds) - {"none"}, kinds
    assert {"q-gone", "q-random"} & set(kinds), kinds  # the records waiting in rec/q were hit too
    assert lost == [] and doubled == [], (lost, doubled, kinds)
    # The logbook says where history went missing.
    notes = [n[3] for n in book.notes()]
    assert any("may be lost" in n or "new identity" in n for n in notes), notes
    book.close()


def test_records_ram_does_not_grow_and_old_segments_go_whole(tmp_path):
    r = memory.Records(str(tmp_path), 120)
    r.load()
    for i in range(1000):
        r.add({"freq_hz": 7.1e6 + i, "trace": [1, 2, 3, 4] * 10})
    names = sorted(int(p.stem) for p in (tmp_path / "rec").glob("*.log"))
    # keep 120 = 3 segments of 50, plus the one being written
    assert names == list(range(1000 // memory.SEG - 3, 1000 // memory.SEG + 1))
    assert set(vars(r)) == {"d", "keep", "seq", "first", "cur", "lost", "note", "floor_lost", "err", "npend",
                            "tail"}
    # At most a batch waits in files of its own (rec/q), and no record stays in RAM.
    assert r.npend < memory.BATCH and r.tail is None
    assert len(list((tmp_path / "rec" / "q").iterdir())) == r.npend
    got = r.since(0, 3)
    assert [x["seq"] for x in got] == [names[0] * memory.SEG, names[0] * memory.SEG + 1,
                                       names[0] * memory.SEG + 2]
    assert [x["seq"] for x in r.since(999, 6)] == [1000]
    r2 = memory.Records(str(tmp_path), 120)
    r2.load()
    assert r2.seq == 1000 and r2.note is None and r2.lost is None


def test_a_damaged_memory_copy_never_becomes_the_backup(tmp_path):
    d = str(tmp_path)
    mem = memory.Memory(d, 25000, 10)
    mem.store(7.1e6, (10, 20, 0), 1.2, 1)
    mem.flush()  # A
    mem.store(14.2e6, (3, 4, 1), 1.1, 2)
    mem.flush()  # B in mem.dat, A in mem.bak
    (tmp_path / "mem.dat").write_bytes(b"FMMEM 1 2 2 0000\nrandom")
    m2 = memory.Memory(d, 25000, 10)
    assert m2.load() and m2.lookup(14.2e6) is None and m2.lookup(7.1e6) is not None  # lost B only
    m2.store(21.2e6, (5, 6, 1), 1.3, 3)
    m2.flush()  # C: the damaged B must not go to mem.bak
    assert memory._parse_mem(str(tmp_path / "mem.bak"), None) not in (None, False)
    (tmp_path / "mem.dat").write_bytes(b"\xff" * 40)  # a second fault
    m3 = memory.Memory(d, 25000, 10)
    assert m3.load() and m3.lookup(7.1e6)[:3] == (10, 20, 0)  # two faults: at most the last change lost
    # A copy that goes bad while the board runs is caught at the next save too.
    m3.store(3.6e6, (1, 2, 0), 1.4, 4)
    m3.flush()  # D in mem.dat, A in mem.bak
    raw = (tmp_path / "mem.dat").read_bytes()
    (tmp_path / "mem.dat").write_bytes(raw[:-4] + b"9999")
    m3.store(10.1e6, (2, 2, 0), 1.4, 5)
    m3.flush()
    assert memory._parse_mem(str(tmp_path / "mem.bak"), None) not in (None, False)


def test_after_a_restart_what_was_just_learned_is_not_the_first_to_go(tmp_path):
    """The board's clock (its uptime) starts again at 0 after every reset: the memory's
    oldest-first eviction must still take the oldest entries, not the newest."""
    d = str(tmp_path)
    mem = memory.Memory(d, 25000, 5)
    for i in range(5):
        mem.store(3.5e6 + i * 100e3, (i, i, 1), 1.2, 1000 + i)  # learned over a long uptime
    mem.flush()
    again = memory.Memory(d, 25000, 5)  # a reset: uptime back to 0 s
    assert again.load()
    again.store(14.2e6, (7, 8, 0), 1.1, 3)
    again.store(21.2e6, (9, 9, 0), 1.1, 9)
    assert again.lookup(14.2e6)[:3] == (7, 8, 0) and again.lookup(21.2e6)[:3] == (9, 9, 0)
    assert again.lookup(3.5e6) is None and again.lookup(3.6e6) is None  # the two oldest went


def _tune(ctl, m, f):
    m.key(10.0, f)
    seq = ctl.rec.seq
    for _ in range(400):
        ctl.step()
        if ctl.rec.seq > seq:
            break
    m.key(0.0, 0.0)
    for _ in range(3):
        ctl.step()


def test_a_tune_end_writes_its_record_and_a_reset_loses_no_memory_change(tmp_path):
    """The memory's changes ride in the tune records (saved whole every SAVE_EVERY
    changes): a reset at any point after a record puts back every change and the last
    state, in the same order, so the memory equals the one that never reset."""
    cfg = board_config()
    m = make_model()
    ctl = Controller(FakeBoard(m), cfg, str(tmp_path))
    freqs = [7.1e6, 7.15e6, 14.2e6, 14.25e6, 21.2e6, 10.12e6]
    for f in freqs:
        _tune(ctl, m, f)
        if ctl.rec.seq == 1:
            ctl.mem.whole = True  # one whole save early on: the later changes ride in records only
            ctl.mem.flush(ctl.rec.seq)
    assert ctl.mem.nlog >= 3 and ctl.mem.upto == 1
    # No mem.last, no new mem.dat at a tune's end: the records hold them.
    assert not (tmp_path / "mem.last").exists()
    again = Controller(FakeBoard(m), cfg, str(tmp_path))
    assert again.mem.entries == ctl.mem.entries and again.mem.n == ctl.mem.n
    assert again.mem.last == ctl.mem.last and again.mem.nlog == ctl.mem.nlog
    # The SAVE_EVERY-th change saves the whole memory; the next start replays nothing.
    for i in range(memory.SAVE_EVERY):
        if again.mem.nlog == 0:
            break
        _tune(again, m, 3.55e6 + i * 30e3)
    third = Controller(FakeBoard(m), cfg, str(tmp_path))
    assert third.mem.entries == again.mem.entries and third.mem.last == again.mem.last


def test_a_lost_record_file_never_gives_its_number_again(tmp_path):
    """A record still in rec/q that disappears: the tune journal's number keeps it used."""
    cfg = board_config()
    m = make_model()
    ctl = Controller(FakeBoard(m), cfg, str(tmp_path))
    for f in (7.1e6, 14.2e6, 21.2e6):
        _tune(ctl, m, f)
    top = ctl.rec.seq
    (tmp_path / "rec" / "q" / str(top)).unlink()
    again = Controller(FakeBoard(m), cfg, str(tmp_path))
    assert again.rec.seq == top and again.rec.lost == (top, top)
    assert any("missing" in w for w in again.warnings)
    _tune(again, m, 7.1e6)
    assert again.rec.seq == top + 1
    # And a reset between the move into the segment and the removal of the small files:
    # the copies are recognised, nothing is read twice.
    (tmp_path / "b").mkdir()
    r = memory.Records(str(tmp_path / "b"), 200)
    r.load()
    for i in range(memory.BATCH + 2):
        r.add({"freq_hz": float(i)})
    q = tmp_path / "b" / "rec" / "q"
    kept = {p.name: p.read_bytes() for p in q.iterdir()}
    r.settle()
    for name, raw in kept.items():
        (q / name).write_bytes(raw)  # as if the removals never happened
    r2 = memory.Records(str(tmp_path / "b"), 200)
    r2.load()
    assert r2.seq == memory.BATCH + 2 and r2.npend == 0 and not list(q.iterdir())
    assert [x["seq"] for x in r2.since(0, 100)] == list(range(1, memory.BATCH + 3))


def test_a_full_flash_drops_the_oldest_records_before_the_memory_goes_unsaved(tmp_path, monkeypatch):
    """The memory's whole save meets a full flash (ENOSPC): the oldest record segment
    goes and the save is tried again; the records being written stay."""
    import builtins
    import errno

    d = str(tmp_path)
    r = memory.Records(d, 2000)
    r.load()
    for i in range(3 * memory.SEG):
        r.add({"freq_hz": float(i)})
    r.settle()
    assert (tmp_path / "rec" / "0.log").exists()
    mem = memory.Memory(d, 25000, 10)
    mem.room = r._drop_oldest
    real_open = builtins.open

    def full(p, mode="r", *a, **k):
        if "w" in mode and str(p).endswith("mem.new") and (tmp_path / "rec" / "0.log").exists():
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_open(p, mode, *a, **k)

    monkeypatch.setattr(builtins, "open", full)
    mem.store(7.1e6, (10, 20, 0), 1.2, 1)
    assert mem.flush(r.seq) and not mem.dirty
    assert not (tmp_path / "rec" / "0.log").exists() and (tmp_path / "rec" / "1.log").exists()
    monkeypatch.setattr(builtins, "open", real_open)
    again = memory.Memory(d, 25000, 10)
    assert again.load() and again.lookup(7.1e6)[:3] == (10, 20, 0) and again.upto == r.seq
