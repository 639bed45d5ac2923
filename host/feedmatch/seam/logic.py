"""The rest of the firmware's logic the host shows or checks, across the seam.

Tune outcomes (fmlogic.controller), the strategy names (fmlogic.search), the self-test's
plan, stuck-element masks and fault words (fmlogic.selftest), the detector calibration,
meter, reading checks and the largest |gamma| a reading gives (fmlogic.swr), the coupler's
gain tolerance (fmlogic.coupler), the memory's frequency bins and its check of imported
entries, and the record store's newest sequence number (fmlogic.memory).  The host never
re-derives these: a firmware change is seen here and nowhere else.
"""

from __future__ import annotations

from functools import lru_cache

from fmlogic.config import DEFAULTS
from fmlogic.controller import BEST, LOCKED, THROUGH
from fmlogic.coupler import GAIN_TOL_DB
from fmlogic.memory import PUT_MAX, Memory, check_entries, highest_seq
from fmlogic.search import NAMES as STRATEGY_NAMES
from fmlogic.selftest import FAILED_KINDS, fault_text, masks, parse_faults, plan, reach
from fmlogic.swr import GAMMA_MAX, Calibration, Meter, gamma_from_swr, reading_gamma

__all__ = ["BEST", "Calibration", "FAILED_KINDS", "GAIN_TOL_DB", "GAMMA_MAX", "LOCKED", "Meter", "PUT_MAX",
           "STRATEGY_NAMES", "THROUGH", "bin_of", "bin_width", "check_entries", "fault_text", "gamma_from_swr",
           "highest_seq", "masks", "parse_faults", "plan", "reach", "reading_gamma"]


@lru_cache(maxsize=8)
def _memory(bin_hz: float) -> Memory:
    return Memory(None, bin_hz, 1)  # held in RAM, one entry: only its bins are used


def bin_of(freq_hz: float, bin_hz: float) -> int:
    """The memory bin a frequency (Hz) falls in, as a board with bins of bin_hz (Hz) numbers
    it (fmlogic.memory.Memory.bin_of): tunes in one bin share one stored state."""
    return _memory(float(bin_hz)).bin_of(freq_hz)


def bin_width(sections: object) -> float:
    """The memory bin width (Hz) a board reported, from its config sections as the logbook
    keeps them ({"memory": {"bin_hz": ...}}); the shipped width where they do not say."""
    mem = sections.get("memory") if isinstance(sections, dict) else None
    w = mem.get("bin_hz") if isinstance(mem, dict) else None
    if isinstance(w, (int, float)) and not isinstance(w, bool) and w > 0:
        return float(w)
    return float(DEFAULTS["memory"]["bin_hz"])
