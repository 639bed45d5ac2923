"""The amateur bands: one table of allocations per ITU Region.

Edges are the amateur-service allocations of the ITU Radio Regulations,
Article 5, Table of Frequency Allocations (edition 2020), per Region (from
memory; check the current edition and, above all, your own licence: national
allocations are narrower in places and some footnotes widen them).  The
logbook's and the designer's HF bands (HF_BANDS, 160 m to 10 m) take the widest
edges of the three Regions (160 m 1.800-2.000, 80 m 3.500-4.000, 40 m
7.000-7.300 MHz: Region 2); `allocation(f, region)` answers for one Region, and
is what decides whether a carrier may be keyed at all (board/keying.py).
"""

from __future__ import annotations

from dataclasses import dataclass

from feedmatch.errors import InputError

ITU_SOURCE = "ITU Radio Regulations, Article 5, Table of Frequency Allocations (edition 2020)"
REGIONS = (1, 2, 3)


@dataclass(frozen=True)
class Band:
    name: str
    low_hz: float
    high_hz: float
    # Where a logged tune still counts as this band: wider than the common edges
    # where national allocations are (60 m; see HF_BANDS).
    span_low_hz: float | None = None
    span_high_hz: float | None = None
    # The amateur allocation in ITU Regions 1, 2 and 3: (low_hz, high_hz) or None.
    regions: tuple[tuple[float, float] | None, ...] = ()

    def holds(self, f_hz: float) -> bool:
        return (self.span_low_hz or self.low_hz) <= f_hz <= (self.span_high_hz or self.high_hz)

    @property
    def centre_hz(self) -> float:
        return 0.5 * (self.low_hz + self.high_hz)

    def in_region(self, region: int) -> tuple[float, float] | None:
        """This band's allocation edges (Hz) in an ITU Region, or None where it has none."""
        return self.regions[region - 1] if self.regions else None


def _band(name: str, r1, r2, r3, span: tuple[float, float] | None = None) -> Band:
    """A band from its Region 1/2/3 edges in kHz; its own edges are the widest of them."""
    regs = tuple(None if r is None else (r[0] * 1e3, r[1] * 1e3) for r in (r1, r2, r3))
    have = [r for r in regs if r is not None]
    return Band(name, min(r[0] for r in have), max(r[1] for r in have),
                span[0] if span else None, span[1] if span else None, regs)


def _same(lo: float, hi: float):
    return (lo, hi), (lo, hi), (lo, hi)


# The one table (kHz), ITU RR Article 5 (edition 2020), from memory.  160 m: Region 1
# has 1810-1850 kHz (1850-2000 only by national footnotes).  80 m: Region 1 3500-3800,
# Region 3 3500-3900.  40 m: Regions 1 and 3 7000-7200 since WRC-03.  60 m: the WRC-15
# secondary allocation 5351.5-5366.5 kHz (footnote 5.133B); national channels and
# allocations lie from about 5250 to 5450 kHz (the US channels up to 5406.4 kHz, the
# UK's from 5258.5 kHz; from memory), so the logbook counts that span as 60 m rather
# than "out" -- keying still needs the Article 5 edges.  6 m: Region 1 50-52 MHz since
# WRC-19 (secondary), Regions 2 and 3 50-54 MHz.
ALL_BANDS = (
    _band("2200m", *_same(135.7, 137.8)),
    _band("630m", *_same(472.0, 479.0)),
    _band("160m", (1810.0, 1850.0), (1800.0, 2000.0), (1800.0, 2000.0)),
    _band("80m", (3500.0, 3800.0), (3500.0, 4000.0), (3500.0, 3900.0)),
    _band("60m", *_same(5351.5, 5366.5), span=(5.250e6, 5.450e6)),
    _band("40m", (7000.0, 7200.0), (7000.0, 7300.0), (7000.0, 7200.0)),
    _band("30m", *_same(10100.0, 10150.0)),
    _band("20m", *_same(14000.0, 14350.0)),
    _band("17m", *_same(18068.0, 18168.0)),
    _band("15m", *_same(21000.0, 21450.0)),
    _band("12m", *_same(24890.0, 24990.0)),
    _band("10m", *_same(28000.0, 29700.0)),
    _band("6m", (50000.0, 52000.0), (50000.0, 54000.0), (50000.0, 54000.0)),
    _band("2m", (144000.0, 146000.0), (144000.0, 148000.0), (144000.0, 148000.0)),
    _band("70cm", (430000.0, 440000.0), (420000.0, 450000.0), (420000.0, 450000.0)),
)
# The HF bands the logbook, the designer and the scorer work over: 160 m to 10 m.
HF_BANDS = tuple(b for b in ALL_BANDS if 1.8e6 <= b.low_hz < 30e6)


def check_region(region) -> int:
    if region not in REGIONS:
        raise InputError(f"the ITU Region must be 1, 2 or 3 (1: Europe, Africa, Middle East, northern Asia; "
                         f"2: the Americas; 3: the rest of Asia and Oceania), got {region!r}")
    return int(region)


def allocation(f_hz: float, region: int) -> tuple[Band, float, float] | None:
    """The amateur band holding f_hz in an ITU Region with its edges (Hz), or None."""
    for b in ALL_BANDS:
        edges = b.in_region(region)
        if edges is not None and edges[0] <= f_hz <= edges[1]:
            return b, edges[0], edges[1]
    return None


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


def check_hz(f: float, text: str, what: str = "frequency") -> float:
    """The one guard on a frequency typed in Hz: finite, positive, 100 kHz to 1 GHz.
    A small number is MHz or a band to an operator, never Hz to this box: the
    message says what was probably meant."""
    if not f > 0 or f != f or f == float("inf"):
        raise InputError(f"{what} must be a positive number of Hz, got {text}")
    if f > 1e9:
        raise InputError(f"{what} {text} Hz is above 1 GHz: an HF matching unit has no use for it")
    if f < 100e3:
        band = f"{f:g}m"
        try:
            by_name(band)
            meant = f"the {band} band or {f:g}e6 Hz ({f:g} MHz)"
        except InputError:
            meant = f"{f:g}e6 Hz ({f:g} MHz)"
        raise InputError(f"{what} {text} is in Hz and below 100 kHz: did you mean {meant}?")
    return f


def parse_freq(text: str) -> float:
    """A frequency in Hz, or a band name meaning its centre."""
    try:
        f = float(text)
    except ValueError:
        return by_name(text).centre_hz
    return check_hz(f, text)


def parse_sweep(text: str) -> list[float]:
    """'start:stop:n' in Hz (each end through the same guard as a single frequency)."""
    parts = text.split(":")
    if len(parts) != 3:
        raise InputError(f"sweep must be start:stop:points, got '{text}'")
    try:
        a, b, n = float(parts[0]), float(parts[1]), int(parts[2])
    except ValueError:
        raise InputError(f"sweep must be start:stop:points with numbers, got '{text}'") from None
    if 0 < a < 100e3 and 0 < b < 100e3:
        raise InputError(f"sweep {text} is in Hz and below 100 kHz: did you mean {a:g}e6:{b:g}e6:{n} (MHz)?")
    check_hz(a, parts[0], "sweep start")
    check_hz(b, parts[1], "sweep stop")
    if not (a < b) or not (2 <= n <= 100000):
        raise InputError(f"sweep needs start < stop and 2..100000 points, got '{text}'")
    return [a + (b - a) * i / (n - 1) for i in range(n)]
