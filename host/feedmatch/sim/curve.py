"""The antenna as the box measured it: one load per tune, from the readings it logged.

Each reading of a tune is |gamma| at a known network state.  Through the
firmware's own model of a state (fmlogic.lnet.mobius: gamma_in = (a g + b) /
(c g + 1) with g the load's reflection coefficient) a reading puts the load on
a circle, and three or more well-spread readings fix it: the three-circle
solution of multi-state reflectometry (Engen, "An improved circuit for
implementing the six-port technique of microwave measurements", IEEE T-MTT 25,
1977, and "A least squares solution for use in the six-port measurement
technique", IEEE T-MTT 28, 1980), here by weighted least squares over all the
tune's readings.  A tune with one or two readings (a recall that held) says
less: its best state matches a load near the one that state matches exactly,
within the circle of the reading's radius.

Uncertainty (one standard deviation, linearised, GUM-style): the readings'
noise (READING_SIGMA, scaled up by the fit's own residual where it has degrees
of freedom to show one), and, propagated through the solution, the systematic
errors no reading can average out: the coupler's leakage (the calibrated
magnitude, growing with frequency like the detector model's capacitive
leakage, its phase unknown), the detectors' gain mismatch and every element
value (ELEMENT_SIGMA_LEARNED after fit-box, the parts' tolerance otherwise).
Tunes in the same memory bin are combined: the random part averages down, the
systematic part does not.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import least_squares

from feedmatch.rf.network import Z0_OHM, swr_of
from feedmatch.seam import bank as lnet  # the firmware's Bank and state model
from feedmatch.sim.fitbox import Trace

READING_SIGMA = 0.015        # |gamma| per reading: ADC noise and the model's own error (as the firmware's _sig)
GAIN_SIGMA = 0.035           # forward/reflected gain mismatch, 0.3 dB (as the firmware's _sig)
ELEMENT_SIGMA_LEARNED = 0.02  # fit-box's values: within 1.9 % on drawn boxes from 400 tunes (cli/fitbox.py)
ELEMENT_SIGMA_NOMINAL = 0.05  # the parts' tolerance when nothing was learned
LEAK_CAL_HZ = 14.2e6         # `feedmatch calibrate` measures the leakage here
LEAK_FLOOR = 0.01            # 40 dB: the directivity cap of the detector model
LEAK_DEFAULT = 0.056         # fmlogic.search.LEAK_DEFAULT: 25 dB, when the board's is unknown
_H = 1e-4


@dataclass
class LoadEstimate:
    """One tune's load: impedance (ohm) with its covariance in (R, X), ohm^2."""

    freq_hz: float
    z: complex
    cov_rand: np.ndarray
    cov_sys: np.ndarray
    readings: int
    time: str | None = None
    # The part of cov_sys this tune does not share with the others (where on its circle a
    # one-reading tune's load lies): kept when two periods are compared, where the shared
    # part (element values, coupler) cancels.
    cov_own: np.ndarray | None = None

    @property
    def cov(self) -> np.ndarray:
        return self.cov_rand + self.cov_sys

    @property
    def cov_compare(self) -> np.ndarray:
        return self.cov_rand + (self.cov_own if self.cov_own is not None else 0.0)


@dataclass
class CurvePoint:
    freq_hz: float
    z: complex
    cov: np.ndarray
    tunes: int
    readings: int
    members: list[LoadEstimate] = field(default_factory=list)

    @property
    def r_err(self) -> float:
        return float(math.sqrt(max(self.cov[0, 0], 0.0)))

    @property
    def x_err(self) -> float:
        return float(math.sqrt(max(self.cov[1, 1], 0.0)))

    def to_json(self) -> dict[str, Any]:
        g = abs((self.z - Z0_OHM) / (self.z + Z0_OHM))
        return {"freq_hz": round(self.freq_hz, 1), "r_ohm": round(self.z.real, 3), "x_ohm": round(self.z.imag, 3),
                "r_err_ohm": round(self.r_err, 3), "x_err_ohm": round(self.x_err, 3), "tunes": self.tunes,
                "readings": self.readings, "swr_50": round(float(swr_of(g)), 2) if g < 0.9999 else None}


