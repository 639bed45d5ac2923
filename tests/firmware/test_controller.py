"""The firmware controller with an in-process fake board: guards, memory, records, link."""

from __future__ import annotations

import json

import pytest
from fmlogic import config as fcfg
from fmlogic import link, memory
from fmlogic.controller import FAULT, LOCKED, SEEK, WAIT_RF, Controller
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as hs

from ..conftest import run_mpy
from ..fakes import FakeBoard, board_config, make_model


def _frames(board):
    out = []
    for line in bytes(board.outbox).split(b"\n"):
        if line:
            d = link.decode(line + b"\n")
            assert d[0] is not None, line
            out.append(d)
    board.outbox.clear()
    return out


def _records(frames):
    return [f[3] for f in frames if f[0] == "E" and f[2] == "record"]


def run(ctl, steps=400, until=None):
    for _ in range(steps):
        ctl.step()
        if until and until(ctl):
            return True
    return False


def _setup(tmp_path, **over):
    m = make_model()
    b = FakeBoard(m)
    ctl = Controller(b, board_config(**over), str(tmp_path))
    return m, b, ctl


def test_auto_tune_on_a_carrier_locks_and_remembers(tmp_path):
    m, b, ctl = _setup(tmp_path)
    m.key(10, 7.1e6)
    assert run(ctl, until=lambda c: c.state == LOCKED)
    recs = _records(_frames(b))
    assert len(recs) == 1 and recs[0]["outcome"] == "locked"
    assert recs[0]["swr_after"] <= 1.5 and m.swr() <= 1.6
    assert recs[0]["n"] <= 20
    assert m.violations == []
    # Unkey, then a return to the band is one reading from memory.
    m.key(0, 0)
    run(ctl, 5)
    m.set(0, 0, 1, 1)  # someone else's state: force a retune
    ctl.relays, ctl.bypass = (0, 0, 1), True
    m.key(10, 7.1e6)
    assert run(ctl, until=lambda c: c.state == LOCKED and c.rec.seq == 2)
    r2 = _records(_frames(b))[-1]
    assert r2["n"] == 1 and r2["mem"] is True
    # The memory lives through a reset (its change is in the tune's record until a whole save).
    again = Controller(FakeBoard(m), board_config(), str(tmp_path))
    assert again.mem.lookup(7.1e6)[:3] == ctl.mem.lookup(7.1e6)[:3]


def test_never_switches_above_hot_switch_limit(tmp_path):
    m, b, ctl = _setup(tmp_path)
    m.key(100, 14.2e6)  # operating power, bad SWR through the bypass
    run(ctl, 200)
    assert b.sets == 1  # only the boot release of the relays
    assert ctl.state != SEEK
    b.inbox += link.encode("Q", 5, "set", {"l": 3, "c": 3, "sh": 1})
    b.inbox += link.encode("Q", 6, "tune", {})
    run(ctl, 50)
    fr = {f[1]: f for f in _frames(b) if f[0] == "A"}
    assert fr[5][2] == "err" and fr[5][3]["why"] == "hot"
    assert fr[6][2] == "ok"
    assert "reduce power" in ctl.why
    assert m.violations == [] and b.sets == 1


def test_reverse_power_from_the_antenna_side_also_blocks_switching(tmp_path):
    # 100 W arriving at the antenna port (the box wired backwards, or a transmitter nearby):
    # the forward detector sees only leakage, so a guard on forward power alone would let the
    # relays switch under full power.  The network carries that power whichever way it flows.
    m, b, ctl = _setup(tmp_path)
    run(ctl, 20)
    m.key_reverse(100, 7.1e6)
    run(ctl, 20)
    assert "reverse power" in ctl.why
    b.inbox += link.encode("Q", 5, "set", {"l": 3, "c": 3, "sh": 1})
    b.inbox += link.encode("Q", 6, "bypass", {"on": False})
    run(ctl, 50)
    fr = {f[1]: f for f in _frames(b) if f[0] == "A"}
    assert fr[5][2] == "err" and fr[5][3]["why"] == "hot"
    assert fr[6][2] == "err" and fr[6][3]["why"] == "hot"
    assert m.violations == [] and b.sets == 1
    m.key_reverse(0)
    run(ctl, 20)
    assert ctl.why == "reverse power gone"
    b.inbox += link.encode("Q", 7, "set", {"l": 3, "c": 3, "sh": 1})
    run(ctl, 20)
    fr = {f[1]: f for f in _frames(b) if f[0] == "A"}
    assert fr[7][2] == "ok" and b.sets == 2  # below the limit the relays move again


