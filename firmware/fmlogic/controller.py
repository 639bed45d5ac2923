# The controller: guards, tuning, memory, records and the link, above a board.
#
# States (shown on the link as these strings):
#   wait-rf      no carrier, or a carrier we do not act on; relays hold
#   seek         a tune is under way (one measurement per step)
#   locked       tuned, SWR at or below target
#   best-effort  tune ended above target; best state kept (or through, if better)
#   through      bypass relay closed: the transmitter sees the antenna directly
#   fault        config or hardware error; relays hold or go through when safe
#
# Guards: every relay change goes through _switch(), which measures forward
# power first and refuses above power.hot_switch_w.  A tune needs a carrier
# inside the tune window, has a measurement budget and a time limit, and is
# journalled so a reset mid-tune still ends in a record.
import gc
import json
import sys

from fmlogic import config as fcfg
from fmlogic import coupler, link, memory, search, selftest
from fmlogic.swr import gamma_from_powers, gamma_from_swr, swr_from_gamma

VERSION = "0.1.0"
# On the board a tune allocates tens of KB of floats; collecting once it is
# over (relays still, nothing timed) leaves the next tune a fresh heap
# (common MicroPython practice).  Within a tune MicroPython also collects
# once a quarter of what was free after the last collection has been
# allocated (gc.threshold, set at every collection here): left to collect
# only when the heap is full, its first-fit allocator has spread a cold
# search's live readings over the whole free heap by then, and the holes
# between them cannot take a 1 KB dict or string (measured on the
# single-precision unix port at 256 KB with a new memory bin every tune:
# MemoryError from the 62nd tune with 48 KB nominally free and no free block
# over 864 bytes; with this, 5000 of 5000).  A check of the free heap in each
# relay step's settling wait was tried first: gc.mem_free() walks the whole
# allocation table, 8 ms a step on the emulated Pico.
_COLLECT = sys.implementation.name == "micropython"
_GC_SHARE = 4  # collect once 1/_GC_SHARE of the free heap has been allocated
_RECORDS_BYTES = 900
_KEEP_BEST_SWR = 3.0  # a best effort worse than this is not worth recalling
# How long a reflected detector that read a reflection is trusted to read one: a zero
# reading of a recalled state within it is a match (an operating session's band changes),
# after it the contrast reading checks the detector again.  Engineering judgement: a
# detector that fails mid-session shows at the next cold tune or after this time.
_REF_TRUST_MS = 600000
WAIT_RF = "wait-rf"
SEEK = "seek"
LOCKED = "locked"
BEST = "best-effort"
THROUGH = "through"
FAULT = "fault"
CONFIG = "config.json"
ADVICE_CONFIG = ("re-deploy the board config (feedmatch deploy --port PORT --config YOUR.json); "
                 "the relays stay through until then")


class Tune:
    """A tune under way (one object a tune, made at its start; None between tunes)."""

    def __init__(self, search, freq_hz, started_ms, before, swr_before, hinted, strategy, preset):
        self.search = search          # the strategy's search object (fmlogic.search)
        self.freq_hz = freq_hz        # counted (or asked for) when it started; 0 if unknown
        self.started_ms = started_ms  # board ticks_ms at the start: the time limit counts from here
        self.before = before          # relays before it, as in the record: [l, c, shunt, bypass]
        self.swr_before = swr_before  # the SWR read before it (-1: none)
        self.hinted = hinted          # started from a stored or preset state
        self.strategy = strategy      # the strategy's name, as in the record
        self.preset = preset          # it confirms a preset


