"""The emulated board: the project's firmware on an emulated RP2040, wired to the station.

The firmware is staged by the project's own deploy code (compiled with
mpy-cross for the RP2040, as `feedmatch deploy --compile` sends it) into the
Pico's littlefs flash file system; MicroPython's rp2 port boots it and
board_rp2040.py drives the emulated peripherals:
  - the relay chain: SPI0 bytes and the latch pin decoded into the relay state
    the simulated hardware switches (held released while output enable is high);
  - the detectors: the simulated hardware's counts on ADC channels 0 and 1 (GPIO 26, 27);
  - the frequency counter: a square wave of the carrier divided by the counter's
    prescaler on its PWM B input;
  - the tune button (GPIO 15, pulled up, pressed low);
  - the link: UART0 (GPIO 0/1) bridged to a pseudo-terminal, so `status`, `tune`
    and `log` work unchanged;
  - the watchdog: when it fires the chip restarts with its flash as it was.
"""

from __future__ import annotations

import json
import tempfile
import time
from pathlib import Path

from feedmatch.errors import InputError
from feedmatch.sim.emulator import Pico, default_uf2, littlefs_image, read_littlefs
from feedmatch.sim.station import Station
from feedmatch.sim.virtual import SimulatedBoard

PINS = {"relay_sck": 18, "relay_mosi": 19, "relay_latch": 17, "relay_oe": 13, "adc_fwd": 26, "adc_ref": 27,
        "freq_in": 21, "tune_button": 15, "led": 25, "uart_tx": 0, "uart_rx": 1}
# The counter's prescaler for the emulated board: 55 kHz at 14 MHz, 2800 edges in a
# 50 ms gate (0.04 % resolution) without millions of pin events per second.
PRESCALE = 256


def emulated_config(station: Station) -> dict:
    """The station's board config as an RP2040 board on the emulated pins."""
    cfg = json.loads(json.dumps(station.board_config))
    cfg["board"] = "rp2040"
    cfg["pins"] = dict(PINS)
    cfg["counter"] = {"prescale": PRESCALE, "gate_ms": 50}
    return cfg


def stage_firmware(cfg: dict, work: Path) -> dict[str, bytes]:
    """The files of the board's flash after `feedmatch deploy --compile`, staged by
    deploy's own plan and apply into a directory, then read back."""
    from feedmatch.board.deploy import DirTarget, apply, plan

    stage = work / "staging"
    stage.mkdir(parents=True, exist_ok=True)
    cfg_path = work / "rp2040-emulated.json"
    cfg_path.write_text(json.dumps(cfg))
    t = DirTarget(stage)
    apply(plan("rp2040", cfg_path, True, t, work / "build"), t)
    return {str(p.relative_to(stage)): p.read_bytes() for p in stage.rglob("*") if p.is_file()}


class EmulatedBoard(SimulatedBoard):
    """The firmware on the emulated Pico; the operator, the model and the pty as in
    VirtualBoard."""

    def __init__(self, station: Station, workdir: str | Path, uf2: str | Path | None = None):
        SimulatedBoard.__init__(self, station, workdir)
        uf2 = Path(uf2) if uf2 else default_uf2()
        if uf2 is None:
            raise InputError("give --image: a MicroPython .uf2 image for the Raspberry Pi Pico")
        self.uf2 = uf2
        self.cfg = emulated_config(station)
        net = self.cfg["network"]
        self.nl = len(net["inductors_uh"])
        self.nc = len(net["capacitors_pf"])
        self.nbytes = (self.nl + self.nc + 2 + 7) // 8
        self.pico: Pico | None = None
        self.oe = 1
        self.latches: list[tuple[int, int]] = []   # (word, output enable) as the chip latched them
        self._button_until = 0.0

    def start(self) -> str:
        work = self.dir
        files = stage_firmware(self.cfg, work)
        self._open_pty()
        pico = self.pico = Pico(self.uf2, littlefs_image(files), work / "emu",
                                pins={"relay_latch": PINS["relay_latch"], "relay_oe": PINS["relay_oe"],
                                      "freq_in": PINS["freq_in"], "uart": 0})
        pico.on_latch = self._latch
        pico.on_uart = self._from_board
        pico.on_wdt = self._wdt
        pico.on_boot = self._boot
        console = open(work / "console.log", "ab")
        self._console = console
        pico.on_cdc = lambda b: (console.write(b), console.flush())
        pico.start()
        self._push()
        pico.set_pin(PINS["tune_button"], 1)
        for fn in (self._pty_loop, self._refresh):
            self._thread(fn)
        return self.pty_path

    def stop(self) -> None:
        self._stop.set()
        if self.pico is not None:
            self.pico.stop()
        self._close_pty()
        if getattr(self, "_console", None) is not None:
            self._console.close()

    # -- the pins -----------------------------------------------------------------
    def relays_of(self, word: int) -> tuple[int, int, int, int]:
        """(l, c, shunt, bypass) of a relay-chain word (board_common.RelayChain)."""
        nl, nc = self.nl, self.nc
        l = word & ((1 << nl) - 1)
        c = (word >> nl) & ((1 << nc) - 1)
        sh = (word >> (nl + nc)) & 1
        inline = (word >> (nl + nc + 1)) & 1
        return (l, c, sh, 1 - inline)

    def _latch(self, data: bytes, oe: int) -> None:
        word = int.from_bytes(data[-self.nbytes:], "big") if data else 0
        self.latches.append((word, oe))
        self.oe = oe
        with self.lock:
            # Output enable high: the registers drive nothing, every relay released
            # (the network transparent, as an unpowered box).
            self.hardware.set(*((0, 0, 1, 1) if oe else self.relays_of(word)))
        if self.on_set is not None:
            self.on_set()
        self._push()
        self.pico.resume()

    def _push(self) -> None:
        """The model's detector counts and carrier onto the chip's pins."""
        pico = self.pico
        if pico is None:
            return
        with self.lock:
            f, r = self.hardware.read()
            hz = self.hardware.count()
        pico.set_adc(0, round(f))
        pico.set_adc(1, round(r))
        pico.set_freq(hz / PRESCALE)
        if self._button_until and time.monotonic() > self._button_until:
            self._button_until = 0.0
            pico.set_pin(PINS["tune_button"], 1)

    def _changed(self) -> None:
        with self.lock:
            pressed = self.hardware.button
            self.hardware.button = False
        if pressed and self.pico is not None:
            self._button_until = time.monotonic() + 0.5
            self.pico.set_pin(PINS["tune_button"], 0)
        self._push()

    def _refresh(self) -> None:
        # Fresh detector noise and the operator's carrier, about every 20 ms of wall time.
        while not self._stop.wait(0.02):
            self._push()

    def _wdt(self) -> None:
        self.resets += 1
        with self.lock:
            self.hardware.relays = (0, 0, 1, 1)  # the chip restarts: relays drop out

    def _boot(self) -> None:
        self._push()

    def _to_board(self, data: bytes) -> None:
        if self.pico is not None:
            self.pico.send_uart(data)

    def flash_files(self) -> dict[str, bytes]:
        return read_littlefs(self.pico.dump_fs())

    def records_on_flash(self) -> int:
        from fmlogic.memory import highest_seq

        files = self.flash_files()
        with tempfile.TemporaryDirectory() as d:
            for name, data in files.items():
                if name.startswith("rec"):
                    Path(d, name).parent.mkdir(parents=True, exist_ok=True)
                    Path(d, name).write_bytes(data)
            return highest_seq(d)
