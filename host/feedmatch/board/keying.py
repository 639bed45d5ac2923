"""Where a tune carrier may be keyed, in which mode, and by whom.

A tune carrier keyed by software is an emission on the operator's licence: this
module decides, before anything is keyed, whether it may be, and says why not.
It keys only

- inside a segment the operator declared (their privileges, their choice);
- inside an amateur band of their ITU Region (rf.bands: ITU Radio Regulations,
  Article 5, Table of Frequency Allocations, edition 2020);
- at least max(2 kHz, the mode's necessary bandwidth) inside the declared
  segment and the band (a carrier on an edge spills over it: drift, a dial
  that is a few hundred Hz off, the emission's own width);
- in a carrier mode the band plan allows there (BAND_PLAN_SOURCE);
- inside the range the box can match: the bands its banks are designed and
  scored for, and, where the antenna is known, where the network's best state
  brings the antenna's impedance under the box's retune SWR (rf.network, the
  one cascade).

When in doubt it does not key.  KeyerLock makes one process at most the keyer of
a radio and of a board.
"""

from __future__ import annotations

import fcntl
import hashlib
import math
import os
import re
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from feedmatch.errors import InputError
from feedmatch.rf import bands
from feedmatch.rf.network import Network, StateTable, best_state, swr_of

EDGE_MARGIN_HZ = 2000.0  # the least distance from a segment or band edge (common practice)
# Without an antenna model the network alone decides: at f it must bring every load inside
# the SWR-3 circle (a moderately mismatched antenna; |gamma| <= 0.5) under the box's retune
# SWR.  A choice of this project, not a published figure: the shipped 7+7 bank passes it
# from 1.8 MHz to beyond 50 MHz and fails it from about 60 MHz up (worst SWR 2.6 at 60 and
# 70 MHz, 3.0 at 145 MHz, measured with this code), where its 0.1 uH step is already
# 38-91 ohm.
COVER_GAMMA = (0.2, 0.35, 0.5)
COVER_PHASES = 24

# Hamlib's mode names (rig_strrmode's table in Hamlib 4.5, src/misc.c; from memory).
HAMLIB_MODES = ("AM", "CW", "USB", "LSB", "RTTY", "FM", "WFM", "CWR", "RTTYR", "AMS", "PKTLSB", "PKTUSB",
                "PKTFM", "ECSSUSB", "ECSSLSB", "FAX", "SAM", "SAL", "SAH", "DSB", "FMN", "PKTAM", "P25",
                "D-STAR", "DPMR", "NXDN-VN", "NXDN-N", "DCR", "AMN", "PSK", "PSKR", "DD", "C4FM", "PKTFMN",
                "SPEC", "CWN", "IQ", "ISBUSB", "ISBLSB")

# The modes that send a steady carrier when keyed with no audio, and their necessary
# bandwidths in Hz (ITU-R Recommendation SM.1138 emission designators: 150HA1A,
# 6K00A3E, 16K0F3E, 11K0F3E; from memory).  SSB and data modes send nothing without
# audio: a tune "carrier" in them is no carrier at all.
CARRIER_MODES = {"CW": 150.0, "CWR": 150.0, "CWN": 150.0, "AM": 6000.0, "FM": 16000.0, "FMN": 11000.0}

BAND_PLAN_SOURCE = "IARU Region 1 HF and VHF band plans, from memory"
# (modes, low kHz, high kHz) where a wide carrier fits the band plan; CW is allowed in every
# amateur band (the plans give CW every segment; common practice).  30 m is for CW and
# narrow data (200 Hz), 60 m for emissions up to 2.7 kHz: neither has AM nor FM.
# FM on HF only in 29.510-29.700 MHz.
WIDE_CARRIERS = (
    ({"AM"}, 1843.0, 2000.0),      # 160 m all modes
    ({"AM"}, 3600.0, 4000.0),      # 80 m all modes (Region 2 phone up to 4000)
    ({"AM"}, 7060.0, 7300.0),      # 40 m all modes (Region 2 phone up to 7300)
    ({"AM"}, 14101.0, 14350.0),    # 20 m
    ({"AM"}, 18111.0, 18168.0),    # 17 m
    ({"AM"}, 21151.0, 21450.0),    # 15 m
    ({"AM"}, 24931.0, 24990.0),    # 12 m
    ({"AM"}, 28320.0, 29300.0),    # 10 m all modes
    ({"FM", "FMN"}, 29510.0, 29700.0),  # 10 m FM
    ({"AM", "FM", "FMN"}, 50500.0, 54000.0),  # 6 m all modes
    ({"AM", "FM", "FMN"}, 144500.0, 145800.0),  # 2 m all modes and FM
    ({"AM", "FM", "FMN"}, 146000.0, 148000.0),  # 2 m, Regions 2 and 3
)