class Controller:
    def __init__(self, board, cfg, d="", boot=None, cfg_note=None):
        self.board = board
        self.dir = d  # the flash directory the memory, records and config live in
        self.raw_cfg = cfg if isinstance(cfg, dict) else {}
        self.reader = link.LineReader()
        self.ev_seq = 0
        self.state = WAIT_RF
        self.why = "boot"
        self.relays = (0, 0, 1)
        self.bypass = True
        self.fwd = 0.0
        self.rf_w = 0.0
        self.ref = 0.0
        self.raw = (0.0, 0.0)
        self.freq = 0.0
        self.tune_req = None
        self.tune = None
        self.lock_bin = None
        self.pending_restore = None
        self.manual = False  # the operator set relays or bypass: no automatic tunes until asked
        self.preset_f = 0.0  # a preset waits for its confirming reading on the next carrier
        self.preset_hint = None  # a preset the host computed (no memory here): the confirming recall starts there
        self.ref_seen = None  # ticks_ms of the reflected detector's last reading above its floor
        self.preset_measured = False  # ... and whether its SWR was read (memory) or predicted (host)
        self.preset_expect = -1.0  # ... the true |gamma| the host expects its first reading to allow (-1: none)
        self.rig = None  # (freq_hz, mode) the host last said the radio is on
        self.frames_bad = 0
        self.hot_refusals = 0
        self.fault_file = None  # the file a fault concerns, and what to do about it
        self.advice = None
        self.warnings = []  # what the start found damaged and got past, in words
        self.internal_at = None  # when an internal error stopped the box (it recovers)
        self.err_at = None  # error answers to garbage on the link: at most one per 100 ms
        self.link_busy = False
        memory.STAGE[0] = memory.BOOTS
        self.boot = _bump_boot(d) if boot is None else boot
        memory.STAGE[0] = "board.uid"
        self.uid, had_uid, note = _identity(d)
        if note:
            self.warnings.append(note)
        errs = fcfg.validate(self.raw_cfg)
        if cfg_note and not errs:
            self.warnings.append(cfg_note)  # running on the previous copy
        self.cfg = fcfg.merged(self.raw_cfg if not errs else {})
        memory.STAGE[0] = memory.MEM
        self._apply_cfg()
        self.mem.load()
        if self.mem.load_error:
            self.warnings.append("memory: " + self.mem.load_error)
        memory.STAGE[0] = "rec/"
        self.rec.load()
        if self.rec.note:
            self.warnings.append(self.rec.note)
        self._replay()
        if self.rec.floor_lost and had_uid and self.boot > 1:
            # The record store and its floor are gone but the board had a history:
            # its numbers would start again at 1 under the same identity, so it takes
            # a new one (a new epoch: the logbook keeps the two apart and says so).
            old = self.uid
            self.uid = _new_identity(d)
            self.warnings.append("record store lost: new identity %s (was %s)" % (self.uid, old))
        memory.STAGE[0] = memory.JOURNAL
        # Relays come up released (output enable held off at boot by the board).
        board.set_relays(0, 0, 1, True)
        if errs:
            self._set_state(FAULT, cfg_note or ("config.json: " + errs[0]))
            self.fault_file = CONFIG
            self.advice = ADVICE_CONFIG
        jn = memory.journal_take(d)
        if jn is not None:
            # The journal's number is a floor: a tune under way (seq: the number its
            # record was to take) or ended ("done": the number its record took). A
            # record lost from rec/q after it went out is not given again.
            done = jn.get("done")
            s = jn.get("seq")
            if isinstance(done, int):
                jn = None
            elif isinstance(s, int):
                if self.rec.seq >= s:
                    jn = None  # the tune ended in its record before the journal was marked
                done = s - 1
            if isinstance(done, int) and self.rec.floor(done):
                self.warnings.append(self.rec.note)
        if jn is not None:
            self._record(jn.get("freq_hz", 0.0), jn.get("before"), jn.get("before"), "reset",
                         "board reset during tune", swr_before=jn.get("swr_before", -1.0), n=jn.get("n", 0),
                         strategy=jn.get("strategy", ""))
        last = self.mem.last_state()
        if last is not None and not errs:
            self.pending_restore = last
        memory.STAGE[0] = ""
        ev = {"boot": self.boot, "version": VERSION, "board_id": self.cfg["board_id"],
              "uid": self.uid, "seq": self.rec.seq, "mem": self.mem.load_error or "ok"}
        if self.warnings:
            ev["warnings"] = self.warnings
        if self.rec.lost is not None:
            ev["lost"] = [self.rec.lost[0], self.rec.lost[1]]
        self._event("boot", ev)
        if _COLLECT:
            self._collect()  # the start's garbage goes; the first tune's collections have their level

    def _replay(self):
        """The last state and the memory changes the records hold beyond the saved
        copies (fmlogic.memory: a tune's end writes its record, not the memory)."""
        mem = self.mem
        tail = self.rec.tail
        self.rec.tail = None  # read once: RAM holds no record after the start
        if tail is None:
            return
        lst = tail.get("lst")
        if tail.get("seq", 0) > mem.last_seq and isinstance(lst, list) and len(lst) == 5:
            try:
                mem.last = tuple(int(x) for x in lst)
            except (TypeError, ValueError):
                pass
        m0 = tail.get("m0")
        if mem.dat_ok:
            if not isinstance(m0, int) or m0 <= mem.upto:
                return  # the saved copy holds every change
            s = m0 - 1
        else:
            # The backup copy (or none): its changes since, as far as the store reaches.
            s = max(mem.upto, self.rec.seq - 4 * memory.SAVE_SPAN)
        while s < self.rec.seq:
            got = self.rec.since(s, 4, b'"mset"')
            if not got:
                break
            for r in got:
                mem.replay(r)
            s = got[-1]["seq"]

    # -- configuration --------------------------------------------------------------
    def _apply_cfg(self):
        m = self.cfg
        self.bank = fcfg.bank_from(m)
        # Failed elements (network.failed): the search works on what still switches.
        self.damage = selftest.damage_from(m, self.bank)
        self.meter = fcfg.meter_from(m)
        self.coupler = coupler.from_config(m["detector"], self.meter.ref)
        self.power = m["power"]  # the board config's power limits (W)
        self.tuning = m["tune"]  # ... and its tune settings (target, budget, times in ms)
        if not hasattr(self, "mem"):
            self.mem = memory.Memory(self.dir, m["memory"]["bin_hz"], m["memory"]["max_entries"])
            self.rec = memory.Records(self.dir, m["records"]["keep"])
            self.mem.room = self.rec._drop_oldest
        else:
            self.mem.bin_hz = float(m["memory"]["bin_hz"])
            self.mem.set_max(m["memory"]["max_entries"])
            self.rec.keep = int(m["records"]["keep"])

    # -- the loop ---------------------------------------------------------------
    def run(self, idle_ms=20):
        while True:
            busy = self.step()
            if not busy:
                self.board.sleep_ms(idle_ms)

    def step(self):
        """One pass; returns True while a tune is under way or the link has more
        waiting (no idle wait then)."""
        b = self.board
        b.wdt_feed()
        try:
            self._poll_link()
            if self.tune is not None:
                self._seek_step()
                return True
            self._watch()
        except Exception as e:  # keep the loop alive; the watchdog covers hangs
            self._internal(e)
        b.led(self.state == LOCKED)
        return self.tune is not None or self.link_busy

    def _internal(self, e):
        """An error no guard foresaw (out of memory, a bug): the tune ends, the
        relays go through when cold, and after a pause the box serves again,
        so one bad moment never needs a visit to the mast."""
        self._fault("internal: " + repr(e)[:90])
        self.advice = "the box recovers by itself in 10 s; if this repeats, send its log to the developers"
        self.internal_at = self.board.ticks_ms()
        if _COLLECT:
            self._collect()

    def _collect(self):
        """Collect the heap and set the allocations after which MicroPython collects again."""
        gc.collect()
        if hasattr(gc, "threshold"):
            gc.threshold(gc.mem_free() // _GC_SHARE)

    def _read(self):
        c = self.board.read_detectors()
        self.raw = c
        self.fwd, self.ref = self.meter.powers(c[0], c[1])
        self.rf_w = self.meter.rf_present_w(c[0], c[1])
        if self.ref > 0.0 and self.fwd > 0.0:
            self.ref_seen = self.board.ticks_ms()
        return self.fwd, self.ref

    def _swr(self):
        return swr_from_gamma(gamma_from_powers(self.fwd, self.ref))

    def _switch(self, state, bypass):
        """Change relays only with RF power at or below the hot-switch limit,
        whichever way it flows through the coupler."""
        want = (state[0], state[1], state[2])
        if want == self.relays and bypass == self.bypass:
            return True
        self._read()
        if not self.rf_w <= self.power["hot_switch_w"]:
            # Above the limit, or not a number (a detector fault): hold.
            self.hot_refusals += 1
            return False
        self.board.set_relays(want[0], want[1], want[2], bypass)
        self.relays = want
        self.bypass = bypass
        return True

    def _watch(self):
        fwd, ref = self._read()
        now = self.board.ticks_ms()
        if self.pending_restore is not None:
            last = self.pending_restore
            if self._switch((last[1], last[2], last[3]), bool(last[4])):
                self.pending_restore = None
                if not last[4]:
                    self._set_state(LOCKED if last[0] >= 0 else WAIT_RF, "restored after reset")
                    self.lock_bin = last[0] if last[0] >= 0 else None
                else:
                    self._set_state(THROUGH, "restored after reset")
        req = self.tune_req
        if fwd <= 0.0:
            self.freq = 0.0
            if self.rf_w > self.power["min_tune_w"]:
                held = "; relays held" if self.rf_w > self.power["hot_switch_w"] else ""
                self._set_state(self.state, "reverse power from the antenna side" + held +
                                ": check the wiring and nearby transmitters")
            elif self.why.startswith("reverse power "):
                self._set_state(self.state, "reverse power gone")
            if req is not None and self.board.ticks_diff(now, req["asked_ms"]) > self.tuning["rf_wait_ms"]:
                self.tune_req = None
                self._record(req.get("freq_hz", 0.0), self._state_list(), self._state_list(), "refused",
                             "no RF within wait time")
            return
        f = self.board.count_freq()
        if f <= 0.0 and req is not None:
            f = req.get("freq_hz", 0.0)
        self.freq = f
        if self.state == FAULT:
            if self.internal_at is not None and self.board.ticks_diff(now, self.internal_at) > 10000:
                self.internal_at = None
                self.advice = None
                self._set_state(WAIT_RF, "recovered after an internal error")
            return
        if self.board.tune_button():
            req = self.tune_req = {"asked_ms": now, "freq_hz": f, "why": "button"}
            self.manual = False
        in_window = self.power["min_tune_w"] <= fwd <= self.power["max_tune_w"]
        if req is not None:
            if fwd > self.power["max_tune_w"]:
                if fwd > self.power["hot_switch_w"]:
                    self._set_state(self.state, "hold: reduce power to %.0f W to tune" % self.power["max_tune_w"])
                return
            if in_window:
                self.tune_req = None
                self._start_tune(f, req.get("why", "request"))
            return
        if self.preset_f > 0.0 and fwd >= self.power["min_tune_w"] and not self.manual:
            # The relays were set from memory before the carrier came: one reading
            # confirms them.  In the tune window that is a recall (it starts at the
            # stored state and searches on if it does not hold); above it, the
            # reading alone, and nothing switches.
            fp = f if f > 0 else self.preset_f
            if in_window and self.tuning["auto"]:
                self._start_tune(fp, "confirm preset")
                return
            self.preset_f = 0.0
            self.preset_expect = -1.0
            swr = self._swr()
            bd = self._bound()
            # Confirmed only where the reading proves the target (the coupler's bounds).
            ok = bd is not None and bd[1] <= self.tuning["target_swr"]
            st = self._state_list()
            self._record(fp, st, st, LOCKED if ok else BEST,
                         "preset confirmed" if ok else "preset not proven: tune at lower power",
                         swr_before=swr, swr_after=swr, n=1, mem=ok, strategy="preset", preset=True, swr_bound=bd)
            self._set_state(LOCKED if ok else BEST, "preset confirmed" if ok else "preset not proven")
            return
        if not self.tuning["auto"] or not in_window or self.manual:
            return
        swr = self._swr()
        fbin = self.mem.bin_of(f) if f > 0 else None
        moved = fbin is not None and self.lock_bin is not None and abs(fbin - self.lock_bin) > 1
        if swr > self.tuning["retune_swr"] or (moved and swr > self.tuning["target_swr"]):
            if self.state == BEST and not moved and self.lock_bin == fbin:
                return  # already did our best on this bin; wait for a request
            self._start_tune(f, "auto: SWR %.2f" % swr)

    # -- tuning -----------------------------------------------------------------
    def _start_tune(self, f, why):
        hint = self.mem.lookup(f) if f > 0 else None
        measured = hint is not None
        expect = -1.0
        if hint is None and self.preset_f > 0.0:
            hint = self.preset_hint
            measured = self.preset_measured
            expect = self.preset_expect
        self.preset_expect = -1.0
        name = self.tuning["strategy"]
        if name == "recall" and hint is None:
            name = "model"
        dmg = self.damage
        if dmg is not None and hint is not None:
            hint = dmg.reduced(hint[:3]) + (hint[3],)
        strat = search.make(name, dmg.bank if dmg is not None else self.bank, f if f > 0 else 14.0e6,
                            self.tuning["target_swr"], self.tuning["budget"], hint[:4] if hint else None, self.coupler)
        # Asked for (the host's request, the button), or a state the host computed (its SWR a
        # prediction, never read): a best effort is searched again; an automatic tune or a
        # preset's confirmation keeps a stored best effort that reads as it was stored.
        strat.asked = why in ("request", "button")
        strat.retry_best = strat.asked or not measured
        # A host-computed preset with its prediction: a first reading that allows it ends the
        # confirmation there (search.Recall); an operator's tune searches as far as it may.
        strat.expect_g = -1.0 if strat.asked else expect
        # A zero first reading of a stored or preset state is a match, not a dead reflected
        # detector, when that detector read a reflection lately: no contrast reading (two
        # relay changes under the carrier).  A cold tune still checks.
        rs = self.ref_seen
        strat.ref_alive = (hint is not None and rs is not None
                           and self.board.ticks_diff(self.board.ticks_ms(), rs) < _REF_TRUST_MS)
        before = self._state_list()
        swr0 = self._swr()
        self.tune = Tune(strat, f, self.board.ticks_ms(), before, swr0, hint is not None, name,
                         self.preset_f > 0.0)
        self.preset_f = 0.0
        # Inside long work the search feeds the watchdog and stops at the time limit.
        strat.guard = self._guard
        memory.journal_write(self.dir, {"freq_hz": f, "before": before, "swr_before": swr0,
                                        "strategy": name, "seq": self.rec.seq + 1})
        self._set_state(SEEK, why)

    def _guard(self):
        b = self.board
        b.wdt_feed()
        tn = self.tune
        return tn is not None and b.ticks_diff(b.ticks_ms(), tn.started_ms) > self.tuning["time_limit_ms"]

    def _seek_step(self):
        tn = self.tune
        s = tn.search
        b = self.board
        if b.ticks_diff(b.ticks_ms(), tn.started_ms) > self.tuning["time_limit_ms"]:
            self._end_tune("time limit")
            return
        st = s.propose()
        byp = st == search.BYPASS
        if self.damage is not None and not byp:
            st = self.damage.full(st)  # failed relays are never driven against their state
        # The search's BYPASS is the antenna alone: the bypass relay, as the
        # box ends when nothing beats it.
        if not self._switch(st, byp):
            self._end_tune("power above hot-switch limit", abort=True)
            return
        b.sleep_ms(self.tuning["settle_ms"])
        fwd, ref = self._read()
        if fwd <= 0.0:
            self._end_tune("carrier lost", abort=True)
            return
        if fwd > self.power["max_tune_w"]:
            self._end_tune("power rose above tune window", abort=True)
            return
        s.observe(fwd, ref)
        if s.done:
            self._end_tune("time limit" if s.timed_out else ("budget spent" if s.n >= s.budget else "search ended"))

    def _end_tune(self, why, abort=False):
        tn = self.tune
        self.tune = None
        s = tn.search
        f = tn.freq_hz
        outcome, final, byp, best_swr, keep, note = conclude(s, abort)
        if outcome == LOCKED:
            why = note
        elif note:
            why = why + "; " + note
        if s.predicted == search.PREDICTED and not abort:
            # The logbook tells a preset the first reading bore out from a search that ended.
            why = "preset as predicted (SWR %.2f), no search; %s" % (swr_from_gamma(s.expect_g), note or why)
        elif s.predicted == search.WORSE:
            why = "preset worse than predicted (SWR %.2f), searched; %s" % (swr_from_gamma(s.expect_g), why)
        if final is None:
            final, byp = (self.relays, self.bypass)
        elif self.damage is not None and not byp:
            final = self.damage.full(final)
        switched = self._switch(final, byp)
        if not switched:
            why = why + "; relays held (power above hot-switch limit)"
        after_swr = best_swr if (switched and best_swr > 0) else -1.0
        dur = self.board.ticks_diff(self.board.ticks_ms(), tn.started_ms)
        if keep and switched:
            self.mem.store(f, final, best_swr, self.board.ticks_ms() // 1000)
        self.mem.set_last(f, self.relays, self.bypass)
        self.lock_bin = self.mem.bin_of(f) if f > 0 else None
        hit = tn.hinted and s.n == 1 and outcome == LOCKED
        if _COLLECT:
            # The search's garbage goes before the tune's flash work (relays set, nothing
            # timed), so no collection lands inside the record's or the memory's write.
            self._collect()
        # The record carries the memory's change and the last state: written first,
        # it is all a tune's end writes, but for the whole memory now and then.
        self._record(f, tn.before, self._state_list(), outcome, why, swr_before=tn.swr_before,
                     swr_after=after_swr, n=s.n, ms=dur, mem=hit, strategy=tn.strategy,
                     trace=_trace(s, self.damage), preset=tn.preset,
                     swr_bound=bound(s) if switched and outcome != FAULT else None)
        self.mem.flush(self.rec.seq)
        # Marked ended with its record's number (one small write, as its removal was).
        memory.journal_write(self.dir, {"done": self.rec.seq})
        if outcome == "aborted":
            self._set_state(WAIT_RF, why)
        elif outcome == FAULT:
            self._fault(why)
        else:
            self._set_state(outcome, why)

    # -- records, events, state ---------------------------------------------------
    def _state_list(self):
        return [self.relays[0], self.relays[1], self.relays[2], 1 if self.bypass else 0]

    def _record(self, f, before, after, outcome, why, swr_before=-1.0, swr_after=-1.0, n=0, ms=0,
                mem=False, strategy="", trace=None, preset=False, swr_bound=None):
        """One record (the keywords are its fields; -1 is an SWR not read): into the
        record store and out on the link as an event."""
        rec = {"boot": self.boot, "t_ms": self.board.ticks_ms(), "freq_hz": f,
               "before": before, "after": after, "swr_before": _r3(swr_before), "swr_after": _r3(swr_after),
               "n": n, "ms": ms, "outcome": outcome, "why": why, "mem": mem,
               "strategy": strategy, "board_id": self.cfg["board_id"], "uid": self.uid}
        if trace:
            rec["trace"] = trace
        if swr_bound is not None:
            # The true SWR the final reading allows (fmlogic.coupler): [low, high].
            rec["swr_bound"] = [swr_bound[0], swr_bound[1]]
        if preset:
            rec["preset"] = True
        if self.rig is not None:
            rec["rig_hz"] = self.rig[0]
            rec["rig_mode"] = self.rig[1]
        mem_ = self.mem
        # What the memory holds beyond its saved copy (fmlogic.memory, put back at boot):
        # the last state, the change this tune made, the first record with an unsaved one.
        if mem_.last is not None:
            rec["lst"] = list(mem_.last)
        if mem_.change is not None:
            rec["mset"] = list(mem_.change)
        m0 = mem_.m0 or (self.rec.seq + 1 if mem_.change is not None else 0)
        if m0:
            rec["m0"] = m0
        self.rec.add(rec)
        if self.rec.err is None:
            mem_.logged(rec["seq"])
        self._event("record", rec)

    def _set_state(self, st, why):
        if st != self.state or why != self.why:
            self.state = st
            self.why = why
            self._event("state", {"state": st, "why": why, "relays": self._state_list()})

    def _fault(self, why):
        self.tune = None
        try:
            self._switch(self.relays, True)
        except Exception:
            pass
        self._set_state(FAULT, why)

    def _event(self, word, obj):
        self.ev_seq = (self.ev_seq + 1) & 0xFFFF
        self._send(link.encode("E", self.ev_seq, word, obj))

    def _send(self, frame):
        try:
            self.board.link_write(frame)
        except Exception:
            pass  # a link that is gone must not stop the tuner

    # -- the link ---------------------------------------------------------------
    def _poll_link(self):
        # Drain what waits, up to 64 reads or 10 ms a pass: a flood of garbage
        # passes at the link's speed while tunes and the watchdog keep their time.
        b = self.board
        t0 = b.ticks_ms()
        self.link_busy = False
        for _ in range(64):
            data = b.link_read()
            if not data:
                return
            self._lines(data)
            if b.ticks_diff(b.ticks_ms(), t0) > 10:
                break
        self.link_busy = True  # more may wait: the loop comes back without its idle pause

    def _bad_frame(self, why):
        """Count a bad frame; answer at most one per 100 ms, so garbage never
        fills the link with answers the host has to wait behind."""
        self.frames_bad += 1
        now = self.board.ticks_ms()
        if self.err_at is None or self.board.ticks_diff(now, self.err_at) >= 100:
            self.err_at = now
            self._send(link.encode("A", 0, "err", {"why": why}))

    def _lines(self, data):
        for line in self.reader.feed(data):
            if not line:
                self._bad_frame("oversize")
                continue
            if line.strip() == b"":
                continue
            d = link.decode(line)
            if d[0] is None:
                self._bad_frame(d[1])
                continue
            kind, seq, word, obj = d
            if kind != "Q":
                self._send(link.encode("A", seq, "err", {"why": "not-a-request"}))
                continue
            try:
                ok, reply = self._handle(word, obj)
            except Exception as e:
                ok, reply = False, {"why": "bad-args", "msg": repr(e)[:60]}
            frame = link.encode("A", seq, "ok" if ok else "err", reply)
            if len(frame) > link.MAX_LINE:
                frame = link.encode("A", seq, "err", {"why": "reply-too-long"})
            self._send(frame)

    def _preset(self, a):
        """Set the relays from memory for a frequency, with no RF present: the
        radio changed band and has not transmitted yet, the safest moment to
        switch.  The lookup is the memory's own (the bins live here only)."""
        f = a.get("freq_hz")
        if not isinstance(f, (int, float)) or isinstance(f, bool) or f <= 0 or f > 1e9:
            return False, {"why": "bad-args", "msg": "freq_hz"}
        ex = a.get("expect_swr")
        if ex is not None and (not isinstance(ex, (int, float)) or isinstance(ex, bool) or not 1.0 <= ex < 100.0):
            # Checked before anything moves: a prediction the box cannot use is refused outright.
            return False, {"why": "bad-args", "msg": "expect_swr must be an SWR from 1 to 100"}
        mode = a.get("mode")
        if isinstance(mode, str):
            self.rig = (float(f), mode[:12])
        self._read()
        if self.fwd > 0.0 or self.rf_w > 0.0:
            return False, {"why": "rf-present", "msg": "RF on the line: the box tunes on it instead"}
        hint = self.mem.lookup(f)
        b = self.mem.bin_of(f)
        src = "memory"
        if hint is None:
            # Nothing stored: a state the host computed from the antenna it measured
            # ("state": [l, c, shunt], "swr": its predicted SWR, or "expect_swr": the SWR
            # its first reading is judged against), switched as coldly.
            hint = _given_state(a.get("state"), a.get("swr", ex), self.bank)
            src = "antenna curve"
        if hint is None:
            return True, {"preset": False, "msg": "nothing stored near this frequency", "bin": b,
                          "relays": self._state_list()}
        if b == self.lock_bin and self.relays == (hint[0], hint[1], hint[2]) and not self.bypass:
            # The same bin, already at its state (the radio's dial moved within it): nothing to do.
            return True, {"preset": True, "already": True, "bin": b, "relays": self._state_list(),
                          "stored_swr": hint[3], "bin_hz": self.mem.bin_hz}
        if not self._switch((hint[0], hint[1], hint[2]), False):
            return False, {"why": "hot", "msg": "power above hot-switch limit"}
        before = self._state_list()
        self.preset_f = float(f)
        self.preset_hint = hint
        self.preset_measured = src == "memory"
        self.preset_expect = gamma_from_swr(ex) if ex is not None and src != "memory" else -1.0
        self.manual = False
        self.freq = float(f)
        self.lock_bin = self.mem.bin_of(f)
        self.mem.set_last(f, self.relays, False)
        # Each preset is a record too (no reading: there is no RF), so the
        # logbook holds every one, confirmed by a carrier or not; it holds the last state.
        self._record(float(f), before, self._state_list(), "preset", "preset from " + src,
                     swr_after=hint[3], mem=src == "memory", strategy="preset")
        self.mem.flush(self.rec.seq)
        self._set_state(WAIT_RF, "preset from %s for %.4f MHz" % (src, f / 1e6))
        return True, {"preset": True, "relays": self._state_list(), "stored_swr": hint[3],
                      "bin_hz": self.mem.bin_hz, "bin": b, "source": src}

    def _selftest(self, a):
        """Step each relay from a reference state with the tune carrier on
        (fmlogic.selftest: the plan, the gate, the readings); the host diagnoses.
        Reference: l/c/sh when given, else the tuned state, else memory's state
        for this frequency, else all relays released on the antenna side."""
        ref = None
        if "l" in a or "c" in a or "sh" in a:
            ref = (a.get("l"), a.get("c"), a.get("sh", 1))
            for v, top in ((ref[0], self.bank.l_max), (ref[1], self.bank.c_max), (ref[2], 1)):
                if not isinstance(v, int) or isinstance(v, bool) or v < 0 or v > top:
                    return False, {"why": "bad-args", "msg": "l/c/sh out of range"}
        side = a.get("side", True)
        byp = a.get("bypass", False)
        if not isinstance(side, bool) or not isinstance(byp, bool):
            return False, {"why": "bad-args", "msg": "side and bypass must be true or false"}
        fwd, _ = self._read()
        if not self.power["min_tune_w"] <= fwd <= self.power["max_tune_w"]:
            return False, {"why": "no-carrier", "msg": "key a carrier of %g to %g W" %
                           (self.power["min_tune_w"], self.power["max_tune_w"])}
        f = self.board.count_freq()
        if ref is None:
            if self.state in (LOCKED, BEST) and not self.bypass:
                ref = self.relays
            else:
                hint = self.mem.lookup(f) if f > 0 else None
                ref = (hint[0], hint[1], hint[2]) if hint else (0, 0, 1)
        g, why, gb = selftest.run(self, ref, side, byp)
        if _COLLECT:
            self._collect()
        return True, {"ref": [ref[0], ref[1], ref[2]], "side": side, "g": g, "gb": gb, "freq_hz": f,
                      "fwd_w": _r3(self.fwd), "stopped": why, "relays": self._state_list()}

    def _status(self):
        return {"state": self.state, "why": self.why, "relays": self._state_list(),
                "fwd_w": _r3(self.fwd), "ref_w": _r3(self.ref),
                "swr": _r3(self._swr()) if self.fwd > 0 else None, "swr_bound": self._bound(),
                "freq_hz": self.freq,
                "seq": self.rec.seq, "boot": self.boot, "board_id": self.cfg["board_id"],
                "uid": self.uid, "version": VERSION, "bad_frames": self.frames_bad, "hot_refusals": self.hot_refusals,
                "mem_entries": self.mem.n, "uptime_ms": self.board.ticks_ms(),
                "manual": self.manual, "file": self.fault_file, "advice": self.advice,
                "warnings": self.warnings, "rec_error": self.rec.err}

    def _bound(self):
        """[low, high] true SWR the present reading allows (the coupler's error
        bounds), or None without a carrier."""
        g = gamma_from_powers(self.fwd, self.ref)
        if self.fwd <= 0.0 or g < 0.0:
            return None
        lo, hi = self.coupler.bounds(self.coupler.correct(g), self.coupler.floor_g(self.fwd))
        return [_r3(swr_from_gamma(lo)), _r3(swr_from_gamma(hi))]

    def _handle(self, word, a):
        """Answer one request through the table (REQUESTS below the class): the guards its
        entry names first (refused during a tune, refused in a fault), then its function."""
        entry = REQUESTS.get(word)
        if entry is None:
            return False, {"why": "unknown-request", "msg": word[:16]}
        fn, guards = entry
        if guards & _NOT_TUNING and self.tune is not None:
            return False, {"why": "busy"}
        if guards & _NOT_IN_FAULT and self.state == FAULT:
            return False, {"why": "fault", "msg": self.why}
        return fn(self, a)

    # -- the requests (one function each; the table is REQUESTS) --------------------
    def _q_status(self, a):
        return True, self._status()

    def _q_tune(self, a):
        f = a.get("freq_hz", 0.0)
        if not isinstance(f, (int, float)) or f < 0 or f > 1e9:
            return False, {"why": "bad-args", "msg": "freq_hz"}
        self.tune_req = {"asked_ms": self.board.ticks_ms(), "freq_hz": float(f), "why": "request"}
        self.manual = False
        return True, {"accepted": True, "seq": self.rec.seq}

    def _q_set(self, a):
        l_, c_, sh = a.get("l"), a.get("c"), a.get("sh", 1)
        for v, top in ((l_, self.bank.l_max), (c_, self.bank.c_max), (sh, 1)):
            if not isinstance(v, int) or isinstance(v, bool) or v < 0 or v > top:
                return False, {"why": "bad-args", "msg": "l/c/sh out of range"}
        if not self._switch((l_, c_, sh), False):
            return False, {"why": "hot", "msg": "power above hot-switch limit"}
        self.mem.set_last(self.freq, self.relays, False)
        self.mem.flush(self.rec.seq)
        self.manual = True
        self._set_state(WAIT_RF, "set by host")
        return True, {"relays": self._state_list()}

    def _q_bypass(self, a):
        on = a.get("on", True)
        if not isinstance(on, bool):
            return False, {"why": "bad-args", "msg": "on must be true or false"}
        if not self._switch(self.relays, on):
            return False, {"why": "hot", "msg": "power above hot-switch limit"}
        self.mem.set_last(self.freq, self.relays, on)
        self.mem.flush(self.rec.seq)
        self.manual = on
        self._set_state(THROUGH if on else WAIT_RF, "bypass by host" if on else "back in line by host")
        return True, {"relays": self._state_list()}

    def _q_rig(self, a):
        # What the radio is on, as the host's rig control reads it: kept in records.
        f = a.get("freq_hz")
        mode = a.get("mode", "")
        if not isinstance(f, (int, float)) or f <= 0 or f > 1e9 or not isinstance(mode, str):
            return False, {"why": "bad-args", "msg": "freq_hz and mode"}
        self.rig = (float(f), mode[:12])
        return True, {}

    def _q_mem_list(self, a):
        start = a.get("start", 0)
        if not isinstance(start, int) or start < 0:
            return False, {"why": "bad-args", "msg": "start"}
        items = self.mem.listing()
        return True, {"bin_hz": self.mem.bin_hz, "total": len(items), "start": start,
                      "entries": items[start:start + 12]}

    def _q_mem_clear(self, a):
        self.mem.clear(self.rec.seq)
        return True, {"entries": 0}

    def _q_cfg_get(self, a):
        sec = a.get("section")
        if sec is None:
            return True, {"sections": [k for k in self.cfg if isinstance(self.cfg[k], dict)]}
        if sec not in self.cfg:
            return False, {"why": "bad-args", "msg": "no such section"}
        return True, {"section": sec, "value": self.cfg[sec]}

    def _q_cal_read(self, a):
        n = a.get("n", 1)
        if not isinstance(n, int) or not 1 <= n <= 64:
            return False, {"why": "bad-args", "msg": "n must be 1..64"}
        sf = sr = 0.0
        for _ in range(n):
            c = self.board.read_detectors()
            sf += c[0]
            sr += c[1]
        self._read()
        return True, {"fwd_counts": sf / n, "ref_counts": sr / n, "fwd_w": _r3(self.fwd),
                      "ref_w": _r3(self.ref), "freq_hz": self.board.count_freq()}

    def _q_records(self, a):
        since = a.get("since", 0)
        if not isinstance(since, int) or since < 0:
            return False, {"why": "bad-args", "msg": "since"}
        # As many records as fit in a short frame (at least one, its trace dropped if it
        # alone is too long): short frames survive a noisy line better.
        cand = self.rec.since(since, 6)
        recs = []
        size = 80
        for r in cand:
            n = len(json.dumps(r)) + 2
            if recs and size + n > _RECORDS_BYTES:
                break
            if size + n > link.MAX_LINE - 40:
                r = dict(r)
                r.pop("trace", None)
                n = len(json.dumps(r)) + 2
            recs.append(r)
            size += n
        more = len(cand) > len(recs) or (len(cand) == 6 and cand[-1]["seq"] < self.rec.seq)
        return True, {"records": recs, "more": more, "last": self.rec.seq}

    def _q_ping(self, a):
        return True, {"pong": True}

    def _mem_put(self, a):
        """Stored states written into the memory (the host's memory --import):
        bin_hz (the width of the bins they were listed from), entries (up to
        memory.PUT_MAX, as mem-list gives them), from_uid (the identity of the box
        they were listed on: another box's states are refused without foreign: its
        relay codes may mean other parts), rebin (bins of another width are refused
        without it), replace (a bin this box already holds keeps its own state
        without it), save (false: keep in RAM until the last frame, one flash
        write for the whole import).  Every entry is checked before any is stored;
        no relay moves."""
        w = a.get("bin_hz")
        flags = (a.get("rebin", False), a.get("replace", False), a.get("save", True), a.get("foreign", False))
        for v in flags:
            if not isinstance(v, bool):
                return False, {"why": "bad-args", "msg": "rebin, replace, save and foreign are true or false"}
        src = a.get("from_uid")
        if src is not None and not isinstance(src, str):
            return False, {"why": "bad-args", "msg": "from_uid"}
        if src is not None and src != self.uid and not flags[3]:
            return False, {"why": "other-board", "msg": "listed on box %s, this is %s" % (src[:16], self.uid)}
        if not memory._is_num(w) or not 100.0 <= w <= 1e7:
            return False, {"why": "bad-args", "msg": "bin_hz"}
        own = self.mem.bin_hz
        if not flags[0] and abs(w - own) > own * 1e-6:
            return False, {"why": "other-bins", "msg": "%g Hz here, %g Hz in the request" % (own, w)}
        ents = a.get("entries")
        err = memory.check_entries(ents, self.bank.l_max, self.bank.c_max)
        if err:
            return False, {"why": "bad-entry", "msg": err}
        stored, kept = self.mem.put_many(ents, float(w), flags[1])
        if flags[2]:
            self.mem.flush(self.rec.seq)
        return True, {"stored": stored, "kept": kept, "entries": self.mem.n,
                      "max_entries": self.mem.max_entries, "saved": not self.mem.dirty}

    def _cfg_set(self, a):
        path = a.get("path")
        if not isinstance(path, str) or path.count(".") != 1:
            return False, {"why": "bad-args", "msg": "path must be section.key"}
        sec, key = path.split(".")
        new = {}
        for k in self.raw_cfg:
            v = self.raw_cfg[k]
            new[k] = dict(v) if isinstance(v, dict) else v
        if sec not in fcfg.DEFAULTS or not isinstance(fcfg.DEFAULTS[sec], dict):
            return False, {"why": "bad-args", "msg": "no such section"}
        new.setdefault(sec, {})
        new[sec][key] = a.get("value")
        errs = fcfg.validate(new)
        if errs:
            return False, {"why": "invalid", "msg": errs[0][:120]}
        memory.atomic_write(self.dir, CONFIG, json.dumps(new).encode())
        self.raw_cfg = new
        self.cfg = fcfg.merged(new)
        self._apply_cfg()
        if self.state == FAULT:
            self.fault_file = None
            self.advice = None
            self._set_state(WAIT_RF, "config fixed")
        return True, {"path": path, "value": self.cfg[sec][key]}


# Guards a request's entry names: refused while a tune is under way ("busy"), refused
# while the box is in a fault ("fault"), checked in that order before its function.
_NOT_TUNING = 1
_NOT_IN_FAULT = 2
# The requests the link takes: word -> (function, guards). A new request is one entry
# here and one function of the Controller (docs/protocol.md describes each).
REQUESTS = {
    "status": (Controller._q_status, 0),
    "tune": (Controller._q_tune, _NOT_TUNING | _NOT_IN_FAULT),
    "set": (Controller._q_set, _NOT_TUNING),
    "bypass": (Controller._q_bypass, _NOT_TUNING),
    "rig": (Controller._q_rig, 0),
    "preset": (Controller._preset, _NOT_TUNING | _NOT_IN_FAULT),
    "mem-list": (Controller._q_mem_list, 0),
    "mem-put": (Controller._mem_put, _NOT_TUNING | _NOT_IN_FAULT),
    "mem-clear": (Controller._q_mem_clear, 0),
    "cfg-get": (Controller._q_cfg_get, 0),
    "cfg-set": (Controller._cfg_set, _NOT_TUNING),
    "cal-read": (Controller._q_cal_read, 0),
    "records": (Controller._q_records, 0),
    "selftest": (Controller._selftest, _NOT_TUNING),
    "ping": (Controller._q_ping, 0),
}


TRACE_MAX = 40


def _given_state(st, swr, bank):
    """A preset state the host sent, as a memory entry (l, c, shunt, swr, t), or None."""
    if not isinstance(st, list) or len(st) != 3:
        return None
    for v, top in ((st[0], bank.l_max), (st[1], bank.c_max), (st[2], 1)):
        if not isinstance(v, int) or isinstance(v, bool) or v < 0 or v > top:
            return None
    if not isinstance(swr, (int, float)) or isinstance(swr, bool) or not 1.0 <= swr < 100.0:
        swr = 0.0  # unknown: the first reading is a starting point, never a lock alone
    return (st[0], st[1], st[2], float(swr), 0)


def conclude(s, abort=False):
    """What the box does when a search ends, shared with the host's scorer:
    (outcome, final state or None to hold, through?, SWR after, keep in memory?,
    note for the record).

    locked: the reading of the final state proves the target with the coupler's
    error bounds (fmlogic.coupler: noise, leakage, gain ratio); anything else is
    best-effort (or through), its note the true SWR the reading allows (see
    bound()).  The search's result is bypass
    when nothing beat the antenna alone with confidence: then the box goes
    through.  States above target are kept too (up to _KEEP_BEST_SWR): a return
    to the frequency starts from them."""
    if s.fault is not None:
        return (FAULT, (0, 0, 1), True, -1.0, False, "search fault: " + s.fault)
    best, swr = s.result()
    if swr < 0.0:
        return ("aborted", None, False, -1.0, False, "")
    through = best == search.BYPASS
    final = (0, 0, 1) if through else best
    b = bound(s)
    if b is not None and b[1] <= s.target_swr:
        outcome, note = LOCKED, ("matched without the network" if through else "matched")
    else:
        outcome = THROUGH if through else BEST
        note = "antenna alone is best; relays through; " if through else ""
        if b is not None:
            note += "true SWR %.2f-%.2f: the readings cannot prove %.2f" % (b[0], b[1], s.target_swr)
    if abort:
        return ("aborted", final, through, swr, False, note)
    keep = outcome == LOCKED or (outcome == BEST and swr <= _KEEP_BEST_SWR)
    return (outcome, final, through, swr, keep, note)


def bound(s):
    """(SWR low, SWR high): the true SWR the final state's reading allows with
    the coupler's error bounds, or None when the search has no result."""
    best, swr = s.result()
    g = s.seen.get(best)
    if swr < 0.0 or g is None:
        return None
    lo, hi = s.cp.bounds(g, s.floor_g)
    return (_r3(swr_from_gamma(lo)), _r3(swr_from_gamma(hi)))


def _trace(s, dmg=None):
    """The readings of a tune, flat [l, c, shunt, 1000*|gamma|, ...], for fitting the box later."""
    out = []
    for st in s.order[:TRACE_MAX]:
        g = s.seen[st]
        if dmg is not None and st != search.BYPASS:
            st = dmg.full(st)
        out.append(st[0])
        out.append(st[1])
        out.append(st[2])
        out.append(int(s.cp.raw(g) * 1000 + 0.5))
    return out


def _r3(x):
    if x is None:
        return None
    return int(x * 1000 + (0.5 if x >= 0 else -0.5)) / 1000.0


def _identity(d):
    """(uid, read from flash?, note): this board's identity, made once, on the
    first boot with an empty flash, and kept in its own file, which a firmware
    update never touches.  Two boards that share a config (and so a board_id),
    or a board whose flash was wiped (its record numbers start again at 1),
    never look like one board to the logbook.  A damaged file (random bytes,
    cut short) gets a new identity, said in the note."""
    p = (d + "/board.uid") if d else "board.uid"
    note = None
    try:
        with open(p, "rb") as f:
            raw = f.read(64)
        uid = raw.strip()
        if len(uid) == 12 and all(c in b"0123456789abcdef" for c in uid):
            return (uid.decode(), True, None)
        note = "board.uid damaged"
    except OSError:
        pass
    uid = _new_identity(d)
    if note:
        note = note + ": new identity " + uid
    return (uid, False, note)


def _new_identity(d):
    try:
        import os

        raw = os.urandom(6)
    except (ImportError, AttributeError, NotImplementedError):
        import time

        t = time.ticks_us() if hasattr(time, "ticks_us") else int(time.time() * 1e6)
        raw = bytes((t >> (8 * i)) & 0xFF for i in range(6))
    uid = "".join("%02x" % b for b in raw)
    try:
        memory.atomic_write(d, "board.uid", uid.encode())
    except OSError:
        pass
    return uid


def _bump_boot(d):
    n = memory.read_boots(d) + 1
    memory.write_boots(d, n)
    return n


_CONFIG_MAX = 32768  # bytes: a board config is a few KB; a bigger file is not one


def read_config(d=""):
    """(config, note): the board's config file; a damaged or missing one falls back
    to its previous copy (said in the note), else to {} with format -1 (defaults and
    a fault).  The note names the file and what is wrong with it."""
    import os

    p = (d + "/" + CONFIG) if d else CONFIG
    problem = None
    for name in (p, p + ".bak"):
        short = CONFIG if name == p else CONFIG + ".bak"
        why = None
        try:
            size = os.stat(name)[6]
            if size == 0:
                why = "empty (a deploy cut short?)"
            elif size > _CONFIG_MAX:
                why = "too large (%d bytes): not a board config" % size
            else:
                with open(name, "rb") as f:
                    raw = f.read()
                try:
                    cfg = json.loads(raw.decode())
                except UnicodeError:
                    cfg = None
                    why = "damaged: not text"
                except ValueError:
                    cfg = None
                    why = "damaged: not valid JSON (cut short or garbled)"
                if why is None:
                    if isinstance(cfg, dict):
                        if problem is not None:
                            return (cfg, problem + "; running on " + short)
                        return (cfg, None)
                    why = "not a JSON object"
        except OSError:
            why = "missing"
        if problem is None:
            problem = CONFIG + " " + why
    return ({"board_id": "unconfigured", "tune": {"auto": False}, "format": -1}, problem)


def load_config(d=""):
    """The board's config file, or {} when missing or damaged (then defaults + fault)."""
    return read_config(d)[0]
