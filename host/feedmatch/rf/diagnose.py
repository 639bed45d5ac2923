"""Single-fault diagnosis of the relay banks from the self-test's readings.

The box steps every relay from a reference state (fmlogic.selftest.plan) and
returns |gamma| for each commanded state and for the bypass.  The antenna's
impedance at the carrier is unknown, so every hypothesis (healthy, or one
element stuck out, stuck in or drifted, or the side relay stuck) is fitted
with its own load: the hypothesis that explains the readings best, by a
margin the healthy box's tolerances do not reach, is named.  This is the
classic fault-dictionary and parameter-identification approach to single
faults in analogue circuits with tolerances (e.g. Bandler and Salama, "Fault
diagnosis of analog circuits", Proc. IEEE 73(8), 1985); a switched network is
the easy case because the box chooses its own states.

Measurement model: the coupler's leakage d (magnitude as `feedmatch calibrate`
measured it, phase unknown, so fitted) makes the box read
|gamma + d| / |1 + gamma d| (the detector model of rf.detector).  Readings
are weighted by sigma = SIGMA0 + SIGMA_REL * |gamma|: the scatter of the
healthy drawn boxes in the bench (5 % parts, strays the model does not hold).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

# Reading scatter on healthy boxes (see the module docstring); measured in the
# bench's healthy corpus, where the 99th-percentile fit error sits near 1 sigma.
SIGMA0 = 0.006
SIGMA_REL = 0.03
# A fault is named only when its fit beats the healthy one by this much in
# chi-square (after PENALTY per extra parameter), and the healthy fit is poor.
MARGIN = 30.0
PENALTY = 8.0
HEALTHY_CHI2_PER_READING = 1.5
# A drift is named only beyond what 5 % parts, their strays and the fit's own
# error explain (fractional change of the element's value).
DRIFT_MIN = 0.15
# An element whose toggle moves |gamma| less than this at the fitted load is
# not tested at this carrier (named in "untested" rather than passed).
VISIBLE = 0.03
_SCALES = (0.3, 0.5, 0.65, 0.8, 1.25, 1.5, 2.0, 3.0)


@dataclass
class Readings:
    """What the box returned: the commanded states (l, c, shunt) in plan order,
    |gamma| for each, |gamma| through the bypass (None if not read)."""

    freq_hz: float
    states: list[tuple[int, int, int]]
    gammas: list[float]
    bypass_gamma: float | None = None


@dataclass
class Model:
    """What the box knows of itself: its element values (learned where it has them), Qs, z0, leak."""

    inductors_uh: list[float]
    capacitors_pf: list[float]
    inductor_q: float = 0.0
    capacitor_q: float = 0.0
    z0: float = 50.0
    leak: float = 0.0
    # The build's strays (node capacitance to chassis at each port, capacitance
    # across an open relay contact, series lead inductance per element): the
    # builder's figures, measured on the bench with an LCR meter.
    stray_in_pf: float = 0.0
    stray_out_pf: float = 0.0
    relay_open_pf: float = 0.0
    lead_nh: float = 0.0


def _grid() -> np.ndarray:
    r = np.concatenate([[0.0], np.linspace(0.08, 0.97, 14)])
    a = np.linspace(0, 2 * np.pi, 40, endpoint=False)
    g = (r[:, None] * np.exp(1j * a[None, :])).ravel()
    return np.unique(np.round(g, 9))


GRID = _grid()


def _hypotheses(nl: int, nc: int) -> list[tuple[str, str]]:
    out = [("", "healthy")]
    for cls, n in (("L", nl), ("C", nc)):
        for i in range(n):
            for kind in ("stuck-out", "stuck-in", "drift"):
                out.append((f"{cls}{i}", kind))
    out += [("side", "stuck-tx"), ("side", "stuck-ant")]
    return out


def _network(m: Model, hyp: tuple[str, str], scale: float):
    from feedmatch.rf.network import Network

    ind = list(m.inductors_uh)
    cap = list(m.capacitors_pf)
    if hyp[1] == "drift":
        vals = ind if hyp[0][0] == "L" else cap
        vals[int(hyp[0][1:])] *= scale
    return Network(m.z0, ind, cap, m.inductor_q or None, m.capacitor_q or None, "", m.stray_in_pf,
                   m.stray_out_pf, relay_open_pf=m.relay_open_pf, lead_nh=m.lead_nh)


def _gamma_states(m: Model, f_hz: float, states: np.ndarray, hyp: tuple[str, str], scale: float,
                  g_load: np.ndarray) -> np.ndarray:
    """gamma (without leakage) of each commanded state (rows) for each load
    reflection (columns) on the box hyp describes."""
    from fmlogic.selftest import masks, reach

    from feedmatch.rf.network import _stray_y, series_table, shunt_table

    net = _network(m, hyp, scale)
    fl = [(hyp[0], hyp[1], 0.0)] if hyp[1] in ("stuck-out", "stuck-in", "stuck-tx", "stuck-ant") else []
    mk = masks(fl)
    eff = np.array([reach(mk, (int(s[0]), int(s[1]), int(s[2]))) for s in states])
    zs = series_table(net, f_hz)[eff[:, 0]][:, None]
    yc = shunt_table(net, f_hz)[eff[:, 1]][:, None]
    y_in, y_out = _stray_y(net, f_hz)
    zl = m.z0 * (1 + g_load) / (1 - g_load)
    yl = (1.0 / zl + y_out)[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        z_ant = zs + 1.0 / (yl + yc)
        z_tx = 1.0 / (1.0 / (zs + 1.0 / yl) + yc)
        zin = np.where((eff[:, 2] == 1)[:, None], z_ant, z_tx)
        if m.stray_in_pf:
            zin = 1.0 / (1.0 / zin + y_in)
        g = (zin - m.z0) / (zin + m.z0)
    return np.where(np.isfinite(g), g, 1.0)


def _with_leak(g: np.ndarray, a: complex) -> np.ndarray:
    return np.abs(g + a) / np.abs(1 + g * a)


def _sigma(meas: np.ndarray) -> np.ndarray:
    return SIGMA0 + SIGMA_REL * meas


def _predict(m: Model, r: Readings, hyp, scale, g_load, phase) -> np.ndarray:
    g = _gamma_states(m, r.freq_hz, np.array(r.states, dtype=int), hyp, scale, np.atleast_1d(g_load))
    if r.bypass_gamma is not None:
        g = np.vstack([g, np.atleast_1d(g_load)[None, :]])
    return _with_leak(g, m.leak * np.exp(1j * phase))


def _meas(r: Readings) -> np.ndarray:
    v = list(r.gammas) + ([r.bypass_gamma] if r.bypass_gamma is not None else [])
    return np.array(v, float)


def _refine(m: Model, r: Readings, hyp, scale0: float, g0: complex,
            phase0: float | None = None) -> tuple[float, dict[str, Any]]:
    """Least squares on (load gamma, leak phase, detector gain ratio[, scale])
    from a grid start.  The gain ratio stays within the calibration's tolerance
    (fmlogic.coupler.GAIN_TOL_DB)."""
    from fmlogic.coupler import GAIN_TOL_DB
    from scipy.optimize import least_squares

    meas = _meas(r)
    sig = _sigma(meas)
    drift = hyp[1] == "drift"
    k_lo = 10 ** (-GAIN_TOL_DB / 20)
    best = (np.inf, {})
    starts = (0.0,) if m.leak <= 0 else ((phase0,) if phase0 is not None else (0.0, 0.5 * np.pi, np.pi, 1.5 * np.pi))
    for ph0 in starts:
        x0 = [g0.real, g0.imag, ph0, 1.0] + ([scale0] if drift else [])

        def res(x):
            gl = complex(x[0], x[1])
            if abs(gl) >= 0.995:
                gl = gl / abs(gl) * 0.995
            p = x[3] * _predict(m, r, hyp, x[4] if drift else 1.0, gl, x[2])[:, 0]
            return (p - meas) / sig

        lo = [-0.995, -0.995, -10.0, k_lo] + ([0.0] if drift else [])
        hi = [0.995, 0.995, 10.0, 1 / k_lo] + ([5.0] if drift else [])
        x0 = np.clip(x0, np.array(lo) + 1e-6, np.array(hi) - 1e-6)
        sol = least_squares(res, x0, bounds=(lo, hi), x_scale=[0.05, 0.05, 0.3, 0.02] + ([0.1] if drift else []))
        chi2 = float(np.sum(sol.fun ** 2))
        if chi2 < best[0]:
            best = (chi2, {"load_gamma": complex(sol.x[0], sol.x[1]), "phase": float(sol.x[2]),
                           "k": float(sol.x[3]), "scale": float(sol.x[4]) if drift else 1.0, "resid": sol.fun})
    return best


def diagnose(m: Model, r: Readings) -> dict[str, Any]:
    """The named faults (at most one: single-fault diagnosis), the elements this
    carrier cannot test, and the fit figures behind the decision."""
    meas = _meas(r)
    sig = _sigma(meas)
    nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
    # Grid stage: loads on a grid, the leak's phase at six points; the best few
    # hypotheses go on to the least-squares fit.
    st = np.array(r.states, dtype=int)
    leaks = m.leak * np.exp(1j * np.linspace(0, 2 * np.pi, 6, endpoint=False)) if m.leak > 0 else np.zeros(1)
    cand = []
    for hyp in _hypotheses(nl, nc):
        for sc in (_SCALES if hyp[1] == "drift" else (1.0,)):
            g = _gamma_states(m, r.freq_hz, st, hyp, sc, GRID)
            best = (np.inf, 0, 0.0)
            for a in leaks:
                chi = np.sum(((_with_leak(g, a) - meas[:, None]) / sig[:, None]) ** 2, axis=0)
                k = int(np.argmin(chi))
                if chi[k] < best[0]:
                    best = (float(chi[k]), k, float(np.angle(a)))
            cand.append((best[0], hyp, sc, complex(GRID[best[1]]), best[2]))
    cand.sort(key=lambda t: t[0])
    healthy = next(c for c in cand if c[1][1] == "healthy")
    top = [healthy] + [c for c in cand if c[1][1] != "healthy"][:8]
    fits = []
    for _chi0, hyp, sc, g0, ph0 in top:
        chi2, info = _refine(m, r, hyp, sc, g0, ph0)
        k = 1 if hyp[1] == "drift" else 0
        fits.append((chi2 + PENALTY * k, chi2, hyp, info))
    h = fits[0]
    faults = [f for f in fits[1:] if _admissible(f)]
    faults.sort(key=lambda f: f[0])
    n = len(meas)
    named = []
    if faults and h[1] > HEALTHY_CHI2_PER_READING * n and h[1] - faults[0][0] > MARGIN:
        named.append(_evidence(m, r, faults[0], h))
    untested = [e for e in _untested(m, r, (named and faults[0]) or h) if not named or e != named[0]["element"]]
    return {"faults": named, "untested": untested, "chi2_healthy": round(h[1], 1),
            "chi2_best_fault": round(faults[0][1], 1) if faults else None,
            "best_fault": list(faults[0][2]) if faults else None, "readings_used": n}


def _admissible(f) -> bool:
    hyp, info = f[2], f[3]
    if hyp[1] == "drift":
        return abs(info["scale"] - 1.0) > DRIFT_MIN and info["scale"] > 0.05
    return True


def _evidence(m: Model, r: Readings, f, h) -> dict[str, Any]:
    """The fault as the report and --json give it: element, kind, value, and the
    readings that tell it (measured against the healthy box's and the fault's
    predictions)."""
    _, chi2, hyp, info = f
    meas = _meas(r)
    pf = _predict(m, r, hyp, info["scale"], info["load_gamma"], info["phase"])[:, 0]
    ph = _predict(m, r, ("", "healthy"), 1.0, h[3]["load_gamma"], h[3]["phase"])[:, 0]
    order = np.argsort(-np.abs(ph - meas))[:3]
    labels = [list(s) for s in r.states] + ([["bypass"]] if r.bypass_gamma is not None else [])
    ev: dict[str, Any] = {
        "chi2_healthy": round(h[1], 1), "chi2_fault": round(chi2, 1),
        "telling": [{"state": labels[i], "measured_gamma": round(float(meas[i]), 3),
                     "healthy_gamma": round(float(ph[i]), 3), "fault_gamma": round(float(pf[i]), 3)}
                    for i in order]}
    name, kind = hyp
    out = {"element": name, "kind": kind, "evidence": ev}
    if name != "side":
        i = int(name[1:])
        unit, v = ("uH", m.inductors_uh[i]) if name[0] == "L" else ("pF", m.capacitors_pf[i])
        out["nominal"] = f"{v:g} {unit}"
        if kind == "drift":
            out["drift_percent"] = round(100 * (info["scale"] - 1.0), 1)
            out["value"] = f"{v * info['scale']:.3g} {unit}"
    return out


def second_ref(m: Model, r: Readings) -> tuple[int, int, int]:
    """The second step's reference, from the first step's readings: on the other
    capacitor side, with as many relays reversed from the first reference as
    still reads between |gamma| 0.1 and 0.6 at the load fitted to the first step
    (so every element is seen both in and out, where the readings move)."""
    meas = _meas(r)
    sig = _sigma(meas)
    p = _predict(Model(**{**m.__dict__, "leak": 0.0}), r, ("", "healthy"), 1.0, GRID, 0.0)
    k = int(np.argmin(np.sum(((p - meas[:, None]) / sig[:, None]) ** 2, axis=0)))
    _, info = _refine(m, r, ("", "healthy"), 1.0, complex(GRID[k]))
    l1, c1, sh1 = r.states[0]
    sh = 1 - sh1
    nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
    ls = np.repeat(np.arange(1 << nl), 1 << nc)
    cs = np.tile(np.arange(1 << nc), 1 << nl)
    allst = np.stack([ls, cs, np.full(len(ls), sh)], axis=1)
    g = _with_leak(_gamma_states(m, r.freq_hz, allst, ("", "healthy"), 1.0, np.array([info["load_gamma"]])),
                   m.leak * np.exp(1j * info["phase"]))[:, 0]
    flips = np.array([bin(int(x)).count("1") for x in range(1 << max(nl, nc))])
    nflip = flips[ls ^ l1] + flips[cs ^ c1]
    ok = (g >= 0.1) & (g <= 0.6)
    if not np.any(ok):
        i = int(np.argmin(np.abs(g - 0.35)))
    else:
        # Most relays reversed first, then the reading nearest 0.35 (ties: the lowest codes).
        score = np.where(ok, nflip * 10.0 - np.abs(g - 0.35), -np.inf)
        i = int(np.argmax(score))
    return int(ls[i]), int(cs[i]), sh


def _untested(m: Model, r: Readings, fit) -> list[str]:
    """Elements whose toggle the model says moves |gamma| by less than VISIBLE at
    the fitted load, in both halves of the plan: a fault there could pass unseen."""
    hyp, info = fit[2], fit[3]
    p = _predict(m, r, hyp, info["scale"], info["load_gamma"], info["phase"])[:, 0]
    nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
    half = 1 + nl + nc  # the first step's side toggle sits at index half
    out = []
    for k, name in enumerate([f"L{i}" for i in range(nl)] + [f"C{i}" for i in range(nc)]):
        moves = [abs(p[b + 1 + k] - p[b]) for b in (0, half + 1) if b + 1 + k < len(r.states)]
        if moves and max(moves) < VISIBLE:
            out.append(name)
    if len(r.states) > half and abs(p[half] - p[0]) < VISIBLE:
        out.append("side")
    return out
