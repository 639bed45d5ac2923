"""The amateur HF band plan, 160 m to 10 m.

Edges are the ITU Region 1/2/3 common allocations as listed in the ARRL
Handbook band charts and the ITU Radio Regulations Article 5 (from memory; the
160 m and 80 m edges are the widest, Region 2, allocations, 1.800-2.000 and
3.500-4.000 MHz, and 40 m is the Region 2 7.000-7.300 MHz).  Check your own
licence conditions: national plans are narrower in places.
"""

from __future__ import annotations

from dataclasses import dataclass

from feedmatch.errors import InputError


@dataclass(frozen=True)
class Band:
    name: str
    low_hz: float
    high_hz: float
    # Where a logged tune still counts as this band: wider than the common edges
    # where national allocations are (60 m; see HF_BANDS).
    span_low_hz: float | None = None
    span_high_hz: float | None = None

    def holds(self, f_hz: float) -> bool:
        return (self.span_low_hz or self.low_hz) <= f_hz <= (self.span_high_hz or self.high_hz)

    @property
    def centre_hz(self) -> float:
        return 0.5 * (self.low_hz + self.high_hz)


HF_BANDS = (
    Band("160m", 1.800e6, 2.000e6),
    Band("80m", 3.500e6, 4.000e6),
    # 60 m: the common edges are the WRC-15 secondary allocation 5351.5-5366.5 kHz
    # (ITU RR Article 5, footnote 5.133B).  National channels and allocations lie
    # from about 5250 to 5450 kHz (for example the US channels up to 5406.4 kHz and
    # the UK's from 5258.5 kHz; from memory), so the logbook counts that span as
    # 60 m rather than "out".
    Band("60m", 5.3515e6, 5.3665e6, 5.250e6, 5.450e6),
    Band("40m", 7.000e6, 7.300e6),
    Band("30m", 10.100e6, 10.150e6),
    Band("20m", 14.000e6, 14.350e6),
    Band("17m", 18.068e6, 18.168e6),
    Band("15m", 21.000e6, 21.450e6),
    Band("12m", 24.890e6, 24.990e6),
    Band("10m", 28.000e6, 29.700e6),
)


def by_name(name: str) -> Band:
    for b in HF_BANDS:
        if b.name.lower() == name.lower():
            return b
    raise InputError(f"unknown band '{name}' (known: {', '.join(b.name for b in HF_BANDS)})")


def band_of(f_hz: float) -> str:
    """Name of the band holding f_hz, or 'out' when it is in none."""
    for b in HF_BANDS:
        if b.holds(f_hz):
            return b.name
    return "out"


def parse_freq(text: str) -> float:
    """A frequency in Hz, or a band name meaning its centre."""
    try:
        f = float(text)
    except ValueError:
        return by_name(text).centre_hz
    if not f > 0 or f != f or f == float("inf"):
        raise InputError(f"frequency must be a positive number of Hz, got {text}")
    if f > 1e9:
        raise InputError(f"frequency {text} Hz is above 1 GHz: an HF matching unit has no use for it")
    if f < 100e3:
        # 7.1 or 40 are MHz or a band to an operator, never Hz to this box.
        raise InputError(f"frequency {text} is in Hz and below 100 kHz: did you mean {f:g}e6 (MHz) "
                         f"or a band name such as 40m?")
    return f


def parse_sweep(text: str) -> list[float]:
    """'start:stop:n' in Hz."""
    parts = text.split(":")
    if len(parts) != 3:
        raise InputError(f"sweep must be start:stop:points, got '{text}'")
    try:
        a, b, n = float(parts[0]), float(parts[1]), int(parts[2])
    except ValueError:
        raise InputError(f"sweep must be start:stop:points with numbers, got '{text}'") from None
    if not (0 < a < b) or not (2 <= n <= 100000):
        raise InputError(f"sweep needs 0 < start < stop and 2..100000 points, got '{text}'")
    return [a + (b - a) * i / (n - 1) for i in range(n)]
