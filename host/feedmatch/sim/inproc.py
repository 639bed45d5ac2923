"""A board in this process: the firmware's Controller on the simulated hardware (sim.hardware),
with virtual time (each detector reading and each sleep advance the clock).

The tests drive the controller through it, and the bench measures what the
controller does over many band changes without a subprocess per tune.
"""

from __future__ import annotations

from feedmatch.sim.hardware import SimulatedHardware


class InProcessBoard:
    def __init__(self, hardware: SimulatedHardware):
        """hardware: what the board measures and switches (relays, detectors, counter)."""
        self.hardware = hardware
        self.t = 0  # the board's clock, ms of virtual time
        self.inbox = bytearray()
        self.outbox = bytearray()
        self.button = False
        self.feeds = 0
        self.sets = 0
        self.on_set = None  # hook(board) after each relay change
        self.led_on = False

    def read_detectors(self):
        self.t += 1
        return self.hardware.read()

    def set_relays(self, l, c, sh, bypass):
        self.hardware.set(l, c, sh, 1 if bypass else 0)
        self.sets += 1
        if self.on_set:
            self.on_set(self)

    def count_freq(self):
        return self.hardware.count()

    def tune_button(self):
        b, self.button = self.button, False
        return b

    def led(self, on):
        self.led_on = on

    def wdt_feed(self):
        self.feeds += 1

    def ticks_ms(self):
        return self.t

    def ticks_diff(self, a, b):
        return a - b

    def sleep_ms(self, ms):
        self.t += ms

    def link_read(self):
        if not self.inbox:
            return None
        data = bytes(self.inbox[:200])
        del self.inbox[:200]
        return data

    def link_write(self, data):
        self.outbox += data
