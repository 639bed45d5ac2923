"""Antenna feed-point impedance from geometry with NEC-2 (the necpp package).

The description (JSON, kind "nec"):
  radiator: height_m, diameter_m (fed at its base; a few cm of insulator gap is
            electrically negligible below 30 MHz and is not modelled)
  top_hat (optional): wires, length_m, diameter_m (horizontal spokes at the top)
  coil (optional): height_m, inductance_uh, q (series loading coil in the radiator)
  ground: {"type": "perfect"}
          | {"type": "radials", conductivity_s_m, permittivity, radials, radial_length_m,
             radial_height_m (<= 0.3, default 0.2), radial_diameter_m}
          | {"type": "counterpoise", the same keys, radial_height_m above 0.3 m}
  feed (optional): series_r_ohm (ground or connection loss added at the feed)

Radials on the ground are modelled as wires 0.2 m above a Sommerfeld-Norton
real ground (NEC-2 cannot bury wires, and closer than about a thousandth of a
wavelength it returns negative resistances on the low bands; common practice).
Segmenting follows the usual NEC-2 guidance: segments no longer than a tenth
of the shortest wavelength (we use a twelfth), and at least eight wire
radii long for the thin-wire kernel; breaking either is warned about, and a
radius larger than the segment length is refused.

Each frequency is one NEC-2 run, so a coil's loss resistance (omega L / Q) is
exact at every frequency.  Sweeps of ADAPTIVE_MIN_POINTS or more are sampled
adaptively (rational.py): NEC-2 runs where a rational fit is uncertain, the
rest is interpolated within ADAPTIVE_RTOL; exact=True solves every point.  The
engine is necpp built with third_party/necpp's fixes; the index's build gives
wire-order-dependent answers over real ground and is warned about.
"""

from __future__ import annotations

import functools
import hashlib
import json
import math
import os
import warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from feedmatch.errors import InputError
from feedmatch.jsonfile import check_keys, number
from feedmatch.rf.rational import adaptive_sample

C0 = 299_792_458.0
CACHE_VERSION = 6
SEGS_PER_WAVELENGTH = 12
F_SEGMENT_HZ = 30e6


class NecWarning(UserWarning):
    pass


def _sec(d: dict, key: str, where: str, required: bool = False) -> dict | None:
    v = d.get(key)
    if v is None:
        if required:
            raise InputError(f"{where}: missing field '{key}'")
        return None
    if not isinstance(v, dict):
        raise InputError(f"{where}: field '{key}' must be an object")
    return v


