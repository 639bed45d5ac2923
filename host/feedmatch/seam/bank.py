"""The relay banks across the seam: the host's one translator to and from the firmware's Bank.

The firmware keeps its banks as `fmlogic.lnet.Bank` (per-code value tables, the learned
correction installed) and its element values in the board config's "network" and
"correction" sections (`fmlogic.config`, which also holds the default bank and the
validator's ranges).  The host keeps them as a network file (`feedmatch.rf.network`).
Every conversion between the three lives here:

- network file <-> Bank and board config section (bank_of_network, network_section,
  network_of_section, section_of);
- board config sections <-> Bank, with the learned correction (bank_of_sections);
- codes <-> element values (state_values, code_value);
- the capacitor's side names (SIDES, side_name, parse_side), the bit limit (MAX_BITS), the
  network ranges the host checks (network_range) and the default bank (DEFAULT_SECTION);
- the firmware's own model of a state, for the host code that reasons as the box does:
  mobius (a state as a bilinear map of the load's reflection) and load_matched_by (the
  load a state matches).
"""

from __future__ import annotations

from typing import Any

from fmlogic import config as _config
from fmlogic.lnet import SHUNT_ANT, SHUNT_TX, Bank, load_matched_by, mobius

from feedmatch.errors import InputError

__all__ = ["BOARD_DEFAULTS", "Bank", "DEFAULT_SECTION", "ELEMENT_KEYS", "MAX_BITS", "SIDES", "bank_of_network",
           "bank_of_sections", "bank_or_none", "code_value", "load_matched_by", "merged", "mobius",
           "network_of_section", "network_range", "network_section", "parse_side", "section_of", "side_name",
           "state_values", "validate"]

# The board config as the firmware ships it (defaults) and checks it (validate, merged).
BOARD_DEFAULTS: dict[str, Any] = _config.DEFAULTS
validate = _config.validate
merged = _config.merged
# The default bank, written once (fmlogic/config.py); the shipped network file
# data/network_default.json is held to it by a test.
DEFAULT_SECTION: dict[str, Any] = BOARD_DEFAULTS["network"]
# The keys that hold element values and losses (the section's other keys, such as the
# elements a self-test found stuck, are the firmware's business).
ELEMENT_KEYS = ("z0_ohm", "inductors_uh", "capacitors_pf", "inductor_q", "capacitor_q")
MAX_BITS: int = _config.MAX_BITS  # elements per bank: the firmware's validator refuses more
# The capacitor's side, indexed by the firmware's shunt number.
SIDES = ("tx", "ant")
assert SIDES[SHUNT_TX] == "tx" and SIDES[SHUNT_ANT] == "ant"


def network_range(key: str) -> tuple[float, float]:
    """(low, high) the firmware's validator allows for a number of the network section
    (z0_ohm, inductor_q, capacitor_q)."""
    _kind, lo, hi = _config.RANGES[("network", key)]
    return float(lo), float(hi)


def side_name(shunt: int) -> str:
    """"tx" (capacitor across the transmitter side) or "ant" (across the antenna side)."""
    return SIDES[SHUNT_TX] if shunt == SHUNT_TX else SIDES[SHUNT_ANT]


def parse_side(s: str | int) -> int:
    """The firmware's shunt number of "tx"/"ant" (or 0/1), else InputError."""
    if s in (0, 1):
        return int(s)
    if s in SIDES:
        return SIDES.index(s)
    raise InputError(f"shunt must be 'tx' or 'ant', got {s!r}")


def section_of(network: dict[str, Any]) -> dict[str, Any]:
    """The keys of a network description that a board config's network section knows."""
    return {k: v for k, v in network.items() if k in DEFAULT_SECTION}


def network_of_section(section: dict[str, Any]) -> dict[str, Any]:
    """A board config's network section as a network description the host reads
    (rf.network.network_from_dict): the element values and losses, a Q of 0 (the board's
    "lossless") left out."""
    return {k: v for k, v in section.items() if k in ELEMENT_KEYS and not (k.endswith("_q") and not v)}


def network_section(net: Any) -> dict[str, Any]:
    """A host Network (rf.network) as a board config carries it; a missing Q is 0 (lossless)."""
    return section_of({"z0_ohm": net.z0_ohm, "inductors_uh": net.inductors_uh, "capacitors_pf": net.capacitors_pf,
                       "inductor_q": net.inductor_q or 0.0, "capacitor_q": net.capacitor_q or 0.0})


def bank_of_network(net: Any) -> Bank:
    """A host Network as the firmware's Bank (its nominal values)."""
    return Bank(net.z0_ohm, net.inductors_uh, net.capacitors_pf, net.inductor_q or 0.0, net.capacitor_q or 0.0)


def bank_of_sections(sections: dict[str, Any]) -> Bank:
    """The Bank of a board config's sections ({"network": ..., "correction": ...}, as the
    board reports them or the logbook keeps them), with the learned correction installed.
    KeyError, TypeError or ValueError for sections that do not describe a bank."""
    return _config.bank_from(sections)


def bank_or_none(sections: dict[str, Any] | None) -> Bank | None:
    """bank_of_sections, or None where the sections are missing or unusable (callers then
    show codes alone)."""
    if not sections:
        return None
    try:
        return bank_of_sections(sections)
    except (KeyError, TypeError, ValueError):
        return None


def state_values(bank: Bank | None, l_code: int, c_code: int) -> tuple[float, float] | None:
    """(uH, pF) of a state's codes in a Bank, or None without a bank or for codes it does
    not have: the values a builder measures, beside the codes."""
    if bank is None or not (0 <= l_code <= bank.l_max and 0 <= c_code <= bank.c_max):
        return None
    return bank.lv[l_code], bank.cv[c_code]


def code_value(bank: Bank | None, element: str, code: float) -> float | None:
    """The value a (median, so maybe fractional) code stands for: uH for element "L",
    pF for "C"; None without a bank or for a code it does not have."""
    if bank is None:
        return None
    i = int(round(code))
    if element == "L":
        return bank.lv[i] if 0 <= i <= bank.l_max else None
    return bank.cv[i] if 0 <= i <= bank.c_max else None