def test_power_rising_mid_tune_aborts_and_holds(tmp_path):
    m, b, ctl = _setup(tmp_path)
    m.key(10, 7.1e6)

    def hook(board):
        if board.sets == 4:
            m.key(100, 7.1e6)  # the operator keys full power during the search
    b.on_set = hook
    run(ctl, 100)
    recs = _records(_frames(b))
    assert recs and recs[0]["outcome"] == "aborted"
    assert "power" in recs[0]["why"]
    assert m.violations == []
    assert ctl.state == WAIT_RF


def test_no_tune_without_rf_and_request_times_out(tmp_path):
    m, b, ctl = _setup(tmp_path)
    b.inbox += link.encode("Q", 1, "tune", {"freq_hz": 7.1e6})
    run(ctl, 20)
    assert ctl.state == WAIT_RF and b.sets == 1
    b.t += 3000
    run(ctl, 3)
    recs = _records(_frames(b))
    assert recs[-1]["outcome"] == "refused" and "no RF" in recs[-1]["why"]
    st = ctl._status()
    assert st["swr"] is None  # no RF is never shown as a match


def test_no_rf_reading_is_not_a_perfect_match(tmp_path):
    from fmlogic.config import merged, meter_from

    meter = meter_from(merged(board_config()))
    assert meter.powers(0.0, 0.0) == (0.0, 0.0)
    assert meter.powers(1.0, 0.0)[0] == 0.0  # below the floor: no RF


def test_budget_and_time_limit(tmp_path):
    m, b, ctl = _setup(tmp_path, tune__budget=3)
    m.key(10, 28.4e6)
    run(ctl, 50, until=lambda c: c.rec.seq >= 1)
    r = _records(_frames(b))[0]
    assert r["n"] <= 3
    m2, b2, ctl2 = _setup(tmp_path / "x", tune__time_limit_ms=50, tune__settle_ms=20)
    (tmp_path / "x").mkdir(exist_ok=True)
    m2.key(10, 28.4e6)
    run(ctl2, 50, until=lambda c: c.rec.seq >= 1)
    r = _records(_frames(b2))[0]
    assert r["why"].startswith("time limit") and r["ms"] <= 50 + 30


def test_reset_mid_tune_ends_in_a_record_and_restores_last_good(tmp_path):
    m, b, ctl = _setup(tmp_path)
    m.key(10, 14.2e6)
    assert run(ctl, until=lambda c: c.state == LOCKED)
    good = m.relays
    m.key(0, 0)
    run(ctl, 3)
    m.key(10, 10.12e6)
    run(ctl, until=lambda c: c.state == SEEK)
    run(ctl, 3)  # mid-search: now the board resets (watchdog or power)
    m.key(0, 0)
    b2 = FakeBoard(m)
    ctl2 = Controller(b2, board_config(), str(tmp_path))
    recs = _records(_frames(b2))
    assert recs[-1]["outcome"] == "reset" and recs[-1]["seq"] == 2
    run(ctl2, 5)
    # Relays come up released, then the last good state is restored (no RF: safe).
    assert m.relays == good
    assert m.violations == []


def test_watchdog_is_fed_every_step_and_faults_keep_the_loop(tmp_path):
    m, b, ctl = _setup(tmp_path)
    n = b.feeds
    run(ctl, 10)
    assert b.feeds == n + 10

    def broken():
        raise OSError("adc gone")
    b.read_detectors = broken
    ctl.step()
    assert ctl.state == FAULT and "adc gone" in ctl.why


@pytest.mark.parametrize("damage", ["truncate", "garbage", "bitflip", "empty"])
def test_damaged_memory_file_falls_back(tmp_path, damage):
    mem = memory.Memory(str(tmp_path), 25000, 10)
    mem.store(7.1e6, (10, 20, 0), 1.2, 5)
    mem.flush()
    mem.store(14.2e6, (3, 4, 1), 1.1, 6)
    mem.flush()  # mem.dat has both, mem.bak has the first
    p = tmp_path / "mem.dat"
    raw = p.read_bytes()
    if damage == "truncate":
        p.write_bytes(raw[: len(raw) - 7])
    elif damage == "garbage":
        p.write_bytes(b"\x00\xff garbage")
    elif damage == "bitflip":
        p.write_bytes(raw[:-3] + bytes([raw[-3] ^ 1]) + raw[-2:])
    else:
        p.write_bytes(b"")
    m2 = memory.Memory(str(tmp_path), 25000, 10)
    assert m2.load()
    assert m2.lookup(7.1e6)[:3] == (10, 20, 0)
    assert m2.lookup(14.2e6) is None  # the newer copy was the damaged one
    assert "damaged" in m2.load_error


