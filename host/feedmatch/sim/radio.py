"""The simulated station's radio: a rigctld radio drives the virtual box's carrier.

A thread reads rigctld's PTT, frequency and RF power level and keys the
virtual station to match, so a tune carrier keyed through rigctld (by
`feedmatch follow --tune-carrier`, or by hand) reaches the firmware as RF.
"""

from __future__ import annotations

import threading

from feedmatch.board.rigctl import RigClient, RigError


class RigBridge:
    def __init__(self, station, rig: RigClient, full_w: float = 100.0, poll_s: float = 0.05):
        self.station, self.rig, self.full_w, self.poll_s = station, rig, full_w, poll_s
        self.stop = threading.Event()
        self.keyed: tuple[float, float] | None = None
        self.errors = 0
        self._th = threading.Thread(target=self._loop, daemon=True)

    def start(self) -> RigBridge:
        self._th.start()
        return self

    def close(self) -> None:
        self.stop.set()
        self._th.join(2.0)
        self.rig.close()

    def _loop(self) -> None:
        while not self.stop.is_set():
            try:
                on = self.rig.ptt()
                want = (self.rig.power() * self.full_w, self.rig.freq()) if on else None
            except RigError:
                self.errors += 1
                self.rig.close()
                want = None  # no radio, no carrier
                self.stop.wait(0.5)
            if want != self.keyed:
                self.keyed = want
                self.station.key(*(want or (0.0, 0.0)))
            self.stop.wait(self.poll_s)
