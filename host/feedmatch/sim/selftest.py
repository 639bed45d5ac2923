"""The self-test on simulated boxes: the firmware's plan, the box's readings
through its detector and the firmware's calibration, the host's diagnosis.

As in the scorer, the diagnosis sees only what the real box reports: the
readings, its own element values (nominal or learned), its Qs and the leak
`feedmatch calibrate` measured.  The true (drawn, damaged) box is used only to
make the readings.
"""

from __future__ import annotations

import random
from typing import Any

from feedmatch.rf.detector import DetectorModel
from feedmatch.rf.diagnose import Model, Readings, diagnose, second_ref
from feedmatch.rf.network import Network
from feedmatch.sim.faults import Faults


def model_of(known: Network, leak: float, strays: bool = True) -> Model:
    """What the diagnosis knows of a box: its element values (nominal or learned),
    Qs, leak, and with strays the typical build figures of sim.boxes (a builder's
    own LCR-meter figures, not the drawn box's)."""
    from feedmatch.rf.network import STRAY_DEFAULTS as S

    st = (S["node_pf"], S["node_pf"], S["relay_open_pf"], S["lead_nh"]) if strays else (0.0, 0.0, 0.0, 0.0)
    return Model(list(known.inductors_uh), list(known.capacitors_pf), known.inductor_q or 0.0,
                 known.capacitor_q or 0.0, known.z0_ohm, leak, *st)


def read_step(true_net: Network, det: DetectorModel, faults: Faults, freq_hz: float, z_load: complex,
              ref: tuple[int, int, int], side: bool, rng: random.Random,
              tune_w: float = 10.0, bypass: bool = False) -> tuple[list[tuple[int, int, int]], list[float]]:
    """What one firmware `selftest` step returns on this box: its commanded states
    and |gamma| of each, in thousandths as the frame carries them."""
    from feedmatch.seam.logic import plan, reading_gamma
    from feedmatch.sim.scorer import _table_for

    tg = _table_for(faults.apply_net(true_net)).gamma(freq_hz, z_load)
    if faults:
        tg = faults.remap(tg)
    meter = det.meter()
    states = plan(ref, true_net.n_l, true_net.n_c, side)
    out = []
    for s in states:
        pf, pr = meter.powers(*det.read(tune_w, complex(tg[s[2], s[0], s[1]]), freq_hz, rng))
        out.append(round(max(0.0, reading_gamma(pf, pr)) * 1000) / 1000)
    if bypass:
        g_load = (z_load - true_net.z0_ohm) / (z_load + true_net.z0_ohm)
        pf, pr = meter.powers(*det.read(tune_w, complex(g_load), freq_hz, rng))
        out.append(round(max(0.0, reading_gamma(pf, pr)) * 1000) / 1000)
    return states, out


def run_case(true_net: Network, known: Network, det: DetectorModel, faults: Faults, freq_hz: float,
             z_load: complex, ref: tuple[int, int, int], seed: int) -> dict[str, Any]:
    """The whole self-test as `feedmatch selftest` runs it: the first step from
    ref, the second from the reference the host picks, then the diagnosis."""
    rng = random.Random(seed)
    m = model_of(known, det.calibrated_leak())
    s1, g1 = read_step(true_net, det, faults, freq_hz, z_load, ref, True, rng, bypass=True)
    r1 = Readings(freq_hz, s1, g1[:-1], g1[-1])
    s2, g2 = read_step(true_net, det, faults, freq_hz, z_load, second_ref(m, r1), False, rng)
    res = diagnose(m, Readings(freq_hz, s1 + s2, g1[:-1] + g2, g1[-1]))
    res["readings"] = len(g1) + len(g2)
    return res


def fault_cases(n_l: int, n_c: int, drift_pct: float = -30.0) -> list[str]:
    """Every single fault the bench tries: each kind on each element."""
    out = []
    for cls, n in (("L", n_l), ("C", n_c)):
        for i in range(n):
            out += [f"{cls}{i}:stuck-out", f"{cls}{i}:stuck-in", f"{cls}{i}:drift={drift_pct:g}%"]
    return out + ["side:stuck-tx", "side:stuck-ant"]



