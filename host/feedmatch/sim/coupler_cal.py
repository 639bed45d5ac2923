"""The coupler's complex error from a dummy load and the network's own states.

With the antenna port on a dummy load, every relay state presents a known
reflection coefficient to the coupler (the L-network's closed form on 50 ohm):
a set of standards the box carries with it.  The readings of many states fix
the error box of the reflectometer, m = k |G + d_r| / |1 + d_f G| (see
fmlogic.coupler), by least squares over all of them: Engen's solution for
multi-state reflectometers (G. F. Engen, "A least squares solution for use in
the six-port measurement technique", IEEE T-MTT 28(12), 1980), here for a
scalar two-detector box.  The standards are only as good as the parts, so each
element's scale is fitted with them, with a prior of the parts' tolerance.

The same model refines the values from logged tunes (refine_from_traces): the
loads there are unknowns, as in fit-box, the coupler terms are shared.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import least_squares

from feedmatch.rf.network import Network, lnet_zin

DUMMY_OHM = 50.0
CAL_FREQ_HZ = 14.2e6
CAL_POWER_W = 10.0
PART_TOL = 0.05      # the prior on each element's scale (5 % parts)
MAX_STANDARD = 0.93  # readings of states nearer full reflection say little about d_r


def standards(net: Network) -> list[tuple[int, int, int]]:
    """The states measured into the dummy load: the bypass (the leakage alone),
    each coil and each capacitor alone, and every coil with every capacitor on
    both sides: each element in many combinations, so their scales separate
    from the coupler's terms."""
    nl, nc = net.n_l, net.n_c
    out = [(0, 0, 1)]
    out += [(1 << i, 0, 1) for i in range(nl)]
    out += [(0, 1 << j, 0) for j in range(nc)]
    for sh in (0, 1):
        for i in range(nl):
            for j in range(nc):
                out.append((1 << i, 1 << j, sh))
    return out


def _gin(net: Network, scales: np.ndarray, states: np.ndarray, f_hz: float, z_load: complex) -> np.ndarray:
    """Complex gamma_in of states on the nominal network with element scales (no strays:
    the firmware's model)."""
    nl, nc = net.n_l, net.n_c
    bl = ((states[:, 0:1] >> np.arange(nl)) & 1).astype(float)
    bc = ((states[:, 1:2] >> np.arange(nc)) & 1).astype(float)
    w = 2 * np.pi * f_hz
    lv = bl @ (np.asarray(net.inductors_uh) * scales[:nl]) * 1e-6
    cv = bc @ (np.asarray(net.capacitors_pf) * scales[nl:]) * 1e-12
    xl = w * lv
    zs = (xl / net.inductor_q if net.inductor_q else 0) + 1j * xl
    b = w * cv
    yc = (b / net.capacitor_q if net.capacitor_q else 0) + 1j * b
    z_tx, z_ant = lnet_zin(zs, yc, 1 / z_load)
    z = np.where(states[:, 2] == 1, z_ant, z_tx)
    return (z - net.z0_ohm) / (z + net.z0_ohm)


@dataclass
class CouplerFit:
    dr: complex
    df: complex
    k: float
    err: float
    rms: float
    scales: list[float]
    readings: int

    def learned(self) -> tuple[float, float, float, float, float, float]:
        """The config's detector.coupler list (fmlogic.coupler.Coupler's learned)."""
        return (round(self.dr.real, 5), round(self.dr.imag, 5), round(self.df.real, 5),
                round(self.df.imag, 5), round(self.k, 5), round(self.err, 4))

    def to_json(self) -> dict[str, Any]:
        return {"d_r": [self.dr.real, self.dr.imag], "d_f": [self.df.real, self.df.imag], "k": self.k,
                "err": self.err, "rms": self.rms, "readings": self.readings,
                "directivity_r_db": -20 * math.log10(max(abs(self.dr), 1e-6)),
                "directivity_f_db": -20 * math.log10(max(abs(self.df), 1e-6)),
                "gain_ratio_db": 20 * math.log10(self.k), "config": list(self.learned())}


