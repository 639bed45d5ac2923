# RP2040 board: two ADC channels for the detectors, relays through a chain of
# 74HC595 shift registers on SPI (latch pin, output enable held off at boot),
# a frequency counter on a PWM slice counting rising edges of the prescaled RF
# sample, a status LED, a tune button, the hardware watchdog.
# Pins come from the board config's "pins" object (hardware_notes/wiring.md).
import time

import machine
from micropython import const

_PWM_BASE = const(0x40050000)  # RP2040 datasheet, PWM registers (section 4.5)
_SLICE = const(0x14)
_IO_BANK0 = const(0x40014000)
_FUNC_PWM = const(4)


class Board:
    def __init__(self, cfg):
        pins = cfg["pins"]
        net = cfg["network"]
        # Output enable first, high (off), before anything can clock the registers.
        self.oe = machine.Pin(pins.get("relay_oe", 13), machine.Pin.OUT, value=1)
        self.latch = machine.Pin(pins.get("relay_latch", 17), machine.Pin.OUT, value=0)
        self.spi = machine.SPI(0, baudrate=1000000, sck=machine.Pin(pins.get("relay_sck", 18)),
                               mosi=machine.Pin(pins.get("relay_mosi", 19)))
        self.nl = len(net["inductors_uh"])
        self.nc = len(net["capacitors_pf"])
        self.nbytes = (self.nl + self.nc + 2 + 7) // 8
        self.buf = bytearray(self.nbytes)
        self._shift(0)
        self.oe.value(0)
        self.adc_f = machine.ADC(pins.get("adc_fwd", 26))
        self.adc_r = machine.ADC(pins.get("adc_ref", 27))
        self.burst = cfg["detector"].get("burst", 16)
        self.led_pin = machine.Pin(pins.get("led", 25), machine.Pin.OUT, value=0)
        self.btn = machine.Pin(pins.get("tune_button", 15), machine.Pin.IN, machine.Pin.PULL_UP)
        self.prescale = cfg["counter"]["prescale"]
        self.gate_ms = cfg["counter"]["gate_ms"]
        self.cnt_pin = pins.get("freq_in", 21)  # must be an odd GPIO (PWM channel B)
        self.slice = (self.cnt_pin >> 1) & 7
        machine.mem32[_IO_BANK0 + 8 * self.cnt_pin + 4] = _FUNC_PWM
        self.wdt = machine.WDT(timeout=4000)
        import sys
        self.uart = None
        tx = pins.get("uart_tx")
        if tx is not None:
            self.uart = machine.UART(0, baudrate=cfg["link"]["baud"], tx=machine.Pin(tx),
                                     rx=machine.Pin(pins.get("uart_rx", tx + 1)), timeout=0)
        else:
            import select
            self.poll = select.poll()
            self.poll.register(sys.stdin, select.POLLIN)
            self.stdin = sys.stdin.buffer
            self.stdout = sys.stdout.buffer

    def _shift(self, word):
        for i in range(self.nbytes):
            self.buf[self.nbytes - 1 - i] = (word >> (8 * i)) & 0xFF
        self.spi.write(self.buf)
        self.latch.value(1)
        self.latch.value(0)

    def set_relays(self, l, c, sh, bypass):
        word = l | (c << self.nl) | ((1 if sh else 0) << (self.nl + self.nc)) | \
            ((0 if bypass else 1) << (self.nl + self.nc + 1))  # in-line bit: relays idle = through
        self._shift(word)

    def read_detectors(self):
        sf = 0
        sr = 0
        for _ in range(self.burst):
            sf += self.adc_f.read_u16()
            sr += self.adc_r.read_u16()
        # read_u16 scales the 12-bit result to 16 bits: back to 12-bit counts.
        return (sf / (16.0 * self.burst), sr / (16.0 * self.burst))

    def count_freq(self):
        gate_ms = self.gate_ms
        base = _PWM_BASE + _SLICE * self.slice
        machine.mem32[base + 0x00] = 0          # CSR: disabled
        machine.mem32[base + 0x04] = 1 << 4     # DIV = 1.0
        machine.mem32[base + 0x10] = 0xFFFF     # TOP
        machine.mem32[base + 0x08] = 0          # CTR
        machine.mem32[base + 0x00] = (2 << 4) | 1  # DIVMODE rising edge of B, enable
        time.sleep_ms(gate_ms)
        n = machine.mem32[base + 0x08] & 0xFFFF
        machine.mem32[base + 0x00] = 0
        return n * self.prescale * 1000.0 / gate_ms

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

    def link_read(self):
        if self.uart is not None:
            return self.uart.read()
        if self.poll.poll(0):
            return self.stdin.read(1)
        return None

    def link_write(self, data):
        if self.uart is not None:
            self.uart.write(data)
        else:
            self.stdout.write(data)
