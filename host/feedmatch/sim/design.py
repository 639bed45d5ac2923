"""The `design` job: propose the L-network's element values for an antenna and its bands.

A proposal is a bank of binary-weighted elements, L0 * rL**k and C0 * rC**k
(k = 0 .. N-1): with a ratio of exactly 2 every code is a step of the smallest
element; a ratio a little under 2 lets neighbouring codes overlap, so a box
built from tolerance parts keeps no gaps, at the price of range.  scipy's
differential evolution picks L0, C0, rL and rC on a coarse frequency grid
with the exact all-states model (every relay state evaluated); the result is
then scored on a fine grid, on drawn boxes of the stated tolerance, against
the bank the builder has now.

A frequency counts as covered when the best state of every drawn box reaches
the design SWR (default 1.3): the margin between it and the 1.5 the firmware
aims at is left for the detector's error and the search.  Where the NEC-2
model of the antenna is uncertain (its impedance moves by more than
CONVERGENCE_WARN with twice the segments), the load is also taken as
Z * (1 - e) and Z * (1 + e), and all three must be matched: the margin is
wider exactly there.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from feedmatch.errors import InputError
from feedmatch.rf import bands
from feedmatch.rf.network import (
    Network,
    StateTable,
    evaluate,
    gamma,
    lnet_zin_ant,
    lnet_zin_tx,
    series_table,
    shunt_table,
    swr_of,
)
from feedmatch.seam.logic import gamma_from_swr

# Search bounds of the optimiser (the smallest element and the weighting ratio).
L0_UH = (0.02, 2.0)
C0_PF = (1.0, 100.0)
RATIO = (1.6, 2.1)
COIL_UH = (0.5, 60.0)  # a fixed series coil at the antenna, when one pays
COIL_WHEN_BELOW = 0.9  # tried when some band is covered less than this by the banks alone
COIL_MUST_GAIN = 0.02  # and kept only when it adds this much mean coverage, losing no band
COARSE_POINTS = 31    # frequencies per band while optimising (the quick evaluation makes it cheap)
RATING_MARGIN = 2.0   # parts rated twice the worst computed stress (hardware_notes/ratings.md; common practice)
UNCERTAIN = 0.05      # see feedmatch.rf.nec.CONVERGENCE_WARN


@dataclass
class DesignSpec:
    """What the builder asks for.  power_w: transmitter power (W) for the ratings;
    tolerance: part tolerance as a fraction (0.05 = 5 %); design_swr: the best
    state must reach this SWR for a frequency to count as covered."""

    band_names: list[str]
    power_w: float = 100.0
    n_l: int = 7
    n_c: int = 7
    tolerance: float = 0.05
    design_swr: float = 1.3
    points: int = 31
    boxes: int = 4
    seed: int = 1
    inductor_q: float | None = 150.0
    capacitor_q: float | None = 1000.0
    z0_ohm: float = 50.0
    strays: str = "default"
    rating_margin: float = RATING_MARGIN
    maxiter: int = 25
    uncertainty: dict[str, float] = field(default_factory=dict)  # band -> relative |Z| change
    fixed_coil: bool = True  # try a fixed series coil at the antenna where a band stays poorly covered


# The E24 preferred numbers (IEC 60063), the series capacitors are sold in.
E24 = (1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8,
       7.5, 8.2, 9.1)


def e24(v: float) -> float:
    """The E24 value nearest to v (on a log scale: the series is geometric)."""
    if v <= 0:
        return v
    dec = 10 ** math.floor(math.log10(v))
    cands = [m * dec for m in E24] + [10 * dec]
    return float(f"{min(cands, key=lambda c: abs(math.log(c / v))):.3g}")


def binary_bank(l0_uh: float, r_l: float, c0_pf: float, r_c: float, spec: DesignSpec, name: str = "") -> Network:
    """A network of N+N weighted elements: L0*rL**k uH and C0*rC**k pF."""
    ind = [float(f"{l0_uh * r_l ** k:.4g}") for k in range(spec.n_l)]
    cap = [float(f"{c0_pf * r_c ** k:.4g}") for k in range(spec.n_c)]
    return Network(spec.z0_ohm, ind, cap, spec.inductor_q, spec.capacitor_q, name)


def band_grid(names: list[str], points: int) -> tuple[np.ndarray, np.ndarray]:
    """Frequencies (Hz) evenly over each band, edges included, and each one's band index."""
    fs, idx = [], []
    for i, n in enumerate(names):
        b = bands.by_name(n)
        k = max(points, 2)
        fs += list(np.linspace(b.low_hz, b.high_hz, k))
        idx += [i] * k
    return np.array(fs), np.array(idx)