def validate(d: dict, where: str) -> dict:
    """A normalised copy of a NEC antenna description; errors name the field."""
    check_keys(d, {"kind", "name", "radiator", "top_hat", "coil", "ground", "feed", "comment"},
               {"radiator", "ground"}, where)
    r = _sec(d, "radiator", where, True)
    w = f"{where}: radiator"
    check_keys(r, {"height_m", "diameter_m"}, {"height_m", "diameter_m"}, w)
    out: dict[str, Any] = {"radiator": {
        "height_m": number(r, "height_m", w, positive=True, maximum=200),
        "diameter_m": number(r, "diameter_m", w, positive=True, maximum=1.0),
    }}
    if out["radiator"]["diameter_m"] >= out["radiator"]["height_m"] / 5:
        raise InputError(f"{w}: diameter_m must be well below height_m (a thin radiator)")
    th = _sec(d, "top_hat", where)
    if th is not None:
        w = f"{where}: top_hat"
        check_keys(th, {"wires", "length_m", "diameter_m"}, {"wires", "length_m"}, w)
        n = th["wires"]
        if not isinstance(n, int) or isinstance(n, bool) or not 1 <= n <= 16:
            raise InputError(f"{w}: field 'wires' must be an integer 1..16")
        out["top_hat"] = {"wires": n, "length_m": number(th, "length_m", w, positive=True, maximum=50),
                          "diameter_m": number(th, "diameter_m", w, positive=True, optional=True,
                                               default=0.004)}
    coil = _sec(d, "coil", where)
    if coil is not None:
        w = f"{where}: coil"
        check_keys(coil, {"height_m", "inductance_uh", "q"}, {"height_m", "inductance_uh"}, w)
        h = number(coil, "height_m", w, minimum=0.0)
        if h >= out["radiator"]["height_m"]:
            raise InputError(f"{w}: field 'height_m' must be below the top of the radiator")
        out["coil"] = {"height_m": h, "inductance_uh": number(coil, "inductance_uh", w, positive=True),
                       "q": number(coil, "q", w, positive=True, optional=True, default=200.0)}
    g = _sec(d, "ground", where, True)
    w = f"{where}: ground"
    gt = g.get("type")
    if gt == "perfect":
        check_keys(g, {"type"}, set(), w)
        out["ground"] = {"type": "perfect"}
    elif gt in ("radials", "counterpoise"):
        check_keys(g, {"type", "conductivity_s_m", "permittivity", "radials", "radial_length_m",
                       "radial_height_m", "radial_diameter_m"},
                   {"conductivity_s_m", "permittivity", "radials", "radial_length_m"}, w)
        n = g["radials"]
        if not isinstance(n, int) or isinstance(n, bool) or not 1 <= n <= 120:
            raise InputError(f"{w}: field 'radials' must be an integer 1..120")
        hdef = 0.2 if gt == "radials" else 2.5
        hr = number(g, "radial_height_m", w, optional=True, default=hdef)
        if hr <= 0:
            raise InputError(f"{w}: field 'radial_height_m' must be above ground (NEC-2 cannot bury "
                             "wires; model on-ground radials a few cm up)")
        if gt == "radials" and hr > 0.3:
            raise InputError(f"{w}: radials on the ground must be at most 0.3 m up; use 'counterpoise'")
        if gt == "counterpoise" and hr <= 0.3:
            raise InputError(f"{w}: a counterpoise must be more than 0.3 m up; use 'radials'")
        out["ground"] = {"type": gt, "conductivity_s_m": number(g, "conductivity_s_m", w, positive=True),
                         "permittivity": number(g, "permittivity", w, minimum=1.0, maximum=100),
                         "radials": n, "radial_length_m": number(g, "radial_length_m", w,
                                                                 positive=True, maximum=200),
                         "radial_height_m": hr,
                         "radial_diameter_m": number(g, "radial_diameter_m", w, positive=True,
                                                     optional=True, default=0.002)}
    else:
        raise InputError(f"{w}: field 'type' must be 'perfect', 'radials' or 'counterpoise'")
    f = _sec(d, "feed", where) or {}
    check_keys(f, {"series_r_ohm"}, set(), f"{where}: feed")
    out["feed"] = {"series_r_ohm": number(f, "series_r_ohm", f"{where}: feed", minimum=0.0,
                                          optional=True, default=0.0)}
    return out


def _nseg(length: float, f_max_hz: float, minimum: int = 3, scale: int = 1) -> int:
    """Segments on one wire; scale 2 doubles them (the convergence check)."""
    lam = C0 / f_max_hz
    return scale * max(minimum, int(math.ceil(length / lam * SEGS_PER_WAVELENGTH)))


MIN_RADIATOR_SEGS = 21  # the current on a short radiator needs several segments


def check_segments(desc: dict, f_max_hz: float) -> list[str]:
    """Warnings (and errors raised) from the NEC-2 segmenting rules."""
    notes = []
    lam = C0 / f_max_hz
    wires = [("radiator", desc["radiator"]["height_m"], desc["radiator"]["diameter_m"] / 2)]
    if "top_hat" in desc:
        wires.append(("top_hat", desc["top_hat"]["length_m"], desc["top_hat"]["diameter_m"] / 2))
    g = desc["ground"]
    if g["type"] != "perfect":
        wires.append(("radial", g["radial_length_m"], g["radial_diameter_m"] / 2))
    for name, length, a in wires:
        seg = length / _nseg(length, f_max_hz, MIN_RADIATOR_SEGS if name == "radiator" else 3)
        if a >= seg:
            raise InputError(f"{name}: wire radius {a:g} m is larger than its segment length {seg:.3g} m "
                             "(NEC-2 thin-wire model breaks); use a thinner wire or fewer, longer segments")
        if seg / a < 8:
            notes.append(f"{name}: segment length is only {seg / a:.1f} radii (NEC-2 wants > 8)")
        if seg > lam / 10:
            notes.append(f"{name}: segment {seg:.3g} m is longer than a tenth wavelength")
    n = segment_count(desc, f_max_hz)
    if n > MAX_SEGMENTS:
        raise InputError(f"the model needs {n} segments up to {f_max_hz / 1e6:g} MHz (limit {MAX_SEGMENTS}, "
                         "beyond which one frequency takes many seconds and a sweep looks hung); use fewer "
                         "or shorter radials or top-hat wires, or sweep to a lower top frequency")
    if n > SLOW_SEGMENTS:
        # Measured here: 437 segments 0.4 s, 821 1.3 s, 1589 4.0 s per frequency over real ground.
        secs = 0.4 * (n / 437) ** 1.7
        notes.append(f"{n} segments: NEC-2 needs roughly {secs:.0f} s per frequency on a small machine")
    return notes


