"""Peak heap of a full tune under the MicroPython unix port (tune_heap_kib)."""

from __future__ import annotations

import json
import os
import subprocess
import tempfile

from feedmatch.resources import FIRMWARE
from feedmatch.sim.virtual import find_micropython

# Runs inside MicroPython: the real controller, a board whose detectors answer
# from the firmware's own network model for a fixed load (no host in the loop).
_SCRIPT = r"""
import gc, json
from fmlogic import lnet
from fmlogic.controller import Controller, LOCKED
from fmlogic.config import merged, meter_from

CFG = json.loads(CFG_JSON)

class Board:
    def __init__(self, zl, f_hz, p_w):
        m = merged(CFG)
        self.meter = meter_from(m)
        from fmlogic.config import bank_from
        self.bank = bank_from(m)
        self.zl = zl; self.f = f_hz / 1e6; self.p = p_w
        self.st = (0, 0, 1, 1); self.t = 0
    def read_detectors(self):
        l, c, sh, byp = self.st
        if byp:
            g = lnet.gamma_of(self.zl, 50.0)
        else:
            g = lnet.gamma_state(self.bank, self.f, self.zl, l, c, sh)
        return (self.meter.fwd.counts(self.p), self.meter.ref.counts(self.p * g * g))
    def set_relays(self, l, c, sh, byp): self.st = (l, c, sh, 1 if byp else 0)
    def count_freq(self): return self.f * 1e6
    def tune_button(self): return False
    def led(self, on): pass
    def wdt_feed(self): pass
    def ticks_ms(self): return self.t
    def ticks_diff(self, a, b): return a - b
    def sleep_ms(self, ms): self.t += ms
    def link_read(self): return None
    def link_write(self, d): pass

peak = 0
worst = 0
for zl, f in LOADS:
    b = Board(complex(zl[0], zl[1]), f, 10.0)
    ctl = Controller(b, CFG, DIR)
    ctl.mem.clear()
    gc.collect()
    base = gc.mem_alloc()
    n = 0
    while ctl.state != LOCKED and n < 400:
        ctl.step()
        gc.collect()
        used = gc.mem_alloc() - base
        if used > peak:
            peak = used
        n += 1
print(json.dumps({"peak_bytes": peak}))
"""

LOADS = [((10.8, -364.5), 7.15e6), ((7.92, -434.78), 7.15e6), ((2.1, -1913.0), 1.9e6),
         ((639.7, 1021.7), 29.35e6), ((3.0, -40.0), 14.2e6),
         ((300.0, 200.0), 21.2e6), ((16.4, -200.9), 10.12e6)]


def tune_heap_kib(heap_k: int = 512) -> float | None:
    mp = find_micropython()
    if mp is None:
        return None
    from feedmatch.rf.detector import DetectorModel

    det = DetectorModel()
    pts = [list(p) for p in det.calibration_points()]
    cfg = {"board": "virtual", "board_id": "heap", "detector": {"fwd": pts, "ref": pts,
                                                                "floor_counts": 2.0},
           "power": {"min_tune_w": 2, "max_tune_w": 20, "hot_switch_w": 25, "max_w": 150},
           "tune": {"strategy": "recall", "budget": 60}}
    with tempfile.TemporaryDirectory() as d:
        code = (f"CFG_JSON = {json.dumps(json.dumps(cfg))}\nDIR = {d!r}\nLOADS = {LOADS!r}\n" + _SCRIPT)
        env = dict(os.environ, MICROPYPATH=f"{FIRMWARE}:.frozen")
        r = subprocess.run([mp, "-X", f"heapsize={heap_k}K", "-c", code], capture_output=True, text=True,
                           env=env, cwd=str(FIRMWARE), timeout=300)
    if r.returncode != 0:
        raise RuntimeError(f"heap benchmark failed under micropython: {r.stderr or r.stdout}")
    return round(json.loads(r.stdout.strip().splitlines()[-1])["peak_bytes"] / 1024, 2)
