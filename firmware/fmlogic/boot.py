# Start-up that never loops.  Whatever fails while the box starts (a damaged
# file, out of memory, a bug; any exception but the operator's Ctrl-C, which
# hands the board to a deploy), it ends in a safe mode: relays through,
# switched only when no RF is on them; the link up, `status` answering `fault`
# with the reason in words, the file it concerns and what to do; the watchdog
# fed; the reason kept in fault.txt where the flash allows.
#
# boot.try counts the starts in a row that did not run for GOOD_MS: a failure
# that escapes everything (a hang the watchdog resets, a crash in the loop)
# still cannot loop more than FAIL_LIMIT times before the box comes up in safe
# mode, and stays there until a deploy clears the count.
import gc

from fmlogic import link, memory

FAIL_LIMIT = 3
GOOD_MS = 30000

_ADVICE = {
    "config.json": "re-deploy the board config (feedmatch deploy --port PORT --config YOUR.json)",
    "firmware": "re-deploy the firmware (feedmatch deploy --port PORT)",
    "board": "check the board config's pins and the wiring, then re-deploy the config",
    "boot.try": "look at the reason of the last failure (fault.txt on the board), then re-deploy; "
                "a deploy clears the count",
}


def advice(file):
    a = _ADVICE.get(file)
    if a is not None:
        return a
    if file:
        return ("remove %s from the board (mpremote rm :%s) or re-deploy; the box starts without it"
                % (file, file))
    return "re-deploy the firmware (feedmatch deploy --port PORT); if this repeats, report it"


def words(e):
    """An exception in words for the operator (not a traceback)."""
    if isinstance(e, MemoryError):
        return "out of memory"
    if isinstance(e, UnicodeError):
        return "damaged bytes (not text)"
    if isinstance(e, OSError):
        code = e.args[0] if e.args else 0
        if code == 28:
            return "flash full"
        if code == 2:
            return "file missing"
        return "flash error %s" % code
    msg = ""
    try:
        msg = str(e)
    except Exception:
        pass
    name = type(e).__name__
    return name + (": " + msg[:80] if msg else "")


class SafeMode:
    """What a board does when its start failed: relays through (switched cold),
    the link answering, the watchdog fed, nothing else."""

    def __init__(self, board, d, why, file, boot, cfg=None):
        self.board = board
        self.why = why
        self.file = file
        self.advice = advice(file)
        self.boot = boot
        self.reader = link.LineReader()
        self.ev_seq = 0
        self.through = False
        self.meter = None
        self.hot_w = 0.0
        self.board_id = "unknown"
        self.uid = None
        self.bad = 0
        memory.note_fault(d, "boot %d: %s (%s)\n" % (boot, why, file))
        try:
            from fmlogic import config as fcfg

            m = fcfg.merged(cfg if isinstance(cfg, dict) and not fcfg.validate(cfg) else {})
            self.board_id = m["board_id"] if cfg else "unknown"
            self.meter = fcfg.meter_from(m)
            self.hot_w = m["power"]["hot_switch_w"]
        except Exception:
            self.meter = None  # no meter: the relays stay as the board's start left them (through)
        try:
            with open(memory._join(d, "board.uid"), "rb") as f:
                u = f.read(16).strip()
            if len(u) == 12:
                self.uid = u.decode()
        except Exception:
            pass
        self._send(link.encode("E", 0, "boot", {"boot": boot, "safe": True, "why": why, "file": file}))

    def _send(self, frame):
        try:
            self.board.link_write(frame)
        except Exception:
            pass

    def _cold(self):
        try:
            c = self.board.read_detectors()
            return self.meter.rf_present_w(c[0], c[1]) <= self.hot_w
        except Exception:
            return False

    def status(self):
        return {"state": "fault", "why": self.why, "file": self.file, "advice": self.advice,
                "safe_mode": True, "relays": [0, 0, 1, 1 if self.through else 0], "fwd_w": 0.0,
                "ref_w": 0.0, "swr": None, "freq_hz": 0.0, "seq": 0, "boot": self.boot,
                "board_id": self.board_id, "uid": self.uid, "version": _version(),
                "bad_frames": self.bad, "hot_refusals": 0, "mem_entries": 0,
                "uptime_ms": self.board.ticks_ms(), "manual": False, "warnings": []}

    def step(self):
        b = self.board
        b.wdt_feed()
        if not self.through and self.meter is not None and self._cold():
            try:
                b.set_relays(0, 0, 1, True)
                self.through = True
            except Exception:
                pass
        for _ in range(64):
            data = b.link_read()
            if not data:
                break
            for line in self.reader.feed(data):
                d = link.decode(line) if line else (None, "oversize")
                if d[0] is None:
                    self.bad += 1
                    continue
                kind, seq, word, _ = d
                if kind != "Q":
                    continue
                if word == "status":
                    ans = link.encode("A", seq, "ok", self.status())
                elif word == "ping":
                    ans = link.encode("A", seq, "ok", {"pong": True})
                elif word == "records":
                    ans = link.encode("A", seq, "ok", {"records": [], "more": False, "last": 0})
                else:
                    ans = link.encode("A", seq, "err", {"why": "fault", "msg": "safe mode: " + self.why[:80]})
                self._send(ans)

    def run(self):
        while True:
            self.step()
            self.board.sleep_ms(20)


