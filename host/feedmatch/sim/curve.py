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

The model of a state is the box as its logbook shows it (BoxModel, learned by
learn_extras from every multi-reading trace at once, as fit-box learns the
elements): the element values (fit-box's as the start and prior), the node
strays, the capacitance across an open relay contact, the elements' lead
inductance, and the measurement chain: the coupler's leakage (growing with
frequency, its phase learned) and each detector's gain and offset acting
through the board's own calibration tables.  Measured on the bench's drawn
boxes (bench/curve.py), leaving the strays and the detectors' law out of the
model was what limited the curve: with the true box's values the solution is
within 0.2 % (median), with fit-box's values and node strays alone 11 %.

Uncertainty (one standard deviation, linearised, GUM-style): the readings'
noise (the learned fit's residual, scaled up by a trace's own where it has
degrees of freedom to show one), and, propagated through the solution, the
systematic errors no reading can average out: every parameter of the box
model with the learned fit's covariance, plus a shared scale per bank that
the fit leaves open (COMMON_SCALE_SIGMA).  Tunes in the same memory bin are
combined: the random part averages down, the systematic part does not.
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
ELEMENT_SIGMA_LEARNED = 0.02  # fit-box's values: within 1.9 % on drawn boxes from 400 tunes (cli/fitbox.py)
ELEMENT_SIGMA_NOMINAL = 0.05  # the parts' tolerance when nothing was learned
LEAK_CAL_HZ = 14.2e6         # `feedmatch calibrate` measures the leakage here
LEAK_FLOOR = 0.01            # 40 dB: the directivity cap of the detector model
LEAK_DEFAULT = 0.056         # fmlogic.search.LEAK_DEFAULT: 25 dB, when the board's is unknown


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
    # The state a one- or two-reading tune's load rests on (l, c, shunt): recalls of one
    # state share where on its circle the load lies.
    state: tuple[int, int, int] | None = None

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


def _bits(codes: np.ndarray, n: int) -> np.ndarray:
    return ((np.asarray(codes, dtype=np.int64)[:, None] >> np.arange(n)[None, :]) & 1).astype(float)


def _bypass(states: np.ndarray) -> np.ndarray:
    st = np.asarray(states)
    return (st[:, 0] == 0) & (st[:, 1] == 0) & (st[:, 2] == 1)


# The box as the curve sees it, in the order of BoxModel.p after one log-scale per element
# (inductors, then capacitors, relative to the board's values): the stray capacitance at
# the transmitter and antenna nodes (pF / 10), the capacitance across an open relay
# contact (pF), the series lead inductance of each element (nH / 10), the reflected/forward
# gain (log), the coupler's leakage at 28 MHz (re, im; growing in proportion to
# frequency, as fit-box models it) and a reflected-detector offset (|gamma| x 10).
# The strays are the usual ones of a relay-switched bank (common practice: a pF or two
# across an open contact, a few pF from each node to the chassis, about 1 nH per mm of
# lead); their values are learned from the logbook, never taken from the bench's boxes.
N_EXTRAS = 10
_CIN, _COUT, _CREL, _LEAD, _GF, _GR, _DRE, _DIM, _OFF, _LP = range(N_EXTRAS)
DET_GAIN_SIGMA_DB = 0.3  # each detector's gain after the bench calibration (sim/boxes.py's spread, from memory)
OFFSET_SIGMA_COUNTS = 1.0  # a detector's offset, counts (common practice for a 12-bit ADC front end)
TUNE_W = 10.0  # the tune carrier the readings are taken at when the logbook does not say (prior centre)


