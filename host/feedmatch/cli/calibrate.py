"""The `calibrate` dialogue: the operator keys each power and confirms the
wattmeter; the tables and the leakage go into the board config (the
arithmetic is feedmatch.board.calibrate)."""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import TextIO

from feedmatch.board.calibrate import fit_table, leak_for_config, residual_directivity
from feedmatch.errors import BoardRefused, InputError, LinkError
from feedmatch.jsonfile import load_json, write_json_with_backup
from feedmatch.seam.bank import merged, validate


def _watts(line: str, asked: float) -> float:
    """The operator's wattmeter reading (Enter takes the power asked for)."""
    text = line.strip()
    if not text:
        return asked
    try:
        w = float(text)
    except ValueError:
        raise InputError(f"'{text}' is not a power in watts; calibration stopped, the config is unchanged") from None
    if not math.isfinite(w) or w <= 0 or w > 10 * asked:
        raise InputError(f"{text} W is not a plausible reading for {asked:g} W keyed; calibration stopped, "
                         "the config is unchanged")
    return w


def _read_points(a: argparse.Namespace, ln, powers: list[float], main: str, leak: str, reflected: bool,
                 points: list, leaks: list, inp: TextIO, out: TextIO,
                 on_prompt: Callable[[float], None] | None) -> None:
    """Prompt for each power and read both detectors (counts) with it keyed."""
    for p in powers:
        if on_prompt:
            on_prompt(p)
        if a.yes:
            watts = p
            print(f"{p:g} W keyed (taken as confirmed)", file=out)
        else:
            out.write(f"Key {p:g} W; type what your wattmeter reads (Enter = {p:g}): ")
            out.flush()
            line = inp.readline()
            if not line:
                raise InputError("calibration stopped: no answer")
            watts = _watts(line, p)
        r = ln.request("cal-read", {"n": max(1, min(64, a.samples))})
        if r[main] <= 0:
            what = "reflected" if reflected else "forward"
            hint = " Is the box reversed?" if reflected else ""
            raise LinkError(f"no {what} reading at {watts:g} W: is the carrier keyed?{hint}")
        points.append((float(r[main]), watts))
        leaks.append((float(r[leak]), watts))
        print(f"  {watts:7.2f} W: forward {r['fwd_counts']:8.1f} counts, reflected "
              f"{r['ref_counts']:6.1f} counts", file=out)


def _restore(ln, was_bypassed: bool, out: TextIO, unkey: Callable[[float], None] | None,
             wait_s: float = 20.0) -> None:
    """Put the box back as calibrate found it, or say why it stays in bypass.
    The relays move only with the carrier gone (the board refuses under power),
    so the operator is asked to unkey and the board is asked again until then."""
    if was_bypassed:
        print("the box stays in bypass, as it was before calibration", file=out)
        return
    print("Unkey the transmitter: the box goes back in line when the carrier is gone.", file=out)
    if unkey:
        unkey(0.0)
    deadline = time.monotonic() + wait_s
    while True:
        try:
            ln.request("bypass", {"on": False})
            print("the box is back in line (calibration ran in bypass)", file=out)
            return
        except BoardRefused as e:
            if e.why != "hot" or time.monotonic() > deadline:
                why = "the carrier is still keyed" if e.why == "hot" else str(e)
                print(f"the box is left in BYPASS ({why}); `feedmatch bypass --off` puts it back in line",
                      file=out)
                return
            time.sleep(0.5)
        except LinkError as e:
            print(f"the box is left in BYPASS ({e}); `feedmatch bypass --off` puts it back in line", file=out)
            return


