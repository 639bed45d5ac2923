"""The emulated Raspberry Pi Pico: MicroPython's rp2 port in rp2040js, driven from here.

The node side (data/emu/pico.mjs) boots a MicroPython .uf2 image with a
littlefs image at the Pico's flash file-system offset, and speaks a line
protocol over one local TCP connection (see the head of pico.mjs): the relay
chain's latch and output enable, USB CDC and UART0 bytes, ADC values, a
square wave on the counter pin, input pins, the watchdog.  rp2040js and uf2
come from the npm registry into a cache directory on first use.

Users bring the official MicroPython Pico image (any recent release); the
tests use the one beside the project (../shared/rp2040/) or FEEDMATCH_PICO_UF2.
Times come from the target's own clock (time.ticks_us follows the emulator's
cycle count: 8 ns per Cortex-M0+ cycle at 125 MHz).  The emulator charges
nothing for flash (XIP) cache misses, so a real Pico is somewhat slower.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import threading
from collections.abc import Callable
from pathlib import Path

from feedmatch.errors import InputError
from feedmatch.resources import DATA, FIRMWARE
from feedmatch.sim.virtual import die_with_parent

EMU_DATA = DATA / "emu"
# The image a development checkout finds beside it (../shared/rp2040); users
# bring the official one (--image, or FEEDMATCH_PICO_UF2).
SHARED_UF2 = FIRMWARE.parent.parent / "shared" / "rp2040" / "micropython-v1.28.0-rpi-pico.uf2"
# The Pico's flash file system as MicroPython's rp2 port lays it out: 1408 KB at
# the end of 2 MB (ports/rp2, MICROPY_HW_FLASH_STORAGE_BYTES), 4 KB blocks.
LFS_BLOCK = 4096
LFS_BLOCKS = 352


class EmulatorMissing(RuntimeError):
    """node, npm, the rp2040js package or the MicroPython image cannot be had here."""


def default_uf2() -> Path | None:
    p = os.environ.get("FEEDMATCH_PICO_UF2")
    if p:
        return Path(p)
    return SHARED_UF2 if SHARED_UF2.exists() else None


def emu_dir() -> Path:
    """A directory with pico.mjs and rp2040js installed (npm, once; then cached)."""
    base = Path(os.environ.get("FEEDMATCH_CACHE", Path.home() / ".cache" / "feedmatch")) / "emu"
    node = shutil.which("node")
    npm = shutil.which("npm")
    if node is None:
        raise EmulatorMissing("node is not installed (Debian: apt-get install nodejs npm)")
    base.mkdir(parents=True, exist_ok=True)
    for name in ("pico.mjs", "bootrom_b1.mjs", "package.json"):
        src = EMU_DATA / name
        dst = base / name
        if not dst.exists() or dst.read_bytes() != src.read_bytes():
            shutil.copyfile(src, dst)
    if not (base / "node_modules" / "rp2040js" / "package.json").exists():
        if npm is None:
            raise EmulatorMissing("npm is not installed: cannot fetch rp2040js")
        r = subprocess.run([npm, "install", "--no-audit", "--no-fund", "--silent"], cwd=base,
                           capture_output=True, text=True, timeout=300)
        if r.returncode != 0:
            raise EmulatorMissing(f"npm install rp2040js failed: {(r.stderr or r.stdout).strip()[:200]}")
    return base


def littlefs_image(files: dict[str, bytes]) -> bytes:
    """A littlefs image of the Pico's flash file system holding files (path -> bytes)."""
    import littlefs

    fs = littlefs.LittleFS(block_size=LFS_BLOCK, block_count=LFS_BLOCKS, prog_size=256)
    for path in sorted(files):
        parts = path.split("/")[:-1]
        for i in range(1, len(parts) + 1):
            d = "/".join(parts[:i])
            try:
                fs.mkdir(d)
            except FileExistsError:
                pass
        with fs.open(path, "wb") as f:
            f.write(files[path])
    return bytes(fs.context.buffer)


def read_littlefs(image: bytes) -> dict[str, bytes]:
    """Every file of a littlefs image (path -> bytes)."""
    import littlefs

    fs = littlefs.LittleFS(block_size=LFS_BLOCK, block_count=LFS_BLOCKS, prog_size=256, mount=False)
    fs.context.buffer = bytearray(image)
    fs.mount()
    out = {}
    for root, _dirs, names in fs.walk("/"):
        for n in names:
            p = (root.rstrip("/") + "/" + n).lstrip("/")
            with fs.open(p, "rb") as f:
                out[p] = f.read()
    return out


