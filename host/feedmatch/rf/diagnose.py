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

from feedmatch.seam.logic import GAMMA_MAX

# Reading scatter on healthy boxes (see the module docstring); measured in the
# bench's healthy corpus, where the 99th-percentile fit error sits near 1 sigma.
SIGMA0 = 0.006
SIGMA_REL = 0.03
# A fault is named only when its fit beats the healthy one by this much in
# chi-square (after PENALTY per extra parameter), and the healthy fit is poor.
MARGIN = 30.0
PENALTY = 8.0
DRIFT_MARGIN = 2.0
# Another element's fault within this chi-square of the named one fits as well.
ALIKE = 4.0
# Fits after the grid stage: the best stuck hypotheses, the most pulled drifts.
N_STUCK = 6
N_DRIFT = 4
HEALTHY_CHI2_PER_READING = 1.5
# A drift is named only beyond what 5 % parts, their strays and the fit's own
# error explain (fractional change of the element's value).
DRIFT_MIN = 0.15
# An element whose toggle moves |gamma| less than this at the fitted load is
# not tested at this carrier (named in "untested" rather than passed).
VISIBLE = 0.03
# The readings' own noise (detector noise, the ADC's steps, the calibration's
# curve), and each element's tolerance around the model's value (one sigma,
# 5 % parts): the MAP fit (_refine) weighs the first and holds the second.
NOISE0 = 0.003
NOISE_REL = 0.005
NOISE_FLOOR = 0.012
TOL = 0.05
# A drift is named only beyond this many sigma of the element's tolerance and
# the fit's own uncertainty combined.
DRIFT_SIGMAS = 3.0
# An element's value counts as measured when the healthy fit's one-sigma on its
# scale is below this (the readings alone then hold it to about 7 %, so a 30 %
# drift stands out at three sigma); above, a drift there could pass unseen.
VALUE_SEEN = 0.04
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
    from feedmatch.rf.network import _stray_y, series_table, shunt_table
    from feedmatch.seam.logic import masks, reach

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


def _noise(meas: np.ndarray) -> np.ndarray:
    # Near a match the reflected detector sits at its floor: its readings scatter
    # by about 0.015 below |gamma| 0.05 (measured on the bench's drawn coupler).
    return NOISE0 + NOISE_REL * meas + NOISE_FLOOR * np.exp(-meas / 0.03)


def _predict(m: Model, r: Readings, hyp, scale, g_load, phase) -> np.ndarray:
    g = _gamma_states(m, r.freq_hz, np.array(r.states, dtype=int), hyp, scale, np.atleast_1d(g_load))
    if r.bypass_gamma is not None:
        g = np.vstack([g, np.atleast_1d(g_load)[None, :]])
    return _with_leak(g, m.leak * np.exp(1j * phase))


def _meas(r: Readings) -> np.ndarray:
    v = list(r.gammas) + ([r.bypass_gamma] if r.bypass_gamma is not None else [])
    return np.array(v, float)