def test_power_loss_between_write_and_rename(tmp_path):
    mem = memory.Memory(str(tmp_path), 25000, 10)
    mem.store(7.1e6, (10, 20, 0), 1.2, 5)
    mem.flush()
    # A cut after mem.new is written but before the renames: the new copy wins.
    mem.store(14.2e6, (3, 4, 1), 1.1, 6)
    mem.gen += 1
    body_ok = memory.Memory(str(tmp_path), 25000, 10)
    for b, e in mem.entries.items():
        body_ok.store(b * 25000.0, e[:3], e[3], e[4])
    body_ok.gen = mem.gen - 1
    body_ok.dirty = True
    body_ok.flush()
    (tmp_path / "mem.dat").rename(tmp_path / "mem.new")
    m2 = memory.Memory(str(tmp_path), 25000, 10)
    assert m2.load() and m2.lookup(14.2e6) is not None
    # Both copies damaged: empty memory, reported, no crash.
    for n in ("mem.new", "mem.bak", "mem.dat"):
        if (tmp_path / n).exists():
            (tmp_path / n).write_bytes(b"FMMEM 1 9 9 0000\nzzz")
    m3 = memory.Memory(str(tmp_path), 25000, 10)
    assert not m3.load() and m3.entries == {}


def test_memory_writes_only_on_change_and_is_bounded(tmp_path):
    mem = memory.Memory(str(tmp_path), 25000, 5)
    mem.store(7.1e6, (10, 20, 0), 1.2, 1)
    assert mem.flush() and not mem.flush()
    assert not mem.store(7.1e6, (10, 20, 0), 1.21, 2)  # same state, same SWR: no write
    for i in range(10):
        mem.store(14.0e6 + i * 100e3, (i, i, 1), 1.1, 10 + i)
    assert len(mem.entries) == 5
    assert mem.lookup(7.1e6) is None  # the oldest went first


def test_records_survive_torn_line_and_fetch_since(tmp_path):
    r = memory.Records(str(tmp_path), 4)
    for i in range(11):
        r.add({"freq_hz": i})
    with open(tmp_path / "rec" / "0.log", "ab") as f:
        f.write(b'12 {"seq": 12, "freq')  # torn by a power cut
    r2 = memory.Records(str(tmp_path), 4)
    r2.load()
    # A torn segment: which of its numbers went out is unknown, so none is given again.
    assert r2.seq == memory.SEG - 1 and r2.lost == (12, memory.SEG - 1)
    assert [x["seq"] for x in r2.since(0, 100)] == list(range(1, 12))
    assert [x["seq"] for x in r2.since(9, 10)] == [10, 11]
    assert r2.add({"freq_hz": 1})["seq"] == memory.SEG


def test_config_validation_and_cfg_set_range_checks(tmp_path):
    assert fcfg.validate(board_config()) == []
    bad = board_config(power__hot_switch_w=5)
    assert any("hot_switch" in e for e in fcfg.validate(bad))
    assert any("target_swr" in e for e in fcfg.validate(board_config(tune__target_swr=0.5)))
    assert any("unknown field 'tune.colour'" in e for e in fcfg.validate(board_config(tune__colour=1)))
    m, b, ctl = _setup(tmp_path)
    b.inbox += link.encode("Q", 1, "cfg-set", {"path": "tune.target_swr", "value": 9.0})
    b.inbox += link.encode("Q", 2, "cfg-set", {"path": "tune.target_swr", "value": 1.3})
    b.inbox += link.encode("Q", 3, "cfg-get", {"section": "tune"})
    run(ctl, 3)
    fr = {f[1]: f for f in _frames(b) if f[0] == "A"}
    assert fr[1][2] == "err" and "target_swr" in fr[1][3]["msg"]
    assert fr[2][2] == "ok"
    assert fr[3][3]["value"]["target_swr"] == 1.3
    saved = json.loads((tmp_path / "config.json").read_text())
    assert saved["tune"]["target_swr"] == 1.3


def test_bad_config_at_boot_is_a_fault_not_a_crash(tmp_path):
    m = make_model()
    b = FakeBoard(m)
    ctl = Controller(b, board_config(power__max_tune_w=-1), str(tmp_path))
    assert ctl.state == FAULT and "power.max_tune_w" in ctl.why
    m.key(10, 7.1e6)
    run(ctl, 20)
    assert b.sets == 1


def test_crc16_check_value():
    # CRC-16/CCITT-FALSE check value for "123456789" is 0x29B1
    # (Greg Cook's CRC catalogue, "CRC-16/IBM-3740", a.k.a. CCITT-FALSE).
    assert link.crc16(b"123456789") == 0x29B1