MAX_SEGMENTS = 2000
SLOW_SEGMENTS = 600


def segment_count(desc: dict, f_max_hz: float, scale: int = 1) -> int:
    """Segments of the NEC-2 model as _build lays it out."""
    n = _nseg(desc["radiator"]["height_m"], f_max_hz, MIN_RADIATOR_SEGS, scale)
    if "top_hat" in desc:
        n += desc["top_hat"]["wires"] * _nseg(desc["top_hat"]["length_m"], f_max_hz, 3, scale)
    g = desc["ground"]
    if g["type"] != "perfect":
        n += g["radials"] * _nseg(g["radial_length_m"], f_max_hz, 3, scale)
    return n


@functools.cache
def engine() -> str:
    """The installed necpp build, e.g. '2.3.4+feedmatch.1' for the fixed one (looked up
    once: it is part of every cache key)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("necpp")
    except PackageNotFoundError:
        return "unknown"


def engine_fixed() -> bool:
    """True for the build from third_party/necpp (Sommerfeld interpolation fixed)."""
    return "+feedmatch." in engine()


def _warn_unfixed(desc: dict) -> None:
    if desc["ground"]["type"] != "perfect" and not engine_fixed():
        warnings.warn(f"necpp {engine()} is the unpatched build: over real ground it reuses stale "
                      "Sommerfeld interpolation coefficients, so results for wires near the ground depend "
                      "on wire order and frequency order by up to about 8 %; `make` builds the fixed one "
                      "(third_party/necpp/README.md)", NecWarning, stacklevel=3)


FEED_TAG = 1  # the radiator's first wire, fed at its base segment


def _build(necpp, nec, desc: dict, f_max_hz: float, scale: int = 1) -> int:
    """The geometry and ground; returns the coil's tag (0 when none)."""

    def ok(rc: int, what: str) -> None:
        if rc != 0:
            raise InputError(f"NEC-2 rejected the {what}: {necpp.nec_error_message()}")

    r = desc["radiator"]
    g = desc["ground"]
    z_base = 0.0 if g["type"] == "perfect" else g["radial_height_m"]
    h = r["height_m"]
    a = r["diameter_m"] / 2
    tag = FEED_TAG
    coil = desc.get("coil")
    nv = _nseg(h, f_max_hz, MIN_RADIATOR_SEGS, scale)
    coil_tag = 0
    if coil is not None:
        # Radiator below the coil (if any), one segment carrying the coil, the rest above.
        seg = h / nv
        n1 = int(round(coil["height_m"] / seg))
        if n1:
            ok(necpp.nec_wire(nec, tag, n1, 0, 0, z_base, 0, 0, z_base + n1 * seg, a, 1, 1), "radiator")
            tag += 1
        coil_tag = tag
        ok(necpp.nec_wire(nec, tag, 1, 0, 0, z_base + n1 * seg, 0, 0, z_base + (n1 + 1) * seg, a, 1, 1),
           "coil")
        tag += 1
        if nv - n1 - 1 > 0:
            ok(necpp.nec_wire(nec, tag, nv - n1 - 1, 0, 0, z_base + (n1 + 1) * seg, 0, 0, z_base + h,
                              a, 1, 1), "radiator")
            tag += 1
    else:
        ok(necpp.nec_wire(nec, tag, nv, 0, 0, z_base, 0, 0, z_base + h, a, 1, 1), "radiator")
        tag += 1
    th = desc.get("top_hat")
    if th is not None:
        n = _nseg(th["length_m"], f_max_hz, 3, scale)
        for k in range(th["wires"]):
            ang = 2 * math.pi * k / th["wires"]
            ok(necpp.nec_wire(nec, tag, n, 0, 0, z_base + h, th["length_m"] * math.cos(ang),
                              th["length_m"] * math.sin(ang), z_base + h, th["diameter_m"] / 2, 1, 1),
               "top hat")
            tag += 1
    if g["type"] != "perfect":
        n = _nseg(g["radial_length_m"], f_max_hz, 3, scale)
        for k in range(g["radials"]):
            ang = 2 * math.pi * k / g["radials"]
            ok(necpp.nec_wire(nec, tag, n, 0, 0, z_base, g["radial_length_m"] * math.cos(ang),
                              g["radial_length_m"] * math.sin(ang), z_base, g["radial_diameter_m"] / 2,
                              1, 1), "radials")
            tag += 1
    ok(necpp.nec_geometry_complete(nec, 1 if g["type"] == "perfect" else 0), "geometry")
    if g["type"] == "perfect":
        ok(necpp.nec_gn_card(nec, 1, 0, 0, 0, 0, 0, 0, 0), "ground")
    else:
        ok(necpp.nec_gn_card(nec, 2, 0, g["permittivity"], g["conductivity_s_m"], 0, 0, 0, 0), "ground")
    return coil_tag


