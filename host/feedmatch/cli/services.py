"""Long-running services: they hold a port or a socket until Ctrl-C or SIGTERM
(stop_on_sigterm) and close what they opened on the way out."""

from __future__ import annotations

import math
import sys
import time

from feedmatch.cli.common import (
    add_port_options,
    check_full_power,
    stop_on_sigterm,
)
from feedmatch.errors import InputError, LinkError
from feedmatch.outpaths import output_dir, output_file


def _check_uf2(path: str) -> None:
    """InputError unless path starts with a UF2 block (Microsoft's UF2 specification,
    github.com/microsoft/uf2: magic words 0x0A324655 and 0x9E5D5157, little endian)."""
    import struct
    from pathlib import Path

    p = Path(path)
    try:
        with p.open("rb") as f:
            head = f.read(8)
    except FileNotFoundError:
        raise InputError(f"--image {p} does not exist") from None
    except OSError as e:
        raise InputError(f"--image {p} cannot be read: {e.strerror or e}") from None
    if len(head) < 8 or struct.unpack("<II", head) != (0x0A324655, 0x9E5D5157):
        raise InputError(f"--image {p} is not a UF2 firmware image: give MicroPython's .uf2 for the "
                         "Raspberry Pi Pico")


def cmd_virtual_board(a) -> int:
    from feedmatch.sim.station import load_station
    from feedmatch.sim.virtual import VirtualBoard

    st = load_station(a.station)
    if a.fault:
        from feedmatch.sim.faults import parse_faults

        st.faults = parse_faults(a.fault, st.network)
    import tempfile

    from feedmatch.rf import bands

    carrier = None
    if a.carrier:
        # Checked before anything starts: a bad value is one line, never a thread's traceback.
        w, at, f = a.carrier.partition("@")
        try:
            watts = float(w)
        except ValueError:
            raise InputError(f"--carrier must be W@Hz or W@band, e.g. 10@7.1e6 or 10@40m; got '{a.carrier}'") \
                from None
        if not at or not math.isfinite(watts) or not 0 < watts <= 2000:
            raise InputError(f"--carrier needs a power of 0 to 2000 W and a frequency, e.g. 10@40m; "
                             f"got '{a.carrier}'")
        f_hz = bands.parse_freq(f)
        if not f_hz <= 60e6:
            raise InputError(f"--carrier frequency {f} is above the HF and 6 m range this box is built for")
        carrier = (watts, f_hz)

    stop_on_sigterm()
    if a.rig:
        from feedmatch.board.rigctl import RigClient, parse_hostport

        check_full_power(a)

        RigClient(*parse_hostport(a.rig)).open().close()  # an unreachable rigctld is one line, now
    if a.dir:
        output_dir(a.dir, "--dir")
    d = a.dir or tempfile.mkdtemp(prefix="feedmatch-board-")
    if a.image:
        _check_uf2(a.image)  # a wrong file fails now, not after the emulator's half-minute start
    if a.emulate:
        from feedmatch.sim.emulated import EmulatedBoard
        from feedmatch.sim.emulator import EmulatorMissing

        vs = EmulatedBoard(st, d, uf2=a.image)
        try:
            path = vs.start()
        except EmulatorMissing as e:
            raise InputError(f"cannot run the emulated {a.emulate}: {e}") from None
    else:
        vs = VirtualBoard(st, d, use_python=a.python, heap_kib=a.heap, micropython=a.micropython)
        path = vs.start()
    print(path, flush=True)
    what = f"emulated {a.emulate}" if a.emulate else "virtual board"
    sys.stderr.write(f"{what} '{st.board_config.get('board_id')}' on {path} "
                     f"(flash in {d}); Ctrl-C stops it\n")
    bridge = None
    if a.rig:
        from feedmatch.board.rigctl import RigClient, parse_hostport
        from feedmatch.sim.radio import RigBridge

        bridge = RigBridge(vs, RigClient(*parse_hostport(a.rig)), a.rig_full_power).start()
    try:
        if carrier:
            vs.key(*carrier)
        elif a.play:
            for step in st.script:
                vs.play(step, st.board_config.get("tune", {}).get("target_swr", 1.5))
        while True:
            time.sleep(0.5)
    except KeyboardInterrupt:
        pass
    finally:
        if bridge is not None:
            bridge.close()
        vs.stop()
        if vs.hardware.violations:
            sys.stderr.write(f"hot-switch violations: {len(vs.hardware.violations)}\n")
    return 0