class Detectors:
    """The box's two detector calibrations (counts to watts, log-log piecewise linear as
    fmlogic.swr.Calibration), vectorised: a reading is what these tables make of the
    detectors' counts, so the gains and offsets the calibration missed act through them."""

    def __init__(self, fwd_points, ref_points, floor_counts: float = 2.0):
        self.tabs = [(np.log([float(c) for c, _w in pts]), np.log([float(w) for _c, w in pts]))
                     for pts in (fwd_points, ref_points)]
        self.floor = float(floor_counts)

    @staticmethod
    def of_section(det: dict | None) -> Detectors:
        from feedmatch.seam.logic import DEFAULTS

        d = DEFAULTS["detector"] | (det if isinstance(det, dict) else {})
        try:
            return Detectors(d["fwd"], d["ref"], float(d.get("floor_counts", 2.0)))
        except (TypeError, ValueError, KeyError):
            dd = DEFAULTS["detector"]
            return Detectors(dd["fwd"], dd["ref"], dd["floor_counts"])

    @staticmethod
    def _interp(x, xs, ys):
        lo = ys[0] + (x - xs[0])  # below the table: square law (as the firmware's watts())
        hi = ys[-1] + (x - xs[-1]) * (ys[-1] - ys[-2]) / (xs[-1] - xs[-2])
        return np.where(x < xs[0], lo, np.where(x > xs[-1], hi, np.interp(x, xs, ys)))

    def reading(self, p_fwd, p_ref, x: np.ndarray) -> np.ndarray:
        """|gamma| the meter reads for true port powers (W) with the gains (dB) and offset
        (counts) in x: counts = gain x the table's counts for the power + offset."""
        out = []
        for (lc, lw), pw, gdb in ((self.tabs[0], p_fwd, x[_GF]), (self.tabs[1], p_ref, x[_GR])):
            c = np.exp(self._interp(np.log(np.maximum(pw, 1e-12)), lw, lc)) * 10 ** (gdb / 20) + x[_OFF]
            out.append(np.exp(self._interp(np.log(np.maximum(c, 1e-3)), lc, lw)))
        return np.sqrt(np.minimum(out[1] / out[0], 1.0))

    def floor_gamma(self, p_fwd, x: np.ndarray) -> np.ndarray:
        """The |gamma| a reading has at the reflected detector's floor (the board reads
        counts at or below it as no power, a reading of zero: fmlogic.swr.Calibration)."""
        (lc, lw), gdb = self.tabs[0], x[_GF]
        cf = np.exp(self._interp(np.log(np.maximum(p_fwd, 1e-12)), lw, lc)) * 10 ** (gdb / 20) + x[_OFF]
        wf = np.exp(self._interp(np.log(np.maximum(cf, 1e-3)), lc, lw))
        lcr, lwr = self.tabs[1]
        wfl = np.exp(self._interp(np.log(np.asarray(max(self.floor, 1e-3))), lcr, lwr))
        return np.sqrt(np.minimum(wfl / wf, 1.0))


def censor(pred: np.ndarray, m: np.ndarray, gfloor: np.ndarray) -> np.ndarray:
    """The prediction a reading is compared with: a zero reading says only that the
    reflected counts were at or below the floor (a censored reading, some 0.04 of |gamma|
    at the tune power), so a prediction below the floor's level explains it exactly and
    one above it misses by the excess (taken as zero, it pulled the model: measured on the
    bench's drawn boxes, 1 % of the readings are zeros)."""
    return np.where(m <= 0.0, np.maximum(pred - gfloor, 0.0), pred)
STRAY_SIGMA_PF = 5.0   # node strays when nothing was learned (prior spread, from memory)
RELAY_SIGMA_PF = 2.0   # open relay contacts: 0.5-2 pF in relay datasheets (from memory)
# The antenna-node stray once learned (see learn_extras): measured on ten drawn boxes with
# 8 pF strays (the bench's six and four others, seeds 8201-8204), the learned value was
# 0.1-3.2 pF off, rms 1.9 pF (2.3 pF on the four outside the bench).
STRAY_OUT_LEARNED_SIGMA_PF = 2.0
LEAD_SIGMA_NH = 20.0   # leads of a few cm (about 1 nH per mm, common practice)