def test_frame_round_trip_and_rejections():
    f = link.encode("Q", 42, "tune", {"freq_hz": 7100000})
    assert link.decode(f) == ("Q", 42, "tune", {"freq_hz": 7100000})
    assert link.decode(f[:-6] + b"*0000\n") == (None, "bad-crc")
    assert link.decode(b"hello\n") == (None, "no-crc")
    body = b"Z1 x {}"
    assert link.decode(body + b"*%04X\n" % link.crc16(body)) == (None, "malformed")
    assert link.decode(b"Q" * (link.MAX_LINE + 10)) == (None, "oversize")


@settings(max_examples=1500, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(hs.binary(max_size=300))
def test_fuzz_parser_random_bytes(data):
    d = link.decode(data)
    assert d[0] is None or d[0] in "QAE"


_FUZZ_STATE = {}


@settings(max_examples=1500, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                   HealthCheck.function_scoped_fixture])
@given(hs.lists(hs.one_of(
    hs.binary(max_size=80),
    hs.builds(lambda w, o: link.encode("Q", 1, w, o),
              hs.sampled_from(["status", "tune", "set", "bypass", "mem-list", "cfg-set", "cfg-get",
                               "cal-read", "records", "zap", "mem-clear", "mem-put"]),
              hs.dictionaries(hs.sampled_from(["l", "c", "sh", "on", "path", "value", "since", "n",
                                               "freq_hz", "section", "start", "bin_hz", "entries", "rebin",
                                               "save"]),
                              hs.one_of(hs.integers(-5, 300), hs.floats(allow_nan=True), hs.text(max_size=5),
                                        hs.booleans(), hs.none(),
                                        hs.lists(hs.lists(hs.one_of(hs.integers(-5, 30_000_000),
                                                                    hs.floats(allow_nan=True), hs.booleans()),
                                                          max_size=7), max_size=3)),
                              max_size=4)),
), max_size=6))
def test_fuzz_command_handler_never_crashes(tmp_path_factory, chunks):
    if "ctl" not in _FUZZ_STATE:
        d = tmp_path_factory.mktemp("fuzz")
        m = make_model()
        b = FakeBoard(m)
        _FUZZ_STATE["ctl"] = (Controller(b, board_config(), str(d)), b, m)
    ctl, b, m = _FUZZ_STATE["ctl"]
    m.key(100, 14.2e6)  # full power: nothing may switch, whatever arrives
    before = m.relays
    for c in chunks:
        b.inbox += c
    for _ in range(4):
        ctl.step()
    assert ctl.state != FAULT, ctl.why
    assert m.relays == before and m.violations == []
    for line in bytes(b.outbox).split(b"\n"):
        if line:
            assert link.decode(line + b"\n")[0] in ("A", "E")
    b.outbox.clear()


def test_operator_bypass_sticks_until_a_tune_is_asked_for(tmp_path):
    m, b, ctl = _setup(tmp_path)
    m.key(10, 14.2e6)
    assert run(ctl, until=lambda c: c.state == LOCKED)
    b.inbox += link.encode("Q", 3, "bypass", {"on": True})
    run(ctl, 50)
    assert m.relays[3] == 1 and ctl.state == "through"  # no automatic retune undoes it
    assert ctl.why == "bypass by host"
    b.inbox += link.encode("Q", 5, "bypass", {"on": False})
    run(ctl, 5)
    # Back in line with the carrier still keyed: the status says what was done, not "bypass".
    assert m.relays[3] == 0 and ctl.why == "back in line by host"
    b.inbox += link.encode("Q", 6, "bypass", {"on": True})
    run(ctl, 5)
    assert m.relays[3] == 1
    b.inbox += link.encode("Q", 4, "tune", {})
    assert run(ctl, until=lambda c: c.state == LOCKED)
    assert m.relays[3] == 0 and m.violations == []


def test_time_limit_and_watchdog_inside_a_long_search(tmp_path):
    # A board whose clock runs fast while the search computes (a slow chip): the
    # search feeds the watchdog from inside its own loops and stops at the tune's
    # time limit mid-search, not only between readings.
    from feedmatch.rf.antenna import FixedLoad

    m = make_model(antenna=FixedLoad(2.1, -1913.0))  # unmatchable: the longest search
    b = FakeBoard(m)

    feeds_in_search = []

    class Slow(FakeBoard):
        def ticks_ms(self):
            self.t += 7  # every look at the clock costs 7 ms
            return self.t

    b = Slow(m)
    ctl = Controller(b, board_config(tune__time_limit_ms=150), str(tmp_path))
    orig = b.wdt_feed

    def feed():
        feeds_in_search.append(ctl.tune is not None)
        orig()

    b.wdt_feed = feed
    m.key(10, 1.9e6)
    assert run(ctl, 400, until=lambda c: c.rec.seq >= 1)
    r = _records(_frames(b))[0]
    assert r["why"].startswith("time limit")
    assert r["ms"] <= 150 + 60
    steps = r["n"]
    # Fed more often than once per reading: the search fed it inside its work.
    assert sum(feeds_in_search) > steps


