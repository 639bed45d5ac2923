"""The board's compute time for a tune, from the search's operation counts.

Each tune counts what it did (fmlogic.search.Strategy.costs): readings, Moebius
maps, float predictions, fits, ideal states, locality weights, rows evaluated
by the integer fit kernel, hypothesis updates and scans of the hunt.  Their
cost on the board, microseconds each, is fitted by `feedmatch bench` against
tunes timed by the emulated RP2040's own clock (time.ticks_us) and kept in
data/rp2040_costs.json; the scorer's "tune ms" is readings x (settle + sample)
plus this, so it does not depend on the host's load or speed.
"""

from __future__ import annotations

import json
from functools import lru_cache
from typing import Any

from feedmatch.resources import DATA

COSTS_FILE = DATA / "rp2040_costs.json"
KEYS = ("read", "coef", "pred", "fit", "ideal", "near", "row", "grid", "hyp", "scan")


@lru_cache(maxsize=1)
def costs_us() -> dict[str, float]:
    """Microseconds per operation on an RP2040 at 125 MHz (emulated)."""
    data = json.loads(COSTS_FILE.read_text())
    return {k: float(data["us"][k]) for k in KEYS}


def board_ms(s: Any) -> float:
    """Modelled board compute time (ms) of a finished search."""
    c = s.costs()
    us = costs_us()
    return sum(us[k] * c[k] for k in KEYS) / 1000.0