@dataclass
class Loads:
    """The loads a bank must match: per grid frequency the antenna's impedance
    and, where the model is uncertain, its two widened variants."""

    f_hz: np.ndarray          # (n,)
    band: np.ndarray          # (n,) band index
    z: np.ndarray             # (n, v) impedances, v variants (column 0 the model's own)
    names: list[str]


def with_coil(loads: Loads, l_uh: float, q: float | None) -> Loads:
    """The loads the box sees through a fixed series coil of l_uh (Q q) at the antenna:
    Z + omega L / Q + j omega L (a base-loading coil, outside the switched network)."""
    if l_uh <= 0:
        return loads
    x = 2 * np.pi * loads.f_hz * l_uh * 1e-6
    r = x / q if q else 0.0
    return replace(loads, z=loads.z + (r + 1j * x)[:, None])


def make_loads(antenna: Any, names: list[str], points: int, uncertainty: dict[str, float]) -> Loads:
    f, bi = band_grid(names, points)
    z0 = np.asarray(antenna.impedance(f), dtype=complex).reshape(len(f))
    if not np.all(np.isfinite(z0)) or np.any(z0.real <= 0):
        raise InputError("the antenna gives no usable impedance (non-finite or R <= 0) on some of these bands")
    e = np.array([uncertainty.get(names[i], 0.0) if uncertainty.get(names[i], 0.0) > UNCERTAIN else 0.0
                  for i in bi])
    z = np.stack([z0, z0 * (1 - e), z0 * (1 + e)], axis=1)
    return Loads(f, bi, z, names)


def best_gamma(net: Network, loads: Loads) -> np.ndarray:
    """|gamma| of the best state for each load: shape (n, v); exhaustive over all states."""
    st = StateTable(net)
    out = np.empty(loads.z.shape)
    for i, f in enumerate(loads.f_hz):
        for j in range(loads.z.shape[1]):
            if j and loads.z[i, j] == loads.z[i, 0]:
                out[i, j] = out[i, 0]
                continue
            out[i, j] = float(st.gamma_mag(float(f), complex(loads.z[i, j])).min())
    return out


NEIGHBOURS = 3  # codes each side of the closed-form values that the quick evaluation tries


