# A box's life, run on the emulated Pico or the MicroPython unix port: the real
# controller starts on a flash holding a full record store, answers `status`,
# then tunes in a row (set loads through the firmware's own network model, a
# virtual clock for the controller) while the host's backfill asks for records
# after every tune.  Input: life.json; output lines (parsed by bench/life.py):
#   BOOT <ms since reset at the status answer> <ms to start the controller> <seq> <imports ms> <controller ms>
#   HEAP <tune> <bytes free> <us the collection before it took> <us gc.mem_free() took>,
#        then mem_info's lines (its "max free sz")
#   TUNE <i> <state> <new records> <end-of-tune flash us> <start journal us> <memory generation> MARK
# (the end of a tune: its record, the memory's save when due, the journal marked ended).
# With "drift" in life.json each round of loads moves up one memory bin (cycling over
# 40 bins), so every tune learns a new bin: the memory changes at every tune and its
# whole saves come at the firmware's own pace (the worst case for the flash).
#   ERR <i> <what>
#   DONE <tunes without an error> <errors>
# The MARK on each TUNE line makes run_rp2_xip.mjs print its flash counters.
import gc
import json
import time

T_START = time.ticks_ms() if hasattr(time, "ticks_ms") else 0

try:
    _us = time.ticks_us
    _diff = time.ticks_diff
except AttributeError:  # CPython
    def _us():
        return time.perf_counter_ns() // 1000

    def _diff(a, b):
        return a - b


def largest_free():
    """Print the heap's state (micropython.mem_info): the host reads its "max free sz",
    the largest free block in blocks of 4 machine words."""
    try:
        import micropython

        micropython.mem_info()
    except (ImportError, AttributeError):
        pass


class Board:
    def __init__(self, cfg):
        from fmlogic.config import bank_from, merged, meter_from

        m = merged(cfg)
        self.meter = meter_from(m)
        self.bank = bank_from(m)
        self.zl = complex(50.0, 0.0)
        self.f = 7.1
        self.p = 0.0
        self.st = (0, 0, 1, 1)
        self.t = 0
        self.inbox = []
        self.out = bytearray()

    def read_detectors(self):
        from fmlogic import lnet

        self.t += 1
        if self.p <= 0.0:
            return (0.0, 0.0)
        l, c, sh, byp = self.st
        g = lnet.gamma_of(self.zl, 50.0) if byp else lnet.gamma_state(self.bank, self.f, self.zl, l, c, sh)
        g = abs(g)
        return (self.meter.fwd.counts(self.p), self.meter.ref.counts(self.p * g * g))

    def set_relays(self, l, c, sh, byp):
        self.st = (l, c, sh, 1 if byp else 0)

    def count_freq(self):
        return self.f * 1e6 if self.p > 0.0 else 0.0

    def tune_button(self):
        return False

    def led(self, on):
        pass

    def wdt_feed(self):
        pass

    def ticks_ms(self):
        return self.t

    def ticks_diff(self, a, b):
        return a - b

    def sleep_ms(self, ms):
        self.t += ms

    def link_read(self):
        return self.inbox.pop(0) if self.inbox else None

    def link_write(self, d):
        # Keep only the last answer's head: what the bench checks, and bounded.
        if len(self.out) > 4096:
            self.out = bytearray()
        self.out.extend(d)


def _answer(board, ctl, seq, word, args):
    from fmlogic import link

    board.out = bytearray()
    board.inbox.append(link.encode("Q", seq, word, args))
    for _ in range(4):
        ctl.step()
    for line in bytes(board.out).split(b"\n"):
        d = link.decode(line + b"\n") if line else (None, "")
        if d[0] == "A" and d[1] == seq:
            return d[3]
    return None