def _carrier_policy(a):
    """--tune-carrier's checks, all before anything connects: one line and exit 2 on any."""
    from feedmatch.board import keying
    from feedmatch.rf import bands

    st = None
    if a.station:
        from feedmatch.sim.station import load_station

        st = load_station(a.station)
    if a.tune_carrier is None:
        return None, []
    mode = keying.check_mode(a.carrier_mode)
    if a.segments:
        segs = keying.parse_segments(a.segments)
    elif st is not None and st.segments:
        segs = st.segments
    else:
        raise InputError("--tune-carrier keys only inside the segments you may transmit in: give --segments "
                         "(MHz, e.g. 7.0-7.2,14.0-14.35, or a file) or put \"segments\" in the --station file")
    region = a.region if a.region is not None else (st.region if st is not None else None)
    if region is None:
        raise InputError("--tune-carrier needs your ITU Region: --region 1, 2 or 3 (or \"region\" in the "
                         "--station file)")
    bands.check_region(region)
    if not a.tune_carrier <= a.rig_full_power:
        raise InputError(f"--tune-carrier {a.tune_carrier:g} W is above the radio's full power "
                         f"(--rig-full-power {a.rig_full_power:g} W)")
    from feedmatch.seam.bank import merged

    cfg = merged(st.board_config if st is not None else {})
    keying.check_power(a.tune_carrier, cfg["power"],
                       f"the board config of {a.station}" if st is not None else "the firmware's default board "
                       "config; the board's own limits are checked again before keying")
    antenna = st.antenna if st is not None else None
    if a.antenna:
        from feedmatch.rf.antenna import load_antenna

        antenna = load_antenna(a.antenna)
    from feedmatch.rf.network import load_network

    pol = keying.KeyPolicy(segs, int(region), mode, a.tune_carrier,
                           network=st.network if st is not None else load_network(), antenna=antenna,
                           swr_limit=float(cfg["tune"]["retune_swr"]))
    notes = pol.check_declared()
    if antenna is None:
        notes.append(f"no antenna model (--station or --antenna): keying only from "
                     f"{pol.box_range_hz[0] / 1e6:g} to {pol.box_range_hz[1] / 1e6:g} MHz where the box's network "
                     "can match every load within SWR 3, without knowing whether it can match your antenna")
    return pol, notes


def cmd_follow(a) -> int:
    import datetime as dt
    import signal

    from feedmatch.board.follow import Follower
    from feedmatch.board.keying import KeyerLock
    from feedmatch.board.rigctl import RigClient, parse_hostport

    check_full_power(a)
    host, port = parse_hostport(a.rig)
    policy, notes = _carrier_policy(a)

    def say(text: str) -> None:
        now = dt.datetime.now()
        if a.json:  # one JSON object per line, for other programs
            import json

            print(json.dumps({"time": now.isoformat(timespec="seconds"), "message": text}), flush=True)
        else:
            print(f"{now.strftime('%H:%M:%S')} {text}", flush=True)

    lock = KeyerLock(f"{host}:{port}", a.port) if policy is not None else None
    fo = Follower(a.port, RigClient(host, port), say, a.baud, tune_carrier_w=a.tune_carrier,
                  carrier_mode=policy.mode if policy else "CW", rig_full_w=a.rig_full_power,
                  policy=policy, lock=lock)
    try:
        fo.rig.open()      # a wrong address is one line, at once
        if policy is not None:
            fo.rig.ptt()   # a radio without a PTT rigctld can switch cannot key: said now, in words
            fo.rig.power()
        fo._board()        # so is a port that is not a board
    except LinkError:
        fo.close()
        raise
    if a.curve:
        from feedmatch.rf.network import load_network
        from feedmatch.sim.curvepreset import presets_from_logbook

        cp = presets_from_logbook(a.curve, load_network(None).firmware_bank())
        if cp is None:
            say(f"--curve: {a.curve} holds no measured antenna yet; presets from the board's memory only")
        else:
            fo.curve_preset = cp.plan
            say(f"--curve: where nothing is stored, presets computed from the antenna measured at {len(cp.f)} "
                f"frequencies ({cp.f[0] / 1e6:.3f}-{cp.f[-1] / 1e6:.3f} MHz)")
    if policy is not None:
        say(f"--tune-carrier: this program will KEY THE RADIO at {a.tune_carrier:g} W {policy.mode} for at most "
            f"{fo.max_key_s:g} s where nothing is stored, only inside "
            f"{', '.join(f'{lo / 1e6:g}-{hi / 1e6:g}' for lo, hi in policy.segments)} MHz (ITU Region "
            f"{policy.region}); you stay responsible for the station")
        for n in notes:
            say("note: " + n)

    stop_on_sigterm()
    # Ctrl-C must always stop a keyer, even when started where SIGINT was ignored (a
    # background job of a non-interactive shell): it unkeys on the way out.
    signal.signal(signal.SIGINT, signal.default_int_handler)
    say(f"following the radio at {host}:{port} for the board on {a.port} (Ctrl-C stops)")
    try:
        fo.run()
    except KeyboardInterrupt:
        pass
    finally:
        fo.close()
        if lock is not None:
            lock.release()
    say(f"stopped: {fo.presets} presets, {fo.keyed_tunes} keyed tunes"
        + (f", {fo.unkey_failures} FAILED UNKEYS" if fo.unkey_failures else ""))
    return 0