def _solve(desc: dict, f_mhz: list[float], f_max_hz: float, scale: int = 1) -> list[complex]:
    """NEC-2 at each frequency, one run per frequency so the coil's loss
    resistance (omega L / Q) is exact at every one of them."""
    import necpp

    out = []
    rs = desc["feed"]["series_r_ohm"]
    coil = desc.get("coil")
    for fm in f_mhz:
        nec = necpp.nec_create()
        try:
            coil_tag = _build(necpp, nec, desc, f_max_hz, scale)
            rcs = []
            if coil is not None:
                lh = coil["inductance_uh"] * 1e-6
                rcs.append(necpp.nec_ld_card(nec, 0, coil_tag, 1, 1, 2 * math.pi * fm * 1e6 * lh / coil["q"],
                                             lh, 0.0))
            rcs.append(necpp.nec_fr_card(nec, 0, 1, fm, 0.0))
            rcs.append(necpp.nec_ex_card(nec, 0, FEED_TAG, 1, 0, 1.0, 0, 0, 0, 0, 0))
            rcs.append(necpp.nec_xq_card(nec, 0))
            if any(rcs):
                raise InputError(f"NEC-2 failed at {fm:g} MHz: {necpp.nec_error_message()}")
            v = complex(necpp.nec_impedance_real(nec, 0), necpp.nec_impedance_imag(nec, 0))
        finally:
            necpp.nec_delete(nec)
        if not (math.isfinite(v.real) and math.isfinite(v.imag)):
            raise InputError("NEC-2 returned no valid impedance for this geometry")
        out.append(v + rs)
    return out


def _solve_chunk(args):
    desc, fs, fmax, *scale = args
    return _solve(desc, fs, fmax, *scale)


def cache_dir() -> Path:
    d = os.environ.get("FEEDMATCH_CACHE")
    p = Path(d) if d else Path.home() / ".cache" / "feedmatch"
    return p / "nec"


# Below this many frequencies every one is solved; above it the sweep is
# sampled adaptively (see rational.py) unless exact=True.
ADAPTIVE_MIN_POINTS = 40
# Interpolation tolerance: |dZ| / (|Z| + 5 ohm).  NEC-2's own impedance is not
# smoother than about 5e-4 once segments cross its approximate-integration
# distance, and its modelling error is percents, so 0.1 % is below both.
ADAPTIVE_RTOL = 1e-3


@dataclass
class NecSweep:
    z: np.ndarray
    solved: np.ndarray  # True where NEC-2 ran, False where interpolated
    est_err: float  # largest estimated interpolation error left, as |dZ| / (|Z| + 5 ohm)
    engine: str

    @property
    def n_solved(self) -> int:
        return int(self.solved.sum())


class _Runner:
    """Solves batches of frequencies on a process pool kept for one sweep."""

    def __init__(self, desc: dict, fmax: float, workers: int):
        self.desc, self.fmax, self.workers = desc, fmax, workers
        self.ex: ProcessPoolExecutor | None = None

    def __call__(self, f_hz: np.ndarray) -> np.ndarray:
        fs = [float(x) / 1e6 for x in f_hz]
        if self.workers < 2 or len(fs) < 2:
            return np.array(_solve_chunk((self.desc, fs, self.fmax)), dtype=complex)
        if self.ex is None:
            self.ex = ProcessPoolExecutor(max_workers=self.workers)
        w = min(self.workers, len(fs))
        parts = list(self.ex.map(_solve_chunk, [(self.desc, fs[i::w], self.fmax) for i in range(w)]))
        out = np.empty(len(fs), dtype=complex)
        for i, p in enumerate(parts):
            out[i::w] = p  # interleaved, so low and high frequencies share the load
        return out

    def close(self) -> None:
        if self.ex is not None:
            self.ex.shutdown()