def solve(net: Network, states: list[tuple[int, int, int]], readings: list[float],
          f_hz: float = CAL_FREQ_HZ) -> CouplerFit:
    """Least-squares error box from readings (|gamma| as the meter reports them)
    of the given states into the dummy load."""
    st = np.asarray(states, dtype=int)
    m = np.asarray(readings, dtype=float)
    g0 = _gin(net, np.ones(net.n_l + net.n_c), st, f_hz, complex(DUMMY_OHM))
    use = np.abs(g0) <= MAX_STANDARD
    st, m = st[use], m[use]
    ne = net.n_l + net.n_c
    sig = 0.004 + 0.02 * m  # a reading's noise and the table's error (fmlogic.coupler)

    def resid(p):
        dr = complex(p[0], p[1])
        df = complex(p[2], p[3])
        k = math.exp(p[4])
        g = _gin(net, np.exp(p[5:]), st, f_hz, complex(DUMMY_OHM))
        pred = k * np.abs(g + dr) / np.abs(1 + df * g)
        return np.concatenate([(pred - m) / sig, p[5:] / PART_TOL])

    best = None
    # The readings fix |G + d_r|; d_r's phase has a few basins: start around the circle.
    m0 = float(m[np.argmin(np.abs(g0[use]))])
    for ph in range(0, 360, 60):
        p0 = np.zeros(5 + ne)
        p0[0], p0[1] = m0 * math.cos(math.radians(ph)), m0 * math.sin(math.radians(ph))
        sol = least_squares(resid, p0, method="lm", max_nfev=400)
        if best is None or sol.cost < best.cost:
            best = sol
    p = best.x
    r = best.fun[: len(m)] * sig
    rms = float(np.sqrt(np.mean(r ** 2)))
    # The uncertainty of the leakage terms from the fit's own covariance, scaled by
    # how well the model explains the readings (a model error, strays, shows there).
    J = best.jac
    try:
        cov = np.linalg.pinv(J.T @ J)
        chi = max(1.0, float(np.sum(best.fun[: len(m)] ** 2)) / max(len(m) - len(p), 1))
        sd = math.sqrt(max(cov[0, 0] + cov[1, 1], cov[2, 2] + cov[3, 3]) * chi)
    except np.linalg.LinAlgError:
        sd = 0.05
    # Three sigma, and never below what the residuals themselves show.
    err = float(min(0.2, max(3 * sd, 2 * rms, 0.004)))
    return CouplerFit(complex(p[0], p[1]), complex(p[2], p[3]), float(math.exp(p[4])), err, rms,
                      np.exp(p[5:]).tolist(), int(len(m)))


def simulate_readings(true_net: Network, det, states: list[tuple[int, int, int]], seed: int,
                      f_hz: float = CAL_FREQ_HZ, p_w: float = CAL_POWER_W, average: int = 4) -> list[float]:
    """What the board reads, state by state, into a dummy load (the bench's plant:
    the true box with its strays, the detector with its leakage and gains)."""
    from feedmatch.rf.network import StateTable

    rng = random.Random(seed)
    tab = StateTable(true_net).gamma(f_hz, complex(DUMMY_OHM)).copy()
    meter = det.meter()
    z0 = true_net.z0_ohm
    out = []
    for l, c, sh in states:
        g = (DUMMY_OHM - z0) / (DUMMY_OHM + z0) if (l, c, sh) == (0, 0, 1) else complex(tab[sh, l, c])
        pf = pr = 0.0
        for _ in range(average):
            a, b = meter.powers(*det.read(p_w, g, f_hz, rng))
            pf += a
            pr += b
        out.append(math.sqrt(pr / pf) if pf > 0 and pr > 0 else 0.0)
    return out


def calibrate_box(nominal: Network, true_net: Network, det, seed: int = 1) -> CouplerFit:
    """The multi-state calibration of one simulated box, as `calibrate` runs it."""
    sts = standards(nominal)
    return solve(nominal, sts, simulate_readings(true_net, det, sts, seed))