_SEEN: list = []  # the frames _ask read, events included


def _ask(b, ctl, seq, word, args):
    b.inbox += link.encode("Q", seq, word, args)
    run(ctl, 5)
    fr = _frames(b)
    _SEEN[:] = fr
    return {f[1]: f for f in fr if f[0] == "A"}[seq]


def test_preset_switches_cold_and_the_first_carrier_confirms_it(tmp_path):
    m, b, ctl = _setup(tmp_path)
    # Learn 7.1 MHz and 14.2 MHz.
    for f in (7.1e6, 14.2e6):
        m.key(10, f)
        assert run(ctl, until=lambda c: c.state == LOCKED)
        m.key(0, 0)
        run(ctl, 5)
    stored = ctl.mem.lookup(7.1e6)
    _frames(b)
    # The radio goes back to 40 m, no RF: the relays move to the stored state at once.
    kind, _seq, word, ans = _ask(b, ctl, 11, "preset", {"freq_hz": 7.1e6, "mode": "CW"})
    assert word == "ok" and ans["preset"] is True
    assert tuple(ans["relays"][:3]) == tuple(stored[:3]) and ans["relays"][3] == 0
    assert m.violations == []
    # The preset itself is a record (no reading: no RF) ...
    pre = _records(_SEEN)[-1]
    assert pre["outcome"] == "preset" and pre["n"] == 0 and pre["rig_mode"] == "CW"
    # ... and the first carrier needs one reading; its record says it followed a preset.
    m.key(10, 7.1e6)
    assert run(ctl, until=lambda c: c.rec.seq == 4)
    rec = _records(_frames(b))[-1]
    assert rec["preset"] is True and rec["n"] == 1 and rec["outcome"] == "locked" and rec["mem"] is True
    assert rec["rig_hz"] == 7.1e6 and rec["rig_mode"] == "CW"
    # With RF present a preset is refused with its reason and nothing moves.
    sets = b.sets
    kind, _seq, word, ans = _ask(b, ctl, 12, "preset", {"freq_hz": 14.2e6})
    assert word == "err" and ans["why"] == "rf-present" and b.sets == sets
    # The dial moved within the same bin: nothing to do, no record, and the answer says so.
    m.key(0, 0)
    run(ctl, 5)
    n = ctl.rec.seq
    kind, _seq, word, ans = _ask(b, ctl, 15, "preset", {"freq_hz": 7.1e6 + 100.0})
    assert word == "ok" and ans["already"] is True and ctl.rec.seq == n
    assert ans["bin"] == ctl.mem.bin_of(7.1e6)
    # Nothing stored near a frequency: the box is left as it is, and says so.
    kind, _seq, word, ans = _ask(b, ctl, 13, "preset", {"freq_hz": 24.9e6})
    assert word == "ok" and ans["preset"] is False and b.sets == sets
    for bad in ({"freq_hz": -1}, {"freq_hz": "7e6"}, {}, {"freq_hz": True}):
        assert _ask(b, ctl, 14, "preset", bad)[2] == "err"


def test_a_preset_confirmed_at_operating_power_switches_nothing(tmp_path):
    m, b, ctl = _setup(tmp_path)
    for f in (7.1e6, 14.2e6):  # learn two bands; the box ends on the second
        m.key(10, f)
        assert run(ctl, until=lambda c: c.state == LOCKED)
        m.key(0, 0)
        run(ctl, 5)
    assert _ask(b, ctl, 21, "preset", {"freq_hz": 7.1e6})[3]["preset"] is True
    sets = b.sets
    m.key(100, 7.1e6)  # straight to operating power: read, never switch
    assert run(ctl, until=lambda c: c.rec.seq == 4)
    rec = _records(_frames(b))[-1]
    assert rec["preset"] is True and rec["strategy"] == "preset" and rec["n"] == 1
    assert b.sets == sets and m.violations == []


def test_presets_spare_the_first_carrier_a_mismatch():
    # The demo station over 10 band changes: without a preset the first carrier meets the
    # previous band's state; with one it meets the stored state, switched cold. The SWR
    # the matched state should show is the firmware's own target (1.5, the config).
    from feedmatch.bench.presets import bench_presets

    r = bench_presets(changes=10, seed=3)
    assert r["first_carrier_swr_median_no_preset"] > 3.0
    assert r["first_carrier_swr_median_preset"] <= 1.5
    assert r["relay_changes_under_carrier_per_change_preset"] < r["relay_changes_under_carrier_per_change_no_preset"]
    # The bound (0.1 per band change): a stored best effort that reads as stored is kept,
    # and a zero reading needs no contrast reading while the detector was seen alive.
    assert r["relay_changes_under_carrier_per_change_preset"] <= 0.1
    assert r["preset_hot_switches"] == 0