def _bank_scaled(bank: lnet.Bank, k: int, h: float) -> lnet.Bank:
    """The same bank with element k (inductors first, then capacitors) scaled by 1 + h."""
    ind, cap = list(bank.ind), list(bank.cap)
    if k < len(ind):
        ind[k] *= 1 + h
    else:
        cap[k - len(ind)] *= 1 + h
    b = lnet.Bank(bank.z0, bank.nominal_l, bank.nominal_c, bank.ql, bank.qc)
    b.set_values(ind, cap)
    return b


def _net_coefs(bank: lnet.Bank, f_hz: float, states: np.ndarray) -> np.ndarray:
    """(n, 3) complex: the Moebius coefficients a, b, c of each state, the firmware's own
    model of the network (lnet.mobius); the search's BYPASS state is the bypass relay, the
    antenna alone (the identity)."""
    f = f_hz / 1e6
    out = np.empty((len(states), 3), dtype=complex)
    for i, st in enumerate(states):
        l, c, sh = int(st[0]), int(st[1]), int(st[2])
        out[i] = (1.0, 0.0, 0.0) if (l, c, sh) == (0, 0, 1) else lnet.mobius(bank, f, l, c, sh)
    return out


def _bypass(states: np.ndarray) -> np.ndarray:
    st = np.asarray(states)
    return (st[:, 0] == 0) & (st[:, 1] == 0) & (st[:, 2] == 1)


def _through_shunt(g, y):
    """gamma seen through a shunt admittance y (normalised to z0) across the line."""
    return ((2 - y) * g - y) / (y * g + 2 + y)


# The box's learned extras, in the order of BoxExtras.p: the stray capacitance at the
# transmitter and antenna nodes (pF / 10), the reflected/forward gain (log), the coupler's
# leakage at 28 MHz (re, im; growing in proportion to frequency, as fit-box models it) and
# a reflected-detector offset (|gamma| x 10).
N_EXTRAS = 6
STRAY_SIGMA_PF = 5.0  # node strays when nothing was learned: the bench's boxes carry 8 pF (boxes.py, from memory)


@dataclass
class BoxExtras:
    """What besides its element values shapes a box's readings, with its covariance."""

    p: np.ndarray
    cov: np.ndarray
    reading_sigma: float = READING_SIGMA
    learned: bool = False

    @staticmethod
    def unknown(leak_cal: float = LEAK_DEFAULT) -> BoxExtras:
        """Nothing learned: no strays, no leakage, equal gains, each with its spread (the
        leakage's phase unknown, its magnitude the calibrated one scaled to 28 MHz)."""
        leak28 = max(leak_cal * 28e6 / LEAK_CAL_HZ, LEAK_FLOOR)
        sd = [STRAY_SIGMA_PF / 10, STRAY_SIGMA_PF / 10, GAIN_SIGMA, leak28 / math.sqrt(2), leak28 / math.sqrt(2), 0.1]
        return BoxExtras(np.zeros(N_EXTRAS), np.diag(np.square(sd)))

    @property
    def strays_pf(self) -> tuple[float, float]:
        return float(self.p[0] * 10), float(self.p[1] * 10)


def _predict(co: np.ndarray, byp: np.ndarray, f_hz, g, p: np.ndarray, z0: float, grid: bool = False) -> np.ndarray:
    """Readings |gamma| of states (net coefficients co) on loads g, with the extras p:
    node strays around the network (not on the bypass relay), then the coupler as
    fit-box models it (leakage spoiling both ports, gain ratio, offset)."""
    a, b, c = co[:, 0], co[:, 1], co[:, 2]
    if grid:  # every reading on each of many loads (the grid start): shape (readings, loads)
        a, b, c, byp = a[:, None], b[:, None], c[:, None], np.asarray(byp)[:, None]
    w = 2 * np.pi * np.asarray(f_hz) * z0 * 1e-12 * 10
    g1 = _through_shunt(g, 1j * w * p[1])
    gn = (a * g1 + b) / (c * g1 + 1.0)
    gin = np.where(byp, g, _through_shunt(gn, 1j * w * p[0]))
    d = (np.asarray(f_hz) / 28e6) * (p[3] + 1j * p[4])
    ratio = np.abs(gin + d) / np.abs(1 + gin * d)
    return np.sqrt(np.exp(2 * p[2]) * ratio ** 2 + (p[5] * 0.1) ** 2)


