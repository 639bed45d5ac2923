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


# -- refinement from logged tunes -------------------------------------------------------------

REFINE_MAX_TRACES = 200   # the logged tunes a refinement uses (the newest when more are given)
REFINE_MIN_TRACES = 20    # fewer say too little about four leakage numbers and a gain ratio
REFINE_MAX_SD = 0.02      # one sigma on a leakage vector (|gamma|) beyond which it is not written
# |gamma| a refinement may leave unexplained: on drawn boxes with the default strays
# (sim.boxes) it left 0.027-0.048 (the model has no strays); more says the detector
# calibration or the model is off.
REFINE_MAX_RMS = 0.06
# The fewest tunes whose refinement is written: two logbooks of independent tunes on one
# box (4 drawn boxes, 15-30 dB) disagreed by up to 4.5 combined sigmas of the stated
# uncertainty with 80 tunes each, 2.6 with 120, 1.1 with 200.
REFINE_MIN_WRITE = 150


def _load_grid(n_r: int = 24, n_th: int = 60) -> np.ndarray:
    r = np.linspace(0.02, 0.99, n_r)
    th = np.linspace(0, 2 * np.pi, n_th, endpoint=False)
    return (r[:, None] * np.exp(1j * th[None, :])).ravel()


def _gin_load(net: Network, scales: np.ndarray, st: np.ndarray, f: np.ndarray, zl: np.ndarray) -> np.ndarray:
    """gamma_in of states st at frequencies f on loads zl (one per row), nominal network with scales."""
    from feedmatch.sim.fitbox import _bits, _predict

    nl, nc = net.n_l, net.n_c
    return _predict(net, scales[:nl], scales[nl:], f, _bits(st[:, 0], nl), _bits(st[:, 1], nc), st[:, 2], zl,
                    complex_out=True)


