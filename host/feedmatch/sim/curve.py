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
from fmlogic import lnet
from scipy.optimize import least_squares

from feedmatch.rf.network import Z0_OHM, swr_of
from feedmatch.sim.fitbox import Trace

READING_SIGMA = 0.015        # |gamma| per reading: ADC noise and the model's own error (as the firmware's _sig)
GAIN_SIGMA = 0.035           # forward/reflected gain mismatch, 0.3 dB (as the firmware's _sig)
ELEMENT_SIGMA_LEARNED = 0.02  # fit-box's values: within 1.9 % on drawn boxes from 400 tunes (cli/board.py)
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

    @property
    def cov(self) -> np.ndarray:
        return self.cov_rand + self.cov_sys


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


def _coefs(bank: lnet.Bank, f_hz: float, states: np.ndarray) -> np.ndarray:
    """(n, 3) complex: the Moebius coefficients a, b, c of each state (the firmware's model)."""
    f = f_hz / 1e6
    return np.array([lnet.mobius(bank, f, int(s[0]), int(s[1]), int(s[2])) for s in states], dtype=complex)


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


def _reading(co: np.ndarray, g, d: complex = 0j, eps: float = 0.0) -> np.ndarray:
    """Predicted readings: the coupler's leakage d spoils both ports (fit-box's model)."""
    gin = (co[:, 0] * g + co[:, 1]) / (co[:, 2] * g + 1.0)
    return (1.0 + eps) * np.abs(gin + d) / np.abs(1.0 + gin * d)


def leak_at(leak_cal: float, f_hz: float) -> float:
    """The coupler's leakage magnitude at f_hz from the calibrated one (capacitive: grows with f)."""
    return max(LEAK_FLOOR, leak_cal * f_hz / LEAK_CAL_HZ)


class LoadSolver:
    """Solves tunes' traces for their loads on one bank (the board's element values)."""

    def __init__(self, bank: lnet.Bank, element_sigma: float, leak_cal: float = LEAK_DEFAULT):
        self.bank = bank
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
        co = _coefs(self.bank, tr.freq_hz, tr.states)
        m = np.asarray(tr.gamma, dtype=float)
        sig = READING_SIGMA
        # Start: the best point of a dense grid over the reflection disc (no basin missed).
        pred = np.abs((co[:, 0:1] * self._grid + co[:, 1:2]) / (co[:, 2:3] * self._grid + 1.0))
        j = int(np.argmin(((pred - m[:, None]) ** 2).sum(axis=0)))
        q0 = _q_of(complex(self._grid[j]))

        def resid(q, co=co, d=0j, eps=0.0):
            return (_reading(co, _g_of(q), d, eps) - m) / sig

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
        # Systematic errors through the solution: dq = -H^-1 J^T dr/dnuisance.
        leak = leak_at(self.leak_cal, tr.freq_hz)
        cols, sds = [], []
        for d, s in ((1e-4 + 0j, leak / math.sqrt(2)), (1e-4j, leak / math.sqrt(2))):
            cols.append((resid(q, d=d) - resid(q, d=-d)) / (2 * abs(d)))
            sds.append(s)
        cols.append((resid(q, eps=1e-4) - resid(q, eps=-1e-4)) / 2e-4)
        sds.append(GAIN_SIGMA)
        for pb in self.perturbed:
            cols.append((resid(q, co=_coefs(pb, tr.freq_hz, tr.states)) - r0) / _H)
            sds.append(self.element_sigma)
        jn = np.array(cols).T * np.array(sds)[None, :]
        k = -hinv @ jac.T @ jn
        cov_q_sys = k @ k.T
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
        """The load the best-read state matches exactly, with the reading's circle
        (|gamma_in| = m, phase unknown: m / sqrt(2) per axis) as its spread."""
        i = int(np.argmin(tr.gamma))
        st = tr.states[i:i + 1]
        m = float(tr.gamma[i])
        z0 = self.bank.z0

        def g0(bank):
            a, b, _c = _coefs(bank, tr.freq_hz, st)[0]
            return -b / a if a != 0 else None

        a, b, c = _coefs(self.bank, tr.freq_hz, st)[0]
        if a == 0:
            return None
        g = -b / a
        if abs(g) >= 1.0:
            return None  # the reading cannot be of a passive load through this state
        k = (a - b * c) / (a * a)  # d g / d gamma_in at gamma_in = 0
        dzdg = 2 * z0 / (1 - g) ** 2
        leak = leak_at(self.leak_cal, tr.freq_hz)
        # The reading's noise averages over repeated tunes; where on its circle the load
        # lies, and the leakage, do not (the same state reads alike every time).
        gain = abs(dzdg * k) ** 2 / 2
        cov_rand = np.eye(2) * gain * READING_SIGMA ** 2
        cov_sys = np.eye(2) * gain * (m * m + leak * leak)
        for pb in self.perturbed:
            gp = g0(pb)
            if gp is None:
                continue
            dz = dzdg * (gp - g) / _H * self.element_sigma
            v = np.array([dz.real, dz.imag])
            cov_sys += np.outer(v, v)
        return LoadEstimate(tr.freq_hz, _z_of(g, z0), cov_rand, cov_sys, len(tr.gamma))