def cmd_log(a) -> int:
    from pathlib import Path

    from feedmatch.logbook.logger import Logger
    from feedmatch.logbook.store import START_FLOOR, Logbook, LogbookUnwritable, free_bytes

    if Path(a.db).exists():
        if not Path(a.db).is_file():
            raise InputError(f"logbook {a.db} is not a file")
    else:
        output_file(a.db, "--db", (Path(a.db).suffix.lower(),))  # any name; its directory must exist
    free = free_bytes(a.db)
    if free is not None and free < START_FLOOR:
        # A logger restarted on a full disk would take its last bytes and die again.
        raise InputError(f"logbook {a.db}: only {free // 1024} KiB free on its disk; the logger needs "
                         f"{START_FLOOR // 1024} KiB to start. Free some space: the board keeps its records "
                         "and the next `feedmatch log` fetches them")
    if Path(a.db).exists():
        Logbook(a.db).close()  # refuse a non-SQLite file before touching the port
    lg = Logger(a.port, a.db, a.baud, out=sys.stdout if sys.stdout.isatty() and not a.json else None)

    stop_on_sigterm()
    failed = ""
    try:
        lg.run(first_connect_s=5.0)
    except KeyboardInterrupt:
        pass
    except LogbookUnwritable as e:
        failed = str(e)
        sys.stderr.write(f"{chr(10) if lg.out else ''}feedmatch: error: {e} ({lg.added} new records "
                         "were logged this run)\n")
    if a.json:
        from feedmatch.cli.output import emit_json

        emit_json({"db": a.db, "added": lg.added, "board": lg.board_id, "bad_frames": lg.corrupt,
                   "notices": lg.notices, **({"error": failed} if failed else {})})
        return 2 if failed else 0
    if failed:
        return 2
    print(f"\nlogged {lg.added} new records into {a.db}")
    for note in lg.notices:
        print("note: " + note)
    return 0


TOKEN_ENV = "FEEDMATCH_CONTROL_TOKEN"


def _control_token(a) -> str | None:
    """The control token from --allow-control-file, the environment or (visible to
    every local user in `ps`) --allow-control; None: the page is read-only."""
    import os
    import stat
    from pathlib import Path

    env = os.environ.get(TOKEN_ENV) or None
    given = [n for n, v in (("--allow-control", a.allow_control), ("--allow-control-file", a.allow_control_file),
                            (TOKEN_ENV, env)) if v is not None]
    if len(given) > 1:
        raise InputError(f"give the control token one way only, not {' and '.join(given)}")
    token = a.allow_control or env
    if a.allow_control_file is not None:
        p = Path(a.allow_control_file)
        try:
            st = p.stat()
            if not stat.S_ISREG(st.st_mode):
                raise InputError(f"--allow-control-file {p} is not a file")
            if st.st_mode & 0o077:
                raise InputError(f"--allow-control-file {p} can be read by other users (mode "
                                 f"{stat.S_IMODE(st.st_mode):o}); chmod 600 it")
            lines = p.read_text().splitlines()
        except FileNotFoundError:
            raise InputError(f"--allow-control-file {p} does not exist") from None
        except (OSError, UnicodeDecodeError) as e:
            raise InputError(f"--allow-control-file {p} cannot be read: {e}") from None
        token = lines[0].strip() if lines else ""
    if token is not None and (len(token) < 8 or any(ord(ch) < 33 or ord(ch) > 126 for ch in token)):
        raise InputError(f"the control token ({given[0]}) needs at least 8 printable characters, no spaces")
    if a.allow_control is not None:
        sys.stderr.write(f"feedmatch: warning: a token on the command line is visible to every user of this "
                         f"machine (ps); prefer --allow-control-file FILE or {TOKEN_ENV}\n")
    return token


