"""The station: the made-up site a simulation runs, as its station file describes it.

A Station is the antenna, the box's network and detector, the operator's script
of carriers and the board config; Station.hardware() makes the simulated
hardware (sim.hardware) a board runs against.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from feedmatch.errors import InputError
from feedmatch.jsonfile import check_keys, load_json, number
from feedmatch.resources import DATA
from feedmatch.rf import bands
from feedmatch.rf.antenna import antenna_from_dict
from feedmatch.rf.detector import DetectorModel, detector_from_dict
from feedmatch.rf.network import Network, load_network, network_from_dict
from feedmatch.sim.faults import NONE as NO_FAULTS
from feedmatch.sim.faults import Faults
from feedmatch.sim.hardware import SimulatedHardware

DEFAULT_STATION = DATA / "station_demo.json"


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

    def hardware(self, clock=None) -> SimulatedHardware:
        """The simulated hardware of this station (clock: seconds, for the violations' times)."""
        hot = self.board_config.get("power", {}).get("hot_switch_w", 30.0)
        return SimulatedHardware(self.network, self.antenna, self.detector, hot, self.seed, clock, self.faults)


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