def _g_of(q: np.ndarray) -> complex:
    """Load reflection from two reals: |g| < 1 by construction (fit-box's tanh parametrisation)."""
    v = complex(q[0], q[1])
    m = abs(v)
    return v * (math.tanh(m) / m) if m > 1e-12 else v


def _q_of(g: complex) -> np.ndarray:
    m = min(abs(g), 0.999999)
    if m < 1e-12:
        return np.array([g.real, g.imag])
    t = math.atanh(m) / abs(g)
    return np.array([g.real * t, g.imag * t])


def _z_of(g: complex, z0: float) -> complex:
    return z0 * (1 + g) / (1 - g)


def leak_at(leak_cal: float, f_hz: float) -> float:
    """The coupler's leakage magnitude at f_hz from the calibrated one (capacitive: grows with f)."""
    return max(LEAK_FLOOR, leak_cal * f_hz / LEAK_CAL_HZ)


class LoadSolver:
    """Solves tunes' traces for their loads on one bank (the board's element values)."""

    def __init__(self, bank: lnet.Bank, element_sigma: float, leak_cal: float = LEAK_DEFAULT,
                 extras: BoxExtras | None = None):
        self.bank = bank
        self.extras = extras or BoxExtras.unknown(leak_cal)
        self.element_sigma = element_sigma
        self.leak_cal = leak_cal
        n = bank.nl + bank.nc
        self.perturbed = [_bank_scaled(bank, k, _H) for k in range(n)]
        r = np.linspace(0.0, 0.995, 34)
        th = np.linspace(0, 2 * np.pi, 96, endpoint=False)
        self._grid = (r[:, None] * np.exp(1j * th[None, :])).ravel()

    def solve(self, tr: Trace) -> LoadEstimate | None:
        if len(tr.gamma) == 0 or tr.freq_hz <= 0:
            return None
        if len(tr.gamma) >= 3:
            est = self._solve_circles(tr)
            if est is not None:
                return est
        return self._solve_best(tr)

    # -- three or more readings: weighted least squares ---------------------------
    def _solve_circles(self, tr: Trace) -> LoadEstimate | None:
        z0 = self.bank.z0
        co = _net_coefs(self.bank, tr.freq_hz, tr.states)
        byp = _bypass(tr.states)
        m = np.asarray(tr.gamma, dtype=float)
        sig = self.extras.reading_sigma
        p0 = self.extras.p
        f = tr.freq_hz
        # Start: the best point of a dense grid over the reflection disc (no basin missed).
        pred = _predict(co, byp, f, self._grid, p0, z0, grid=True)
        j = int(np.argmin(((pred - m[:, None]) ** 2).sum(axis=0)))
        q0 = _q_of(complex(self._grid[j]))

        def resid(q, co=co, p=p0):
            return (_predict(co, byp, f, _g_of(q), p, z0) - m) / sig

        sol = least_squares(resid, q0, method="lm", xtol=1e-10, ftol=1e-10)
        q = sol.x
        r0 = resid(q)
        jac = np.empty((len(m), 2))
        for i in range(2):
            dq = np.zeros(2)
            dq[i] = 1e-6
            jac[:, i] = (resid(q + dq) - resid(q - dq)) / 2e-6
        hm = jac.T @ jac
        if np.linalg.cond(hm) > 1e12:
            return None
        hinv = np.linalg.inv(hm)
        dof = len(m) - 2
        birge = max(1.0, float(r0 @ r0) / dof) if dof >= 3 else 1.0
        cov_q_rand = hinv * birge
        # Systematic errors through the solution: dq = -H^-1 J^T dr/dnuisance, the
        # nuisances being the box's extras (with their covariance) and each element value.
        jp = np.empty((len(m), N_EXTRAS))
        for i in range(N_EXTRAS):
            dp = np.zeros(N_EXTRAS)
            dp[i] = 1e-5
            jp[:, i] = (resid(q, p=p0 + dp) - resid(q, p=p0 - dp)) / 2e-5
        je = np.array([(resid(q, co=_net_coefs(pb, f, tr.states)) - r0) / _H for pb in self.perturbed]).T
        kp = -hinv @ jac.T @ jp
        ke = -hinv @ jac.T @ je * self.element_sigma
        cov_q_sys = kp @ self.extras.cov @ kp.T + ke @ ke.T
        jz = self._jz(q, z0)
        g = _g_of(q)
        return LoadEstimate(tr.freq_hz, _z_of(g, z0), jz @ cov_q_rand @ jz.T, jz @ cov_q_sys @ jz.T, len(m))

    @staticmethod
    def _jz(q: np.ndarray, z0: float) -> np.ndarray:
        """d(R, X) / d(q), numerically."""
        out = np.empty((2, 2))
        for i in range(2):
            dq = np.zeros(2)
            dq[i] = 1e-7
            a, b = _z_of(_g_of(q + dq), z0), _z_of(_g_of(q - dq), z0)
            out[:, i] = [(a - b).real / 2e-7, (a - b).imag / 2e-7]
        return out

    # -- one or two readings: the best state's circle --------------------------------
    def _solve_best(self, tr: Trace) -> LoadEstimate | None:
        """The load the best-read state matches, with the reading's circle (|gamma_in| = m,
        its phase unknown: m / sqrt(2) per axis) as its spread: the load whose predicted
        reading through that state is zero, found on the same model as above."""
        i = int(np.argmin(tr.gamma))
        st = tr.states[i:i + 1]
        if _bypass(st)[0]:
            return None  # the antenna alone read best: its phase is unknown
        m = float(tr.gamma[i])
        z0 = self.bank.z0
        f = tr.freq_hz
        p0 = self.extras.p.copy()
        p0[5] = 0.0  # the offset only lifts a zero reading

        def g_match(co, p):
            # gamma_in(g) = 0 is linear in g for each Moebius stage: invert stage by stage.
            w = 2 * np.pi * f * z0 * 1e-12 * 10
            y_in, y_out = 1j * w * p[0], 1j * w * p[1]
            d = (f / 28e6) * (p[3] + 1j * p[4])
            gin = -d  # the reading is zero where gamma_in + d is
            gn = (gin * (2 + y_in) + y_in) / (2 - y_in - y_in * gin)  # undo the input stray
            a, b, c = co[0]
            g1 = (b - gn) / (gn * c - a)
            return (g1 * (2 + y_out) + y_out) / (2 - y_out - y_out * g1)

        co = _net_coefs(self.bank, f, st)
        g = g_match(co, p0)
        if not abs(g) < 1.0:
            return None  # the reading cannot be of a passive load through this state
        dzdg = 2 * z0 / (1 - g) ** 2
        # d g / d gamma_in, numerically, for the circle's spread.
        a, b, c = co[0]
        k = (a - b * c) / (a * a)
        gain = abs(dzdg * k) ** 2 / 2
        # The reading's noise averages over repeated tunes; where on its circle the load
        # lies does not (the same state reads alike every time).
        cov_rand = np.eye(2) * gain * self.extras.reading_sigma ** 2
        cov_own = np.eye(2) * gain * m * m
        cov_sys = cov_own.copy()
        cols = []
        for i in range(N_EXTRAS):
            dp = np.zeros(N_EXTRAS)
            dp[i] = 1e-5
            dz = dzdg * (g_match(co, p0 + dp) - g_match(co, p0 - dp)) / 2e-5
            cols.append([dz.real, dz.imag])
        jp = np.array(cols).T
        cov_sys += jp @ self.extras.cov @ jp.T
        for pb in self.perturbed:
            dz = dzdg * (g_match(_net_coefs(pb, f, st), p0) - g) / _H * self.element_sigma
            v = np.array([dz.real, dz.imag])
            cov_sys += np.outer(v, v)
        return LoadEstimate(f, _z_of(g, z0), cov_rand, cov_sys, len(tr.gamma), cov_own=cov_own)