@dataclass
class BoxModel:
    """What shapes a box's readings: its element values (log scales on the board's bank),
    strays and coupler, with their covariance (the element scales first)."""

    bank: lnet.Bank
    p: np.ndarray
    cov: np.ndarray
    reading_sigma: float = READING_SIGMA
    learned: bool = False
    det: Detectors | None = None

    def read(self, gin, f_hz, x: np.ndarray, m: np.ndarray | None = None) -> np.ndarray:
        """The reading of a true gamma_in through the coupler (its leakage spoiling both
        ports, growing with frequency) and the detectors (gains, offset, at the tune power);
        with the readings m given, what each is compared with (zero readings censored)."""
        d = (np.asarray(f_hz) / 28e6) * (x[_DRE] + 1j * x[_DIM])
        pw = TUNE_W * math.exp(x[_LP])
        det = self.det or Detectors.of_section(None)
        pf = pw * np.abs(1 + gin * d) ** 2
        g = det.reading(pf, pw * np.abs(gin + d) ** 2, x)
        return g if m is None else censor(g, m, det.floor_gamma(pf, x))

    @staticmethod
    def unknown(bank: lnet.Bank, leak_cal: float = LEAK_DEFAULT,
                element_sigma: float = ELEMENT_SIGMA_LEARNED, det: Detectors | None = None) -> BoxModel:
        """Nothing learned: the board's values with their spread, no strays, no leakage,
        equal gains (the leakage's phase unknown, its magnitude the calibrated one at 28 MHz)."""
        leak28 = max(leak_cal * 28e6 / LEAK_CAL_HZ, LEAK_FLOOR)
        sd = [element_sigma] * (bank.nl + bank.nc) + [
            STRAY_SIGMA_PF / 10, STRAY_SIGMA_PF / 10, RELAY_SIGMA_PF, LEAD_SIGMA_NH / 10, DET_GAIN_SIGMA_DB,
            DET_GAIN_SIGMA_DB, leak28 / math.sqrt(2), leak28 / math.sqrt(2), OFFSET_SIGMA_COUNTS, 1.0]
        return BoxModel(bank, np.zeros(len(sd)), np.diag(np.square(sd)), det=det)

    @property
    def ne(self) -> int:
        return self.bank.nl + self.bank.nc

    def extras(self, p: np.ndarray | None = None) -> np.ndarray:
        return (self.p if p is None else p)[self.ne:]

    @property
    def strays_pf(self) -> tuple[float, float]:
        x = self.extras()
        return float(x[_CIN] * 10), float(x[_COUT] * 10)

    def network(self):
        """The box as a Network (rf/network.py): learned values and strays, for the presets."""
        from feedmatch.rf.network import Network

        b, p, x = self.bank, self.p, self.extras()
        ind = np.asarray(b.ind) * np.exp(p[:b.nl])
        cap = np.asarray(b.cap) * np.exp(p[b.nl:self.ne])
        net = Network(b.z0, [float(v) for v in ind], [float(v) for v in cap], b.ql or None, b.qc or None)
        if self.learned:
            net.stray_in_pf, net.stray_out_pf = max(float(x[_CIN]) * 10, 0.0), max(float(x[_COUT]) * 10, 0.0)
            net.relay_open_pf, net.lead_nh = max(float(x[_CREL]), 0.0), max(float(x[_LEAD]) * 10, 0.0)
        return net

    def gin(self, p: np.ndarray, f, bl: np.ndarray, bc: np.ndarray, sh: np.ndarray, g) -> np.ndarray:
        """gamma_in of each reading's state (bits bl, bc; shunt side sh) on its load g, the
        strays included (the same L-network as rf/network.py, one load per reading)."""
        b, nl, ne = self.bank, self.bank.nl, self.ne
        x = p[ne:]
        w = (2 * np.pi * np.asarray(f, dtype=float))[:, None]
        ind = np.asarray(b.ind) * np.exp(p[:nl]) * 1e-6
        cap = np.asarray(b.cap) * np.exp(p[nl:ne]) * 1e-12
        lead, crel = x[_LEAD] * 1e-8, x[_CREL] * 1e-12
        zk = w * ind * ((1 / b.ql) if b.ql else 0.0) + 1j * w * (ind + lead)
        zk = zk / (1 + 1j * w * crel * zk)  # the open contact across an inductor in circuit
        zs = (zk * bl).sum(axis=1)
        yk = w * cap * ((1 / b.qc) if b.qc else 0.0) + 1j * w * cap
        yk = yk / (1 + 1j * w * lead * yk)
        yo = 1j * w * cap * crel / (cap + crel)  # a capacitor hanging on through its open contact
        yc = (yk * bc).sum(axis=1) + (yo * (1 - bc)).sum(axis=1)
        z0 = b.z0
        w1 = w[:, 0]
        g = np.asarray(g)
        yl = (1 - g) / (z0 * (1 + g)) + 1j * w1 * x[_COUT] * 1e-11
        with np.errstate(divide="ignore", invalid="ignore"):
            z_ant = zs + 1.0 / (yl + yc)
            z_tx = 1.0 / (1.0 / (zs + 1.0 / yl) + yc)
            z = np.where(sh == 1, z_ant, z_tx)
            z = 1.0 / (1.0 / z + 1j * w1 * x[_CIN] * 1e-11)
        return (z - z0) / (z + z0)

    def coefs(self, p: np.ndarray, f_hz: float, states: np.ndarray) -> np.ndarray:
        """(n, 3) complex: each state's Moebius coefficients a, b, c (gamma_in = (a g + b) /
        (c g + 1)), strays included; the bypass relay is the identity (the antenna alone)."""
        st = np.asarray(states)
        n = len(st)
        bl, bc = _bits(st[:, 0], self.bank.nl), _bits(st[:, 1], self.bank.nc)
        f = np.full(n, f_hz)
        gs = (0.0, 0.5, -0.5j)
        gm = [self.gin(p, f, bl, bc, st[:, 2], np.full(n, g, dtype=complex)) for g in gs]
        bb = gm[0]
        # gamma_k (c g_k + 1) = a g_k + b for the two other loads: a g_k - c g_k gamma_k = gamma_k - b.
        g1, g2 = gs[1], gs[2]
        r1, r2 = gm[1] - bb, gm[2] - bb
        det = g1 * (-g2 * gm[2]) - (-g1 * gm[1]) * g2
        a = (r1 * (-g2 * gm[2]) - (-g1 * gm[1]) * r2) / det
        c = (g1 * r2 - g2 * r1) / det
        out = np.stack([a, bb, c], axis=1)
        out[_bypass(st)] = (1.0, 0.0, 0.0)
        return out