def test_mem_put_writes_an_export_back_and_refuses_what_does_not_fit(tmp_path):
    """memory --import's request: entries as mem-list lists them go back to their
    own bins, one flash write at the last frame; another bin width without rebin,
    a code beyond the banks (7 relays: 0..127) or a non-bool flag stores nothing."""
    m, b, ctl = _setup(tmp_path)
    run(ctl, 5)
    _frames(b)
    relays = ctl._state_list()
    ents = [[7.1e6, 12, 34, 0, 1.21, 5], [14.2e6 + 25000, 127, 127, 1, 1.0, 9], [28.4e6, 0, 5, 1, 2.5, 7]]
    a = _ask(b, ctl, 1, "mem-put", {"bin_hz": 25000, "entries": ents[:2], "save": False})
    assert a[2] == "ok" and a[3]["stored"] == 2 and a[3]["saved"] is False
    assert not (tmp_path / memory.MEM).exists() or memory.Memory(str(tmp_path), 25000, 50).load() is False
    a = _ask(b, ctl, 2, "mem-put", {"bin_hz": 25000.0, "entries": ents[2:]})
    assert a[3] == {"stored": 1, "kept": 0, "entries": 3, "max_entries": 50, "saved": True}
    listed = _ask(b, ctl, 3, "mem-list", {"start": 0})[3]["entries"]
    assert [e[:5] for e in listed] == [e[:5] for e in ents]  # back in the bins they were listed for
    again = memory.Memory(str(tmp_path), 25000, 50)
    assert again.load() and again.listing() == listed  # on flash
    # The board's own state wins over a second import unless replace.
    a = _ask(b, ctl, 4, "mem-put", {"bin_hz": 25000, "entries": [[7.1e6, 1, 1, 1, 1.1, 1]]})
    assert a[3]["stored"] == 0 and a[3]["kept"] == 1
    a = _ask(b, ctl, 5, "mem-put", {"bin_hz": 25000, "entries": [[7.1e6, 1, 1, 1, 1.1, 1]], "replace": True})
    assert a[3]["stored"] == 1 and ctl.mem.lookup(7.1e6)[:3] == (1, 1, 1)
    # Bins of 10 kHz: refused without rebin; with it, each lands on the 25 kHz bin holding its middle.
    a = _ask(b, ctl, 6, "mem-put", {"bin_hz": 10000, "entries": [[3.51e6, 2, 2, 0, 1.3, 1]]})
    assert a[2] == "err" and a[3]["why"] == "other-bins"
    a = _ask(b, ctl, 7, "mem-put", {"bin_hz": 10000, "entries": [[3.51e6, 2, 2, 0, 1.3, 1]], "rebin": True})
    assert a[2] == "ok" and ctl.mem.bin_of(3.515e6) in ctl.mem.entries
    # Another box's states: refused unless foreign (their codes may mean other parts).
    a = _ask(b, ctl, 30, "mem-put", {"bin_hz": 25000, "entries": [[10.1e6, 3, 3, 0, 1.2, 1]], "from_uid": "0a1b2c"})
    assert a[2] == "err" and a[3]["why"] == "other-board" and ctl.mem.lookup(10.1e6) is None
    a = _ask(b, ctl, 31, "mem-put", {"bin_hz": 25000, "entries": [[10.1e6, 3, 3, 0, 1.2, 1]], "from_uid": ctl.uid})
    assert a[2] == "ok" and a[3]["stored"] == 1
    a = _ask(b, ctl, 32, "mem-put", {"bin_hz": 25000, "entries": [[10.2e6, 3, 3, 0, 1.2, 1]], "from_uid": "0a1b2c",
                                     "foreign": True})
    assert a[2] == "ok" and a[3]["stored"] == 1
    before = ctl.mem.listing()
    for seq, args, why in (
            (8, {"bin_hz": 25000, "entries": [[7.2e6, 128, 0, 0, 1.2, 1]]}, "bad-entry"),
            (9, {"bin_hz": 25000, "entries": [[7.2e6, 1, 0, 2, 1.2, 1]]}, "bad-entry"),
            (10, {"bin_hz": 25000, "entries": [[7.3e6, 1, 0, 0, 1.2, 1], [7.2e6, 1, 0, 0, 0.5, 1]]}, "bad-entry"),
            (11, {"bin_hz": 25000, "entries": [[-7.2e6, 1, 0, 0, 1.2, 1]]}, "bad-entry"),
            (12, {"bin_hz": 25000, "entries": [[7.2e6, True, 0, 0, 1.2, 1]]}, "bad-entry"),
            (13, {"bin_hz": 25000, "entries": [[7.2e6, 1, 0, 0, 1.2]]}, "bad-entry"),
            (14, {"bin_hz": 25000, "entries": [[7.2e6, 1, 0, 0, 1.2, 1]] * (memory.PUT_MAX + 1)}, "bad-entry"),
            (15, {"bin_hz": 25000, "entries": []}, "bad-entry"),
            (16, {"bin_hz": "25000", "entries": [[7.2e6, 1, 0, 0, 1.2, 1]]}, "bad-args"),
            (17, {"bin_hz": 25000, "entries": [[7.2e6, 1, 0, 0, 1.2, 1]], "save": 1}, "bad-args"),
            (18, {"bin_hz": 25000, "entries": [[7.2e6, 1, 0, 0, 1.2, 1]], "from_uid": 5}, "bad-args")):
        a = _ask(b, ctl, seq, "mem-put", args)
        assert a[2] == "err" and a[3]["why"] == why, (seq, a)
    assert ctl.mem.listing() == before  # a frame with one bad entry stored nothing
    assert ctl._state_list() == relays  # no relay moved


