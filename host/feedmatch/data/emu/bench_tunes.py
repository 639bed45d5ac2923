# Runs on the emulated Pico (MicroPython): the firmware's own strategies on a
# fixed set of tunes, each timed by the target's clock.  The plant (the true
# box, its coupler and detector noise) is computed here too, but outside the
# timed calls.  Input: tunes.json; output lines "TUNE ...", "OPS ...", "DONE".
import gc
import json
import time

from fmlogic import lnet, search

try:
    _us = time.ticks_us
    _diff = time.ticks_diff
except AttributeError:  # CPython, for comparisons: the same decisions, the host's clock
    def _us():
        return time.perf_counter_ns() // 1000

    def _diff(a, b):
        return a - b


class Rng:
    def __init__(self, seed):
        self.s = seed & 0x7FFFFFFF

    def gauss(self):
        t = 0.0
        for _ in range(4):
            self.s = (self.s * 1103515245 + 12345) & 0x7FFFFFFF
            t += self.s / 2147483648.0
        return (t - 2.0) * 1.7320508


def reading(true_bank, f_mhz, zl, st, d, k, noise, rng):
    if st == search.BYPASS:
        g = (zl - 50.0) / (zl + 50.0)
    else:
        z = lnet.z_in(true_bank, f_mhz, zl, st[0], st[1], st[2])
        g = (z - 50.0) / (z + 50.0)
    m = abs((g + d) / (1.0 + d * g)) * k
    if noise > 0.0:
        m = m * (1.0 + noise * rng.gauss()) + 0.002 * abs(rng.gauss())
    if m > 0.999:
        m = 0.999
    return m


def run():
    try:
        with open("tunes.json") as f:
            spec = json.loads(f.read())
        nom = spec["nominal"]
        tru = spec["true"]
        bank = lnet.Bank(nom["z0"], nom["l"], nom["c"], nom["ql"], nom["qc"])
        true_bank = lnet.Bank(tru["z0"], tru["l"], tru["c"], tru["ql"], tru["qc"])
        d = complex(spec["leak"][0], spec["leak"][1])
        k = spec["gain"]
        for i, t in enumerate(spec["tunes"]):
            gc.collect()  # as the controller does after every tune, outside the timed calls
            f_mhz = t["f"] / 1e6
            zl = complex(t["r"], t["x"])
            rng = Rng(1000 + i)
            s = search.make(t["strategy"], bank, t["f"], 1.5, spec["budget"], None, spec["leak_mag"])
            tot = 0
            longest = 0
            while True:
                t0 = _us()
                if s.done:
                    break
                st = s.propose()
                dt = _diff(_us(), t0)
                tot += dt
                longest = dt if dt > longest else longest
                if s.done:
                    break
                m = reading(true_bank, f_mhz, zl, st, d, k, t["noise"], rng)
                t0 = _us()
                s.observe(100.0, 100.0 * m * m)
                dt = _diff(_us(), t0)
                tot += dt
                longest = dt if dt > longest else longest
            state, swr = s.result()
            c = s.costs()
            print("TUNE %d %s %d %d %d %.3f %d %d %d" % (i, t["kind"], s.n, tot, longest, swr,
                                                        state[0], state[1], state[2]))
            print("OPS %d %s" % (i, json.dumps(c)))
    except Exception as e:
        import sys
        if hasattr(sys, "print_exception"):
            sys.print_exception(e)
        else:
            import traceback
            traceback.print_exc()
    print("DONE")