def sweep_result(desc: dict, f_hz, workers: int | None = None, use_cache: bool = True,
                 exact: bool = False, rtol: float = ADAPTIVE_RTOL) -> NecSweep:
    """Impedance at each frequency (Hz), from the disk cache when the same
    description, frequencies, method and NEC-2 build were used before."""
    f = np.atleast_1d(np.asarray(f_hz, dtype=float))
    if np.any(~np.isfinite(f)) or np.any(f <= 0):
        raise InputError("NEC frequencies must be finite and > 0")
    _warn_unfixed(desc)
    fu, inverse = np.unique(f, return_inverse=True)
    adaptive = not exact and len(fu) >= ADAPTIVE_MIN_POINTS
    method = f"aaa:{rtol:g}" if adaptive else "exact"
    key = hashlib.sha256(json.dumps({"v": CACHE_VERSION, "d": desc, "f": fu.round(3).tolist(),
                                     "m": method, "e": engine()}, sort_keys=True).encode()).hexdigest()[:32]
    path = cache_dir() / f"{key}.json"
    if use_cache and path.exists():
        try:
            data = json.loads(path.read_text())
            zu = np.array(data["re"]) + 1j * np.array(data["im"])
            solved = np.zeros(len(fu), dtype=bool)
            solved[np.asarray(data["solved"], dtype=int)] = True
            if zu.shape == fu.shape:
                return NecSweep(zu[inverse], solved[inverse], float(data["est_err"]), engine())
        except (OSError, ValueError, KeyError, IndexError, TypeError):
            pass  # a damaged cache entry is recomputed
    # One segmentation for every run, set by the top of HF at least, so a
    # single frequency and a sweep through it get the same answer.
    fmax = max(float(fu.max()), F_SEGMENT_HZ)
    for n in check_segments(desc, fmax):
        warnings.warn(n, NecWarning, stacklevel=2)
    workers = workers if workers is not None else min(2, os.cpu_count() or 1)
    runner = _Runner(desc, fmax, workers)
    try:
        if adaptive:
            s = adaptive_sample(fu, runner, rtol=rtol, batch=2 * workers)
            zu, solved, est = s.values, s.solved, s.est_err
        else:
            zu, solved, est = runner(fu), np.ones(len(fu), dtype=bool), 0.0
    finally:
        runner.close()
    bad = fu[zu.real <= 0]
    if len(bad):
        warnings.warn(f"NEC-2 gave a negative resistance at {len(bad)} frequencies from "
                      f"{bad.min() / 1e6:.3f} MHz: the ground model is outside its range there "
                      "(raise radial_height_m)", NecWarning, stacklevel=2)
    if use_cache:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            tmp = path.with_suffix(f".{os.getpid()}.tmp")
            tmp.write_text(json.dumps({"re": zu.real.tolist(), "im": zu.imag.tolist(),
                                       "solved": np.flatnonzero(solved).tolist(), "est_err": est}))
            tmp.replace(path)
            _prune(path.parent, CACHE_KEEP)
        except OSError:
            pass
    return NecSweep(zu[inverse], solved[inverse], est, engine())


CACHE_KEEP = 4000  # sweeps kept on disk (a few kB each); the oldest go first


def _prune(d: Path, keep: int) -> None:
    entries = [e for e in os.scandir(d) if e.name.endswith(".json")]
    if len(entries) <= keep:
        return
    entries.sort(key=lambda e: e.stat().st_mtime)
    for e in entries[:len(entries) - keep]:
        try:
            os.unlink(e.path)
        except OSError:
            pass  # another process pruned it first


def sweep(desc: dict, f_hz, workers: int | None = None, use_cache: bool = True,
          exact: bool = False) -> np.ndarray:
    """Impedance at each frequency (Hz); see sweep_result."""
    return sweep_result(desc, f_hz, workers, use_cache, exact).z


# Above this relative change between the model and the model with twice the
# segments, the antenna command warns and design widens its margin (common
# practice for a convergence check: the answer should not move with the mesh).
CONVERGENCE_WARN = 0.05