def test_mem_put_decides_alike_under_the_unix_port(micropython):
    """The entry check and the bins an import lands in, on the single- or
    double-precision port as under CPython (the host runs the same check)."""
    cases = [[[7.1e6, 12, 34, 0, 1.21, 5]], [[29.7e6 - 1, 0, 0, 1, 99.0, 2147483647]],
             [[1.8e6, 1, 2, 0, 1.0, 0], [1.8e6 + 9999, 1, 2, 1, 1.5, 3]], [[7.2e6, 128, 0, 0, 1.2, 1]],
             [[7.2e6, 1, 0, 0, 99.5, 1]], [[7.2e6, 1, 0, 0, 1.2, -1]], [[7.2e6, 1, 0, 0, 1.2, 1.5]],
             [[0, 1, 0, 0, 1.2, 1]], [[7.2e6, 1, 0, "1", 1.2, 1]], "x", []]
    code = ("import json\nfrom fmlogic import memory\n"
            f"for ents in json.loads({json.dumps(json.dumps(cases))}):\n"
            "    for w in (25000.0, 10000.0, 1000.0):\n"
            "        e = memory.check_entries(ents, 127, 127)\n"
            "        m = memory.Memory(None, 25000, 50)\n"
            "        r = None if e else m.put_many(ents, w, False)\n"
            "        print(json.dumps([e, r, sorted(m.entries)]))\n")
    import os

    from .test_strategies import FLOAT32

    ports = [micropython]
    f32 = os.environ.get("FEEDMATCH_MPY_FLOAT32") or (str(FLOAT32) if FLOAT32.exists() else None)
    if f32 is not None:
        ports.append(f32)  # single precision, as on the RP2040 and ESP32
    outs = [run_mpy(mp, code).split("\n") for mp in ports]
    want = []
    for ents in cases:
        for w in (25000.0, 10000.0, 1000.0):
            e = memory.check_entries(ents, 127, 127)
            mm = memory.Memory(None, 25000, 50)
            r = None if e else mm.put_many(ents, w, False)
            want.append(json.dumps([e, list(r) if r else r, sorted(mm.entries)]))
    for out in outs:
        assert out[:len(want)] == want
    assert len(outs) == 2 or not FLOAT32.parent.exists()  # the float32 port where ../shared has it


def test_the_request_table_is_the_protocol_and_its_guards_hold(tmp_path):
    """REQUESTS is every request the link takes (docs/protocol.md lists the same words);
    during a tune each entry marked not-while-tuning answers busy before its function runs,
    and in a fault each marked not-in-fault answers fault; the others still answer."""
    import re

    from fmlogic import controller as fctl

    from ..conftest import ROOT

    doc = (ROOT / "docs" / "protocol.md").read_text()
    section = doc[doc.index("## Requests"):doc.index("## Events")]
    assert set(fctl.REQUESTS) == set(re.findall(r"^\| `([a-z-]+)` \|", section, re.M))
    _m, _b, ctl = _setup(tmp_path)
    ctl.tune = object()  # a tune under way (its object is never looked at by the guards)
    for word, (_fn, guards) in fctl.REQUESTS.items():
        ok, reply = ctl._handle(word, {})
        if guards & fctl._NOT_TUNING:
            assert (ok, reply) == (False, {"why": "busy"}), word
        else:
            assert reply.get("why") != "busy", word
    ctl.tune = None
    ctl.state, ctl.why = FAULT, "test fault"
    for word, (_fn, guards) in fctl.REQUESTS.items():
        if guards & fctl._NOT_IN_FAULT:
            assert ctl._handle(word, {}) == (False, {"why": "fault", "msg": "test fault"}), word
    assert ctl._handle("no-such", {}) == (False, {"why": "unknown-request", "msg": "no-such"})


