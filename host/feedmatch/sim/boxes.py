"""Simulated boxes that differ from the nominal network the firmware knows.

Each box is drawn from a seed: every inductor and capacitor off nominal by a
normal spread of `tolerance` (clipped at 3 sigma), each element's Q drawn
around its nominal Q (10 % spread), relay and wiring strays, and detector and
coupler errors.  Default strays, typical figures from memory (not a
particular datasheet): 1 pF across an open relay contact (small signal and
power relays list 0.5-2 pF), 8 pF from each switched node to the chassis,
15 nH of series lead inductance per element (about 1 nH per mm of lead).
Detector: each detector's gain off by 0.3 dB (1 sigma, held within 0.3 dB: what
the two calibration passes leave, so the ratio stays within the firmware's
detector.gain_tol_db of 0.6 dB), an offset of 1 count, the coupler's leakage
phase uniform over the circle.
"""

from __future__ import annotations

import random
from dataclasses import dataclass, replace
from typing import Any

from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.network import STRAY_DEFAULTS, Network


@dataclass
class Box:
    network: Network
    detector: DetectorModel
    seed: int
    tolerance: float
    strays: str

    def to_json(self, index: int) -> dict[str, Any]:
        n = self.network
        return {"box": index, "seed": self.seed, "tolerance": self.tolerance, "strays": self.strays,
                "network": {"z0_ohm": n.z0_ohm, "inductors_uh": n.inductors_uh,
                            "capacitors_pf": n.capacitors_pf, "inductor_q_each": n.inductor_q_each,
                            "capacitor_q_each": n.capacitor_q_each, "relay_open_pf": n.relay_open_pf,
                            "lead_nh": n.lead_nh, "stray_in_pf": n.stray_in_pf, "stray_out_pf": n.stray_out_pf},
                "detector": self.detector.to_json()}


def _spread(rng: random.Random, sigma: float) -> float:
    if sigma <= 0:
        return 1.0
    x = rng.gauss(0.0, sigma)
    return 1.0 + max(-3 * sigma, min(3 * sigma, x))


def _clip(x: float, lim: float) -> float:
    return max(-lim, min(lim, x))


def draw_box(nominal: Network, seed: int, tolerance: float, strays: str = "default",
             ideal: bool = False) -> Box:
    rng = random.Random(seed)
    ind = [v * _spread(rng, tolerance) for v in nominal.inductors_uh]
    cap = [v * _spread(rng, tolerance) for v in nominal.capacitors_pf]
    # With tolerance 0 the Qs stay nominal too, so the box is the nominal network exactly.
    ql = [nominal.inductor_q * _spread(rng, 0.1) for _ in ind] if nominal.inductor_q and tolerance > 0 else None
    qc = [nominal.capacitor_q * _spread(rng, 0.1) for _ in cap] if nominal.capacitor_q and tolerance > 0 else None
    net = replace(nominal, inductors_uh=ind, capacitors_pf=cap, inductor_q_each=ql, capacitor_q_each=qc)
    if strays == "default":
        net = replace(net, relay_open_pf=STRAY_DEFAULTS["relay_open_pf"], lead_nh=STRAY_DEFAULTS["lead_nh"],
                      stray_in_pf=STRAY_DEFAULTS["node_pf"], stray_out_pf=STRAY_DEFAULTS["node_pf"])
    det = DetectorModel(ideal=ideal)
    if not ideal and (tolerance > 0 or strays == "default"):
        det = replace(det, fwd_gain_db=_clip(rng.gauss(0, 0.3), 0.3), ref_gain_db=_clip(rng.gauss(0, 0.3), 0.3),
                      offset_counts=rng.gauss(0, 1.0), directivity_phase_deg=rng.uniform(0, 360))
    return Box(net, det, seed, tolerance, strays)


def fit_from_scores(nominal: Network, box: Box, loads) -> Network:
    """Learn a box's effective values from tunes on it (the traces a logbook would hold)."""
    from feedmatch.sim.fitbox import fit_elements, traces_from_scoring

    traces = traces_from_scoring(nominal, box, loads)
    res = fit_elements(nominal, traces)
    return replace(nominal, inductors_uh=res["inductors_uh"], capacitors_pf=res["capacitors_pf"])