def run_calibrate(a: argparse.Namespace, inp: TextIO, out: TextIO,
                  on_prompt: Callable[[float], None] | None = None) -> int:
    from feedmatch.board.link import BoardLink
    from feedmatch.seam.logic import Calibration

    cfg_path = Path(a.config)
    cfg = load_json(cfg_path, "board config")
    try:
        powers = [float(x) for x in a.powers.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--powers must be a list of watts, got '{a.powers}'") from None
    if len(powers) < 3 or any(p <= 0 for p in powers):
        raise InputError("--powers needs at least 3 positive powers")
    reflected = bool(getattr(a, "reflected", False))
    det_cfg = cfg.get("detector", {})
    if reflected and not isinstance(det_cfg.get("fwd"), list):
        raise InputError("run the forward pass first: the config has no detector.fwd table")
    if reflected:
        print("Reflected-detector calibration: reverse the box (transmitter into the ANT port, "
              "50 ohm dummy load on the TX port). Key each power; do not touch the box while keyed.",
              file=out)
    else:
        print("Calibration into a 50 ohm dummy load. Key each power with the transmitter into the box,"
              " with the dummy load on the antenna port. Do not touch the box while keyed.", file=out)
    main, leak = ("ref_counts", "fwd_counts") if reflected else ("fwd_counts", "ref_counts")
    points = []
    leaks = []
    with BoardLink(a.port, a.baud, timeout=a.timeout) as ln:
        # Calibrate through the bypass (the network would add its own loss), and
        # leave the box as it was found, saying so, whatever happens.
        was_bypassed = bool((ln.request("status").get("relays") or [0, 0, 0, 0])[3])
        ln.request("bypass", {"on": True})
        try:
            _read_points(a, ln, powers, main, leak, reflected, points, leaks, inp, out, on_prompt)
        finally:
            _restore(ln, was_bypassed, out, on_prompt)
    table = fit_table(points, "reflected" if reflected else "forward")
    floor = float(det_cfg.get("floor_counts", 2.0))
    # The leakage at the highest power, read through the other detector's curve.
    other = Calibration(det_cfg["fwd"], floor) if reflected else Calibration(table, floor)
    c_leak, w = leaks[-1]
    res = residual_directivity(w, other.watts(c_leak))
    if reflected:
        # Reversed, the forward detector reads the forward port's own leakage.
        cfg["detector"] = dict(det_cfg, ref=table, floor_counts=floor, leak_fwd=leak_for_config(res["gamma"]))
    else:
        # The leakage into the dummy load is what the search allows for.
        cfg["detector"] = dict(det_cfg, fwd=table, ref=table, floor_counts=floor,
                               leak=leak_for_config(res["gamma"]))
    errs = validate(cfg)
    if errs:
        raise InputError(f"the new calibration does not validate: {errs[0]}")
    write_json_with_backup(cfg_path, cfg)
    where = "towards the transmitter port" if reflected else "into the dummy load"
    print(f"residual leakage {where}: |gamma| {res['gamma']:.3f} "
          f"(effective directivity {res['directivity_db']:.1f} dB): SWR below "
          f"{res['lowest_swr']:.2f} cannot be told apart", file=out)
    side = "reflected" if reflected else "forward (and, until --reflected is run, reflected)"
    print(f"wrote {len(table)} {side} points into {cfg_path} (previous copy {cfg_path}.bak); "
          "deploy it with feedmatch deploy", file=out)
    return 0


def run_coupler(a: argparse.Namespace, out: TextIO, on_prompt: Callable[[float], None] | None = None) -> int:
    """The multi-state pass: with the dummy load on the antenna port and a steady
    carrier at tune power, the box steps through its own states (known
    standards on 50 ohm) and the coupler's error box is fitted to the readings
    (feedmatch.sim.coupler_cal); the result goes into detector.coupler."""
    from feedmatch.board.link import BoardLink
    from feedmatch.rf.network import Network
    from feedmatch.seam.logic import Calibration
    from feedmatch.sim.coupler_cal import solve, standards

    cfg_path = Path(a.config)
    cfg = load_json(cfg_path, "board config")
    if validate(cfg):
        raise InputError(f"{cfg_path}: {validate(cfg)[0]}")
    m = merged(cfg)
    det_cfg = m["detector"]
    fl = float(det_cfg["floor_counts"])
    cf, cr = Calibration(det_cfg["fwd"], fl), Calibration(det_cfg["ref"], fl)
    n = m["network"]
    net = Network(float(n["z0_ohm"]), [float(v) for v in n["inductors_uh"]],
                  [float(v) for v in n["capacitors_pf"]], n.get("inductor_q"), n.get("capacitor_q"))
    p = min(10.0, float(m["power"]["max_tune_w"]))
    print(f"Coupler calibration: 50 ohm dummy load on the antenna port; key a steady carrier of about "
          f"{p:g} W and keep it keyed while the box steps through its states.", file=out)
    sts = standards(net)
    reads = []
    with BoardLink(a.port, a.baud, timeout=a.timeout) as ln:
        was_bypassed = bool((ln.request("status").get("relays") or [0, 0, 0, 0])[3])
        if on_prompt:
            on_prompt(p)
        try:
            f_hz = 0.0
            for st in sts:
                if st == (0, 0, 1):
                    ln.request("bypass", {"on": True})
                else:
                    ln.request("set", {"l": st[0], "c": st[1], "sh": st[2]})
                r = ln.request("cal-read", {"n": max(1, min(64, a.samples))})
                pf, pr = cf.watts(r["fwd_counts"]), cr.watts(r["ref_counts"])
                if pf <= 0:
                    raise LinkError("no forward reading: is the carrier keyed?")
                f_hz = float(r.get("freq_hz") or f_hz)
                reads.append(math.sqrt(pr / pf) if pr > 0 else 0.0)
        finally:
            _restore(ln, was_bypassed, out, on_prompt)
    f_hz = f_hz or 14.2e6
    fit = solve(net, sts, reads, f_hz)
    res = fit.to_json()
    if fit.err >= 0.2:
        raise InputError(f"the readings do not fit a coupler (residual {fit.rms:.3f}): check the dummy load "
                         "and the carrier; the config is unchanged")
    cfg.setdefault("detector", {})
    cfg["detector"] = dict(cfg["detector"], coupler=list(fit.learned()),
                           coupler_scales=[round(v, 4) for v in fit.scales])
    errs = validate(cfg)
    if errs:
        raise InputError(f"the coupler calibration does not validate: {errs[0]}")
    write_json_with_backup(cfg_path, cfg)
    print(f"{fit.readings} states at {f_hz / 1e6:.4f} MHz: reflected port leakage |d_r| {abs(fit.dr):.3f} "
          f"({res['directivity_r_db']:.1f} dB), forward port |d_f| {abs(fit.df):.3f} "
          f"({res['directivity_f_db']:.1f} dB), gain ratio {res['gain_ratio_db']:+.2f} dB; residual "
          f"{fit.rms:.4f}, error bound {fit.err:.3f}", file=out)
    print(f"wrote detector.coupler into {cfg_path} (previous copy {cfg_path}.bak); deploy it with "
          "feedmatch deploy", file=out)
    return 0


def cmd_calibrate(a: argparse.Namespace) -> int:
    from feedmatch.cli.calibrate import run_calibrate
    from feedmatch.cli.common import check_link_options

    check_link_options(a)
    if not 1 <= a.samples <= 64:
        raise InputError(f"--samples must be 1 to 64 readings, got {a.samples}")
    if a.rehearse:
        return _rehearse_calibration(a)
    if not a.port:
        raise InputError("give --port (the board's serial port), or --rehearse to practise on the virtual board")
    if not a.config:
        raise InputError("give --config: the board config JSON the calibration goes into")
    if getattr(a, "coupler", False):
        from feedmatch.cli.calibrate import run_coupler

        return run_coupler(a, sys.stdout)
    return run_calibrate(a, sys.stdin, sys.stdout)


def _rehearse_calibration(a: argparse.Namespace) -> int:
    """The calibration dialogue against the virtual station with a 50 ohm dummy
    load: each power is keyed for you at 14.2 MHz when it is asked for.  The
    result goes into --config if given, else into a scratch copy of the
    station's board config (its path is printed); nothing real is touched."""
    import json
    import time

    from feedmatch.cli.calibrate import run_calibrate
    from feedmatch.rf.antenna import FixedLoad
    from feedmatch.sim.station import load_station
    from feedmatch.sim.virtual import VirtualBoard

    if a.port:
        raise InputError("--rehearse runs its own virtual board; leave out --port")
    st = load_station(a.station)
    st.antenna = FixedLoad(50.0, 0.0)  # the dummy load on the antenna port
    work = Path(tempfile.mkdtemp(prefix="feedmatch-rehearsal-"))
    if not a.config:
        a.config = str(work / "board_config.json")
        Path(a.config).write_text(json.dumps(st.board_config, indent=2))
    vs = VirtualBoard(st, work / "flash")
    a.port = vs.start()
    print(f"rehearsal: virtual board on {a.port}, dummy load on the antenna port; each power is keyed "
          "for you at 14.2 MHz")
    try:
        time.sleep(1.0)  # the firmware boots
        key = lambda p: (vs.key(p, 14.2e6), time.sleep(0.2))  # noqa: E731
        if getattr(a, "coupler", False):
            from feedmatch.cli.calibrate import run_coupler

            return run_coupler(a, sys.stdout, on_prompt=key)
        return run_calibrate(a, sys.stdin, sys.stdout, on_prompt=key)
    finally:
        vs.key(0)
        vs.stop()
        print(f"rehearsal config: {a.config}")


def _parser_calibrate(sub) -> None:
    s = sub.add_parser("calibrate", help="guided detector calibration into a dummy load")
    s.add_argument("--port", help="the board's serial port")
    s.add_argument("--baud", type=int, default=115200, help="serial speed in bit/s (default 115200)")
    s.add_argument("--timeout", type=float, default=2.0, help="seconds to wait for each answer (default 2; 0.1 to 120)")
    s.add_argument("--powers", default="1,2,5,10,25,50,100",
                   help="transmit powers to step through, W (default 1,2,5,10,25,50,100)")
    s.add_argument("--config", help="board config JSON to update (a backup is kept)")
    s.add_argument("--rehearse", action="store_true",
                   help="practise on the virtual board with a dummy load (no --port; nothing real changes)")
    s.add_argument("--station", help="with --rehearse: station JSON (default: the built-in demo station)")
    s.add_argument("--samples", type=int, default=16,
                   help="detector readings averaged at each power (default 16; the board takes 1 to 64)")
    s.add_argument("--yes", action="store_true", help="take each power as confirmed (scripts and tests)")
    s.add_argument("--reflected", action="store_true",
                   help="second pass with the box reversed (transmitter on ANT, dummy load on TX): "
                        "calibrates the reflected detector on its own")
    s.add_argument("--coupler", action="store_true",
                   help="third pass, dummy load on ANT and a steady carrier at tune power: the box steps "
                        "through its own states and the coupler's complex error is fitted (detector.coupler)")
    s.set_defaults(fn=cmd_calibrate)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "calibrate": _parser_calibrate,
}