def cmd_serve(a) -> int:

    from feedmatch.web.server import serve

    if a.port is None and a.db is None:
        raise InputError("give --port (the board), --db (a logbook) or both")
    if not 1 <= a.http_port <= 65535:
        raise InputError(f"--http-port must be 1 to 65535, got {a.http_port}")
    token = _control_token(a)
    if not 0.5 <= a.idle_timeout <= 3600:
        raise InputError(f"--idle-timeout must be 0.5 to 3600 s, got {a.idle_timeout:g}")
    if a.hamlib_amp_port is not None and (a.port is None or not 1 <= a.hamlib_amp_port <= 65535):
        raise InputError("--hamlib-amp-port needs --port (the board) and a TCP port of 1 to 65535")
    if a.no_page and a.hamlib_amp_port is None:
        raise InputError("--no-page serves nothing without --hamlib-amp-port")
    if a.db is not None:
        from feedmatch.logbook.store import open_existing

        # A bad or missing logbook is one line now, not a broken page later
        # (start `feedmatch log` first: it makes the logbook).
        open_existing(a.db).close()

    stop_on_sigterm()

    if token is not None and a.listen not in ("127.0.0.1", "localhost", "::1"):
        sys.stderr.write("feedmatch: warning: --allow-control on a network address: the token and the "
                         "page travel unencrypted; anyone who can read the network can tune the box\n")

    def ready(url: str) -> None:
        what = " and ".join(x for x in ((f"the board on {a.port}" if a.port else ""),
                                         (f"the logbook {a.db}" if a.db else "")) if x)
        mode = "tune and bypass buttons need the token" if token else "read-only"
        print(f"serving {what} at {url} ({mode}; Ctrl-C stops)", flush=True)

    amp = None
    try:  # a Ctrl-C at any moment from here on still closes the amplifier server and its board watch
        if a.hamlib_amp_port is not None:
            from feedmatch.web.hamlib_amp import serve_board

            amp = serve_board(a.port, a.baud, a.hamlib_amp_listen, a.hamlib_amp_port)
            print(f"serving the board's SWR, forward and reflected power and frequency to Hamlib amplifier "
                  f"clients on {a.hamlib_amp_listen}:{amp[0].port} (ampctld protocol, read-only)", flush=True)
        if a.no_page:
            while True:
                time.sleep(3600)
        serve(a.db, a.port, a.listen, a.http_port, token, a.baud, ready=ready,
              allow_hosts=tuple(a.allow_host or ()), idle_timeout_s=a.idle_timeout)
    except KeyboardInterrupt:
        pass
    finally:
        if amp is not None:
            amp[0].close()
            amp[1].close()
    return 0


def _parser_virtual_board(sub) -> None:
    s = sub.add_parser("virtual-board", help="run the firmware on the simulated station; prints its port")
    s.add_argument("--station", help="station JSON (default: the built-in demo station)")
    s.add_argument("--python", action="store_true", help="run the firmware under CPython")
    s.add_argument("--dir", help="directory standing in for the board's flash")
    s.add_argument("--carrier", help="key a steady carrier, e.g. 10@7.1e6 (W@Hz or W@band)")
    s.add_argument("--play", action="store_true", help="play the station's operating script once")
    s.add_argument("--emulate", choices=["rp2040"],
                   help="run the firmware as deployed on an emulated chip (rp2040js, needs node and npm)")
    s.add_argument("--image", help="with --emulate: the MicroPython .uf2 image for the Raspberry Pi Pico")
    s.add_argument("--rig", metavar="HOST:PORT",
                   help="a rigctld radio keys the station: its PTT, frequency and RF power become the carrier")
    s.add_argument("--rig-full-power", type=float, default=100.0,
                   help="the radio's power in W at RF power level 1.0 (with --rig; default 100)")
    s.add_argument("--fault", metavar="SPEC",
                   help="damage the simulated box, e.g. L3:stuck-out,C5:stuck-in,L6:drift=-30%%,side:stuck-ant")
    s.add_argument("--heap", type=int, metavar="KB",
                   help="the firmware's MicroPython heap in KB (-X heapsize; default 2048): rehearse the chip's "
                        "limits (the unix port's objects are twice the Pico's, so 256 is stricter than a Pico)")
    s.add_argument("--micropython", metavar="PORT",
                   help="which MicroPython unix port runs the firmware: 'float32' (single precision, as on "
                        "the chip), or a path to one (default: the installed port)")
    s.set_defaults(fn=cmd_virtual_board)