def segment_convergence(desc: dict, f_hz, workers: int | None = None) -> list[dict[str, Any]]:
    """Re-solve a few frequencies with twice the segments on every wire.

    Returns per frequency the impedance with the usual segmenting and with
    twice as many, and the change |Z2 - Z1| / |Z1|: an estimate of how far the
    NEC-2 answer itself (not the interpolation) can be trusted there."""
    fs = sorted({float(x) for x in np.atleast_1d(np.asarray(f_hz, dtype=float))})
    if not fs:
        return []
    fmax = max(max(fs), F_SEGMENT_HZ)
    mhz = [f / 1e6 for f in fs]
    workers = workers if workers is not None else min(2, os.cpu_count() or 1)
    jobs = [(desc, mhz, fmax, 1), (desc, mhz, fmax, 2)]
    if workers >= 2:
        with ProcessPoolExecutor(max_workers=2) as ex:
            z1, z2 = ex.map(_solve_chunk, jobs)
    else:
        z1, z2 = (_solve_chunk(j) for j in jobs)
    n1, n2 = segment_count(desc, fmax, 1), segment_count(desc, fmax, 2)
    return [{"freq_hz": f, "z_ohm": [a.real, a.imag], "z_fine_ohm": [b.real, b.imag],
             "change": abs(b - a) / max(abs(a), 1e-9), "segments": [n1, n2]}
            for f, a, b in zip(fs, z1, z2)]


class NecAntenna:
    """An antenna from its geometry; impedance() runs NEC-2 (through the cache)."""

    def __init__(self, desc: dict, name: str = ""):
        self.desc = desc
        self.name = name

    def impedance(self, f_hz) -> np.ndarray:
        f = np.asarray(f_hz, dtype=float)
        z = sweep(self.desc, f.ravel())
        return z.reshape(f.shape) if f.shape else z[0]

    def sweep(self, f_hz, exact: bool = False) -> NecSweep:
        """The sweep with how it was computed (solved points, estimated error)."""
        return sweep_result(self.desc, np.asarray(f_hz, dtype=float).ravel(), exact=exact)

    def convergence(self, f_hz) -> list[dict[str, Any]]:
        """See segment_convergence."""
        return segment_convergence(self.desc, f_hz)

    def describe(self) -> str:
        r = self.desc["radiator"]
        g = self.desc["ground"]
        gd = "perfect ground" if g["type"] == "perfect" else (
            f"{g['radials']} x {g['radial_length_m']:g} m {'radials' if g['type'] == 'radials' else 'counterpoise'}"
            f" over {g['conductivity_s_m']:g} S/m, er {g['permittivity']:g}")
        extra = ""
        if "top_hat" in self.desc:
            extra += f", top hat {self.desc['top_hat']['wires']} x {self.desc['top_hat']['length_m']:g} m"
        if "coil" in self.desc:
            extra += f", coil {self.desc['coil']['inductance_uh']:g} uH at {self.desc['coil']['height_m']:g} m"
        return f"NEC-2 vertical {r['height_m']:g} m x {r['diameter_m'] * 1e3:g} mm{extra}, {gd}"


def nec_antenna_from_dict(d: dict, where: str = "antenna") -> NecAntenna:
    return NecAntenna(validate(d, where), str(d.get("name", "")))


DEMO_VERTICAL = {
    "kind": "nec", "name": "Hollow Oak field vertical",
    "radiator": {"height_m": 4.5, "diameter_m": 0.025},
    "ground": {"type": "radials", "conductivity_s_m": 0.002, "permittivity": 10, "radials": 16,
               "radial_length_m": 4.0, "radial_height_m": 0.2, "radial_diameter_m": 0.002},
}


def bench_nec_sweep() -> dict[str, Any]:
    """A fresh (uncached) 300-point sweep of the demo vertical with 16 radials,
    adaptive (the default) and exact, timed in the same run, with the largest
    difference between them as |dZ| / (|Z| + 5 ohm)."""
    import time

    desc = validate(DEMO_VERTICAL, "bench")
    f = np.linspace(1.8e6, 30e6, 300)
    t = time.perf_counter()
    fast = sweep_result(desc, f, use_cache=False)
    t_fast = time.perf_counter() - t
    t = time.perf_counter()
    full = sweep_result(desc, f, use_cache=False, exact=True)
    t_full = time.perf_counter() - t
    err = float(np.max(np.abs(fast.z - full.z) / (np.abs(full.z) + 5.0)))
    return {"nec_sweep_300_s": round(t_fast, 2), "nec_sweep_300_exact_s": round(t_full, 2),
            "nec_sweep_300_solved": fast.n_solved, "nec_sweep_300_max_err": float(f"{err:.2g}"),
            "nec_sweep_300_est_err": float(f"{fast.est_err:.2g}"), "nec_engine": fast.engine}