def refine_from_traces(net: Network, traces: list, prior: CouplerFit | None = None,
                       max_traces: int = REFINE_MAX_TRACES, split: bool = True,
                       scales: list[float] | None = None) -> dict[str, Any]:
    """The coupler's error box refined from logged tunes (fmlogic.coupler's model):
    each trace's load is an unknown (two numbers, as in fit-box), the coupler
    terms (d_r, d_f, the gain ratio k) are shared by all traces.  The element
    values are held where the multi-state calibration put them (scales, by
    default the prior's own: the dummy load and the box's states measured them
    as they measured the coupler), so each state is a fixed Moebius map of its
    load and the fit stays small; what the model leaves out (strays) shows in
    the residual and the stated uncertainty.  Readings are the raw ones the log keeps (reflected over forward, the
    gain ratio not divided out).  prior: the multi-state calibration, a Gaussian
    prior of its own stated bound (err as three sigma); none: a weak one at zero
    leakage.  Weighted non-linear least squares (scipy's trust-region reflective
    solver, sparse Jacobian, a soft-L1 loss for the few tunes whose load settles
    in a wrong basin), started from the best grid load of each trace.

    The one-sigma uncertainty of the leakage vectors is the Gauss-Newton
    covariance (loads marginalised, scaled by the residual variance) and, with
    split, at least half the difference between fits of the even and the odd
    tunes (the delete-half estimate fit-box uses).  err, the bound the firmware
    takes, is three sigma and never below twice the rms residual."""
    from scipy.sparse import lil_matrix

    from feedmatch.sim.fitbox import MIN_READINGS

    traces = [t for t in traces if len(t.gamma) >= MIN_READINGS][-max_traces:]
    if len(traces) < REFINE_MIN_TRACES:
        raise ValueError(f"{len(traces)} tunes with readings; a coupler refinement needs at least "
                         f"{REFINE_MIN_TRACES}")
    nl, nc, k_tr = net.n_l, net.n_c, len(traces)
    st = np.concatenate([t.states for t in traces]).astype(int)
    m = np.concatenate([t.gamma for t in traces]).astype(float)
    f = np.concatenate([np.full(len(t.gamma), t.freq_hz) for t in traces])
    owner = np.concatenate([np.full(len(t.gamma), i) for i, t in enumerate(traces)])
    z0 = net.z0_ohm
    sig = 0.004 + 0.02 * m
    if prior is not None:
        c0 = np.array([prior.dr.real, prior.dr.imag, prior.df.real, prior.df.imag, math.log(prior.k)])
        psd = max(prior.err / 3.0, 0.003)
        csd = np.array([psd, psd, psd, psd, 0.03])
    else:
        c0 = np.zeros(5)
        csd = np.array([0.1, 0.1, 0.1, 0.1, 0.07])

    def err_box(p, g):
        dr = complex(p[0], p[1])
        df = complex(p[2], p[3])
        return math.exp(p[4]) * np.abs(g + dr) / np.abs(1 + df * g)

    if scales is None:
        scales = prior.scales if prior is not None else [1.0] * (nl + nc)
    ones = np.asarray(scales, dtype=float)

    def gin_at(gl: complex) -> np.ndarray:
        return _gin_load(net, ones, st, f, np.full(len(m), z0 * (1 + gl) / (1 - gl)))

    B = gin_at(0j)
    x1, x2 = 0.5, -0.5
    g1, g2 = gin_at(complex(x1)), gin_at(complex(x2))
    # a x - c x g(x) = g(x) - B at x1 and x2: two linear equations in a and c.
    det_ = x1 * (-x2 * g2) - (-x1 * g1) * x2
    A = ((g1 - B) * (-x2 * g2) - (-x1 * g1) * (g2 - B)) / det_
    C = (x1 * (g2 - B) - x2 * (g1 - B)) / det_

    grid = _load_grid()

    def grid_start(p, q_now=None, r_now=None):
        out = np.zeros((k_tr, 2)) if q_now is None else q_now.copy()
        for i in range(k_tr):
            sel = owner == i
            g = (A[sel, None] * grid[None, :] + B[sel, None]) / (C[sel, None] * grid[None, :] + 1)
            e = (((err_box(p, g) - m[sel, None]) / sig[sel, None]) ** 2).sum(axis=0)
            j = int(np.argmin(e))
            if r_now is not None and e[j] >= float(np.sum(r_now[sel] ** 2)):
                continue
            a = math.atanh(min(abs(grid[j]), 0.995))
            out[i] = (a * math.cos(np.angle(grid[j])), a * math.sin(np.angle(grid[j])))
        return out

    def resid(p):
        q = p[5:].reshape(k_tr, 2)
        v = q[:, 0] + 1j * q[:, 1]
        a = np.abs(v)
        gl = (np.where(a > 0, np.tanh(a) / np.maximum(a, 1e-12), 1.0) * v)[owner]
        g = (A * gl + B) / (C * gl + 1)
        return np.concatenate([(err_box(p, g) - m) / sig, (p[:5] - c0) / csd])

    n_sh = 5
    sp = lil_matrix((len(m) + n_sh, n_sh + 2 * k_tr), dtype=int)
    for r in range(len(m)):
        sp[r, :n_sh] = 1
        sp[r, n_sh + 2 * owner[r]] = 1
        sp[r, n_sh + 2 * owner[r] + 1] = 1
    for j in range(n_sh):
        sp[len(m) + j, j] = 1
    p = np.concatenate([c0, np.zeros(2 * k_tr)])
    p[n_sh:] = grid_start(p).ravel()
    sol = None
    for _ in range(2):
        sol = least_squares(resid, p, jac_sparsity=sp, method="trf", loss="soft_l1", f_scale=3.0,
                            max_nfev=40, x_scale="jac", ftol=1e-4, xtol=1e-4)
        p = sol.x.copy()
        q = grid_start(p, p[n_sh:].reshape(k_tr, 2), resid(p)[: len(m)])
        p[n_sh:] = q.ravel()
    sol = least_squares(resid, p, jac_sparsity=sp, method="trf", loss="soft_l1", f_scale=3.0,
                        max_nfev=40, x_scale="jac", ftol=1e-4, xtol=1e-4)
    p = sol.x
    r_g = resid(p)[: len(m)] * sig
    rms = float(np.sqrt(np.mean(r_g ** 2)))
    J = sol.jac
    J = J.toarray() if hasattr(J, "toarray") else np.asarray(J)
    dof = max(len(m) - J.shape[1], 1)
    s2 = max(1.0, float(np.sum(sol.fun[: len(m)] ** 2)) / dof)
    # The shared terms' covariance with the loads marginalised: the Schur complement of
    # the normal matrix, each load's 2 x 2 block eliminated in turn (no large inverse).
    Js = J[:, :5]
    info = Js.T @ Js
    for i in range(k_tr):
        rows = np.nonzero(owner == i)[0]
        jl = J[rows, 5 + 2 * i:7 + 2 * i]
        x = Js[rows].T @ jl
        info -= x @ np.linalg.pinv(jl.T @ jl) @ x.T
    try:
        cov = np.linalg.pinv(info) * s2
        sd_r = math.sqrt(max(cov[0, 0] + cov[1, 1], 0.0))
        sd_f = math.sqrt(max(cov[2, 2] + cov[3, 3], 0.0))
        sd_k = math.sqrt(max(cov[4, 4], 0.0))
    except np.linalg.LinAlgError:
        sd_r = sd_f = sd_k = math.inf
    res: dict[str, Any] = {"d_r": [float(p[0]), float(p[1])], "d_f": [float(p[2]), float(p[3])],
                           "k": float(math.exp(p[4])), "d_r_sigma": sd_r, "d_f_sigma": sd_f,
                           "gain_ratio_sigma_db": 20 * sd_k / math.log(10), "rms": rms,
                           "traces": k_tr, "readings": int(len(m)), "converged": bool(sol.success),
                           "sigma_method": "covariance"}
    if split and k_tr >= 2 * REFINE_MIN_TRACES:
        a = refine_from_traces(net, traces[0::2], prior, max_traces, False, scales)
        b = refine_from_traces(net, traces[1::2], prior, max_traces, False, scales)
        for key, sk in (("d_r", "d_r_sigma"), ("d_f", "d_f_sigma")):
            half = abs(complex(*a[key]) - complex(*b[key])) / 2
            res[sk] = max(res[sk], half)
        res["sigma_method"] = "covariance and delete-half (even/odd tunes)"
    sd = max(res["d_r_sigma"], res["d_f_sigma"])
    res["err"] = float(min(0.2, max(3 * sd, 2 * rms, 0.004)))
    res["directivity_r_db"] = -20 * math.log10(max(abs(complex(*res["d_r"])), 1e-6))
    res["directivity_f_db"] = -20 * math.log10(max(abs(complex(*res["d_f"])), 1e-6))
    res["gain_ratio_db"] = 20 * math.log10(res["k"])
    res["config"] = [round(res["d_r"][0], 5), round(res["d_r"][1], 5), round(res["d_f"][0], 5),
                     round(res["d_f"][1], 5), round(res["k"], 5), round(res["err"], 4)]
    return res