def _mhz(f: float) -> str:
    return f"{f / 1e6:.4f} MHz"


def _span(lo: float, hi: float) -> str:
    return f"{lo / 1e6:.4f}-{hi / 1e6:.4f} MHz"


# -- what the operator declares ------------------------------------------------------
def parse_segments(text: str) -> list[tuple[float, float]]:
    """'7.0-7.2,14.0-14.35' in MHz, or a file of such segments (commas or lines,
    '#' starts a comment) -> sorted [(low_hz, high_hz)]."""
    src = f"--segments '{text}'"
    p = Path(text)
    if p.is_file():
        try:
            body = p.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise InputError(f"segments file {p} cannot be read: {e}") from None
        text = ",".join(line.split("#", 1)[0] for line in body.splitlines())
        src = f"segments file {p}"
    elif "-" not in text and not text.strip():
        raise InputError("--segments is empty")
    return segments_from_list([x for x in re.split(r"[,\s]+", text) if x], src)


def segments_from_list(items: list, where: str) -> list[tuple[float, float]]:
    """Segments as 'low-high' strings in MHz or [low, high] pairs in MHz."""
    out = []
    for it in items:
        if isinstance(it, str):
            lo_s, sep, hi_s = it.partition("-")
            try:
                lo, hi = float(lo_s), float(hi_s)
            except ValueError:
                raise InputError(f"{where}: '{it}' is not a segment LOW-HIGH in MHz, e.g. 7.0-7.2") from None
            if not sep:
                raise InputError(f"{where}: '{it}' is not a segment LOW-HIGH in MHz, e.g. 7.0-7.2")
        elif isinstance(it, (list, tuple)) and len(it) == 2 and all(
                isinstance(v, (int, float)) and not isinstance(v, bool) for v in it):
            lo, hi = float(it[0]), float(it[1])
        else:
            raise InputError(f"{where}: {it!r} is not a segment [low, high] in MHz")
        if not (math.isfinite(lo) and math.isfinite(hi)) or not 0 < lo < hi:
            raise InputError(f"{where}: segment {it!r} needs 0 < low < high (MHz)")
        if hi > 1000.0:
            raise InputError(f"{where}: segment {it!r} is above 1000 MHz: segments are in MHz, e.g. 7.0-7.2")
        out.append((lo * 1e6, hi * 1e6))
    if not out:
        raise InputError(f"{where}: no segments")
    return sorted(out)


def check_mode(mode: str) -> str:
    """A Hamlib mode name that sends a carrier, or InputError saying why not."""
    m = mode.strip().upper()
    if m not in HAMLIB_MODES:
        raise InputError(f"--carrier-mode '{mode}' is not a Hamlib mode name (CW, AM, FM, ...; see "
                         "`rigctl -m 1 M ?`)")
    if m not in CARRIER_MODES:
        raise InputError(f"--carrier-mode {m} sends no steady carrier without audio; use CW (a key-down "
                         "carrier, the usual choice), or AM or FM where the band plan allows them")
    return m


def check_power(watts: float, power: dict[str, Any], where: str) -> None:
    """The tune power inside the box's tune window and under its hot-switch limit."""
    lo, hi = float(power.get("min_tune_w", 0.0)), float(power.get("max_tune_w", 0.0))
    hot = float(power.get("hot_switch_w", 0.0))
    if not (math.isfinite(watts) and lo <= watts <= hi and watts <= hot):
        raise InputError(f"--tune-carrier {watts:g} W is outside the box's tune window {lo:g}-{hi:g} W "
                         f"or above its hot-switch limit {hot:g} W ({where})")