class Pico:
    """One emulated Pico; callbacks run on the reader thread.

    on_latch(word: bytes, oe: int): the relay chain latched (the chip waits for
    resume()); on_cdc / on_uart(bytes); on_wdt(); on_boot()."""

    def __init__(self, uf2: str | Path, fs_image: bytes, workdir: str | Path,
                 pins: dict | None = None):
        uf2 = Path(uf2).resolve()  # node runs in another directory
        if not uf2.is_file():
            raise InputError(f"MicroPython image not found: {uf2}")
        self.uf2 = uf2
        self.dir = Path(workdir)
        self.dir.mkdir(parents=True, exist_ok=True)
        self.fs_path = self.dir / "flash-fs.img"
        self.fs_path.write_bytes(fs_image)
        self.pins = pins or {}
        self.on_latch: Callable[[bytes, int], None] | None = None
        self.on_cdc: Callable[[bytes], None] | None = None
        self.on_uart: Callable[[bytes], None] | None = None
        self.on_wdt: Callable[[], None] | None = None
        self.on_boot: Callable[[], None] | None = None
        self.nanos = 0
        self.resets = 0
        self.proc: subprocess.Popen | None = None
        self.conn: socket.socket | None = None
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self.closed = threading.Event()
        self._fs: bytes | None = None
        self._fs_ready = threading.Event()

    def start(self, timeout: float = 30.0) -> Pico:
        import json

        d = emu_dir()
        srv = socket.socket()
        srv.bind(("127.0.0.1", 0))
        srv.listen(1)
        srv.settimeout(timeout)
        port = srv.getsockname()[1]
        log = open(self.dir / "emulator.log", "ab")
        self.proc = subprocess.Popen(["node", str(d / "pico.mjs"), str(self.uf2), str(self.fs_path), str(port),
                                      json.dumps(self.pins)], cwd=d, stdin=subprocess.DEVNULL,
                                     stdout=log, stderr=log, start_new_session=True,
                                     preexec_fn=die_with_parent)
        log.close()
        try:
            self.conn, _ = srv.accept()
        except OSError:
            self.stop()
            raise EmulatorMissing(f"the emulator did not start (see {self.dir / 'emulator.log'})") from None
        finally:
            srv.close()
        self.conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self._thread = threading.Thread(target=self._read, daemon=True)
        self._thread.start()
        return self

    def _send(self, line: str) -> None:
        with self._lock:
            if self.conn is None:
                return
            try:
                self.conn.sendall(line.encode() + b"\n")
            except OSError:
                pass

    def repl(self, text: str) -> None:
        self._send("repl " + text)

    def send_cdc(self, data: bytes) -> None:
        self._send("cdc " + data.hex())

    def send_uart(self, data: bytes) -> None:
        self._send("uart " + data.hex())

    def set_adc(self, ch: int, value: int) -> None:
        self._send(f"adc {ch} {max(0, min(4095, int(value)))}")

    def set_freq(self, hz: float) -> None:
        self._send(f"freq {max(0.0, hz):.3f}")

    def set_pin(self, gpio: int, value: int) -> None:
        self._send(f"pin {gpio} {1 if value else 0}")

    def resume(self) -> None:
        self._send("resume")

    def dump_fs(self, timeout: float = 20.0) -> bytes:
        """The flash file system as the chip has it now (a littlefs image)."""
        self._fs_ready.clear()
        self._send("dump")
        if not self._fs_ready.wait(timeout):
            raise TimeoutError("the emulator did not send its flash")
        return self._fs or b""

    def _read(self) -> None:
        buf = b""
        conn = self.conn
        while conn is not None:
            try:
                chunk = conn.recv(65536)
            except OSError:
                break
            if not chunk:
                break
            buf += chunk
            while b"\n" in buf:
                line, buf = buf.split(b"\n", 1)
                self._line(line.decode("latin1"))
        self.closed.set()

    def _line(self, line: str) -> None:
        cmd, _, arg = line.partition(" ")
        if cmd == "cdc" and self.on_cdc:
            self.on_cdc(bytes.fromhex(arg))
        elif cmd == "uart" and self.on_uart:
            self.on_uart(bytes.fromhex(arg))
        elif cmd == "latch":
            word, oe, nanos = arg.split()
            self.nanos = int(float(nanos))
            if self.on_latch:
                self.on_latch(bytes.fromhex(word), int(oe))
            else:
                self.resume()
        elif cmd == "t":
            self.nanos = int(float(arg))
        elif cmd == "wdt":
            self.resets += 1
            if self.on_wdt:
                self.on_wdt()
        elif cmd == "booted" and self.on_boot:
            self.on_boot()
        elif cmd == "fs":
            self._fs = bytes.fromhex(arg)
            self._fs_ready.set()

    def stop(self) -> None:
        self._send("quit")
        with self._lock:
            c, self.conn = self.conn, None
        if c is not None:
            try:
                c.close()
            except OSError:
                pass
        p = self.proc
        if p is not None and p.poll() is None:
            try:
                p.wait(3)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, 9)
                p.wait()