def _parser_follow(sub) -> None:
    s = sub.add_parser("follow", help="follow the radio's frequency through rigctld: preset the box before "
                       "the first carrier")
    add_port_options(s)
    s.add_argument("--rig", required=True, metavar="HOST:PORT", help="rigctld's address (default port 4532)")
    s.add_argument("--tune-carrier", type=float, metavar="WATTS",
                   help="KEYS THE RADIO: where nothing is stored, key this power in --carrier-mode for a tune "
                        "(at most 5 s), then unkey and restore power and mode. Off by default")
    s.add_argument("--carrier-mode", default="CW",
                   help="the Hamlib mode of the tune carrier (default CW: a key-down carrier); AM or FM only "
                        "where the band plan allows them")
    s.add_argument("--segments", metavar="LIST|FILE",
                   help="with --tune-carrier: the segments you may transmit in, MHz, e.g. 7.0-7.2,14.0-14.35 "
                        "(or a file of them); nothing is keyed outside them")
    s.add_argument("--region", type=int, choices=[1, 2, 3],
                   help="your ITU Region (1 Europe/Africa, 2 Americas, 3 Asia-Pacific): the band edges")
    s.add_argument("--station", help="station JSON: its segments, region, antenna, network and board limits")
    s.add_argument("--antenna", help="antenna JSON or .s1p: key only where the box can match it")
    s.add_argument("--rig-full-power", type=float, default=100.0,
                   help="the radio's power in W at RF power level 1.0 (to set --tune-carrier; default 100)")
    s.add_argument("--curve", metavar="DB", help="logbook whose measured antenna gives presets where nothing "
                   "is stored (computed on the box's element values, switched cold, confirmed by the first carrier)")
    s.set_defaults(fn=cmd_follow)


def _parser_log(sub) -> None:
    s = sub.add_parser("log", help="log every tune into an SQLite logbook until stopped")
    add_port_options(s)
    s.add_argument("--db", required=True, help="the SQLite logbook file (made if missing; its directory must exist)")
    s.set_defaults(fn=cmd_log)


def _parser_serve(sub) -> None:
    s = sub.add_parser("serve", help="a live web page of the station (board state, logbook, charts)")
    s.add_argument("--port", help="the board's serial port (optional: without it, the logbook alone)")
    s.add_argument("--baud", type=int, default=115200, help="serial speed in bit/s (default 115200)")
    s.add_argument("--db", help="the logbook to show (an existing file: `feedmatch log` makes it)")
    s.add_argument("--listen", default="127.0.0.1", help="address to bind (default 127.0.0.1: this machine only)")
    s.add_argument("--http-port", type=int, default=8765, help="TCP port of the page (default 8765)")
    s.add_argument("--allow-host", action="append", metavar="NAME",
                   help="another host name the page may be reached by (repeatable; 127.0.0.1, localhost "
                        "and the --listen address are always served)")
    s.add_argument("--allow-control-file", metavar="FILE",
                   help="add tune and bypass buttons; each request must carry the token on the first line "
                        "of FILE (mode 600). The environment variable FEEDMATCH_CONTROL_TOKEN does the same")
    s.add_argument("--allow-control", metavar="TOKEN",
                   help="as --allow-control-file, with the token on the command line (visible in ps)")
    s.add_argument("--idle-timeout", type=float, default=10.0, metavar="SECONDS",
                   help="close a connection that sends no complete request for this long (default 10 s)")
    s.add_argument("--hamlib-amp-port", type=int, metavar="PORT",
                   help="also serve the box's SWR, forward and reflected power and frequency, read-only, on "
                        "Hamlib's network amplifier protocol (what ampctld serves) at this TCP port")
    s.add_argument("--hamlib-amp-listen", default="127.0.0.1", metavar="ADDR",
                   help="address for --hamlib-amp-port (default 127.0.0.1: this machine only)")
    s.add_argument("--no-page", action="store_true", help="with --hamlib-amp-port: no web page, the amplifier "
                   "protocol alone")
    s.set_defaults(fn=cmd_serve)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "virtual-board": _parser_virtual_board,
    "follow": _parser_follow,
    "log": _parser_log,
    "serve": _parser_serve,
}