def _version():
    try:
        from fmlogic.controller import VERSION

        return VERSION
    except Exception:
        return "?"


def start(d, make_board, run=True):
    """Start the box: the controller, or the safe mode when anything fails.

    make_board(cfg) builds the board (cfg None: the board's defaults).  With
    run False, returns the controller or SafeMode built (tests)."""
    boots = 0
    tries = 0
    try:
        boots = memory.read_boots(d) + 1
        tries = memory.read_tries(d)
        memory.write_boots(d, boots)
        memory.write_tries(d, tries + 1)
    except Exception:
        pass  # counters are a help, never a reason not to start
    board = None
    cfg = None
    ctl = None
    memory.STAGE[0] = "firmware"
    try:
        if tries >= FAIL_LIMIT:
            memory.STAGE[0] = "boot.try"
            last = ""
            try:
                with open(memory._join(d, "fault.txt"), "rb") as f:
                    last = f.read(120).decode().strip()
            except Exception:
                pass
            raise RuntimeError("%d starts in a row failed%s" % (tries, ("; last: " + last) if last else ""))
        # The controller is the largest module to compile from source: a collection first
        # gives its parse tree one unfragmented heap (the unix port at 256 KB and a Pico
        # without mpy-cross compile it on the board).
        gc.collect()
        from fmlogic.controller import Controller, read_config

        memory.STAGE[0] = "config.json"
        cfg, note = read_config(d)
        memory.STAGE[0] = "board"
        board = make_board(cfg)
        ctl = Controller(board, cfg, d, boots, note)
    except KeyboardInterrupt:
        raise
    except BaseException as e:  # noqa: B036 - any failure at all ends in the safe mode
        return _safe(board, make_board, d, e, memory.STAGE[0], boots, cfg, run)
    if not run:
        return ctl
    try:
        t0 = board.ticks_ms()
        good = False
        while True:
            busy = ctl.step()
            if not good and board.ticks_diff(board.ticks_ms(), t0) > GOOD_MS:
                good = True
                memory.write_tries(d, 0)
            if not busy:
                board.sleep_ms(20)
    except KeyboardInterrupt:
        raise
    except BaseException as e:  # noqa: B036
        return _safe(board, make_board, d, e, "firmware", boots, cfg, run)


def _safe(board, make_board, d, e, file, boots, cfg, run):
    why = (file + ": " if file and file not in ("firmware", "board", "boot.try") else "") + words(e)
    if file == "board":
        why = "the board would not start: " + words(e)
    elif file == "boot.try":
        why = str(e.args[0]) if e.args else words(e)
    elif file == "firmware":
        why = "firmware error: " + words(e)
    if board is None:
        try:
            board = make_board(None)
        except KeyboardInterrupt:
            raise
        except BaseException as e2:  # noqa: B036
            # No board at all: nothing to switch and no link to answer on.  Say it on
            # the console and stop (the REPL stays; boot.try ends any reset loop).
            print("feedmatch: no safe mode without a board: %s; %s" % (why, words(e2)))
            raise e2
    sm = SafeMode(board, d, why, file, boots, cfg)
    if run:
        sm.run()
    return sm
