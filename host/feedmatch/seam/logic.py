"""The rest of the firmware's logic the host shows or checks, across the seam.

Tune outcomes (fmlogic.controller), the strategy names (fmlogic.search), the self-test's
plan, stuck-element masks and fault words (fmlogic.selftest), the detector calibration,
meter and reading checks (fmlogic.swr), the coupler's gain tolerance (fmlogic.coupler) and
the record store's newest sequence number (fmlogic.memory).  The host never re-derives
these: a firmware change is seen here and nowhere else.
"""

from __future__ import annotations

from fmlogic.controller import BEST, LOCKED, THROUGH
from fmlogic.coupler import GAIN_TOL_DB
from fmlogic.memory import highest_seq
from fmlogic.search import NAMES as STRATEGY_NAMES
from fmlogic.selftest import FAILED_KINDS, fault_text, masks, parse_faults, plan, reach
from fmlogic.swr import Calibration, Meter, gamma_from_swr, reading_gamma

__all__ = ["BEST", "FAILED_KINDS", "GAIN_TOL_DB", "LOCKED", "STRATEGY_NAMES", "THROUGH", "Calibration", "Meter",
           "fault_text", "gamma_from_swr", "highest_seq", "masks", "parse_faults", "plan", "reach",
           "reading_gamma"]
