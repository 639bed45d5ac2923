"""Passive watch: an element that stopped acting or moved, from the logbook alone.

Every tune record carries its trace: the relay codes the search measured and
|gamma| read at each (at most 40 per tune).  Each trace has its own unknown
load; the box's element values, the side relay and the coupler are shared by
all of them.  For the last tunes (windows of 15, 30 and 50) every single-fault
hypothesis (healthy; an element stuck out or in; an element's value scaled;
the side relay stuck) is scored as the sum over the traces of the best
load's misfit (each trace's load on a grid over the reflection disc), with
the coupler leak's phase shared by the window.  The single-fault dictionary
approach of rf.diagnose, on readings the box took anyway: no extra reading,
no carrier asked for.  The model is what the box knows of itself (its
element values, learned where its config holds a correction, Qs, the
calibrated leak, the typical strays); a drift must move the value beyond
what 5 % parts explain (rf.diagnose.DRIFT_MIN) or, where fit-box learned the
values, beyond three of their sigmas.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from feedmatch.rf.diagnose import DRIFT_MIN, Model, _with_leak

WINDOWS = (15, 30, 50)
# Reading misfit the watch allows (|gamma|): reading noise, the search's own
# settling, the coupler's gain mismatch and a load grid step.
SIG0 = 0.012
SIG_REL = 0.02
# A fault is named when it lowers the window's misfit by this much (chi-square)
# and by this fraction of the healthy box's misfit.
MARGIN = 100.0
FRACTION = 0.3
DRIFT_SCALES = (0.6, 0.72, 0.8, 1.3)
# A part at the edge of its tolerance is a healthy box: the yardstick is the
# best of these and the nominal box.
TOL_SCALES = (0.88, 1.12)
MIN_READINGS = 3


def _grid() -> np.ndarray:
    r = np.concatenate([[0.0], np.linspace(0.04, 0.985, 20)])
    a = np.linspace(0, 2 * np.pi, 48, endpoint=False)
    return np.unique(np.round((r[:, None] * np.exp(1j * a[None, :])).ravel(), 9))


GRID = _grid()


def traces(records: list[dict[str, Any]]) -> list[tuple[float, np.ndarray, np.ndarray]]:
    """(frequency Hz, relay states (n, 3), |gamma| (n,)) of each record with a usable trace, in order."""
    out = []
    for r in records:
        t = r.get("trace")
        f = r.get("freq_hz") or 0.0
        if not isinstance(t, list) or len(t) < 4 * MIN_READINGS or not f or f <= 0:
            continue
        try:
            a = np.asarray(t[: len(t) // 4 * 4], dtype=float).reshape(-1, 4)
        except (TypeError, ValueError):
            continue
        ok = (a[:, 3] >= 0) & (a[:, 3] <= 1000)
        if ok.sum() < MIN_READINGS:
            continue
        out.append((float(f), a[ok, :3].astype(int), a[ok, 3] / 1000.0))
    return out


def hypotheses(nl: int, nc: int) -> list[tuple[str, str, float]]:
    """Healthy, each element at the edges of its tolerance ("tol": still
    healthy, the box's values are only nominal or learned), each fault."""
    out = [("", "healthy", 1.0)]
    for cls, n in (("L", nl), ("C", nc)):
        for i in range(n):
            out += [(f"{cls}{i}", "tol", s) for s in TOL_SCALES]
            out += [(f"{cls}{i}", "stuck-out", 1.0), (f"{cls}{i}", "stuck-in", 1.0)]
            out += [(f"{cls}{i}", "drift", s) for s in DRIFT_SCALES]
    return out + [("side", "stuck-tx", 1.0), ("side", "stuck-ant", 1.0)]


def _elements(m: Model, f: float, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Series impedance of each inductor in circuit, shunt admittance of each
    capacitor in and out of circuit, per hypothesis row of scales (H, nL + nC):
    the formulas of rf.diagnose._Fit."""
    nl = len(m.inductors_uh)
    w = 2 * np.pi * f
    ind = np.asarray(m.inductors_uh) * 1e-6 * scale[:, :nl]
    ze = w * ind / (m.inductor_q or np.inf) + 1j * w * (ind + m.lead_nh * 1e-9)
    if m.relay_open_pf:
        ze = 1.0 / (1.0 / ze + 1j * w * m.relay_open_pf * 1e-12)
    cap = np.asarray(m.capacitors_pf) * 1e-12 * scale[:, nl:]
    ye = w * cap / (m.capacitor_q or np.inf) + 1j * w * cap
    if m.lead_nh:
        ye = 1.0 / (1.0 / ye + 1j * w * m.lead_nh * 1e-9)
    yo = (1.0 / (1.0 / (1j * w * cap) + 1.0 / (1j * w * m.relay_open_pf * 1e-12)) if m.relay_open_pf
          else np.zeros_like(ye))
    return ze, ye, yo


def _tables(m: Model, hyps: list) -> tuple[np.ndarray, list]:
    """Per hypothesis: the element scales and the fault masks (fmlogic.selftest)."""
    from feedmatch.seam.logic import masks

    nl = len(m.inductors_uh)
    sc = np.ones((len(hyps), nl + len(m.capacitors_pf)))
    mk = []
    for h, (name, kind, s) in enumerate(hyps):
        if kind in ("drift", "tol"):
            sc[h, (0 if name[0] == "L" else nl) + int(name[1:])] = s
        mk.append(masks([(name, kind, 0.0)]) if kind in ("stuck-out", "stuck-in", "stuck-tx", "stuck-ant")
                  else masks([]))
    return sc, mk


def _gammas(m: Model, f: float, st: np.ndarray, sc: np.ndarray, mk: list, gl: np.ndarray) -> np.ndarray:
    """gamma (no leak) [hypothesis, reading, load]; gl (H, n or 1, G) or (G,)."""
    nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
    ze, ye, yo = _elements(m, f, sc)
    la = np.array([k[0] for k in mk])[:, None]
    lo = np.array([k[1] for k in mk])[:, None]
    ca = np.array([k[2] for k in mk])[:, None]
    co = np.array([k[3] for k in mk])[:, None]
    sd = np.array([k[4] for k in mk])[:, None]
    lcode = (st[None, :, 0] & la) | lo
    ccode = (st[None, :, 1] & ca) | co
    ant = np.where(sd < 0, st[None, :, 2], sd) == 1
    bl = (lcode[:, :, None] >> np.arange(nl)) & 1
    bc = (ccode[:, :, None] >> np.arange(nc)) & 1
    zs = np.einsum("hnk,hk->hn", bl, ze)
    yc = np.einsum("hnk,hk->hn", bc, ye) + np.einsum("hnk,hk->hn", 1 - bc, yo)
    w = 2 * np.pi * f
    zl = m.z0 * (1 + gl) / (1 - gl)
    yl = 1.0 / zl + 1j * w * m.stray_out_pf * 1e-12
    zs, yc, ant = zs[:, :, None], yc[:, :, None], ant[:, :, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        zin = np.where(ant, zs + 1.0 / (yl + yc), 1.0 / (1.0 / (zs + 1.0 / yl) + yc))
        if m.stray_in_pf:
            zin = 1.0 / (1.0 / zin + 1j * w * m.stray_in_pf * 1e-12)
        g = (zin - m.z0) / (zin + m.z0)
    return np.where(np.isfinite(g), g, 1.0)


_STEP = 0.05
_LOCAL = np.array([complex(x, y) for x in (-1, -0.5, 0, 0.5, 1) for y in (-1, -0.5, 0, 0.5, 1)]) * _STEP


def misfits(m: Model, trs: list, hyps: list) -> np.ndarray:
    """[hypothesis, leak phase, trace]: each trace's smallest chi-square over its
    load (the grid, then a finer grid around the best point)."""
    phases = np.linspace(0, 2 * np.pi, 4, endpoint=False) if m.leak > 0 else np.zeros(1)
    sc, mk = _tables(m, hyps)
    out = np.zeros((len(hyps), len(phases), len(trs)))
    for t, (f, st, g) in enumerate(trs):
        sig = (SIG0 + SIG_REL * g)[None, :, None]
        gs = _gammas(m, f, st, sc, mk, GRID)
        for p, ph in enumerate(phases):
            a = m.leak * np.exp(1j * ph)
            chi = np.sum(((_with_leak(gs, a) - g[None, :, None]) / sig) ** 2, axis=1)  # (H, G)
            k = np.argmin(chi, axis=1)
            near = GRID[k][:, None] + _LOCAL[None, :]  # (H, L)
            big = np.abs(near) >= 0.995
            near[big] = near[big] / np.abs(near[big]) * 0.995
            gn = _gammas(m, f, st, sc, mk, near[:, None, :])
            chn = np.sum(((_with_leak(gn, a) - g[None, :, None]) / sig) ** 2, axis=1)
            out[:, p, t] = np.minimum(chi.min(axis=1), chn.min(axis=1))
    return out


def watch(m: Model, records: list[dict[str, Any]], sigma_pct: dict[str, float] | None = None) -> dict[str, Any]:
    """The element the last tunes say stopped acting or moved (at most one), with
    its value in uH or pF, or none; the windows looked at and their figures."""
    trs = traces(records)[-max(WINDOWS):]
    nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
    res: dict[str, Any] = {"tunes_with_traces": len(trs), "finding": None, "windows": []}
    if len(trs) < min(WINDOWS):
        res["note"] = f"too few tunes with traces to watch ({len(trs)} of {min(WINDOWS)})"
        return res
    hyps = hypotheses(nl, nc)
    mf = misfits(m, trs, hyps)
    best = None
    for w in WINDOWS:
        if w > len(trs):
            continue
        tot = mf[:, :, -w:].sum(axis=2).min(axis=1)  # the leak phase shared by the window
        h = min(tot[i] for i in range(len(hyps)) if hyps[i][1] in ("healthy", "tol"))
        order = np.argsort(tot)
        k = next((int(i) for i in order if hyps[i][1] not in ("healthy", "tol")
                  and _admissible(hyps[i], sigma_pct, m)), None)
        row = {"tunes": w, "chi2_healthy": round(float(h), 1)}
        if k is not None:
            row.update({"best": f"{hyps[k][0]}:{hyps[k][1]}", "chi2_best": round(float(tot[k]), 1)})
            gain = h - tot[k]
            if gain > MARGIN and gain > FRACTION * h and (best is None or gain > best[0]):
                best = (gain, k, w, float(tot[k]), float(h))
        res["windows"].append(row)
    if best is not None:
        res["finding"] = _finding(m, hyps[best[1]], best)
    return res


def _admissible(hyp, sigma_pct, m: Model) -> bool:
    if hyp[1] != "drift":
        return hyp[1] != "healthy"
    lim = DRIFT_MIN
    if sigma_pct and hyp[0] in sigma_pct:
        lim = max(3 * sigma_pct[hyp[0]] / 100.0, 0.05)
    return abs(hyp[2] - 1.0) > lim


def _finding(m: Model, hyp, best) -> dict[str, Any]:
    name, kind, sc = hyp
    out: dict[str, Any] = {"element": name, "kind": kind, "tunes": best[2],
                           "chi2_healthy": round(best[4], 1), "chi2_fault": round(best[3], 1)}
    if name == "side":
        out["words"] = f"the capacitor's side relay {kind} (seen in the last {best[2]} tunes)"
        return out
    i = int(name[1:])
    unit, v = ("uH", m.inductors_uh[i]) if name[0] == "L" else ("pF", m.capacitors_pf[i])
    out["value"] = f"{v:g} {unit}"
    if kind == "drift":
        out["now"] = f"{v * sc:.3g} {unit}"
        out["words"] = f"{name} ({v:g} {unit}) moved to about {v * sc:.3g} {unit} (seen in the last {best[2]} tunes)"
    else:
        what = "never enters the circuit" if kind == "stuck-out" else "stays in the circuit"
        out["words"] = f"{name} ({v:g} {unit}) stopped acting: {what} ({kind}; seen in the last {best[2]} tunes)"
    return out


def watch_logbook(rows: list, sections: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """The watch for each board in the logbook's tune rows (the last board's
    config sections give its model): {board key: watch result}."""
    from feedmatch.board.selftest import model_from_config

    by: dict[str, list] = {}
    for r in rows:
        raw = r["raw"] if "raw" in r.keys() else None
        if not raw:
            continue
        try:
            rec = json.loads(raw)
        except ValueError:
            continue
        if isinstance(rec, dict):
            by.setdefault(r["board_id"], []).append(rec)
    out = {}
    for key, recs in by.items():
        sec = sections.get(key)
        if not sec or "network" not in sec:
            continue
        try:
            m = model_from_config(sec["network"], sec.get("correction"), sec.get("detector") or {})
        except (KeyError, TypeError, ValueError):
            continue
        # The page asks every few seconds: the same last tunes give the same answer.
        ck = (key, len(recs), json.dumps(recs[-1], sort_keys=True, default=str), json.dumps(sec, sort_keys=True))
        if ck not in _CACHE:
            if len(_CACHE) > 16:
                _CACHE.clear()
            _CACHE[ck] = watch(m, recs)
        out[key] = _CACHE[ck]
    return out


_CACHE: dict[tuple, dict[str, Any]] = {}


def watch_lines(found: dict[str, dict[str, Any]]) -> list[str]:
    """The watch as report lines, one per board (the page shows them too)."""
    out = []
    for key, w in found.items():
        who = f"parts ({key})" if len(found) > 1 else "parts"
        if w.get("finding"):
            out.append(f"{who}: CHECK {w['finding']['words']}; run feedmatch selftest to confirm")
        elif w.get("note"):
            out.append(f"{who}: {w['note']}")
        else:
            out.append(f"{who}: every element acts as the box's values say over its last "
                       f"{min(w['tunes_with_traces'], max(WINDOWS))} tunes with traces")
    return out