class _Fit:
    """The readings one hypothesis predicts, with every element's value free
    around the model's (a scale per element): the reached states as bit
    matrices, so one evaluation is a few small matrix products."""

    def __init__(self, m: Model, r: Readings, hyp: tuple[str, str]):
        from feedmatch.seam.logic import masks, reach

        fl = [(hyp[0], hyp[1], 0.0)] if hyp[1] in ("stuck-out", "stuck-in", "stuck-tx", "stuck-ant") else []
        mk = masks(fl)
        eff = np.array([reach(mk, (int(s[0]), int(s[1]), int(s[2]))) for s in r.states], dtype=int)
        nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
        self.nl, self.nc = nl, nc
        self.bl = ((eff[:, 0:1] >> np.arange(nl)) & 1).astype(float)
        self.bc = ((eff[:, 1:2] >> np.arange(nc)) & 1).astype(float)
        self.ant = eff[:, 2] == 1
        self.w = 2 * np.pi * r.freq_hz
        self.m = m
        self.L = np.array(m.inductors_uh) * 1e-6
        self.C = np.array(m.capacitors_pf) * 1e-12
        self.bypass = r.bypass_gamma is not None
        self.meas = _meas(r)
        self.sig = _noise(self.meas)
        # Which scales carry the tolerance prior: all but a drifted element's.
        self.prior = np.ones(nl + nc, bool)
        if hyp[1] == "drift":
            self.prior[(0 if hyp[0][0] == "L" else nl) + int(hyp[0][1:])] = False

    def gamma(self, sl: np.ndarray, sc: np.ndarray, gl: complex) -> np.ndarray:
        m, w = self.m, self.w
        ind = self.L * sl
        ql = m.inductor_q or np.inf
        ze = w * ind / ql + 1j * w * (ind + m.lead_nh * 1e-9)
        if m.relay_open_pf:
            ze = 1.0 / (1.0 / ze + 1j * w * m.relay_open_pf * 1e-12)
        cap = self.C * sc
        qc = m.capacitor_q or np.inf
        ye = w * cap / qc + 1j * w * cap
        if m.lead_nh:
            ye = 1.0 / (1.0 / ye + 1j * w * m.lead_nh * 1e-9)
        zs = self.bl @ ze
        yc = self.bc @ ye
        if m.relay_open_pf:
            yo = 1.0 / (1.0 / (1j * w * cap) + 1.0 / (1j * w * m.relay_open_pf * 1e-12))
            yc = yc + (1.0 - self.bc) @ yo
        zl = m.z0 * (1 + gl) / (1 - gl)
        yl = 1.0 / zl + 1j * w * m.stray_out_pf * 1e-12
        with np.errstate(divide="ignore", invalid="ignore"):
            z_ant = zs + 1.0 / (yl + yc)
            z_tx = 1.0 / (1.0 / (zs + 1.0 / yl) + yc)
            zin = np.where(self.ant, z_ant, z_tx)
            if m.stray_in_pf:
                zin = 1.0 / (1.0 / zin + 1j * w * m.stray_in_pf * 1e-12)
            g = (zin - m.z0) / (zin + m.z0)
        g = np.where(np.isfinite(g), g, 1.0)
        if self.bypass:
            g = np.append(g, gl)
        return g

    def unpack(self, x: np.ndarray):
        gl = complex(x[0], x[1])
        if abs(gl) >= 0.995:
            gl = gl / abs(gl) * 0.995
        return gl, x[2], x[3], x[4:4 + self.nl], x[4 + self.nl:]

    def predict(self, x: np.ndarray) -> np.ndarray:
        gl, ph, k, sl, sc = self.unpack(x)
        # The box's readings stop at GAMMA_MAX (fmlogic.swr): a prediction above reads as it.
        return np.minimum(k * _with_leak(self.gamma(sl, sc, gl), self.m.leak * np.exp(1j * ph)), GAMMA_MAX)

    def residuals(self, x: np.ndarray) -> np.ndarray:
        s = x[4:]
        return np.concatenate([(self.predict(x) - self.meas) / self.sig, ((s - 1.0) / TOL)[self.prior]])