def learn_extras(bank: lnet.Bank, traces: list[Trace], leak_cal: float = LEAK_DEFAULT,
                 max_traces: int = 300) -> BoxExtras:
    """The box's node strays and coupler, learned from its tunes as fit-box learns the
    elements: non-linear least squares over every multi-reading trace at once (each with
    its own load), the element values held.  The strays show through the bypass readings
    (the antenna alone) against the network's; the coupler through the spread of states.
    Their covariance is the fit's (Gauss-Newton, scaled by the residual), so the curve's
    uncertainty carries how well they are known.  Too few traces: nothing is learned."""
    from scipy.sparse import lil_matrix

    trs = [t for t in traces if len(t.gamma) >= 3][:max_traces]
    unknown = BoxExtras.unknown(leak_cal)
    if len(trs) < 8:
        return unknown
    z0 = bank.z0
    co = np.concatenate([_net_coefs(bank, t.freq_hz, t.states) for t in trs])
    byp = np.concatenate([_bypass(t.states) for t in trs])
    f = np.concatenate([np.full(len(t.gamma), t.freq_hz) for t in trs])
    m = np.concatenate([t.gamma for t in trs])
    owner = np.concatenate([np.full(len(t.gamma), i) for i, t in enumerate(trs)])
    solver = LoadSolver(bank, ELEMENT_SIGMA_LEARNED, leak_cal, unknown)
    q0 = []
    for t in trs:
        e = solver._solve_circles(t)
        q0.append(_q_of((e.z - z0) / (e.z + z0)) if e is not None else np.zeros(2))
    k = len(trs)
    prior_sd = np.sqrt(np.diag(unknown.cov))

    def resid(x):
        p = x[:N_EXTRAS]
        q = x[N_EXTRAS:].reshape(k, 2)
        v = q[:, 0] + 1j * q[:, 1]
        a = np.abs(v)
        g = np.where(a > 1e-12, np.tanh(a) / np.maximum(a, 1e-12), 1.0) * v
        pred = _predict(co, byp, f, g[owner], p, z0)
        # A weak prior on the extras keeps the ones the traces cannot see where they were.
        return np.concatenate([(pred - m) / READING_SIGMA, p / (3 * prior_sd)])

    sp = lil_matrix((len(m) + N_EXTRAS, N_EXTRAS + 2 * k), dtype=int)
    for r in range(len(m)):
        sp[r, :N_EXTRAS] = 1
        sp[r, N_EXTRAS + 2 * owner[r]] = 1
        sp[r, N_EXTRAS + 2 * owner[r] + 1] = 1
    for j in range(N_EXTRAS):
        sp[len(m) + j, j] = 1
    x0 = np.concatenate([np.zeros(N_EXTRAS), np.ravel(q0)])
    lo = np.full(len(x0), -np.inf)
    lo[:2] = 0.0  # a capacitance to the chassis is never negative
    sol = least_squares(resid, x0, jac_sparsity=sp, method="trf", loss="soft_l1", f_scale=3.0, max_nfev=100,
                        x_scale="jac", bounds=(lo, np.inf))
    r = sol.fun[: len(m)]
    sigma = max(READING_SIGMA * float(np.sqrt(np.median(r ** 2) / 0.455)), 0.005)  # robust rms (median chi2_1)
    jac = sol.jac.toarray() if hasattr(sol.jac, "toarray") else np.asarray(sol.jac)
    try:
        cov_all = np.linalg.inv(jac.T @ jac) * (sigma / READING_SIGMA) ** 2
    except np.linalg.LinAlgError:
        return unknown
    cov = cov_all[:N_EXTRAS, :N_EXTRAS].copy()
    if not np.all(np.isfinite(cov)):
        return unknown
    # The strays' values also soak up what the model leaves out (lead inductance, open
    # relay contacts, per-element Q): measured on the bench's drawn boxes they come out a
    # few pF off however tight the fit says they are, so they keep their prior spread.
    cov[0, 0] += (STRAY_SIGMA_PF / 10) ** 2
    cov[1, 1] += (STRAY_SIGMA_PF / 10) ** 2
    return BoxExtras(sol.x[:N_EXTRAS].copy(), cov, sigma, True)