def _predict(md: BoxModel, co: np.ndarray, byp: np.ndarray, f_hz, g, x: np.ndarray,
             grid: bool = False, m: np.ndarray | None = None) -> np.ndarray:
    """Readings |gamma| of states (Moebius coefficients co, strays included) on loads g
    (with the readings m: what each is compared with, zero readings censored)."""
    a, b, c = co[:, 0], co[:, 1], co[:, 2]
    if grid:  # every reading on each of many loads (the grid start): shape (readings, loads)
        a, b, c, byp = a[:, None], b[:, None], c[:, None], np.asarray(byp)[:, None]
        m = None if m is None else np.asarray(m)[:, None]
    gin = np.where(byp, g, (a * g + b) / (c * g + 1.0))
    return md.read(gin, f_hz, x, m)


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


_HP = 1e-5  # step of the numerical derivatives in the model's parameters


class LoadSolver:
    """Solves tunes' traces for their loads on one box model (the board's element values,
    with the strays and coupler learned from the logbook when there are enough tunes)."""

    def __init__(self, bank: lnet.Bank, element_sigma: float, leak_cal: float = LEAK_DEFAULT,
                 extras: BoxModel | None = None):
        self.bank = bank
        self.model = extras or BoxModel.unknown(bank, leak_cal, element_sigma)
        self.extras = self.model
        self.element_sigma = element_sigma
        self.leak_cal = leak_cal
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

    def _perturbed(self, f: float, states: np.ndarray):
        """For each model parameter i: (p + h e_i, its coefficients, p - h e_i, its coefficients)."""
        md = self.model
        out = []
        for i in range(len(md.p)):
            dp = np.zeros(len(md.p))
            dp[i] = _HP
            out.append((md.p + dp, md.coefs(md.p + dp, f, states), md.p - dp, md.coefs(md.p - dp, f, states)))
        return out

    def fit_q(self, tr: Trace, co: np.ndarray | None = None):
        """The load (tanh parametrisation) that best explains the trace's readings, and the
        residual function it was fitted with; None for a degenerate trace."""
        md = self.model
        co = md.coefs(md.p, tr.freq_hz, tr.states) if co is None else co
        byp = _bypass(tr.states)
        m = np.asarray(tr.gamma, dtype=float)
        sig = md.reading_sigma
        x0 = md.extras()
        f = tr.freq_hz
        # Start: the best point of a dense grid over the reflection disc (no basin missed).
        pred = _predict(md, co, byp, f, self._grid, x0, grid=True, m=m)
        j = int(np.argmin(((pred - m[:, None]) ** 2).sum(axis=0)))
        q0 = _q_of(complex(self._grid[j]))

        def resid(q, co=co, x=x0):
            return (_predict(md, co, byp, f, _g_of(q), x, m=m) - m) / sig

        sol = least_squares(resid, q0, method="lm", xtol=1e-10, ftol=1e-10)
        return sol.x, resid

    # -- three or more readings: weighted least squares ---------------------------
    def _solve_circles(self, tr: Trace) -> LoadEstimate | None:
        md = self.model
        z0 = self.bank.z0
        m = np.asarray(tr.gamma, dtype=float)
        q, resid = self.fit_q(tr)
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
        # Systematic errors through the solution: dq = -H^-1 J^T dr/dp, p the box model's
        # parameters (element values, strays, coupler) with their covariance.
        ne = md.ne
        jp = np.array([(resid(q, co=cp, x=pp[ne:]) - resid(q, co=cm, x=pm[ne:])) / (2 * _HP)
                       for pp, cp, pm, cm in self._perturbed(tr.freq_hz, tr.states)]).T
        kp = -hinv @ jac.T @ jp
        cov_q_sys = kp @ md.cov @ kp.T
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
        md = self.model
        ne = md.ne

        def g_match(co, x):
            # The reading is zero where gamma_in + d is: invert the state's Moebius map.
            d = (f / 28e6) * (x[_DRE] + 1j * x[_DIM])
            gin = -d
            a, b, c = co[0]
            return (b - gin) / (gin * c - a)

        co = md.coefs(md.p, f, st)
        g = g_match(co, md.extras())
        if not abs(g) < 1.0:
            return None  # the reading cannot be of a passive load through this state
        dzdg = 2 * z0 / (1 - g) ** 2
        a, b, c = co[0]
        k = (a - b * c) / (a * a)
        gain = abs(dzdg * k) ** 2 / 2
        # The reading's noise averages over repeated tunes; where on its circle the load
        # lies does not (the same state reads alike every time).
        cov_rand = np.eye(2) * gain * md.reading_sigma ** 2
        if m <= 0.0:
            # A zero reading (at or below the reflected detector's floor): the load lies
            # anywhere within the floor's circle, not on a circle of radius zero (a uniform
            # disc of radius r has r^2 / 4 per axis, a circle r^2 / 2).
            x0 = md.extras()
            d0 = (f / 28e6) * complex(x0[_DRE], x0[_DIM])
            pf = TUNE_W * math.exp(x0[_LP]) * abs(1 - d0 * d0) ** 2
            m = float((md.det or Detectors.of_section(None)).floor_gamma(np.asarray(pf), x0)) / math.sqrt(2)
        cov_own = np.eye(2) * gain * m * m
        cols = []
        for pp, cp, pm, cm in self._perturbed(f, st):
            dz = dzdg * (g_match(cp, pp[ne:]) - g_match(cm, pm[ne:])) / (2 * _HP)
            cols.append([dz.real, dz.imag])
        jp = np.array(cols).T
        cov_sys = cov_own + jp @ md.cov @ jp.T
        return LoadEstimate(f, _z_of(g, z0), cov_rand, cov_sys, len(tr.gamma), cov_own=cov_own,
                            state=(int(st[0][0]), int(st[0][1]), int(st[0][2])))


