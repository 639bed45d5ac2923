"""Faults injected into a simulated box (--fault on virtual-board and score).

The spec grammar and the state masks are the firmware's own
(fmlogic.selftest), so a failed element in a board config and a fault in the
simulator are written alike.  A stuck relay maps every commanded state to the
state the damaged box really reaches; a drift scales the element's value in
the true network the simulator evaluates.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from feedmatch.errors import InputError
from feedmatch.rf.network import Network


@dataclass(frozen=True)
class Faults:
    """Parsed faults: (element, kind, drift percent) tuples as fmlogic.selftest makes them."""

    items: tuple[tuple[str, str, float], ...] = ()

    def __bool__(self) -> bool:
        return bool(self.items)

    @property
    def masks(self) -> tuple[int, int, int, int, int]:
        from feedmatch.seam.logic import masks

        return masks(self.items)

    def spec(self) -> str:
        from feedmatch.seam.logic import fault_text

        return ",".join(fault_text(f) for f in self.items)

    def apply_net(self, net: Network) -> Network:
        """The true network with drifted element values (stuck relays change states, not values)."""
        ind = list(net.inductors_uh)
        cap = list(net.capacitors_pf)
        for name, kind, pct in self.items:
            if kind == "drift":
                vals = ind if name[0] == "L" else cap
                vals[int(name[1:])] *= 1.0 + pct / 100.0
        if ind == list(net.inductors_uh) and cap == list(net.capacitors_pf):
            return net
        return replace(net, inductors_uh=ind, capacitors_pf=cap)

    def reach(self, l: int, c: int, sh: int) -> tuple[int, int, int]:
        """The state the damaged box is in when (l, c, sh) is commanded."""
        from feedmatch.seam.logic import reach

        return reach(self.masks, (l, c, sh))

    def remap(self, table: np.ndarray) -> np.ndarray:
        """A per-state table [shunt, l, c] of the true box re-indexed by commanded
        state: out[sh, l, c] = table[reached state]."""
        l_and, l_or, c_and, c_or, side = self.masks
        n_l, n_c = table.shape[1], table.shape[2]
        li = (np.arange(n_l) & l_and) | l_or
        ci = (np.arange(n_c) & c_and) | c_or
        si = np.array([0, 1]) if side < 0 else np.array([side, side])
        return table[si[:, None, None], li[None, :, None], ci[None, None, :]]


NONE = Faults()


def parse_faults(text: str | None, net: Network) -> Faults:
    """--fault's value for a bank like net; one InputError line on bad input."""
    if not text:
        return NONE
    from feedmatch.seam.logic import parse_faults as fw_parse

    try:
        return Faults(tuple(fw_parse(text, net.n_l, net.n_c)))
    except ValueError as e:
        raise InputError(f"--fault: {e}") from None