def mode_allowed(mode: str, lo_hz: float, hi_hz: float) -> bool:
    """True when the band plan allows this carrier mode over all of lo..hi."""
    if mode in ("CW", "CWR", "CWN"):
        return True
    return any(mode in ms and a * 1e3 <= lo_hz and hi_hz <= b * 1e3 for ms, a, b in WIDE_CARRIERS)


# -- the policy ----------------------------------------------------------------------
@dataclass
class KeyPolicy:
    """Everything decided before a carrier is keyed.  refusal(f) is None where it may be."""

    segments: list[tuple[float, float]]
    region: int
    mode: str
    watts: float
    network: Network | None = None
    antenna: Any = None          # anything with impedance([f_hz]) (rf.antenna), or None
    swr_limit: float = 2.0       # the box's retune SWR: above it a tune is no use
    box_range_hz: tuple[float, float] = (bands.HF_BANDS[0].low_hz, bands.HF_BANDS[-1].high_hz)
    _matched: dict[float, str | None] = field(default_factory=dict)

    @property
    def margin_hz(self) -> float:
        return max(EDGE_MARGIN_HZ, CARRIER_MODES.get(self.mode, EDGE_MARGIN_HZ))

    def check_declared(self) -> list[str]:
        """At start: every declared segment lies in an amateur band of the Region (InputError
        otherwise); returns notes for segments where the mode may not be keyed."""
        bands.check_region(self.region)
        notes = []
        usable = False
        for lo, hi in self.segments:
            a = bands.allocation(lo, self.region)
            if a is None or hi > a[2]:
                near = a or bands.allocation(hi, self.region)
                hint = (f" ({near[0].name} is {_span(near[1], near[2])} there)" if near else "")
                raise InputError(f"segment {_span(lo, hi)} is not inside an amateur band of ITU Region "
                                 f"{self.region}{hint} ({bands.ITU_SOURCE}): correct --segments or --region")
            if self.mode in ("CW", "CWR", "CWN") or any(
                    self.mode in ms and min(hi, y * 1e3) > max(lo, x * 1e3) for ms, x, y in WIDE_CARRIERS):
                usable = True
            else:
                notes.append(f"{self.mode} carriers are in the band plan nowhere in {_span(lo, hi)} "
                             f"({a[0].name}): no keying there")
        if not usable:
            raise InputError(f"--carrier-mode {self.mode} is allowed for a tune carrier in none of the declared "
                             f"segments ({BAND_PLAN_SOURCE}); use CW")
        return notes

    def refusal(self, f: float) -> str | None:
        """Why a carrier may not be keyed at f_hz, or None when it may."""
        m = self.margin_hz
        seg = next(((lo, hi) for lo, hi in self.segments if lo <= f <= hi), None)
        if seg is None:
            a = bands.allocation(f, self.region)
            segs = ", ".join(_span(lo, hi) for lo, hi in self.segments)
            if a:
                return f"{_mhz(f)} is in {a[0].name} but outside your declared segments ({segs})"
            return (f"{_mhz(f)} is outside your declared segments ({segs}) and in no amateur band of "
                    f"ITU Region {self.region}")
        a = bands.allocation(f, self.region)
        if a is None:  # check_declared refuses such segments; checked again here all the same
            return f"{_mhz(f)} is in no amateur band of ITU Region {self.region} ({bands.ITU_SOURCE})"
        lo, hi = max(seg[0], a[1]), min(seg[1], a[2])
        if f - lo < m or hi - f < m:
            return (f"{_mhz(f)} is within {m / 1e3:g} kHz of the edge of {_span(lo, hi)}: a {self.mode} "
                    "carrier there could spill over it")
        half = 0.5 * CARRIER_MODES.get(self.mode, 0.0)
        if not mode_allowed(self.mode, f - half, f + half):
            return (f"a {self.mode} carrier at {_mhz(f)} ({a[0].name}) is not in the band plan "
                    f"({BAND_PLAN_SOURCE}); use CW")
        return self._box_refusal(f)

    def _box_refusal(self, f: float) -> str | None:
        r0, r1 = self.box_range_hz
        if not r0 <= f <= r1:
            return f"{_mhz(f)} is outside the range the box is built for ({_span(r0, r1)})"
        if self.network is None:  # when in doubt, do not key
            return "the box's network is not known (the board did not say and no network was given)"
        if self.antenna is None:
            if f not in self._matched:
                self._matched[f] = self._network_refusal(f)
            return self._matched[f]
        if f not in self._matched:
            try:
                z = complex(self.antenna.impedance([f])[0])
            except InputError as e:
                self._matched[f] = f"the antenna model does not reach {_mhz(f)} ({e})"
            else:
                g = best_state(self.network, f, z)[3]
                swr = float(swr_of(g))
                self._matched[f] = None if swr <= self.swr_limit else (
                    f"the box cannot match the antenna at {_mhz(f)}: its best state gives SWR {swr:.1f} "
                    f"on the antenna model ({z.real:.1f}{z.imag:+.1f}j ohm), above the retune SWR "
                    f"{self.swr_limit:g}")
        return self._matched[f]

    def _network_refusal(self, f: float) -> str | None:
        assert self.network is not None
        z0 = self.network.z0_ohm
        table = StateTable(self.network)
        worst = 1.0
        for g in COVER_GAMMA:
            for k in range(COVER_PHASES):
                gam = g * complex(math.cos(2 * math.pi * k / COVER_PHASES), math.sin(2 * math.pi * k / COVER_PHASES))
                z = z0 * (1 + gam) / (1 - gam)
                worst = max(worst, float(swr_of(table.gamma_mag(f, z).min())))
        if worst <= self.swr_limit:
            return None
        return (f"the box's network cannot match every load within SWR 3 at {_mhz(f)} (its best state leaves "
                f"SWR {worst:.1f}); give --antenna or --station to decide on the antenna itself")