def closed_form_match(f_hz: np.ndarray, z: np.ndarray, z0: float, ql: float = np.inf, stray_in_pf: float = 0.0,
                      stray_out_pf: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """The L-network's closed-form match for many loads at once: the numpy twin of the
    firmware's fmlogic.lnet.analytic_match (a test holds them together), with every root.

    With the capacitor across the load ("ant", Y = G + jB) the shunt arm brings the
    susceptance to B' with G / (G^2 + B'^2) = z0; with it across the source ("tx") the
    series arm brings the reactance to X' with R / (R^2 + X'^2) = 1/z0 (Bowick, "RF
    Circuit Design", 2nd ed., ch. 4; the ARRL Handbook's L-network equations).  Returns
    (l_uh, c_pf) of shape (n, 4): columns 0-1 the two roots with the capacitor across the
    antenna side, 2-3 across the transmitter side (values may be negative or not finite
    where that root does not exist).
    The inductor's loss resistance (omega L / ql) and the strays go in by a few
    fixed-point steps."""
    f = np.asarray(f_hz, dtype=float)
    zl = np.asarray(z, dtype=complex)
    w = 2 * np.pi * f
    y_out = 1j * w * stray_out_pf * 1e-12
    y_in = 1j * w * stray_in_pf * 1e-12
    with np.errstate(divide="ignore", invalid="ignore"):
        y = 1.0 / zl
        ya = y + y_out
        g, b = ya.real, ya.imag
        za = 1.0 / ya
        r, x = za.real, za.imag
        sign = np.array([1.0, -1.0])
        z0e = np.full((len(f), 2), z0)        # capacitor across the load
        rt = np.repeat(r[:, None], 2, axis=1)  # capacitor across the source
        for _ in range(3):
            bt = sign * np.sqrt(np.maximum(g[:, None] / z0e - g[:, None] ** 2, 0.0))
            xs_a = bt / (g[:, None] ** 2 + bt ** 2)
            z0e = z0 - np.maximum(xs_a, 0.0) / ql
            xt = sign * np.sqrt(np.maximum(rt * z0 - rt ** 2, 0.0))
            xs_t = xt - x[:, None]
            rt = r[:, None] + np.maximum(xs_t, 0.0) / ql
        l_ant = xs_a / w[:, None]
        c_ant = (bt - b[:, None]) / w[:, None]
        l_tx = xs_t / w[:, None]
        c_tx = (xt / (rt ** 2 + xt ** 2) - y_in.imag[:, None]) / w[:, None]
    return (np.concatenate([l_ant, l_tx], axis=1) * 1e6,    # (n, 4) uH
            np.concatenate([c_ant, c_tx], axis=1) * 1e12)   # (n, 4) pF


def quick_best_gamma(net: Network, f_hz: np.ndarray, z: np.ndarray) -> np.ndarray:
    """|gamma| of the best state near the closed-form match, for many loads at once.

    The closed form (closed_form_match) gives up to four exact (L, C) solutions per
    load; the NEIGHBOURS codes on each side of each value are evaluated with the full
    model of the box (losses, strays), 144 states instead of every one.  The optimiser
    uses it; the final scores use the exhaustive best_gamma, and a test holds the two
    together."""
    f = np.asarray(f_hz, dtype=float)
    zl = np.asarray(z, dtype=complex)
    z0 = net.z0_ohm
    # The inductor's loss resistance (omega L / Q) moves the match a long way on
    # low-resistance loads (a short vertical on 40 m: about 20 % in C), and the
    # output stray adds to the load: both go into the closed form, so the
    # neighbourhood is centred where the box matches.
    ql = float(np.mean(net.inductor_q_each)) if net.inductor_q_each else (net.inductor_q or np.inf)
    l_req, c_req = closed_form_match(f, zl, z0, ql, net.stray_in_pf, net.stray_out_pf)
    w = 2 * np.pi * f
    y_in = 1j * w * net.stray_in_pf * 1e-12
    with np.errstate(divide="ignore", invalid="ignore"):
        ya = 1.0 / zl + 1j * w * net.stray_out_pf * 1e-12   # the load with the output stray
    l_req = np.where(np.isfinite(l_req), l_req, 0.0)
    c_req = np.where(np.isfinite(c_req), c_req, 0.0)

    def near(table: np.ndarray, want: np.ndarray) -> np.ndarray:
        order = np.argsort(table)
        pos = np.searchsorted(table[order], want)
        idx = np.clip(pos[..., None] + np.arange(-NEIGHBOURS, NEIGHBOURS), 0, len(table) - 1)
        return order[idx]                                        # (n, 4, 2K) codes
    lc = near(net.l_table_uh(), l_req)
    cc = near(net.c_table_pf(), c_req)
    zs_tab = series_table(net, f)                                # (n, 2^nL)
    yc_tab = shunt_table(net, f)                                 # (n, 2^nC)
    n = len(f)
    zs = np.take_along_axis(zs_tab, lc.reshape(n, -1), axis=1).reshape(lc.shape)[..., :, None]
    yc = np.take_along_axis(yc_tab, cc.reshape(n, -1), axis=1).reshape(cc.shape)[..., None, :]
    yl = ya[:, None, None, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        # Each slot only in its own arrangement: 0-1 capacitor across the load, 2-3 across the source.
        zin = np.concatenate([lnet_zin_ant(zs[:, :2], yc[:, :2], yl), lnet_zin_tx(zs[:, 2:], yc[:, 2:], yl)], axis=1)
        if net.stray_in_pf:
            zin = 1.0 / (1.0 / zin + y_in[:, None, None, None])
        gm = np.abs(gamma(zin, z0))
    return gm.reshape(n, -1).min(axis=1)


def _box(net: Network, spec: DesignSpec, k: int) -> Network:
    """Drawn box k of a bank: parts off by the tolerance, and every other box with
    the default strays (node and relay capacitance, lead inductance), the rest
    without.  Both kinds must be matched: a bank that only covers a band thanks
    to 8 pF of wiring capacitance would fail in a box built more tightly."""
    from feedmatch.sim.boxes import draw_box

    strays = spec.strays if k % 2 == 0 else "none"
    return draw_box(net, spec.seed * 7919 + k, spec.tolerance, strays).network


def _quick_cover(net: Network, spec: DesignSpec, loads: Loads, soft: bool) -> np.ndarray:
    """Per load, the share of drawn boxes (spec.boxes of them, seeded) whose best
    state near the closed form reaches the design SWR for every variant of the
    load; soft=True makes the step a steep logistic so an optimiser sees slopes."""

    gd = gamma_from_swr(spec.design_swr)
    n, v = loads.z.shape
    # Only the distinct loads: a variant equal to the model's own load (a band
    # where the model is certain) is not evaluated twice.
    keep = np.ones((n, v), dtype=bool)
    keep[:, 1:] = loads.z[:, 1:] != loads.z[:, :1]
    f = np.repeat(loads.f_hz, v).reshape(n, v)[keep]
    zf = loads.z[keep]
    acc = np.zeros(n)
    for k in range(spec.boxes):
        box = _box(net, spec, k)
        gk = np.zeros((n, v))
        gk[keep] = quick_best_gamma(box, f, zf)
        g = gk.max(axis=1)                                        # every variant must be matched
        acc += 1.0 / (1.0 + np.exp((g - gd) / 0.01)) if soft else (g <= gd)
    return acc / max(spec.boxes, 1)


def _objective_factory(spec: DesignSpec, loads: Loads, floor: np.ndarray | None) -> Callable:
    """The optimiser's cost of x = (log10 L0, log10 C0, rL, rC): minus the mean
    per-band coverage on the drawn boxes of the candidate (so the range keeps a
    margin for tolerance and strays), plus a penalty for each band where it
    falls below the floor (the coverage of the builder's current bank)."""
    masks = [loads.band == b for b in range(len(loads.names))]

    def cost(x: np.ndarray) -> float:
        net = binary_bank(10 ** x[0], x[2], 10 ** x[1], x[3], spec)
        ld = with_coil(loads, 10 ** x[4], spec.inductor_q) if len(x) > 4 else loads
        soft = _quick_cover(net, spec, ld, soft=True)
        cov = np.array([soft[m].mean() for m in masks])
        c = -cov.mean()
        if floor is not None:
            c += 4.0 * np.clip(floor - cov, 0.0, None).sum()
        return float(c)
    return cost


def _start_point(net: Network) -> np.ndarray | None:
    """The builder's current bank as a point of the search space, if it is one."""
    def fit(v: list[float]) -> tuple[float, float] | None:
        if len(v) < 2 or min(v) <= 0:
            return None
        k = np.arange(len(v))
        slope, icpt = np.polyfit(k, np.log(v), 1)
        return math.exp(icpt), math.exp(slope)
    a, b = fit(net.inductors_uh), fit(net.capacitors_pf)
    if a is None or b is None:
        return None
    x = np.array([math.log10(a[0]), math.log10(b[0]), a[1], b[1]])
    lo = np.array([math.log10(L0_UH[0]), math.log10(C0_PF[0]), RATIO[0], RATIO[0]])
    hi = np.array([math.log10(L0_UH[1]), math.log10(C0_PF[1]), RATIO[1], RATIO[1]])
    return np.clip(x, lo, hi)


def score_bank(net: Network, spec: DesignSpec, loads: Loads, power_w: float,
               coil_uh: float = 0.0) -> dict[str, Any]:
    """Per band: covered share on drawn boxes and on the nominal bank, worst best
    SWR, network loss at the matched state, and the worst stresses at power_w."""

    gd = gamma_from_swr(spec.design_swr)
    nom = best_gamma(net, loads)
    per_box = [best_gamma(_box(net, spec, k), loads) for k in range(spec.boxes)]
    ok_box = np.stack([(g.max(axis=1) <= gd) for g in per_box]) if per_box else (nom.max(axis=1) <= gd)[None]
    # Stresses and loss at the nominal best state of the model's own load.
    st = StateTable(net)
    loss_db = np.full(len(loads.f_hz), np.nan)
    v_pk = np.zeros(len(loads.f_hz))
    i_rms = np.zeros(len(loads.f_hz))
    p_load = np.zeros(len(loads.f_hz))
    states = []
    for i, f in enumerate(loads.f_hz):
        gm = st.gamma_mag(float(f), complex(loads.z[i, 0]))
        sh, lc, cc = np.unravel_index(int(np.argmin(gm)), gm.shape)
        e = evaluate(net, float(f), complex(loads.z[i, 0]), int(lc), int(cc), int(sh), power_w)
        eff = float(e["efficiency"])
        if coil_uh > 0:  # the coil's own loss: its resistance in series with the antenna's
            rc = 2 * math.pi * float(f) * coil_uh * 1e-6 / (spec.inductor_q or math.inf)
            eff *= max(loads.z[i, 0].real - rc, 1e-9) / loads.z[i, 0].real
        loss_db[i] = -10 * math.log10(max(eff, 1e-12))
        p_load[i] = float(e["p_load_w"])
        v_pk[i] = float(e["v_cap_rms"]) * math.sqrt(2)
        i_rms[i] = float(e["i_ind_rms"])
        states.append((int(lc), int(cc), int(sh)))
    rows = []
    for b, name in enumerate(loads.names):
        m = loads.band == b
        covered = nom[m, 0] <= gd
        rows.append({
            "band": name,
            "coverage": float(ok_box[:, m].mean()),
            "coverage_nominal": float((nom[m].max(axis=1) <= gd).mean()),
            "worst_swr": float(swr_of(nom[m, 0].max())),
            "loss_db_median": float(np.median(loss_db[m][covered])) if covered.any() else None,
            "loss_db_max": float(np.max(loss_db[m][covered])) if covered.any() else None,
            "v_cap_peak_max": float(v_pk[m].max()),
            "i_ind_rms_max": float(i_rms[m].max()),
        })
    return {"bands": rows, "states": states, "v_cap_peak": v_pk, "i_ind_rms": i_rms, "loss_db": loss_db,
            "p_load_w": p_load, "z_seen": loads.z[:, 0],
            "best_gamma_nominal": nom[:, 0], "best_gamma_boxes_worst":
                np.max([g[:, 0] for g in per_box], axis=0) if per_box else nom[:, 0],
            # What the coverage counts: each load's worst variant (the model's own and,
            # where it is uncertain, the widened ones), nominal and over the drawn boxes.
            "best_gamma_nominal_all": nom.max(axis=1),
            "best_gamma_boxes_worst_all": np.max([g.max(axis=1) for g in per_box], axis=0) if per_box
                else nom.max(axis=1),
            "best_gamma_boxes_best_all": np.min([g.max(axis=1) for g in per_box], axis=0) if per_box
                else nom.max(axis=1)}


def parts_list(net: Network, score: dict[str, Any], loads: Loads, margin: float,
               coil_uh: float = 0.0) -> list[dict[str, Any]]:
    """Each element with what it must carry: a capacitor the peak voltage across
    the shunt arm, an inductor the RMS current of the series arm and its own
    peak voltage (I * omega * L * sqrt 2), each the worst over the grid states
    that switch it in, times the rating margin."""
    out = []
    for k, v in enumerate(net.capacitors_pf):
        vs = [score["v_cap_peak"][i] for i, s in enumerate(score["states"]) if s[1] >> k & 1]
        out.append({"part": f"C{k}", "value": v, "unit": "pF", "in_use": len(vs),
                    "v_peak": max(vs, default=0.0), "rated_v_peak": margin * max(vs, default=0.0)})
    for k, v in enumerate(net.inductors_uh):
        idx = [i for i, s in enumerate(score["states"]) if s[0] >> k & 1]
        cur = max((score["i_ind_rms"][i] for i in idx), default=0.0)
        vl = max((score["i_ind_rms"][i] * 2 * math.pi * loads.f_hz[i] * v * 1e-6 * math.sqrt(2) for i in idx),
                 default=0.0)
        out.append({"part": f"L{k}", "value": v, "unit": "uH", "in_use": len(idx), "i_rms": cur,
                    "rated_i_rms": margin * cur, "v_peak": vl, "rated_v_peak": margin * vl})
    if coil_uh > 0:
        # The fixed coil carries the antenna current: power into the load over its resistance.
        i_ant = [math.sqrt(max(p, 0.0) / max(z.real, 1e-3)) for p, z in zip(score["p_load_w"], score["z_seen"])]
        cur = max(i_ant, default=0.0)
        vl = max((i * 2 * math.pi * f * coil_uh * 1e-6 * math.sqrt(2) for i, f in zip(i_ant, loads.f_hz)),
                 default=0.0)
        out.append({"part": "Lfix", "value": coil_uh, "unit": "uH", "in_use": len(loads.f_hz), "i_rms": cur,
                    "rated_i_rms": margin * cur, "v_peak": vl, "rated_v_peak": margin * vl})
    return out


def antenna_uncertainty(antenna: Any, names: list[str]) -> dict[str, float]:
    """Per band, the largest relative |Z| change of the NEC-2 model with twice
    the segments at the band's edges and centre; empty for other antennas."""
    if not hasattr(antenna, "convergence"):
        return {}
    fs, owner = [], []
    for n in names:
        b = bands.by_name(n)
        for f in (b.low_hz, b.centre_hz, b.high_hz):
            fs.append(f)
            owner.append(n)
    check = antenna.convergence(fs)
    by_f = {c["freq_hz"]: c["change"] for c in check}
    out: dict[str, float] = {}
    for f, n in zip(fs, owner):
        out[n] = max(out.get(n, 0.0), by_f.get(float(f), 0.0))
    return out


def design(antenna: Any, spec: DesignSpec, current: Network,
           progress: Callable[[int, int], None] | None = None) -> dict[str, Any]:
    """Propose a bank for antenna over spec.band_names; compare it with current."""
    from scipy.optimize import differential_evolution

    t0 = time.perf_counter()
    for n in spec.band_names:
        bands.by_name(n)  # an unknown band is refused before any work
    fine = make_loads(antenna, spec.band_names, spec.points, spec.uncertainty)
    coarse = fine if spec.points <= COARSE_POINTS else \
        make_loads(antenna, spec.band_names, COARSE_POINTS, spec.uncertainty)
    cur = replace(current, inductor_q=current.inductor_q or spec.inductor_q,
                  capacitor_q=current.capacitor_q or spec.capacitor_q)
    # The current bank's coarse coverage is the floor no band may fall below; it
    # only applies when the current bank has the relay counts asked for.
    floor = None
    same_size = cur.n_l == spec.n_l and cur.n_c == spec.n_c
    if same_size:
        ok = _quick_cover(cur, spec, coarse, soft=False)
        floor = np.array([ok[coarse.band == b].mean() for b in range(len(spec.band_names))])
    cost = _objective_factory(spec, coarse, floor)
    bounds = [tuple(math.log10(v) for v in L0_UH), tuple(math.log10(v) for v in C0_PF), RATIO, RATIO]
    x0 = _start_point(cur) if same_size else None
    gen = [0]

    def cb(*_a: Any, **_k: Any) -> bool:
        gen[0] += 1
        if progress:
            progress(gen[0], spec.maxiter)
        return False
    def search(bnds: list, start: np.ndarray | None):
        gen[0] = 0
        return differential_evolution(cost, bnds, x0=start, seed=spec.seed, maxiter=spec.maxiter, popsize=6,
                                      tol=1e-4, polish=False, init="sobol", callback=cb)
    res = search(bounds, x0)
    x = res.x
    nfev = int(res.nfev)
    name = f"designed: {spec.n_l}+{spec.n_c} relays for {', '.join(spec.band_names)}"
    prop = binary_bank(10 ** x[0], x[2], 10 ** x[1], x[3], spec, name=name)
    s_prop = score_bank(prop, spec, fine, spec.power_w)
    coil_uh, coil_tried = 0.0, False
    covs = [b["coverage"] for b in s_prop["bands"]]
    if spec.fixed_coil and min(covs) < COIL_WHEN_BELOW:
        # Where the banks alone leave a band short (a short vertical on a low band needs
        # more inductance than a binary bank holds), a fixed coil may pay: a second
        # search with its value as a fifth variable, kept only if it gains overall
        # and loses no band.
        coil_tried = True
        res2 = search(bounds + [tuple(math.log10(v) for v in COIL_UH)], np.append(x, math.log10(COIL_UH[0])))
        nfev += int(res2.nfev)
        x2 = res2.x
        coil2 = float(f"{10 ** x2[4]:.3g}")  # scored as it would be wound and printed
        net2 = binary_bank(10 ** x2[0], x2[2], 10 ** x2[1], x2[3], spec, name=name)
        s2 = score_bank(net2, spec, with_coil(fine, coil2, spec.inductor_q), spec.power_w, coil2)
        covs2 = [b["coverage"] for b in s2["bands"]]
        if np.mean(covs2) >= np.mean(covs) + COIL_MUST_GAIN and all(a >= b - 1e-9 for a, b in zip(covs2, covs)):
            coil_uh, prop, s_prop = coil2, net2, s2
            prop.extra["fixed_series_coil_uh"] = coil_uh
    # Capacitors as a buyer finds them: each snapped to E24, kept when no band
    # loses more than half a point of coverage by it.
    snapped = replace(prop, capacitors_pf=[e24(v) for v in prop.capacitors_pf], extra=dict(prop.extra))
    e24_cover = None
    if snapped.capacitors_pf != prop.capacitors_pf:
        ld = with_coil(fine, coil_uh, spec.inductor_q)
        s_snap = score_bank(snapped, spec, ld, spec.power_w, coil_uh)
        e24_cover = {"capacitors_pf": snapped.capacitors_pf,
                     "coverage": {b["band"]: b["coverage"] for b in s_snap["bands"]}}
        if all(a["coverage"] >= b["coverage"] - 0.005 for a, b in zip(s_snap["bands"], s_prop["bands"])):
            prop, s_prop = snapped, s_snap
            prop.extra["capacitors"] = "E24"
            e24_cover = None
    s_cur = score_bank(cur, spec, fine, spec.power_w)
    # Never propose a bank the builder would lose by: when the current bank of the
    # same size covers a band better, keep it and say so.
    worse = [a["band"] for a, b in zip(s_prop["bands"], s_cur["bands"]) if a["coverage"] < b["coverage"] - 1e-9]
    kept_current = bool(worse) and same_size
    if kept_current:
        prop, s_prop = replace(cur, name=cur.name or "current bank"), s_cur
        coil_uh = 0.0
    # Loss compared like with like: over the frequencies both banks match.
    gd = gamma_from_swr(spec.design_swr)
    both = (s_prop["best_gamma_nominal"] <= gd) & (s_cur["best_gamma_nominal"] <= gd)
    for b, (rp, rc) in enumerate(zip(s_prop["bands"], s_cur["bands"])):
        m = (fine.band == b) & both
        rp["loss_db_common"] = float(np.median(s_prop["loss_db"][m])) if m.any() else None
        rc["loss_db_common"] = float(np.median(s_cur["loss_db"][m])) if m.any() else None
    return {
        "proposal": prop, "current": cur, "score": s_prop, "score_current": s_cur, "loads": fine,
        "parts": parts_list(prop, s_prop, fine, spec.rating_margin, coil_uh),
        "kept_current": kept_current, "worse_bands": worse, "evaluations": nfev, "e24_alternative": e24_cover,
        "coil_uh": coil_uh, "coil_tried": coil_tried,
        "design_s": time.perf_counter() - t0,
    }


def relay_count(net: Network) -> int:
    """Relays of the box: one per element plus the capacitor-side relay."""
    return net.n_l + net.n_c + 1