def combine(ests: list[LoadEstimate]) -> CurvePoint:
    """Tunes of one bin as one point: inverse-covariance weighted; the random part
    averages down, the systematic part (shared by every tune) does not, and a
    scatter larger than the stated errors widens the result (Birge ratio)."""
    zs = np.array([[e.z.real, e.z.imag] for e in ests])
    ws = [np.linalg.inv(e.cov + np.eye(2) * 1e-12) for e in ests]
    wsum = sum(ws)
    winv = np.linalg.inv(wsum)
    zbar = winv @ sum(w @ z for w, z in zip(ws, zs))
    share = np.array([np.trace(w) for w in ws])
    share = share / share.sum()
    cov_rand = winv @ sum(w @ e.cov_rand @ w.T for w, e in zip(ws, ests)) @ winv.T
    cov_sys = sum(s * e.cov_sys for s, e in zip(share, ests))
    cov = cov_rand + cov_sys
    if len(ests) > 1:
        chi2 = sum(float((z - zbar) @ w @ (z - zbar)) for w, z in zip(ws, zs))
        cov = cov * max(1.0, chi2 / (2 * (len(ests) - 1)))
    f = float(np.mean([e.freq_hz for e in ests]))
    return CurvePoint(f, complex(zbar[0], zbar[1]), cov, len(ests), sum(e.readings for e in ests), list(ests))


def curve_points(ests: list[LoadEstimate], bin_hz: float) -> list[CurvePoint]:
    by: dict[int, list[LoadEstimate]] = {}
    for e in ests:
        by.setdefault(int(e.freq_hz // bin_hz), []).append(e)
    return [combine(by[b]) for b in sorted(by)]


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


def solve_records(recs: list[dict[str, Any]], bank: lnet.Bank, learned: bool,
                  leak_cal: float = LEAK_DEFAULT) -> list[LoadEstimate]:
    """Every tune record with readings, solved for its load (in the records' order)."""
    solver = LoadSolver(bank, ELEMENT_SIGMA_LEARNED if learned else ELEMENT_SIGMA_NOMINAL, leak_cal)
    out = []
    for r in recs:
        if r.get("outcome") == "preset":
            continue
        t = r.get("trace")
        if not isinstance(t, list) or len(t) < 4:
            continue
        f = r.get("freq_hz") or 0.0
        try:
            a = np.asarray(t[: len(t) // 4 * 4], dtype=float).reshape(-1, 4)
        except (TypeError, ValueError):
            continue  # a damaged trace: that tune says nothing
        if not isinstance(f, (int, float)) or f <= 0 or not np.isfinite(a).all():
            continue
        e = solver.solve(Trace(float(f), a[:, :3].astype(int), a[:, 3] / 1000.0))
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

    from fmlogic.config import DEFAULTS, bank_from

    from feedmatch.logbook.store import open_existing

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
    learned_any = False
    for key, recs in by_board.items():
        sec = sections.get(key) or {}
        bank = None
        if isinstance(sec.get("network"), dict):
            try:
                bank = bank_from(sec)
            except (KeyError, TypeError, ValueError):
                bank = None
        learned = bank is not None and isinstance(sec.get("correction"), dict)
        learned_any |= learned
        if bank is None:
            bank = nominal
        if bank is None:
            continue
        leak = (sec.get("detector") or {}).get("leak", LEAK_DEFAULT)
        ests += solve_records(recs, bank, learned, float(leak) if isinstance(leak, (int, float)) else LEAK_DEFAULT)
    pts = curve_points(ests, float(DEFAULTS["memory"]["bin_hz"]))
    times = [e.time for e in ests if e.time]
    return {"points": pts, "resonances": resonances(pts), "tunes": len(ests),
            "first": min(times) if times else None, "last": max(times) if times else None,
            "element_sigma": ELEMENT_SIGMA_LEARNED if learned_any else ELEMENT_SIGMA_NOMINAL,
            "learned": learned_any, "boards": sorted(by_board)}