def refine_refusal(res: dict[str, Any]) -> str | None:
    """Why a refined error box must not go into a board (what more data would help); None: it may."""
    if res["rms"] > REFINE_MAX_RMS:
        return (f"the refinement leaves {res['rms']:.3f} of |gamma| unexplained (a good one leaves under "
                f"{REFINE_MAX_RMS}): check the detector calibration, log more tunes and refine again")
    if res["traces"] < REFINE_MIN_WRITE:
        return (f"{res['traces']} tunes with readings: the stated uncertainty holds from about {REFINE_MIN_WRITE} "
                f"(up to {REFINE_MAX_TRACES} count); log more tunes across the bands and refine again")
    sd = max(res["d_r_sigma"], res["d_f_sigma"])
    if not sd <= REFINE_MAX_SD:
        return (f"the leakage is known only to +-{sd:.3f} (at most {REFINE_MAX_SD} to write): log more tunes "
                f"across the bands (this used {res['traces']}, up to {REFINE_MAX_TRACES} count) and refine again")
    return None


def traces_from_results(results: list[dict[str, Any]], learned: tuple | None = None) -> list:
    """The traces a logbook keeps from scored tunes: raw readings (the learned gain
    ratio put back, as fmlogic.controller's trace does), rounded to 1e-3."""
    from feedmatch.sim.fitbox import MIN_READINGS, Trace

    k = float(learned[4]) if learned is not None else 1.0
    out = []
    for r in results:
        t = r.get("trace") or []
        if len(t) >= MIN_READINGS:
            a = np.asarray(t, dtype=float)
            out.append(Trace(r["freq_hz"], a[:, :3].astype(int), np.floor(a[:, 3] * k * 1000 + 0.5) / 1000))
    return out
