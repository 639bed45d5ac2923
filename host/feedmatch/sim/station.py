"""The simulated station: the box's physics as the board's sensors see it.

StationModel answers what a board asks (detector counts, frequency, relay
changes) from the network model, the antenna and the detector model, for a
transmitter whose power and frequency the operator script sets.  It records a
violation whenever relays change with forward power above the hot-switch
limit: the tests assert there are none.  Faults (sim.faults) make it a damaged
box: stuck relays reach other states than the board commands, drifted elements
have other values.
"""

from __future__ import annotations

import random
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from feedmatch.errors import InputError
from feedmatch.jsonfile import check_keys, load_json, number
from feedmatch.resources import DATA
from feedmatch.rf import bands
from feedmatch.rf.antenna import antenna_from_dict
from feedmatch.rf.detector import DetectorModel, detector_from_dict
from feedmatch.rf.network import Network, evaluate, load_network, network_from_dict, swr_of
from feedmatch.sim.faults import NONE as NO_FAULTS
from feedmatch.sim.faults import Faults

DEFAULT_STATION = DATA / "station_demo.json"


@dataclass
class Violation:
    t: float
    power_w: float
    before: tuple
    after: tuple


class StationModel:
    def __init__(self, net: Network, antenna, det: DetectorModel, hot_switch_w: float,
                 seed: int = 1, clock=None, faults: Faults = NO_FAULTS):
        self.faults = faults
        self.net = faults.apply_net(net)
        self.antenna = antenna
        self.det = det
        self.hot_switch_w = hot_switch_w
        self.rng = random.Random(seed)
        self.relays = (0, 0, 1, 1)
        self.tx_w = 0.0
        self.rev_w = 0.0
        self.freq_hz = 0.0
        self.violations: list[Violation] = []
        self.switches = 0
        self.button = False
        self.clock = clock or (lambda: 0.0)
        self._cache: dict[tuple, complex] = {}
        self._zcache: dict[float, complex] = {}

    def key(self, power_w: float, freq_hz: float) -> None:
        self.tx_w = max(0.0, power_w)
        if freq_hz:
            self.freq_hz = freq_hz

    def key_reverse(self, power_w: float, freq_hz: float = 0.0) -> None:
        """Power arriving from the antenna side (a nearby transmitter, or the box wired
        with the transmitter on its antenna port); only while our own carrier is off."""
        self.rev_w = max(0.0, power_w)
        if freq_hz:
            self.freq_hz = freq_hz

    def antenna_z(self, f: float) -> complex:
        z = self._zcache.get(f)
        if z is None:
            z = complex(self.antenna.impedance(f))
            self._zcache[f] = z
        return z

    def gamma(self) -> complex:
        f = self.freq_hz or 14e6
        k = (self.relays, f)
        g = self._cache.get(k)
        if g is None:
            z = self.antenna_z(f)
            l, c, sh, byp = self.relays
            if self.faults:
                l, c, sh = self.faults.reach(l, c, sh)
            if byp:
                g = (z - self.net.z0_ohm) / (z + self.net.z0_ohm)
            else:
                g = complex(evaluate(self.net, f, z, l, c, sh)["gamma"])
            if len(self._cache) > 20000:
                self._cache.clear()
            self._cache[k] = g
        return g

    def swr(self) -> float:
        return float(swr_of(abs(self.gamma())))

    def read(self) -> tuple[float, float]:
        if self.tx_w <= 0 and self.rev_w > 0:
            return self.det.read_reverse(self.rev_w, self.freq_hz or 14e6, self.rng)
        if self.tx_w <= 0:
            if self.det.ideal:
                return (0.0, 0.0)
            n = self.det.noise_counts
            return (max(0.0, round(self.rng.gauss(0, n))), max(0.0, round(self.rng.gauss(0, n))))
        return self.det.read(self.tx_w, self.gamma(), self.freq_hz, self.rng)

    def count(self) -> float:
        return self.freq_hz if self.tx_w >= 0.2 else 0.0

    def set(self, l: int, c: int, sh: int, byp: int) -> None:
        new = (int(l), int(c), int(sh), int(byp))
        if new != self.relays:
            self.switches += 1
            p = max(self.tx_w, self.rev_w)
            if p > self.hot_switch_w:
                self.violations.append(Violation(self.clock(), p, self.relays, new))
        self.relays = new


# -- station file -------------------------------------------------------------
@dataclass
class Step:
    """One operator action: key a tune carrier on a frequency, then operate."""

    freq_hz: float
    tune_w: float
    operate_w: float
    operate_s: float
    via: str = "carrier"  # "carrier": board tunes on its own; "button": the local tune input