def combine(ests: list[LoadEstimate]) -> CurvePoint:
    """Tunes of one bin as one point: a weighted mean (weights 1 / the estimate's variance;
    scalar, so errors the tunes share cannot pull R against X); the random part averages
    down, the systematic part (shared by every tune) does not, and a scatter larger than
    the stated errors widens the result (Birge ratio)."""
    zs = np.array([[e.z.real, e.z.imag] for e in ests])
    w = np.array([1.0 / max(float(np.trace(e.cov)), 1e-12) for e in ests])
    w = w / w.sum()
    zbar = w @ zs
    cov_rand = sum(wi * wi * e.cov_rand for wi, e in zip(w, ests))
    cov_sys = sum(wi * e.cov_sys for wi, e in zip(w, ests))
    cov = cov_rand + cov_sys
    if len(ests) > 1:
        chi2 = sum(float(np.sum((z - zbar) ** 2 / np.maximum(np.diag(e.cov), 1e-12))) for z, e in zip(zs, ests))
        cov = cov * max(1.0, chi2 / (2 * (len(ests) - 1)))
    f = float(np.mean([e.freq_hz for e in ests]))
    return CurvePoint(f, complex(zbar[0], zbar[1]), cov, len(ests), sum(e.readings for e in ests), list(ests))