def _refine(m: Model, r: Readings, hyp, scale0: float, g0: complex,
            phase0: float | None = None, x_start: np.ndarray | None = None) -> tuple[float, dict[str, Any]]:
    """Maximum a posteriori fit of (load gamma, leak phase, detector gain ratio,
    every element's scale) from a grid start: the readings weighted by their
    noise, each element's scale by its tolerance (TOL) around the model's value,
    except a drifted element's, which is free.  The gain ratio stays within the
    calibration's tolerance (fmlogic.coupler.GAIN_TOL_DB).  Returns the
    chi-square (readings and priors) and the fit, with the fitted scale of a
    drifted element and its one-sigma uncertainty from the fit's curvature."""
    from scipy.optimize import least_squares

    from feedmatch.seam.logic import GAIN_TOL_DB

    fit = _Fit(m, r, hyp)
    nl, nc = fit.nl, fit.nc
    drift = hyp[1] == "drift"
    di = ((0 if hyp[0][0] == "L" else nl) + int(hyp[0][1:])) if drift else -1
    k_lo = 10 ** (-GAIN_TOL_DB / 20)
    lo = np.concatenate([[-0.995, -0.995, -10.0, k_lo], np.full(nl + nc, 0.02)])
    hi = np.concatenate([[0.995, 0.995, 10.0, 1 / k_lo], np.full(nl + nc, 5.0)])
    xs = np.concatenate([[0.05, 0.05, 0.3, 0.02], np.full(nl + nc, TOL)])
    if x_start is None:
        # Stage A: load, phase and gain alone (the scales held) from every start,
        # cheap; stage B below frees the scales from the best of them.
        s0 = np.ones(nl + nc)
        if drift:
            s0[di] = scale0
        phases = (0.0,) if m.leak <= 0 else (
            (phase0,) if phase0 is not None else (0.0, 0.5 * np.pi, np.pi, 1.5 * np.pi))
        loads = g0 if isinstance(g0, (list, tuple)) else [g0]
        a_best = (np.inf, None)
        for gs in loads:
            for ph0 in phases:
                xa = np.clip([gs.real, gs.imag, ph0, 1.0], lo[:4] + 1e-6, hi[:4] - 1e-6)

                def res_a(x4):
                    return fit.residuals(np.concatenate([x4, s0]))
                sa = least_squares(res_a, xa, bounds=(lo[:4], hi[:4]), x_scale=xs[:4])
                c = float(np.sum(sa.fun ** 2))
                if c < a_best[0]:
                    a_best = (c, np.concatenate([sa.x, s0]))
        x_start = a_best[1]
    x0 = np.clip(x_start, lo + 1e-6, hi - 1e-6)
    sol = least_squares(fit.residuals, x0, bounds=(lo, hi), x_scale=xs)
    chi2 = float(np.sum(sol.fun ** 2))
    info = {"load_gamma": complex(sol.x[0], sol.x[1]), "phase": float(sol.x[2]),
            "k": float(sol.x[3]), "scales": sol.x[4:].copy(), "scale": 1.0, "scale_sigma": 0.0,
            "resid": sol.fun[:len(fit.meas)], "pred": fit.predict(sol.x), "x": sol.x}
    # One-sigma uncertainty of each scale from the fit's curvature
    # (readings and priors: at most TOL where the readings say nothing).
    try:
        cov = np.linalg.pinv(sol.jac.T @ sol.jac)
        info["scale_sigmas"] = np.sqrt(np.maximum(np.diag(cov)[4:], 0.0))
    except np.linalg.LinAlgError:
        info["scale_sigmas"] = np.full(nl + nc, np.inf)
    if drift:
        info["scale"] = float(sol.x[4 + di])
        info["scale_sigma"] = float(info["scale_sigmas"][di])
    return chi2, info


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
        if hyp[1] == "drift":
            continue  # drifts start from the healthy fit below
        g = _gamma_states(m, r.freq_hz, st, hyp, 1.0, GRID)
        if r.bypass_gamma is not None:
            g = np.vstack([g, GRID[None, :]])
        best = (np.inf, 0, 0.0)
        chis = []
        for a in leaks:
            chi = np.sum(((_with_leak(g, a) - meas[:, None]) / sig[:, None]) ** 2, axis=0)
            chis.append(chi)
            k = int(np.argmin(chi))
            if chi[k] < best[0]:
                best = (float(chi[k]), k, float(np.angle(a)))
        if hyp[1] == "healthy":
            # The yardstick starts from the five best grid loads (any phase), and the match.
            order = np.argsort(np.min(chis, axis=0))[:5]
            cand.append((best[0], hyp, 1.0, [complex(GRID[k]) for k in order] + [0j], None))
        else:
            cand.append((best[0], hyp, 1.0, complex(GRID[best[1]]), best[2]))
    cand.sort(key=lambda t: t[0])
    healthy = next(c for c in cand if c[1][1] == "healthy")
    top = [healthy] + [c for c in cand if c[1][1] != "healthy"][:N_STUCK]
    fits = []
    for _chi0, hyp, sc, g0, ph0 in top:
        chi2, info = _refine(m, r, hyp, sc, g0, ph0)
        fits.append((chi2, chi2, hyp, info))
    # The healthy fit again from the best fault fits' loads and phases: a poor
    # local minimum of the yardstick would make any fault look good.
    for f in sorted(fits[1:], key=lambda f: f[1])[:2]:
        x = f[3]["x"].copy()
        x[4:] = np.clip(x[4:], 1 - 3 * TOL, 1 + 3 * TOL)
        chi2, info = _refine(m, r, ("", "healthy"), 1.0, 0j, x_start=x)
        if chi2 < fits[0][1]:
            fits[0] = (chi2, chi2, ("", "healthy"), info)
    h = fits[0]
    # A drifted element pulls its own scale in the healthy fit: the most pulled
    # (in units of their tolerance) are fitted again with that scale free, from
    # the healthy solution.
    hs = h[3]["scales"]
    for i in np.argsort(-np.abs(hs - 1.0))[:N_DRIFT]:
        hyp = (f"L{i}" if i < nl else f"C{i - nl}", "drift")
        chi2, info = _refine(m, r, hyp, float(hs[i]), h[3]["load_gamma"], x_start=h[3]["x"])
        fits.append((chi2 + PENALTY, chi2, hyp, info))
    faults = [f for f in fits[1:] if _admissible(f)]
    faults.sort(key=lambda f: f[0])
    # Before a drift is named, the healthy fit from the drift's solution (its
    # scale held within the tolerance): the yardstick's own minimum, not a worse one.
    if faults and faults[0][2][1] == "drift":
        x = faults[0][3]["x"].copy()
        x[4:] = np.clip(x[4:], 1 - 3 * TOL, 1 + 3 * TOL)
        chi2, info = _refine(m, r, ("", "healthy"), 1.0, 0j, x_start=x)
        if chi2 < h[1]:
            h = fits[0] = (chi2, chi2, ("", "healthy"), info)
    n = len(meas)
    named = []
    if faults and _decisive(faults[0], h, n):
        named.append(_evidence(m, r, faults[0], h))
        # Other elements' faults the readings fit about as well (a part stuck in
        # that puts every reading near total reflection hides which one it is).
        alike = []
        for f in faults[1:]:
            if f[2][0] != faults[0][2][0] and f[0] - faults[0][0] < ALIKE and f"{f[2][0]}:{f[2][1]}" not in alike:
                alike.append(f"{f[2][0]}:{f[2][1]}")
        if alike:
            named[0]["fits_as_well"] = alike
    untested = [e for e in _untested(m, r, (named and faults[0]) or h) if not named or e != named[0]["element"]]
    # Elements whose value these readings barely constrain (the fit's
    # uncertainty near the tolerance alone): a drift there passes unseen.
    sd = h[3]["scale_sigmas"]
    names = [f"L{i}" for i in range(nl)] + [f"C{i}" for i in range(nc)]
    unmeasured = [names[i] for i in range(nl + nc) if sd[i] > VALUE_SEEN and names[i] not in untested
                  and not (named and names[i] == named[0]["element"])]
    return {"faults": named, "untested": untested, "values_unmeasured": unmeasured,
            "chi2_healthy": round(h[1], 1),
            "chi2_best_fault": round(faults[0][1], 1) if faults else None,
            "best_fault": list(faults[0][2]) if faults else None, "readings_used": n,
            "drift_fits": [(f[2][0], round(f[1], 1), round(f[3]["scale"], 3), round(f[3]["scale_sigma"], 3))
                           for f in fits if f[2][1] == "drift"]}