def _computed_preset(tmp_path, f, dl, expect_swr=None):
    """A preset request for a state the host computed on the fake's own antenna and network
    (the best state, dl inductor codes off), with its predicted SWR; then the first carrier.
    Returns (answer, the confirming tune's record, relay sets under the carrier, true SWR)."""
    from feedmatch.rf.network import all_states_zin, best_state, gamma, swr_of

    m, b, ctl = _setup(tmp_path)
    z = complex(m.antenna.impedance(f))
    l, c, sh, _g = best_state(m.net, f, z)
    swr = round(float(swr_of(abs(gamma(all_states_zin(m.net, f, z), 50.0)[sh, l + dl, c]))), 2)
    ans = _ask(b, ctl, 40, "preset", {"freq_hz": f, "state": [l + dl, c, sh], "swr": swr,
                                      "expect_swr": swr if expect_swr is None else expect_swr})[3]
    assert ans["preset"] is True and ans["source"] == "antenna curve"
    n, sets = ctl.rec.seq, b.sets
    m.key(10, f)
    assert run(ctl, 3000, until=lambda c: c.rec.seq > n and c.tune is None)
    rec = _records(_frames(b))[-1]
    assert rec["preset"] is True and m.violations == []
    return ans, rec, b.sets - sets, swr


def test_a_computed_preset_read_as_predicted_moves_no_relay_under_the_carrier(tmp_path):
    # 20 m, the state two inductor codes off the best (true SWR about 1.8 on the fake's
    # vertical): the host predicts it and the first reading allows the prediction, so the box
    # ends there best-effort (its bound cannot prove the 1.5 target), one reading, no relay
    # switched under the carrier; the record says so.
    _ans, rec, moved, swr = _computed_preset(tmp_path, 14.2e6, 2)
    assert swr > 1.5  # the premise: a state that cannot read the target
    assert rec["outcome"] == "best-effort" and rec["n"] == 1 and moved == 0
    assert rec["why"].startswith(f"preset as predicted (SWR {swr:.2f}), no search")
    lo, hi = rec["swr_bound"]
    assert lo <= swr <= hi and hi > 1.5


def test_a_computed_preset_that_locks_says_matched(tmp_path):
    _ans, rec, moved, _swr = _computed_preset(tmp_path, 7.1e6, 0)
    assert rec["outcome"] == LOCKED and rec["n"] == 1 and moved == 0 and rec["why"] == "matched"


def test_a_computed_preset_read_worse_than_predicted_searches(tmp_path):
    # The same state, but the host predicted SWR 1.05 (its curve wrong, or the antenna
    # changed): the reading cannot come from that, so the recall searches and locks elsewhere.
    _ans, rec, moved, swr = _computed_preset(tmp_path, 14.2e6, 2, expect_swr=1.05)
    assert rec["outcome"] == LOCKED and rec["n"] > 1 and moved >= 1
    assert rec["why"].startswith("preset worse than predicted (SWR 1.05), searched")


def test_a_preset_with_a_bad_expected_swr_is_refused_and_nothing_moves(tmp_path):
    m, b, ctl = _setup(tmp_path)
    sets, n = b.sets, ctl.rec.seq
    for i, bad in enumerate((0.99, -1, 0, 100, 1e9, float("nan"), float("inf"), "1.5", True, [1.2], {"swr": 1.2})):
        kind, _s, word, ans = _ask(b, ctl, 50 + i, "preset", {"freq_hz": 14.2e6, "state": [10, 20, 1],
                                                              "swr": 1.2, "expect_swr": bad})
        assert word == "err" and ans["why"] == "bad-args" and "expect_swr" in ans["msg"], bad
    assert b.sets == sets and ctl.rec.seq == n and ctl.preset_f == 0.0
    # From memory the prediction plays no part: a stored state is confirmed as before.
    for f in (7.1e6, 14.2e6):
        m.key(10, f)
        assert run(ctl, until=lambda c: c.state == LOCKED)
        m.key(0, 0)
        run(ctl, 5)
    ans = _ask(b, ctl, 70, "preset", {"freq_hz": 7.1e6, "state": [1, 2, 1], "expect_swr": 1.2})[3]
    assert ans["source"] == "memory" and tuple(ans["relays"][:3]) == tuple(ctl.mem.lookup(7.1e6)[:3])
    assert ctl.preset_expect == -1.0
