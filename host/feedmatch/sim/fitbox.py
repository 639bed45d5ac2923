"""Fit a box's effective element values from the readings of its own tunes.

Every tune record carries its trace: the states the search measured and the
|gamma| it read at each.  Each trace has an unknown load (two numbers); the
element values are shared by all traces.  Non-linear least squares on all of
them at once (scipy's trust-region reflective solver with a sparse Jacobian)
estimates per-element scale factors, with a weak prior pulling elements that
the traces never exercised back to nominal.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import least_squares
from scipy.sparse import lil_matrix

from feedmatch.rf.network import Network, lnet_zin

PRIOR_SIGMA = 0.15  # relative; a weak pull to nominal for unexercised elements
MIN_READINGS = 3
N_COUPLER = 4


@dataclass
class Trace:
    freq_hz: float
    states: np.ndarray  # (n, 3) int: l, c, shunt
    gamma: np.ndarray   # (n,) measured |gamma|


def traces_from_records(recs: list[dict[str, Any]]) -> list[Trace]:
    out = []
    for r in recs:
        t = r.get("trace")
        f = r.get("freq_hz") or 0.0
        if not isinstance(t, list) or len(t) < 4 * MIN_READINGS or f <= 0:
            continue
        a = np.asarray(t[: len(t) // 4 * 4], dtype=float).reshape(-1, 4)
        out.append(Trace(float(f), a[:, :3].astype(int), a[:, 3] / 1000.0))
    return out


def traces_from_logbook(db: str) -> list[Trace]:
    from feedmatch.logbook.store import open_existing

    book = open_existing(db)
    rows = book.tunes()
    book.close()
    return traces_from_records([json.loads(r["raw"]) for r in rows if r["raw"]])


def traces_from_scoring(nominal: Network, box, loads) -> list[Trace]:
    """Tunes on a simulated box, as the board would have logged them."""
    from feedmatch.sim.scorer import ScoreConfig, score

    cfg = ScoreConfig(strategy="model", detector=box.detector, seed=box.seed)
    res = score(loads, box.network, nominal, cfg, det=box.detector, workers=1)
    out = []
    for r in res:
        t = r.get("trace") or []
        if len(t) >= MIN_READINGS:
            a = np.asarray(t, dtype=float)
            out.append(Trace(r["freq_hz"], a[:, :3].astype(int), np.round(a[:, 3], 3)))
    return out


def _bits(codes: np.ndarray, n: int) -> np.ndarray:
    return ((codes[:, None] >> np.arange(n)[None, :]) & 1).astype(float)


def _predict(net: Network, sl: np.ndarray, sc: np.ndarray, f: np.ndarray, bl: np.ndarray,
             bc: np.ndarray, sh: np.ndarray, zl: np.ndarray, complex_out: bool = False) -> np.ndarray:
    w = 2 * np.pi * f
    lv = bl @ (np.asarray(net.inductors_uh) * sl) * 1e-6
    cv = bc @ (np.asarray(net.capacitors_pf) * sc) * 1e-12
    xl = w * lv
    zs = (xl / net.inductor_q if net.inductor_q else 0) + 1j * xl
    b = w * cv
    yc = (b / net.capacitor_q if net.capacitor_q else 0) + 1j * b
    z_tx, z_ant = lnet_zin(zs, yc, 1 / zl)  # the fit's model has no strays
    z = np.where(sh == 1, z_ant, z_tx)
    gam = (z - net.z0_ohm) / (z + net.z0_ohm)
    return gam if complex_out else np.abs(gam)


def _grid_start(net, sl, sc, traces, f, bl, bc, sh, g, owner, keep=None, resid_now=None) -> np.ndarray:
    """Per trace, the load (in the tanh parametrisation) that best explains its readings
    on a dense grid over the reflection disc; with keep, only where that beats the current fit."""
    k = len(traces)
    r = np.linspace(0.02, 0.995, 28)
    th = np.linspace(0, 2 * np.pi, 72, endpoint=False)
    gam = (r[:, None] * np.exp(1j * th[None, :])).ravel()
    zgrid = net.z0_ohm * (1 + gam) / (1 - gam)
    out = np.zeros(2 * k) if keep is None else keep.copy()
    for i in range(k):
        m = owner == i
        n_g = len(zgrid)
        pred = _predict(net, sl, sc, np.repeat(f[m], n_g), np.repeat(bl[m], n_g, axis=0),
                        np.repeat(bc[m], n_g, axis=0), np.repeat(sh[m], n_g), np.tile(zgrid, m.sum()))
        err = ((pred.reshape(m.sum(), -1) - g[m][:, None]) ** 2).sum(axis=0)
        j = int(np.argmin(err))
        if keep is not None and resid_now is not None and err[j] >= (resid_now[m] ** 2).sum():
            continue
        v = gam[j]
        mag = np.arctanh(min(abs(v), 0.995))
        out[2 * i], out[2 * i + 1] = mag * np.cos(np.angle(v)), mag * np.sin(np.angle(v))
    return out


def fit_elements(nominal: Network, traces: list[Trace], max_traces: int = 400, max_nfev: int = 200,
                 rounds: int = 2, split: bool = False) -> dict[str, Any]:
    """Effective element values (uH, pF) and how far each is from nominal.

    Each value carries a one-sigma uncertainty (inductor_sigma_pct,
    capacitor_sigma_pct): the least-squares covariance, and with split the
    larger of that and half the difference between fits of the even and the
    odd tunes (a delete-half estimate, which also sees what the model leaves
    out: strays, the wrong basin of a multi-modal fit)."""
    traces = [t for t in traces if len(t.gamma) >= MIN_READINGS][:max_traces]
    if split and len(traces) >= 20:
        full = fit_elements(nominal, traces, max_traces, max_nfev, rounds)
        a = fit_elements(nominal, traces[0::2], max_traces, max_nfev, rounds)
        b = fit_elements(nominal, traces[1::2], max_traces, max_nfev, rounds)
        for key, vals in (("inductor", "inductors_uh"), ("capacitor", "capacitors_pf")):
            d = 100 * np.abs(np.asarray(a[vals]) / np.asarray(b[vals]) - 1) / 2
            full[f"{key}_sigma_pct"] = [round(float(max(x, y)), 2) for x, y in zip(full[f"{key}_sigma_pct"], d)]
        full["sigma_method"] = "covariance and delete-half (even/odd tunes)"
        return full
    if not traces:
        raise ValueError("no tune traces with enough readings to fit")
    nl, nc, k = nominal.n_l, nominal.n_c, len(traces)
    st = np.concatenate([t.states for t in traces])
    g = np.concatenate([t.gamma for t in traces])
    f = np.concatenate([np.full(len(t.gamma), t.freq_hz) for t in traces])
    owner = np.concatenate([np.full(len(t.gamma), i) for i, t in enumerate(traces)])
    bl, bc, sh = _bits(st[:, 0], nl), _bits(st[:, 1], nc), st[:, 2]
    z0 = nominal.z0_ohm
    # Parameters: log scales of the elements, then the coupler and detector (log gain
    # ratio, leakage at 28 MHz as re, im, growing with frequency; a reflected offset),
    # then each trace's load.
    ne = nl + nc + N_COUPLER
    p0 = np.concatenate([np.zeros(ne), np.zeros(2 * k)])
    p0[ne:] = _grid_start(nominal, np.ones(nl), np.ones(nc), traces, f, bl, bc, sh, g, owner)

    def unpack(p):
        sl = np.exp(p[:nl])
        sc = np.exp(p[nl:nl + nc])
        q = p[ne:].reshape(k, 2)
        # |gamma| < 1 by construction: magnitude through tanh.
        v = q[:, 0] + 1j * q[:, 1]
        m = np.abs(v)
        gam = np.where(m > 0, np.tanh(m) / np.maximum(m, 1e-12), 1.0) * v
        zl = z0 * (1 + gam) / (1 - gam)
        return sl, sc, zl

    def resid(p):
        sl, sc, zl = unpack(p)
        gin = _predict(nominal, sl, sc, f, bl, bc, sh, zl[owner], complex_out=True)
        leak = (f / 28e6) * (p[nl + nc + 1] + 1j * p[nl + nc + 2])
        # Reflected over forward read = gain * |gamma + d| / |1 + gamma d|, plus a small offset.
        # The leakage spoils both ports: the forward sample carries 1 + gamma * leakage.
        ratio = np.abs(gin + leak) / np.abs(1 + gin * leak)
        pred = np.sqrt(np.exp(2 * p[nl + nc]) * ratio ** 2 + (p[nl + nc + 3] * 0.1) ** 2)
        prior = p[:ne] / PRIOR_SIGMA * 0.02
        return np.concatenate([pred - g, prior])

    n_res = len(g) + ne
    sp = lil_matrix((n_res, len(p0)), dtype=int)
    for r in range(len(g)):
        sp[r, :ne] = 1
        sp[r, ne + 2 * owner[r]] = 1
        sp[r, ne + 2 * owner[r] + 1] = 1
    for j in range(ne):
        sp[len(g) + j, j] = 1
    sol = None
    for _ in range(rounds):
        sol = least_squares(resid, p0, jac_sparsity=sp, method="trf", loss="soft_l1", f_scale=0.05,
                            max_nfev=max_nfev, x_scale="jac")
        p0 = sol.x.copy()
        sl, sc, _ = unpack(p0)
        # Loads that settled in the wrong basin get a fresh start on the new elements.
        p0[ne:] = _grid_start(nominal, sl, sc, traces, f, bl, bc, sh, g, owner, keep=p0[ne:],
                              resid_now=resid(p0)[: len(g)])
    sl, sc, _ = unpack(sol.x)
    sig = _sigmas(sol, len(g), ne)
    ind = (np.asarray(nominal.inductors_uh) * sl).tolist()
    cap = (np.asarray(nominal.capacitors_pf) * sc).tolist()
    rms = float(np.sqrt(np.mean(resid(sol.x)[: len(g)] ** 2)))
    used_l = bl.sum(axis=0)
    used_c = bc.sum(axis=0)
    return {"inductors_uh": ind, "capacitors_pf": cap,
            "inductor_offset_pct": ((sl - 1) * 100).tolist(), "capacitor_offset_pct": ((sc - 1) * 100).tolist(),
            "inductor_readings": used_l.astype(int).tolist(), "capacitor_readings": used_c.astype(int).tolist(),
            "inductor_sigma_pct": [round(100 * float(x), 2) for x in sig[:nl]],
            "capacitor_sigma_pct": [round(100 * float(x), 2) for x in sig[nl:nl + nc]],
            "traces": k, "readings": int(len(g)), "rms_gamma_residual": rms, "converged": bool(sol.success),
            "coupler_gain_ratio_db": float(20 * np.log10(np.exp(sol.x[nl + nc]))),
            "coupler_leak_28mhz": float(abs(sol.x[nl + nc + 1] + 1j * sol.x[nl + nc + 2]))}


def _sigmas(sol, n_read: int, ne: int) -> np.ndarray:
    """One-sigma uncertainty of the shared parameters (log scales, so relative for
    the elements): the Gauss-Newton covariance (J^T J)^-1 scaled by the residual
    variance (e.g. Press et al., Numerical Recipes, 3rd ed., 15.5), the loads
    marginalised out.  Robust weights are ignored: an approximation that errs
    large where readings were discounted."""
    J = sol.jac
    J = J.toarray() if hasattr(J, "toarray") else np.asarray(J)
    r = sol.fun[:n_read]
    dof = max(n_read - J.shape[1], 1)
    s2 = float(np.sum(r ** 2)) / dof
    try:
        cov = np.linalg.pinv(J.T @ J) * s2
    except np.linalg.LinAlgError:
        return np.full(ne, np.inf)
    return np.sqrt(np.maximum(np.diag(cov)[:ne], 0.0))


# What a fit must show before its values go into a board (fit-box --write).
WRITE_MAX_SIGMA_PCT = 3.0   # one sigma, any element the tunes exercised
WRITE_MAX_RMS = 0.03        # |gamma|: about twice what noise and strays leave on a good fit
WRITE_MAX_OFFSET_PCT = 30.0  # beyond any part's tolerance plus its leads: a wrong basin
WRITE_MIN_USES = 20


def write_refusal(res: dict[str, Any], names: list[str]) -> str | None:
    """Why these fitted values must not go into a board, with what more data would
    help; None when they may.  names: element names, inductors then capacitors."""
    if res["rms_gamma_residual"] > WRITE_MAX_RMS:
        return (f"the fit leaves {res['rms_gamma_residual']:.3f} of |gamma| unexplained (a good fit leaves under "
                f"{WRITE_MAX_RMS}): the values are unreliable; log more tunes across the bands and fit again, "
                "and check the detector calibration")
    sig = res["inductor_sigma_pct"] + res["capacitor_sigma_pct"]
    off = res["inductor_offset_pct"] + res["capacitor_offset_pct"]
    uses = res["inductor_readings"] + res["capacitor_readings"]
    for nm, of, n in zip(names, off, uses):
        if n >= WRITE_MIN_USES and abs(of) > WRITE_MAX_OFFSET_PCT:
            return (f"{nm} fitted {of:+.0f} % off nominal, beyond any part's tolerance: the fit is likely in a "
                    f"wrong basin; log more tunes that switch {nm} and fit again")
    for nm, sg, n in zip(names, sig, uses):
        if n >= WRITE_MIN_USES and not sg <= WRITE_MAX_SIGMA_PCT:
            return (f"{nm} is known only to +-{sg:.1f} % (at most {WRITE_MAX_SIGMA_PCT:g} % to write); log more "
                    f"tunes that switch {nm} (it was in {n} readings) and fit again")
    return None