LEARN_MAX_NFEV = 100  # the fit's evaluations: about 20-35 s for 300 traces on one core
COMMON_SCALE_SIGMA = 0.03  # a shared scale per bank the model leaves open (see learn_extras)
ELEMENT_SCATTER_SIGMA = ELEMENT_SIGMA_LEARNED  # ... and each element apart from it
# Fewer multi-reading tunes than this (some 300 readings) leave the model's 24 numbers to the
# priors: the element values are then held at the board's (fit-box itself asks for 20 uses per
# element) and only the strays and the coupler are learned.
MIN_LEARN_TRACES = 30
SPLIT = False  # delete-half on the bench: coverage 0.68 -> 0.68 without the shared scale, not worth twice the time
MIN_HELD_TRACES = 8  # below it nothing is learned (the strays and coupler need a few tunes)


def learn_extras(bank: lnet.Bank, traces: list[Trace], leak_cal: float = LEAK_DEFAULT,
                 max_traces: int = 300, element_sigma: float = ELEMENT_SIGMA_LEARNED, p0=None,
                 det: Detectors | None = None, split: bool | None = None) -> BoxModel:
    """The box as its tunes show it, learned as fit-box learns the elements but with the
    strays in the model: non-linear least squares over every multi-reading trace at once
    (each with its own load) for the element values (a prior at the board's values, with
    element_sigma), the node strays, the open-contact and lead strays and the coupler.
    The strays show through the bypass readings (the antenna alone) against the network's
    and through how the elements' effect changes with frequency; the coupler through the
    spread of states.  Their covariance is the fit's (Gauss-Newton, scaled by the
    residual), so the curve's uncertainty carries how well they are known.  Too few
    traces: nothing is learned."""
    from scipy.sparse import lil_matrix

    trs = [t for t in traces if len(t.gamma) >= 3][:max_traces]
    unknown = BoxModel.unknown(bank, leak_cal, element_sigma, det)
    if len(trs) < MIN_HELD_TRACES:
        return unknown
    # Few tunes: the strays and coupler only, the element values held at the board's.
    held = len(trs) < MIN_LEARN_TRACES
    nl, nc, ne = bank.nl, bank.nc, bank.nl + bank.nc
    npar = ne + N_EXTRAS
    st = np.concatenate([t.states for t in trs])
    bl, bc, sh = _bits(st[:, 0], nl), _bits(st[:, 1], nc), st[:, 2]
    byp = _bypass(st)
    f = np.concatenate([np.full(len(t.gamma), t.freq_hz) for t in trs])
    m = np.concatenate([t.gamma for t in trs])
    owner = np.concatenate([np.full(len(t.gamma), i) for i, t in enumerate(trs)])
    if p0 is None:
        # Start inside the bounds, at small strays of the usual kind (common practice), not at
        # zero where a bound holds them: the fit finds the box's own from there.
        p0 = np.zeros(ne + N_EXTRAS)
        p0[ne + _CIN] = p0[ne + _COUT] = 0.4
        p0[ne + _CREL] = 0.5
        p0[ne + _LEAD] = 1.0
    start = BoxModel(bank, np.asarray(p0, float), unknown.cov, det=det)
    solver = LoadSolver(bank, element_sigma, leak_cal, start)
    q0 = [solver.fit_q(t)[0] for t in trs]
    k = len(trs)
    prior_sd = np.sqrt(np.diag(unknown.cov))
    # Held: the element values, the contact and lead strays and the detectors stay at their
    # start (a few tunes cannot tell them from the loads); the node strays and the leakage are learned.
    fixed = np.r_[np.arange(ne), ne + np.array([_CREL, _LEAD, _GF, _GR, _OFF, _LP])] if held else np.array([], int)
    prior_sd[fixed] = 1e-4

    def resid(x):
        p = x[:npar]
        q = x[npar:].reshape(k, 2)
        v = q[:, 0] + 1j * q[:, 1]
        a = np.abs(v)
        g = np.where(a > 1e-12, np.tanh(a) / np.maximum(a, 1e-12), 1.0) * v
        gin = np.where(byp, g[owner], unknown.gin(p, f, bl, bc, sh, g[owner]))
        pred = unknown.read(gin, f, p[ne:], m)
        # A prior: the elements near the board's values, the extras weakly where they were.
        pr = p / prior_sd
        pr[ne:] /= 3
        return np.concatenate([(pred - m) / READING_SIGMA, pr])

    sp = lil_matrix((len(m) + npar, npar + 2 * k), dtype=int)
    for r in range(len(m)):
        sp[r, :npar] = 1
        sp[r, npar + 2 * owner[r]] = 1
        sp[r, npar + 2 * owner[r] + 1] = 1
    for j in range(npar):
        sp[len(m) + j, j] = 1
    x0 = np.concatenate([start.p, np.ravel(q0)])
    lo = np.full(len(x0), -np.inf)
    for j in (_CIN, _COUT, _CREL, _LEAD):
        lo[ne + j] = 0.0  # capacitances and inductances are never negative
    sol = least_squares(resid, x0, jac_sparsity=sp, method="trf", loss="soft_l1", f_scale=3.0, max_nfev=LEARN_MAX_NFEV,
                        x_scale="jac", bounds=(lo, np.inf))
    r = sol.fun[: len(m)]
    sigma = max(READING_SIGMA * float(np.sqrt(np.median(r ** 2) / 0.455)), 0.005)  # robust rms (median chi2_1)
    jac = sol.jac.toarray() if hasattr(sol.jac, "toarray") else np.asarray(sol.jac)
    try:
        # pinv: a trace whose readings cannot place its load leaves its own columns singular.
        # The readings at the noise the fit shows, the priors as they were stated.
        jd, jp = jac[: len(m)] * (READING_SIGMA / sigma), jac[len(m):]
        cov_all = np.linalg.pinv(jd.T @ jd + jp.T @ jp)
    except np.linalg.LinAlgError:
        return unknown
    cov = cov_all[:npar, :npar].copy()
    if not np.all(np.isfinite(cov)):
        return unknown
    # What the model still leaves out (the detectors' law between the calibration's points,
    # each element's own Q) the fit soaks up as all inductors a few per cent one way and
    # all capacitors the other (measured on the bench's drawn boxes: 2-5 %), however tight
    # its own covariance: a shared scale per bank keeps that spread.
    if held:
        cov[fixed, :] = 0.0
        cov[:, fixed] = 0.0
        cov[fixed, fixed] = np.diag(unknown.cov)[fixed]
    if (SPLIT if split is None else split) and not held and len(trs) >= 2 * MIN_LEARN_TRACES:
        # Delete-half (as fit-box --split): the fits of the even and the odd tunes differ by
        # what the readings leave open, the model's own omissions included; half their
        # difference, with its direction across the parameters, joins the covariance.
        a = learn_extras(bank, trs[0::2], leak_cal, max_traces, element_sigma, sol.x[:npar], det, split=False)
        b = learn_extras(bank, trs[1::2], leak_cal, max_traces, element_sigma, sol.x[:npar], det, split=False)
        d = (a.p - b.p) / 2
        cov += np.outer(d, d)
    one_l = np.r_[np.ones(nl), np.zeros(npar - nl)]
    one_c = np.r_[np.zeros(nl), np.ones(nc), np.zeros(N_EXTRAS)]
    cov += COMMON_SCALE_SIGMA ** 2 * (np.outer(one_l, one_l) + np.outer(one_c, one_c))
    # ... and each element on its own, as fit-box states its values (ELEMENT_SIGMA_LEARNED;
    # measured on the same boxes: 0.5-2 % apart from the shared scale; bench coverage 86.4 -> 87.2 %).
    cov[:ne, :ne] += np.diag(np.full(ne, ELEMENT_SCATTER_SIGMA ** 2))
    # The stray at the antenna node sits across the load in every state: to the network's
    # readings it is part of the antenna's own shunt capacitance, and only the bypass
    # readings (the antenna alone, mostly high |gamma|, where the gain ratio and the
    # detectors' law act unlike at the network's low readings) tell it apart.  The fit
    # states it to 0.4-0.5 pF; it is known no better than STRAY_OUT_LEARNED_SIGMA_PF.
    i = ne + _COUT
    cov[i, i] = max(cov[i, i], (STRAY_OUT_LEARNED_SIGMA_PF / 10) ** 2)
    return BoxModel(bank, sol.x[:npar].copy(), cov, sigma, True, det)