def _decisive(f, h, n: int) -> bool:
    """A stuck relay must explain readings the healthy box cannot (MARGIN); a
    drift is held to its fitted value and uncertainty (_admissible), so a
    smaller gain in chi-square names it."""
    if f[2][1] == "drift":
        return h[1] - f[0] > DRIFT_MARGIN
    return h[1] > HEALTHY_CHI2_PER_READING * n and h[1] - f[0] > MARGIN


def _admissible(f) -> bool:
    hyp, info = f[2], f[3]
    if hyp[1] == "drift":
        d = abs(info["scale"] - 1.0)
        return d > DRIFT_MIN and d > DRIFT_SIGMAS * float(np.hypot(TOL, info["scale_sigma"])) \
            and info["scale"] > 0.05
    return True


def _evidence(m: Model, r: Readings, f, h) -> dict[str, Any]:
    """The fault as the report and --json give it: element, kind, value, and the
    readings that tell it (measured against the healthy box's and the fault's
    predictions)."""
    _, chi2, hyp, info = f
    meas = _meas(r)
    pf = info["pred"]
    ph = h[3]["pred"]
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
    (so every element is seen both in and out, where the readings move).  The
    load and the box are those of the hypothesis (healthy or a stuck relay)
    that explains the first step best: on a box with a part stuck in, the
    healthy box's view of the load would pick a reference where nothing reads."""
    meas = _meas(r)
    sig = _sigma(meas)
    nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
    st = np.array(r.states, dtype=int)
    best = (np.inf, ("", "healthy"), [0j])
    for hyp in _hypotheses(nl, nc):
        if hyp[1] == "drift":
            continue
        g = _gamma_states(m, r.freq_hz, st, hyp, 1.0, GRID)
        if r.bypass_gamma is not None:
            g = np.vstack([g, GRID[None, :]])
        chi = np.sum(((np.abs(g) - meas[:, None]) / sig[:, None]) ** 2, axis=0)
        order = np.argsort(chi)[:3]
        if chi[order[0]] < best[0]:
            best = (float(chi[order[0]]), hyp, [complex(GRID[k]) for k in order])
    hyp = best[1]
    _, info = _refine(m, r, hyp, 1.0, best[2])
    l1, c1, sh1 = r.states[0]
    sh = 1 - sh1
    ls = np.repeat(np.arange(1 << nl), 1 << nc)
    cs = np.tile(np.arange(1 << nc), 1 << nl)
    allst = np.stack([ls, cs, np.full(len(ls), sh)], axis=1)
    g = _with_leak(_gamma_states(m, r.freq_hz, allst, hyp, 1.0, np.array([info["load_gamma"]])),
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
