"""Antenna feed-point impedance: fixed loads, a closed-form monopole, Touchstone sweeps.

The monopole uses the induced-EMF method for a thin centre-fed dipole of
length 2h with a sinusoidal current (Balanis, Antenna Theory, 3rd ed.,
section 8.5, radiation resistance and reactance referred to the current
maximum, then to the input by dividing by sin^2(kh)), the monopole over a
perfect ground plane being half the dipole (image theory).  Ground losses of
a real radial system are an added series resistance.  The method is good
from very short radiators up to about 0.4 wavelength; beyond that the
reference to the input current blows up near the half-wave anti-resonance, so
the model refuses heights above 0.45 wavelength (use the NEC model).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

import numpy as np
from scipy.special import sici

from feedmatch.errors import InputError
from feedmatch.jsonfile import check_keys, load_json, number

C0 = 299_792_458.0
ETA0 = 119.9169832 * math.pi  # free-space wave impedance, ohm
EULER_GAMMA = 0.5772156649015329
MAX_H_OVER_LAMBDA = 0.45


class Antenna(Protocol):
    def impedance(self, f_hz) -> np.ndarray: ...

    def describe(self) -> str: ...


@dataclass
class FixedLoad:
    r_ohm: float
    x_ohm: float

    def impedance(self, f_hz) -> np.ndarray:
        f = np.asarray(f_hz, dtype=float)
        return np.full(f.shape, complex(self.r_ohm, self.x_ohm))

    def describe(self) -> str:
        return f"fixed load {self.r_ohm:g}{self.x_ohm:+g}j ohm"


def dipole_induced_emf(l_m: float, a_m: float, f_hz) -> np.ndarray:
    """Input impedance of a thin centre-fed dipole of length l (induced-EMF method)."""
    f = np.asarray(f_hz, dtype=float)
    k = 2 * np.pi * f / C0
    kl = k * l_m
    si1, ci1 = sici(kl)
    si2, ci2 = sici(2 * kl)
    _, cia = sici(2 * k * a_m * a_m / l_m)
    g = EULER_GAMMA
    rr = ETA0 / (2 * np.pi) * (
        g + np.log(kl) - ci1 + 0.5 * np.sin(kl) * (si2 - 2 * si1)
        + 0.5 * np.cos(kl) * (g + np.log(kl / 2) + ci2 - 2 * ci1))
    xm = ETA0 / (4 * np.pi) * (
        2 * si1 + np.cos(kl) * (2 * si1 - si2)
        - np.sin(kl) * (2 * ci1 - ci2 - cia))
    s2 = np.sin(kl / 2) ** 2
    return (rr + 1j * xm) / s2


@dataclass
class Monopole:
    """A vertical over a ground system, closed form (see module doc)."""

    height_m: float
    radius_m: float
    ground_loss_ohm: float = 0.0

    def impedance(self, f_hz) -> np.ndarray:
        f = np.asarray(f_hz, dtype=float)
        hl = self.height_m * f / C0
        if np.any(hl > MAX_H_OVER_LAMBDA):
            fmax = MAX_H_OVER_LAMBDA * C0 / self.height_m
            raise InputError(f"closed-form monopole is valid up to {MAX_H_OVER_LAMBDA} wavelength: "
                             f"{self.height_m} m allows at most {fmax / 1e6:.2f} MHz")
        z = 0.5 * dipole_induced_emf(2 * self.height_m, self.radius_m, f)
        return z + self.ground_loss_ohm

    def max_hz(self) -> float:
        """The highest frequency the closed form holds at (0.45 wavelength)."""
        return MAX_H_OVER_LAMBDA * C0 / self.height_m

    def describe(self) -> str:
        return (f"monopole {self.height_m:g} m, radius {self.radius_m * 1e3:g} mm, "
                f"ground loss {self.ground_loss_ohm:g} ohm")


def short_monopole_radiation_resistance(h_m: float, f_hz: float) -> float:
    """40 pi^2 (h/lambda)^2: short monopole with triangular current (Balanis, 3rd ed.,
    short dipole 20 pi^2 (l/lambda)^2, halved for the image, l = 2h)."""
    return 40 * math.pi**2 * (h_m * f_hz / C0) ** 2


class TouchstoneSweep:
    """A measured one-port sweep (.s1p), read with scikit-rf, interpolated in frequency."""

    def __init__(self, path: str | Path):
        import skrf

        p = Path(path)
        if not p.is_file():
            raise InputError(f"Touchstone file not found: {p}")
        try:
            with warnings.catch_warnings():
                # skrf warns about unordered frequencies; the checks below say it in one line.
                warnings.simplefilter("ignore")
                ntw = skrf.Network(str(p))
        except Exception as e:  # skrf raises many kinds on bad files
            raise InputError(f"Touchstone file {p} cannot be read: {e}") from None
        if ntw.nports != 1:
            raise InputError(f"Touchstone file {p} has {ntw.nports} ports; a one-port .s1p is needed")
        self.path = p
        self.f = np.asarray(ntw.f, dtype=float)
        s11 = np.asarray(ntw.s[:, 0, 0], dtype=complex)
        if len(self.f) < 2:
            raise InputError(f"Touchstone file {p} needs at least 2 frequencies")
        # A sweep that is not a measurement of a passive one-port is refused
        # whole, naming the first bad point (Touchstone 2.0 requires frequencies
        # in increasing order; |S11| above 1 is an active load or a bad file).
        bad = ~(np.isfinite(self.f) & np.isfinite(s11.real) & np.isfinite(s11.imag))
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"Touchstone file {p}: point {i + 1} is not a number (NaN or infinite)")
        if self.f[0] <= 0:
            raise InputError(f"Touchstone file {p}: frequencies must be above 0 Hz, got {self.f[0]:g} Hz")
        step = np.diff(self.f)
        if np.any(step <= 0):
            i = int(np.argmax(step <= 0)) + 1
            raise InputError(f"Touchstone file {p}: frequencies must increase; point {i + 1} "
                             f"({self.f[i] / 1e6:g} MHz) does not")
        big = np.abs(s11) > 1.0 + 1e-6
        if big.any():
            i = int(np.argmax(big))
            raise InputError(f"Touchstone file {p}: |S11| = {abs(s11[i]):.3f} above 1 at "
                             f"{self.f[i] / 1e6:g} MHz: not a passive antenna")
        self.z = np.asarray(ntw.z[:, 0, 0], dtype=complex)

    def impedance(self, f_hz) -> np.ndarray:
        f = np.asarray(f_hz, dtype=float)
        if np.any(f < self.f[0] * (1 - 1e-9)) or np.any(f > self.f[-1] * (1 + 1e-9)):
            raise InputError(f"frequency outside the sweep in {self.path} "
                             f"({self.f[0] / 1e6:g}-{self.f[-1] / 1e6:g} MHz)")
        return np.interp(f, self.f, self.z.real) + 1j * np.interp(f, self.f, self.z.imag)

    def describe(self) -> str:
        return f"Touchstone sweep {self.path.name} ({len(self.f)} points)"

    def max_hz(self) -> float:
        return float(self.f[-1])


def write_s1p(path: str | Path, f_hz, z, z0: float = 50.0, comment: str = "") -> None:
    """Export a sweep as a Touchstone one-port through scikit-rf."""
    import skrf

    f = np.asarray(f_hz, dtype=float)
    zz = np.asarray(z, dtype=complex)
    s = (zz - z0) / (zz + z0)
    ntw = skrf.Network(frequency=skrf.Frequency.from_f(f, unit="hz"), s=s.reshape(-1, 1, 1),
                       z0=z0, comments=comment)
    p = Path(path)
    stem = str(p.with_suffix(""))
    ntw.write_touchstone(stem, form="ri")


_KINDS = {"fixed", "monopole", "touchstone", "nec"}


def antenna_from_dict(d: dict[str, Any], where: str = "antenna", base: Path | None = None):
    kind = d.get("kind")
    if kind not in _KINDS:
        raise InputError(f"{where}: field 'kind' must be one of {sorted(_KINDS)}, got {kind!r}")
    if kind == "fixed":
        check_keys(d, {"kind", "name", "r_ohm", "x_ohm"}, {"r_ohm", "x_ohm"}, where)
        return FixedLoad(number(d, "r_ohm", where, positive=True), number(d, "x_ohm", where))
    if kind == "monopole":
        check_keys(d, {"kind", "name", "height_m", "radius_m", "ground_loss_ohm"},
                   {"height_m", "radius_m"}, where)
        h = number(d, "height_m", where, positive=True)
        a = number(d, "radius_m", where, positive=True)
        if a >= h / 10:
            raise InputError(f"{where}: field 'radius_m' must be well below the height (thin wire)")
        return Monopole(h, a, number(d, "ground_loss_ohm", where, minimum=0.0, optional=True,
                                     default=0.0) or 0.0)
    if kind == "touchstone":
        check_keys(d, {"kind", "name", "path"}, {"path"}, where)
        if not isinstance(d["path"], str):
            raise InputError(f"{where}: field 'path' must be a string")
        p = Path(d["path"])
        if not p.is_absolute() and base is not None:
            p = base / p
        return TouchstoneSweep(p)
    from feedmatch.rf.nec import nec_antenna_from_dict

    return nec_antenna_from_dict(d, where)


def load_antenna(path: str | Path):
    """An antenna from a JSON description or directly from a .s1p file."""
    p = Path(path)
    if p.suffix.lower() == ".s1p":
        return TouchstoneSweep(p)
    return antenna_from_dict(load_json(p, "antenna"), f"antenna file {p}", p.parent)