def run():
    with open("life.json") as f:
        spec = json.loads(f.read())
    cfg = spec["cfg"]
    d = spec.get("dir", "")
    gc.collect()
    t0 = _us()
    imp = []
    for name in ("link", "memory", "config", "swr", "coupler", "lnet", "hunt", "qfit", "search", "controller"):
        t = _us()
        __import__("fmlogic." + name)
        imp.append("%s %d" % (name, _diff(_us(), t) // 1000))
    print("IMPORTS " + " ".join(imp))
    from fmlogic import memory
    from fmlogic.controller import Controller

    t1 = _us()
    board = Board(cfg)
    ctl = Controller(board, cfg, d)
    t2 = _us()
    st = _answer(board, ctl, 1, "status", {})
    t_ans = time.ticks_ms() if hasattr(time, "ticks_ms") else 0
    print("BOOT %d %d %d %d %d" % (t_ans, _diff(_us(), t0) // 1000, st["seq"] if st else -1,
                                   _diff(t1, t0) // 1000, _diff(t2, t1) // 1000))
    # Where the start's time goes (after the answer, read-only look-alikes of what the controller did).
    from fmlogic.config import merged

    m = merged(cfg)
    parts = []
    for fn in (lambda: memory.read_boots(d), lambda: memory.Memory(d, 25000, m["memory"]["max_entries"]).load(),
               lambda: memory.Records(d, 2000).load(False)):
        t = _us()
        fn()
        parts.append(_diff(_us(), t) // 1000)
    print("PARTS boots %d mem %d rec %d" % tuple(parts))
    loads = spec["loads"]
    flash = [0, 0]

    def timed(fn, k):
        def w(*a):
            t = _us()
            r = fn(*a)
            flash[k] += _diff(_us(), t)
            return r
        return w

    ctl.mem.flush = timed(ctl.mem.flush, 0)
    ctl.rec.add = timed(ctl.rec.add, 0)
    memory.journal_take = timed(memory.journal_take, 0)
    jw_start = timed(memory.journal_write, 1)
    jw_end = timed(memory.journal_write, 0)

    def journal_write(d_, obj):
        return (jw_end if "done" in obj else jw_start)(d_, obj)

    memory.journal_write = journal_write
    ok = 0
    errors = 0
    every = spec["report_every"]
    since = max(0, ctl.rec.seq - 3)
    for i in range(spec["tunes"]):
        if i % every == 0:
            t = _us()
            gc.collect()
            t1 = _us()
            free = gc.mem_free()
            print("HEAP %d %d %d %d" % (i, free, _diff(t1, t), _diff(_us(), t1)))
            largest_free()
        ld = loads[i % len(loads)]
        board.zl = complex(ld[0], ld[1])
        board.f = ld[2] / 1e6
        if spec.get("drift"):
            board.f += ((i // len(loads)) % 40) * spec["drift"] / 1e6
        board.p = 10.0
        flash[0] = flash[1] = 0
        seq = ctl.rec.seq
        try:
            for _ in range(600):
                ctl.step()
                if ctl.rec.seq > seq:
                    break
            board.p = 0.0
            for _ in range(3):
                ctl.step()
            # The logger's backfill, as it goes: the records since the last it has.
            ans = _answer(board, ctl, 2 + i % 60000, "records", {"since": since})
            got = ans.get("records") if isinstance(ans, dict) else None
            if got:
                since = got[-1]["seq"]
            if ctl.state == "fault" or ctl.rec.seq == seq:
                errors += 1
                print("ERR %d %s" % (i, ctl.why[:120]))
            elif got is None:
                # The backfill's request answered with an error (or not at all).
                errors += 1
                print("ERR %d records: %s" % (i, repr(ans)[:120]))
            else:
                ok += 1
        except Exception as e:  # a MemoryError escaping the controller's own guard
            errors += 1
            print("ERR %d %s" % (i, repr(e)[:60]))
            board.p = 0.0
        print("TUNE %d %s %d %d %d %d MARK" % (i, ctl.state, ctl.rec.seq - seq, flash[0], flash[1], ctl.mem.gen))
    t = _us()
    gc.collect()
    print("HEAP %d %d %d" % (spec["tunes"], gc.mem_free(), _diff(_us(), t)))
    largest_free()
    print("DONE %d %d" % (ok, errors))


run()
