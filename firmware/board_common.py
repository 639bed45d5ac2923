# What the RP2040 and ESP32 boards share: the 74HC595 relay chain, the
# detector burst, the small pin duties and time.  Hardware objects come in
# from the board file; nothing here imports machine.
import time


class RelayChain:
    """74HC595s in a chain: l bits, c bits, the shunt-side bit, the in-line bit.

    All bits 0 is the transparent state (inductors shorted, capacitors out,
    network bypassed), which is also what an unpowered box does.
    """

    def __init__(self, spi, latch, oe, nl, nc):
        self.spi = spi
        self.latch = latch
        self.oe = oe
        self.nl = nl
        self.nc = nc
        self.nbytes = (nl + nc + 2 + 7) // 8
        self.buf = bytearray(self.nbytes)
        self.shift(0)
        oe.value(0)  # only now may the registers drive the relays

    def shift(self, word):
        for i in range(self.nbytes):
            self.buf[self.nbytes - 1 - i] = (word >> (8 * i)) & 0xFF
        self.spi.write(self.buf)
        self.latch.value(1)
        self.latch.value(0)

    def set(self, l, c, sh, bypass):
        self.shift(l | (c << self.nl) | ((1 if sh else 0) << (self.nl + self.nc)) |
                   ((0 if bypass else 1) << (self.nl + self.nc + 1)))


# The board contract: every board (board_rp2040, board_esp32, board_virtual,
# the host tests' in-process board) offers these, and the controller uses
# nothing else.  tests/firmware/test_board_contract.py holds each one to it.
#   read_detectors()          -> (fwd, ref): raw detector readings in 12-bit ADC
#                                counts (0..4095, floats: a burst average); the
#                                calibration (fmlogic.swr) turns them into watts.
#                                One call takes at most a few ms.
#   set_relays(l, c, sh, byp) -> None: latch the relay word at once (l, c codes;
#                                sh 1 = capacitor on the antenna side; byp true =
#                                through).  The caller waits the settle time; the
#                                controller alone decides whether switching is safe.
#   count_freq()              -> Hz (float), 0.0 with no carrier; one gate of
#                                tens of ms at most.
#   tune_button()             -> bool: the front-panel button is pressed.
#   led(on)                   -> None.
#   wdt_feed()                -> None: feed the hardware watchdog (4 s).
#   ticks_ms(), ticks_diff(a, b), sleep_ms(ms): MicroPython's time semantics
#                                (ms; ticks_diff is later minus earlier, wrap-safe).
#   link_read()               -> bytes, or None when nothing waits (never blocks).
#   link_write(data)          -> None: all of data (bytes, bytearray or memoryview)
#                                is sent before it returns.
CONTRACT = ("read_detectors", "set_relays", "count_freq", "tune_button", "led", "wdt_feed",
            "ticks_ms", "ticks_diff", "sleep_ms", "link_read", "link_write")


class BoardBase:
    """Methods both hardware boards implement the same way; subclasses set
    the pins and add count_freq, link_read and link_write (see CONTRACT)."""

    def read_detectors(self):
        sf = 0
        sr = 0
        for _ in range(self.burst):
            sf += self.adc_f.read_u16()
            sr += self.adc_r.read_u16()
        # read_u16 scales to 16 bits: back to 12-bit counts, as the calibration uses.
        return (sf / (16.0 * self.burst), sr / (16.0 * self.burst))

    def set_relays(self, l, c, sh, bypass):
        self.relays.set(l, c, sh, bypass)

    def tune_button(self):
        return self.btn.value() == 0

    def led(self, on):
        self.led_pin.value(1 if on else 0)

    def wdt_feed(self):
        self.wdt.feed()

    def ticks_ms(self):
        return time.ticks_ms()

    def ticks_diff(self, a, b):
        return time.ticks_diff(a, b)

    def sleep_ms(self, ms):
        time.sleep_ms(ms)