def model_error_factor(groups: list[list[LoadEstimate]]) -> float:
    """How much more the tunes of one frequency disagree with each other than their stated
    errors allow, over the whole logbook (a global Birge ratio, >= 1): tunes through
    different states see the model's own errors differently, so their scatter shows what
    the stated errors miss.  Each bin's tunes against their weighted mean, in R and X."""
    chi2, dof = 0.0, 0
    for ms in groups:
        if len(ms) < 2:
            continue
        w = np.array([1.0 / max(float(np.trace(e.cov)), 1e-12) for e in ms])
        w = w / w.sum()
        zbar = sum(wi * e.z for wi, e in zip(w, ms))
        for e in ms:
            d = e.z - zbar
            v = np.diag(e.cov)
            chi2 += d.real ** 2 / max(v[0], 1e-12) + d.imag ** 2 / max(v[1], 1e-12)
        dof += 2 * (len(ms) - 1)
    return max(1.0, chi2 / dof) if dof >= 6 else 1.0


def curve_points(ests: list[LoadEstimate], bin_hz: float) -> list[CurvePoint]:
    """One point per memory bin (bin_hz wide, numbered as the board's memory numbers them),
    every error scaled by the logbook's model-error factor."""
    from feedmatch.seam.logic import bin_of

    by: dict[int, list[LoadEstimate]] = {}
    for e in ests:
        by.setdefault(bin_of(e.freq_hz, bin_hz), []).append(e)
    k = model_error_factor(list(by.values()))
    pts = [combine(by[b]) for b in sorted(by)]
    if k > 1.0:
        for p in pts:
            p.cov = p.cov * k
    return pts


def resonances(points: list[CurvePoint]) -> list[dict[str, Any]]:
    """Where the measured reactance crosses zero between neighbouring points, located by
    linear interpolation, with the frequency's uncertainty from the reactances' and the
    span it lies in (series: X rising through zero; parallel: falling)."""
    out = []
    for p, q in zip(points, points[1:]):
        x1, x2 = p.z.imag, q.z.imag
        if x1 == 0 or x1 * x2 < 0:
            t = x1 / (x1 - x2)
            f = p.freq_hz + t * (q.freq_hz - p.freq_hz)
            r = p.z.real + t * (q.z.real - p.z.real)
            slope = (x2 - x1) / (q.freq_hz - p.freq_hz)
            ferr = math.hypot((1 - t) * p.x_err, t * q.x_err) / abs(slope)
            out.append({"freq_hz": round(f, 1), "freq_err_hz": round(min(ferr, q.freq_hz - p.freq_hz), 1),
                        "between_hz": [round(p.freq_hz, 1), round(q.freq_hz, 1)], "r_ohm": round(r, 2),
                        "kind": "series" if x2 > x1 else "parallel"})
    return out


