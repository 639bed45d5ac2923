"""The heap of a full tune under the MicroPython unix port: live peak, transient peak, retained."""

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
transient = 0
retained = 0
for zl, f in LOADS:
    b = Board(complex(zl[0], zl[1]), f, 10.0)
    ctl = Controller(b, CFG, DIR)
    ctl.mem.clear()
    gc.collect()
    base = gc.mem_alloc()
    n = 0
    while ctl.state != LOCKED and n < 400:
        gc.collect()
        gc.disable()  # everything one step allocates, as if no collection ran inside it
        ctl.step()
        top = gc.mem_alloc() - base
        gc.enable()
        if top > transient:
            transient = top
        gc.collect()
        used = gc.mem_alloc() - base
        if used > peak:
            peak = used
        n += 1

# What a tune keeps: one controller through every load three times; the heap
# after each tune (collected) against the heap after the first round.
b = Board(complex(50.0, 0.0), 7.1e6, 10.0)
ctl = Controller(b, CFG, DIR)
ctl.mem.clear()
after = []
for rnd in range(3):
    for zl, f in LOADS:
        b.zl = complex(zl[0], zl[1])
        b.f = f / 1e6
        b.p = 10.0
        seq = ctl.rec.seq
        n = 0
        while ctl.rec.seq == seq and n < 400:
            ctl.step()
            n += 1
        b.p = 0.0
        for _ in range(3):
            ctl.step()
    gc.collect()
    after.append(gc.mem_alloc())
retained = (after[-1] - after[0]) / (len(LOADS) * (len(after) - 1))
print(json.dumps({"peak_bytes": peak, "transient_bytes": transient, "retained_bytes": retained}))
"""

LOADS = [((10.8, -364.5), 7.15e6), ((7.92, -434.78), 7.15e6), ((2.1, -1913.0), 1.9e6),
         ((639.7, 1021.7), 29.35e6), ((3.0, -40.0), 14.2e6),
         ((300.0, 200.0), 21.2e6), ((16.4, -200.9), 10.12e6)]


def tune_heap(heap_k: int = 512) -> dict[str, float | None]:
    """The heap of one tune under the unix port (64-bit: about twice the chip's sizes):
    tune_heap_kib, the most live data between two steps of a tune (after a collection);
    tune_heap_transient_peak_kib, the most a single step needs with no collection inside
    it (live data plus all it allocates); tune_heap_retained_kib, what each tune keeps
    once it is over (the heap's growth per tune over two rounds of the loads, after a
    first round that fills the memory and the lazily built tables)."""
    r = _run(heap_k)
    if r is None:
        return {"tune_heap_kib": None, "tune_heap_transient_peak_kib": None, "tune_heap_retained_kib": None}
    return {"tune_heap_kib": round(r["peak_bytes"] / 1024, 2),
            "tune_heap_transient_peak_kib": round(r["transient_bytes"] / 1024, 2),
            "tune_heap_retained_kib": round(r["retained_bytes"] / 1024, 3)}


def tune_heap_kib(heap_k: int = 512) -> float | None:
    return tune_heap(heap_k)["tune_heap_kib"]


def _run(heap_k: int) -> dict | None:
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
    return json.loads(r.stdout.strip().splitlines()[-1])
