"""The simulated measurement chain of the box: coupler, diode detectors, ADC.

Coupler: a two-transformer tandem coupler with turns ratio N couples
1/N of the line voltage, i.e. a coupling factor of 20 log10 N dB (for N = 30,
about 29.5 dB).  Finite directivity D leaks a fraction 10^(-D/20) of the
opposite wave into each port, with a phase that depends on the build.  The
default directivity is 25 dB at 28 MHz, improving 20 dB per decade towards the
low bands (the leakage is capacitive, so it scales with frequency), capped at
40 dB; these are typical figures for a home-built tandem coupler, from memory
(common practice), not a datasheet.

Detector: a Schottky diode detector is square-law at small signals and linear
(with a forward-voltage offset) at large ones.  We use the smooth form
V_out = sqrt(Vp^2 + Vt^2) - Vt, which tends to Vp^2 / (2 Vt) below Vt and to
Vp - Vt above it; Vt = 0.25 V is a typical small-signal Schottky figure (from
memory).  ADC: bits, reference, a front-end gain, Gaussian noise in counts
after the firmware's averaging.
"""

from __future__ import annotations

import math
import random
from dataclasses import asdict, dataclass
from typing import Any

from feedmatch.errors import InputError
from feedmatch.jsonfile import check_keys, number


@dataclass
class DetectorModel:
    turns: float = 30.0
    directivity_db_28mhz: float = 25.0
    directivity_max_db: float = 40.0
    directivity_phase_deg: float = 0.0
    diode_vt: float = 0.25
    front_gain: float = 0.75
    adc_bits: int = 12
    adc_vref: float = 3.3
    noise_counts: float = 0.7
    fwd_gain_db: float = 0.0
    ref_gain_db: float = 0.0
    offset_counts: float = 0.0
    ideal: bool = False
    directivity_flat_db: float | None = None
    # The forward port's own leakage (directivity in dB and phase in degrees);
    # None: the reflected port's vector is shared (the older, kinder model).
    fwd_directivity_db: float | None = None
    fwd_phase_deg: float | None = None

    def directivity_db(self, f_hz: float) -> float:
        """Directivity at f_hz: flat when directivity_flat_db is set, else the
        frequency-dependent default (capacitive leakage: 20 dB per decade)."""
        if self.directivity_flat_db is not None:
            return self.directivity_flat_db
        d = self.directivity_db_28mhz + 20.0 * math.log10(28e6 / max(f_hz, 1.0))
        return min(d, self.directivity_max_db)

    def calibrated_leak(self, f_hz: float = 14.2e6, p_w: float = 25.0) -> float:
        """The coupler leakage |gamma| that `feedmatch calibrate` reports for this
        box: the reading into a matched dummy load at f_hz, noise averaged out."""
        if self.ideal:
            return 0.0
        m = self.meter()
        pf, pr = m.powers(*self.read(p_w, 0j, f_hz, None))
        return _leak_reading(m, pf, pr)

    def full_scale(self) -> int:
        return (1 << self.adc_bits) - 1

    def _counts(self, v_peak: float, gain_db: float) -> float:
        vt = self.diode_vt
        v = math.sqrt(v_peak * v_peak + vt * vt) - vt
        c = v * self.front_gain * 10 ** (gain_db / 20.0) / self.adc_vref * self.full_scale()
        return c + self.offset_counts

    def port_voltages(self, p_inc_w: float, gamma: complex, f_hz: float) -> tuple[float, float]:
        """Peak voltages at the forward and reflected detector inputs."""
        leak, leak_f = self.leakage(f_hz)
        v_line = math.sqrt(2.0 * 50.0 * max(p_inc_w, 0.0)) / self.turns
        return v_line * abs(1.0 + gamma * leak_f), v_line * abs(gamma + leak)

    def leakage(self, f_hz: float) -> tuple[complex, complex]:
        """The true leakage vectors (reflected port d_r, forward port d_f) at f_hz:
        the plant's own, never told to a strategy."""
        d = 10 ** (-self.directivity_db(f_hz) / 20.0)
        leak = d * complex(math.cos(math.radians(self.directivity_phase_deg)),
                           math.sin(math.radians(self.directivity_phase_deg)))
        if self.fwd_directivity_db is None and self.fwd_phase_deg is None:
            return leak, leak
        df = d if self.fwd_directivity_db is None else 10 ** (-self.fwd_directivity_db / 20.0)
        ph = math.radians(self.fwd_phase_deg if self.fwd_phase_deg is not None else self.directivity_phase_deg)
        return leak, df * complex(math.cos(ph), math.sin(ph))

    def calibrated_leak_fwd(self, f_hz: float = 14.2e6, p_w: float = 25.0) -> float:
        """|d_f| as the reversed calibration pass reports it: power into the antenna
        port, the forward detector's leakage over the reflected detector's wave."""
        if self.ideal:
            return 0.0
        m = self.meter()
        pf, pr = m.powers(*self.read_reverse(p_w, f_hz, None)[::-1])
        return _leak_reading(m, pf, pr)

    def read(self, p_inc_w: float, gamma: complex, f_hz: float,
             rng: random.Random | None) -> tuple[float, float]:
        """Raw (forward, reflected) ADC counts, or exact watts when ideal."""
        if self.ideal:
            g2 = abs(gamma) ** 2
            return (p_inc_w, p_inc_w * g2)
        vf, vr = self.port_voltages(p_inc_w, gamma, f_hz)
        return self._adc(self._counts(vf, self.fwd_gain_db), self._counts(vr, self.ref_gain_db), rng)

    def _adc(self, cf: float, cr: float, rng: random.Random | None) -> tuple[float, float]:
        """Noise, rounding and the converter's range on a pair of detector outputs."""
        if rng is not None and self.noise_counts > 0:
            cf += rng.gauss(0.0, self.noise_counts)
            cr += rng.gauss(0.0, self.noise_counts)
        fs = self.full_scale()
        return (float(min(max(round(cf), 0), fs)), float(min(max(round(cr), 0), fs)))

    def read_reverse(self, p_w: float, f_hz: float, rng: random.Random | None) -> tuple[float, float]:
        """Raw (forward, reflected) counts with p_w flowing from the antenna port towards a
        matched transmitter port: the reflected detector sees the wave, the forward one
        only the coupler's leakage."""
        if self.ideal:
            return (0.0, p_w)
        # Reversed, the wave into the antenna port is the reflected port's main
        # signal and the forward port's leakage.
        v_line = math.sqrt(2.0 * 50.0 * max(p_w, 0.0)) / self.turns
        v_leak = v_line * abs(self.leakage(f_hz)[1])
        return self._adc(self._counts(v_leak, self.fwd_gain_db), self._counts(v_line, self.ref_gain_db), rng)

    def nominal_counts(self, p_w: float, side: str = "") -> float:
        """Noise-free counts for p_w of a wave at a detector: the nominal one, or with the
        gain of side "fwd" or "ref"."""
        gain = {"": 0.0, "fwd": self.fwd_gain_db, "ref": self.ref_gain_db}[side]
        return self._counts(math.sqrt(2.0 * 50.0 * p_w) / self.turns, gain)

    def calibration_points(self, p_min: float = 0.05, p_max: float = 200.0,
                           n: int = 16) -> list[tuple[float, float]]:
        """The table a bench calibration into a dummy load would produce."""
        pts = []
        for i in range(n):
            p = p_min * (p_max / p_min) ** (i / (n - 1))
            pts.append((round(self.nominal_counts(p), 3), p))
        return pts

    def meter(self, min_fwd_w: float = 0.5):
        """The firmware's Meter calibrated against this detector (or ideal)."""
        from feedmatch.seam.logic import Calibration, Meter

        if self.ideal:
            pts = [(1e-6, 1e-6), (1e4, 1e4)]
            cal = Calibration(pts, 0.0)
            return _IdealMeter(cal, cal, min_fwd_w)
        pts = self.calibration_points()
        floor = 2.0
        return Meter(Calibration(pts, floor), Calibration(pts, floor), min_fwd_w)

    def to_json(self) -> dict[str, Any]:
        return asdict(self)