def combine(ests: list[LoadEstimate]) -> CurvePoint:
    """Tunes of one bin as one point: a weighted mean, each tune weighted by what it does
    not share with the others (its readings' noise and, for a one-reading tune, where on
    its reading's circle the load lies; scalar weights, so errors the tunes share cannot
    pull R against X).  Recalls of one state share their circle (the same state reads
    alike every time), so they count together as one.  The random part averages down,
    the shared systematic part (element values, strays, coupler) does not, and a scatter
    larger than the stated errors widens the result (Birge ratio).  Weighted by the whole
    covariance, three recalls of a state outweighed the bin's cold tune whose several
    readings had fixed the load (the demo's 15 m point: 8.6 % off, the cold tune alone 0.1 %)."""
    groups: dict[Any, list[LoadEstimate]] = {}
    for i, e in enumerate(ests):
        groups.setdefault(e.state if e.state is not None else i, []).append(e)
    zs, own, rand, shared = [], [], [], []
    for g in groups.values():
        n = len(g)
        zs.append(np.mean([[e.z.real, e.z.imag] for e in g], axis=0))
        rand.append(sum(e.cov_rand for e in g) / (n * n))
        ow = sum(e.cov_own if e.cov_own is not None else np.zeros((2, 2)) for e in g) / n
        own.append(ow)
        shared.append(sum(e.cov_sys for e in g) / n - ow)
    zs_a = np.array(zs)
    w = np.array([1.0 / max(float(np.trace(r + o)), 1e-12) for r, o in zip(rand, own)])
    w = w / w.sum()
    zbar = w @ zs_a
    cov = (sum(wi * wi * (r + o) for wi, r, o in zip(w, rand, own))
           + sum(wi * sh for wi, sh in zip(w, shared)))
    if len(ests) > 1:
        zz = np.array([[e.z.real, e.z.imag] for e in ests])
        chi2 = sum(float(np.sum((z - zbar) ** 2 / np.maximum(np.diag(e.cov), 1e-12))) for z, e in zip(zz, ests))
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
                  leak_cal: float = LEAK_DEFAULT, extras: BoxModel | None = None) -> list[LoadEstimate]:
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
        extras = learn_extras(bank, [t for t in (_trace_of(r) for r in recs) if t is not None], leak,
                              element_sigma=ELEMENT_SIGMA_LEARNED if learned else ELEMENT_SIGMA_NOMINAL,
                              det=Detectors.of_section(sec.get("detector")))
        learned_extras = learned_extras or extras.learned
        ests += solve_records(recs, bank, learned, leak, extras)
        if len(recs) > most:  # the board with the most tunes speaks for the box
            most, main_bank, main_extras, main_key = len(recs), bank, extras, key
    # The bins of that board's memory (the logger keeps its width), else the shipped ones.
    bin_hz = bin_width(sections.get(main_key))
    pts = curve_points(ests, bin_hz)
    times = [e.time for e in ests if e.time]
    return {"points": pts, "resonances": resonances(pts), "tunes": len(ests), "bin_hz": bin_hz,
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


def antenna_health(points: list[CurvePoint], bin_hz: float | None = None) -> dict[str, Any]:
    """Each bin's earlier tunes against its later ones (the halves of its tunes in time):
    R and X, and the resonances the two halves locate, each change judged against the
    uncertainty of the difference (the errors both periods share cancel in it).
    bin_hz: the width of the bins the points were made with (the board's memory's, as
    measured_curve returns it); the shipped width when None.
    Returns {"bands": {band: {"flag", "notes"}}, "notes": [antenna-wide notes]}."""
    from feedmatch.rf import bands
    from feedmatch.seam.logic import bin_width

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
        width = bin_hz if bin_hz else bin_width(None)
        r1, r2 = resonances(curve_points(early_all, width)), resonances(curve_points(late_all, width))
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
    h = antenna_health(cur["points"], cur["bin_hz"])
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