@dataclass
class Station:
    name: str
    site: str
    network: Network
    antenna: Any
    detector: DetectorModel
    script: list[Step]
    board_config: dict
    seed: int = 1
    # What the operator may transmit in (follow --tune-carrier): [(low_hz, high_hz)] and ITU Region.
    segments: list[tuple[float, float]] | None = None
    region: int | None = None

    faults: Faults = NO_FAULTS

    def model(self, clock=None) -> StationModel:
        hot = self.board_config.get("power", {}).get("hot_switch_w", 30.0)
        return StationModel(self.network, self.antenna, self.detector, hot, self.seed, clock, self.faults)


_KEYS = {"name", "site", "antenna", "network", "detector", "script", "board", "seed", "comment", "segments",
         "region"}


def station_from_dict(d: dict, where: str, base: Path) -> Station:
    check_keys(d, _KEYS, {"antenna", "script"}, where)
    ant_d = d["antenna"]
    if not isinstance(ant_d, dict):
        raise InputError(f"{where}: field 'antenna' must be an object")
    antenna = antenna_from_dict(ant_d, f"{where}: antenna", base)
    net_d = d.get("network")
    if net_d is None:
        net = load_network()
    elif isinstance(net_d, str):
        net = load_network(base / net_d if not Path(net_d).is_absolute() else net_d)
    elif isinstance(net_d, dict):
        net = network_from_dict(net_d, f"{where}: network")
    else:
        raise InputError(f"{where}: field 'network' must be a file name or an object")
    det_d = d.get("detector", {})
    if not isinstance(det_d, dict):
        raise InputError(f"{where}: field 'detector' must be an object")
    det = detector_from_dict(det_d, f"{where}: detector")
    script = []
    sc = d["script"]
    if not isinstance(sc, list) or not sc:
        raise InputError(f"{where}: field 'script' must be a non-empty list of steps")
    for i, s in enumerate(sc):
        w = f"{where}: script[{i}]"
        if not isinstance(s, dict):
            raise InputError(f"{w} must be an object")
        check_keys(s, {"band", "freq_hz", "tune_w", "operate_w", "operate_s", "via", "repeat"},
                   set(), w)
        if "freq_hz" in s:
            f = number(s, "freq_hz", w, positive=True)
        elif "band" in s:
            if not isinstance(s["band"], str):
                raise InputError(f"{w}: field 'band' must be a band name")
            f = bands.by_name(s["band"]).centre_hz
        else:
            raise InputError(f"{w}: give 'band' or 'freq_hz'")
        via = s.get("via", "carrier")
        if via not in ("carrier", "button"):
            raise InputError(f"{w}: field 'via' must be 'carrier' or 'button'")
        rep = s.get("repeat", 1)
        if not isinstance(rep, int) or isinstance(rep, bool) or not 1 <= rep <= 1000:
            raise InputError(f"{w}: field 'repeat' must be an integer 1..1000")
        step = Step(f, number(s, "tune_w", w, positive=True, optional=True, default=10.0),
                    number(s, "operate_w", w, minimum=0.0, optional=True, default=100.0),
                    number(s, "operate_s", w, minimum=0.0, maximum=3600, optional=True, default=0.15),
                    via)
        script += [step] * rep
    board = d.get("board", {})
    if not isinstance(board, dict):
        raise InputError(f"{where}: field 'board' must be an object (a board config)")
    from feedmatch.seam.bank import section_of, validate

    cfg = dict(board)
    cfg.setdefault("board", "virtual")
    cfg["network"] = (section_of(board["network"]) if isinstance(board.get("network"), dict)
                      else net.board_section())
    if "detector" not in cfg:
        # As `feedmatch calibrate` would set it up on this station's box.
        pts = [list(p) for p in det.calibration_points()]
        cfg["detector"] = {"fwd": pts, "ref": pts, "floor_counts": 2.0,
                           "leak": round(det.calibrated_leak(), 4)}
    errs = validate(cfg)
    if errs:
        raise InputError(f"{where}: board: {errs[0]}")
    seed = d.get("seed", 1)
    if not isinstance(seed, int) or isinstance(seed, bool):
        raise InputError(f"{where}: field 'seed' must be an integer")
    name = d.get("name", "station")
    site = d.get("site", "")
    segs = region = None
    if "segments" in d:
        from feedmatch.board.keying import segments_from_list

        if not isinstance(d["segments"], list):
            raise InputError(f"{where}: field 'segments' must be a list such as [\"7.0-7.2\", \"14.0-14.35\"] (MHz)")
        segs = segments_from_list(d["segments"], f"{where}: segments")
    if "region" in d:
        try:
            region = bands.check_region(d["region"])
        except InputError as e:
            raise InputError(f"{where}: field 'region': {e}") from None
    return Station(str(name), str(site), net, antenna, det, script, cfg, seed, segs, region)


def load_station(path: str | Path | None = None) -> Station:
    p = Path(path) if path else DEFAULT_STATION
    return station_from_dict(load_json(p, "station"), f"station file {p}", p.parent)