def _leak_reading(meter, pf: float, pr: float) -> float:
    """A leakage reading as calibrate reports it: never below what the reflected
    detector resolves at that power (its floor plus two counts), since a
    reading at the floor only says the leakage is no larger."""
    if pf <= 0:
        return 0.0
    floor = math.sqrt(meter.ref.watts(meter.ref.floor + 2.0) / pf)
    return max(math.sqrt(pr / pf) if pr > 0 else 0.0, floor)


def floor_watts(meter) -> float:
    """The reflected power the firmware's coupler bounds take as the detector's
    floor (fmlogic.coupler.from_config does the same from a config)."""
    ref = getattr(meter, "ref", None)
    return ref.watts(ref.floor + 2.0) if ref is not None else 0.0


class _IdealMeter:
    """Readings already in watts (--ideal-detector)."""

    def __init__(self, fwd, ref, min_fwd_w):
        self.min_fwd_w = min_fwd_w

    def powers(self, fwd, ref):
        if fwd < self.min_fwd_w:
            return (0.0, 0.0)
        return (fwd, min(ref, fwd))


_KEYS = {"turns", "directivity_db_28mhz", "directivity_max_db", "directivity_phase_deg",
         "diode_vt", "front_gain", "adc_bits", "adc_vref", "noise_counts", "fwd_gain_db",
         "ref_gain_db", "offset_counts", "ideal", "directivity_flat_db", "fwd_directivity_db", "fwd_phase_deg"}


def detector_from_dict(d: dict[str, Any], where: str = "detector") -> DetectorModel:
    check_keys(d, _KEYS, set(), where)
    m = DetectorModel()
    for k in _KEYS - {"ideal", "adc_bits", "directivity_flat_db", "fwd_directivity_db", "fwd_phase_deg"}:
        if k in d:
            pos = k in {"turns", "diode_vt", "front_gain", "adc_vref"}
            setattr(m, k, number(d, k, where, positive=pos))
    if "adc_bits" in d:
        b = d["adc_bits"]
        if not isinstance(b, int) or isinstance(b, bool) or not 6 <= b <= 24:
            raise InputError(f"{where}: field 'adc_bits' must be an integer 6..24")
        m.adc_bits = b
    if d.get("directivity_flat_db") is not None:
        m.directivity_flat_db = number(d, "directivity_flat_db", where, minimum=6.0, maximum=60.0)
    if d.get("fwd_directivity_db") is not None:
        m.fwd_directivity_db = number(d, "fwd_directivity_db", where, minimum=6.0, maximum=60.0)
    if d.get("fwd_phase_deg") is not None:
        m.fwd_phase_deg = number(d, "fwd_phase_deg", where)
    if "ideal" in d:
        if not isinstance(d["ideal"], bool):
            raise InputError(f"{where}: field 'ideal' must be true or false")
        m.ideal = d["ideal"]
    return m