# -- one keyer per radio and per board -------------------------------------------------
def _runtime_dir() -> Path:
    return Path(os.environ.get("XDG_RUNTIME_DIR") or tempfile.gettempdir())


def lock_path(kind: str, name: str) -> Path:
    h = hashlib.sha1(name.encode()).hexdigest()[:16]
    return _runtime_dir() / f"feedmatch-keyer-{os.getuid()}-{kind}-{h}.lock"


class KeyerLock:
    """flock(2) on one file per rigctld address and one per board: the holder keys, others
    only follow.  The kernel drops the locks when the holder's process ends, however it
    ends.  holder() names the pid that holds a lock this process could not take."""

    def __init__(self, rig_addr: str, board_port: str):
        board = os.path.realpath(board_port) if "://" not in board_port else board_port
        self.paths = [lock_path("rig", rig_addr), lock_path("board", board)]
        self.what = [f"the radio at {rig_addr}", f"the board on {board_port}"]
        self._fds: list[int] = []

    @property
    def held(self) -> bool:
        return len(self._fds) == len(self.paths)

    def acquire(self) -> str | None:
        """Take both locks; None when held, else a sentence naming who holds which."""
        if self.held:
            return None
        fds = []
        for p, what in zip(self.paths, self.what):
            fd = os.open(p, os.O_RDWR | os.O_CREAT, 0o600)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                try:
                    pid = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "?"
                except OSError:
                    pid = "?"
                os.close(fd)
                for f in fds:
                    os.close(f)
                return f"another follower (pid {pid}) is the keyer for {what}"
            fds.append(fd)
        for fd in fds:
            os.ftruncate(fd, 0)
            os.pwrite(fd, str(os.getpid()).encode(), 0)
        self._fds = fds
        return None

    def release(self) -> None:
        for fd in self._fds:
            try:
                os.ftruncate(fd, 0)
            except OSError:
                pass
            os.close(fd)  # closing drops the flock
        self._fds = []
