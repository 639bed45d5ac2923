"""The simulated hardware around a board: the box's physics as the board's sensors see it.

SimulatedHardware answers what a board asks (detector counts, frequency, relay
changes) from the network model, the antenna and the detector model, for a
transmitter whose power and frequency the operator script sets.  It records a
violation whenever relays change with forward power above the hot-switch
limit: the tests assert there are none.  Faults (sim.faults) make it a damaged
box: stuck relays reach other states than the board commands, drifted elements
have other values.
"""

from __future__ import annotations

import random
from dataclasses import dataclass

from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import Network, evaluate, swr_of
from feedmatch.sim.faults import NONE as NO_FAULTS
from feedmatch.sim.faults import Faults


@dataclass
class Violation:
    t: float
    power_w: float
    before: tuple
    after: tuple


class SimulatedHardware:
    """The relays, detectors, counter and button a board drives and reads, simulated."""

    def __init__(self, net: Network, antenna, det: DetectorModel, hot_switch_w: float,
                 seed: int = 1, clock=None, faults: Faults = NO_FAULTS):
        self.faults = faults
        self.net = faults.apply_net(net)
        self.antenna = antenna
        self.det = det
        self.hot_switch_w = hot_switch_w
        self.rng = random.Random(seed)
        self.relays = (0, 0, 1, 1)
        self.tx_w = 0.0
        self.rev_w = 0.0
        self.freq_hz = 0.0
        self.violations: list[Violation] = []
        self.switches = 0
        self.button = False
        self.clock = clock or (lambda: 0.0)
        self._cache: dict[tuple, complex] = {}
        self._zcache: dict[float, complex] = {}

    def key(self, power_w: float, freq_hz: float) -> None:
        self.tx_w = max(0.0, power_w)
        if freq_hz:
            self.freq_hz = freq_hz

    def key_reverse(self, power_w: float, freq_hz: float = 0.0) -> None:
        """Power arriving from the antenna side (a nearby transmitter, or the box wired
        with the transmitter on its antenna port); only while our own carrier is off."""
        self.rev_w = max(0.0, power_w)
        if freq_hz:
            self.freq_hz = freq_hz

    def antenna_z(self, f: float) -> complex:
        z = self._zcache.get(f)
        if z is None:
            z = complex(self.antenna.impedance(f))
            self._zcache[f] = z
        return z

    def gamma(self) -> complex:
        f = self.freq_hz or 14e6
        k = (self.relays, f)
        g = self._cache.get(k)
        if g is None:
            z = self.antenna_z(f)
            l, c, sh, byp = self.relays
            if self.faults:
                l, c, sh = self.faults.reach(l, c, sh)
            if byp:
                g = (z - self.net.z0_ohm) / (z + self.net.z0_ohm)
            else:
                g = complex(evaluate(self.net, f, z, l, c, sh)["gamma"])
            if len(self._cache) > 20000:
                self._cache.clear()
            self._cache[k] = g
        return g

    def swr(self) -> float:
        return float(swr_of(abs(self.gamma())))

    def read(self) -> tuple[float, float]:
        if self.tx_w <= 0 and self.rev_w > 0:
            return self.det.read_reverse(self.rev_w, self.freq_hz or 14e6, self.rng)
        if self.tx_w <= 0:
            if self.det.ideal:
                return (0.0, 0.0)
            n = self.det.noise_counts
            return (max(0.0, round(self.rng.gauss(0, n))), max(0.0, round(self.rng.gauss(0, n))))
        return self.det.read(self.tx_w, self.gamma(), self.freq_hz, self.rng)

    def count(self) -> float:
        return self.freq_hz if self.tx_w >= 0.2 else 0.0

    def set(self, l: int, c: int, sh: int, byp: int) -> None:
        new = (int(l), int(c), int(sh), int(byp))
        if new != self.relays:
            self.switches += 1
            p = max(self.tx_w, self.rev_w)
            if p > self.hot_switch_w:
                self.violations.append(Violation(self.clock(), p, self.relays, new))
        self.relays = new