def _trace_of(r: dict[str, Any]) -> Trace | None:
    """A record's readings as a Trace, or None (a preset, no readings, a damaged trace)."""
    t = r.get("trace")
    f = r.get("freq_hz") or 0.0
    if r.get("outcome") == "preset" or not isinstance(t, list) or len(t) < 4:
        return None
    try:
        a = np.asarray(t[: len(t) // 4 * 4], dtype=float).reshape(-1, 4)
    except (TypeError, ValueError):
        return None
    if not isinstance(f, (int, float)) or f <= 0 or not np.isfinite(a).all():
        return None
    return Trace(float(f), a[:, :3].astype(int), a[:, 3] / 1000.0)


def solve_records(recs: list[dict[str, Any]], bank: lnet.Bank, learned: bool,
                  leak_cal: float = LEAK_DEFAULT, extras: BoxExtras | None = None) -> list[LoadEstimate]:
    """Every tune record with readings, solved for its load (in the records' order)."""
    solver = LoadSolver(bank, ELEMENT_SIGMA_LEARNED if learned else ELEMENT_SIGMA_NOMINAL, leak_cal, extras)
    out = []
    for r in recs:
        tr = _trace_of(r)
        if tr is None:
            continue
        e = solver.solve(tr)
        if e is not None:
            e.time = r.get("_time")
            out.append(e)
    return out


def _until_ok(t: str | None, until: str | None) -> bool:
    return until is None or t is None or t < until


def measured_curve(db: str, since: str | None = None, until: str | None = None,
                   nominal: lnet.Bank | None = None) -> dict[str, Any]:
    """The measured curve of the logbook's antenna over a period: the points (one per
    memory bin tuned), the resonances between them, and what they rest on."""
    import json

    from feedmatch.logbook.store import open_existing
    from feedmatch.seam.bank import bank_or_none
    from feedmatch.seam.logic import bin_width

    book = open_existing(db)
    rows = [r for r in book.tunes(since) if _until_ok(r["time"], until)]
    sections = book.banks()
    book.close()
    by_board: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        if not r["raw"]:
            continue
        try:
            rec = json.loads(r["raw"])
        except ValueError:
            continue
        if isinstance(rec, dict):
            by_board.setdefault(r["board_id"], []).append(rec | {"_time": r["time"]})
    ests: list[LoadEstimate] = []
    learned_any = learned_extras = False
    most, main_bank, main_extras, main_key = 0, None, None, None
    for key, recs in by_board.items():
        sec = sections.get(key) or {}
        bank = bank_or_none(sec) if isinstance(sec.get("network"), dict) else None
        learned = bank is not None and isinstance(sec.get("correction"), dict)
        learned_any |= learned
        if bank is None:
            bank = nominal
        if bank is None:
            continue
        leak = (sec.get("detector") or {}).get("leak", LEAK_DEFAULT)
        leak = float(leak) if isinstance(leak, (int, float)) else LEAK_DEFAULT
        extras = learn_extras(bank, [t for t in (_trace_of(r) for r in recs) if t is not None], leak)
        learned_extras = learned_extras or extras.learned
        ests += solve_records(recs, bank, learned, leak, extras)
        if len(recs) > most:  # the board with the most tunes speaks for the box
            most, main_bank, main_extras, main_key = len(recs), bank, extras, key
    # The bins of that board's memory (the logger keeps its width), else the shipped ones.
    pts = curve_points(ests, bin_width(sections.get(main_key)))
    times = [e.time for e in ests if e.time]
    return {"points": pts, "resonances": resonances(pts), "tunes": len(ests),
            "first": min(times) if times else None, "last": max(times) if times else None,
            "element_sigma": ELEMENT_SIGMA_LEARNED if learned_any else ELEMENT_SIGMA_NOMINAL,
            "learned": learned_any, "coupler_learned": learned_extras, "boards": sorted(by_board),
            "bank": main_bank, "extras": main_extras}


# -- health: what changed on the antenna, in its own terms ------------------------------
HEALTH_SIGMAS = 3.0     # a change is flagged beyond this many standard deviations of the difference
HEALTH_MIN_CHANGE = 0.10  # ... and beyond this fraction of the value (common practice for trend alarms)


def _compare_point(ests: list[LoadEstimate]) -> tuple[complex, np.ndarray]:
    """A period's tunes of one bin: the weighted mean and the variance of what is not
    shared with the other period (random part and each tune's own circle)."""
    w = np.array([1.0 / max(float(np.trace(e.cov)), 1e-12) for e in ests])
    w = w / w.sum()
    z = complex(sum(wi * e.z for wi, e in zip(w, ests)))
    own = [e.cov_own if e.cov_own is not None else np.zeros((2, 2)) for e in ests]
    cov = sum(wi * wi * e.cov_rand for wi, e in zip(w, ests)) + sum(wi * o for wi, o in zip(w, own))
    return z, cov


def antenna_health(points: list[CurvePoint]) -> dict[str, Any]:
    """Each bin's earlier tunes against its later ones (the halves of its tunes in time):
    R and X, and the resonances the two halves locate, each change judged against the
    uncertainty of the difference (the errors both periods share cancel in it).
    Returns {"bands": {band: {"flag", "notes"}}, "notes": [antenna-wide notes]}."""
    from feedmatch.rf import bands
    from feedmatch.seam.bank import BOARD_DEFAULTS as DEFAULTS

    out: dict[str, dict[str, Any]] = {}
    splits = []
    for p in points:
        ms = sorted(p.members, key=lambda e: e.time or "")
        band = bands.band_of(p.freq_hz)
        row = out.setdefault(band, {"flag": False, "notes": [], "compared": 0})
        if len(ms) < 2:
            continue
        row["compared"] += 1
        # Where did it change, if it did: every split of the bin's tunes in time, the one
        # whose difference is the most significant (a change-point scan).
        best = None
        for k in range(1, len(ms)):
            (z1, c1), (z2, c2) = _compare_point(ms[:k]), _compare_point(ms[k:])
            found = []
            for name, a, b, var in (("R", z1.real, z2.real, c1[0, 0] + c2[0, 0]),
                                    ("X", z1.imag, z2.imag, c1[1, 1] + c2[1, 1])):
                d = b - a
                t = abs(d) / math.sqrt(max(var, 1e-12))
                if t > HEALTH_SIGMAS and abs(d) > HEALTH_MIN_CHANGE * abs(a):
                    found.append((t, name, a, b))
            score = max((f[0] for f in found), default=0.0)
            if found and (best is None or score > best[0]):
                best = (score, k, found)
        if best is None:
            continue
        _score, k, found = best
        splits.append(ms[k].time or "")
        mhz = p.freq_hz / 1e6
        for _t, name, a, b in found:
            row["notes"].append(f"{name} at {mhz:.2f} MHz {a:.1f} -> {b:.1f} ohm ({100 * (b - a) / abs(a):+.0f} %)")
        row["flag"] = True
    notes = []
    # The resonances before and after the change (the earliest split found), or the halves in time.
    ests = sorted((e for p in points for e in p.members), key=lambda e: e.time or "")
    cut = min(splits) if splits else (ests[len(ests) // 2].time or "" if ests else "")
    early_all = [e for e in ests if (e.time or "") < cut]
    late_all = [e for e in ests if (e.time or "") >= cut]
    if early_all and late_all:
        bin_hz = float(DEFAULTS["memory"]["bin_hz"])
        r1, r2 = resonances(curve_points(early_all, bin_hz)), resonances(curve_points(late_all, bin_hz))
        for a in r1:
            same = [b for b in r2 if b["kind"] == a["kind"] and b["between_hz"] == a["between_hz"]]
            if not same:
                continue
            b = same[0]
            d = b["freq_hz"] - a["freq_hz"]
            if abs(d) > HEALTH_SIGMAS * math.hypot(a["freq_err_hz"], b["freq_err_hz"]):
                notes.append(f"{a['kind']} resonance {a['freq_hz'] / 1e6:.2f} -> {b['freq_hz'] / 1e6:.2f} MHz")
    for row in out.values():
        if not row["notes"]:
            row["notes"] = ["steady"] if row["compared"] else ["too few tunes per frequency to compare"]
    return {"bands": out, "notes": notes}


def add_antenna(rep: dict[str, Any], db: str, since: str | None = None) -> dict[str, Any]:
    """A report (or the page's station view) with the measured antenna beside it: each
    band's antenna health ("antenna_health"), antenna-wide notes ("antenna_notes") and the
    curve itself ("antenna_curve": points, resonances, Smith-chart gammas)."""
    from feedmatch.rf.network import load_network

    cur = measured_curve(db, since, None, nominal=load_network(None).firmware_bank())
    h = antenna_health(cur["points"])
    for b in rep.get("bands", []):
        ah = h["bands"].get(b["band"])
        if ah is not None:
            b["antenna_health"] = {"flag": ah["flag"], "note": "; ".join(ah["notes"])}
    rep["antenna_notes"] = h["notes"]
    rep["antenna_health_bands"] = {k: {"flag": v["flag"], "note": "; ".join(v["notes"])} for k, v in h["bands"].items()}
    pts = []
    for p in cur["points"]:
        j = p.to_json()
        g = (p.z - Z0_OHM) / (p.z + Z0_OHM)
        j["gamma"] = [round(g.real, 4), round(g.imag, 4)]
        pts.append(j)
    rep["antenna_curve"] = {"points": pts, "resonances": cur["resonances"]}
    return rep
