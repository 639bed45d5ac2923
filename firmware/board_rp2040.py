# RP2040 board: two ADC channels for the detectors, relays through a chain of
# 74HC595 shift registers on SPI (latch pin, output enable held off at boot),
# a frequency counter on a PWM slice counting rising edges of the prescaled RF
# sample, a status LED, a tune button, the hardware watchdog.
# Pins come from the board config's "pins" object (hardware_notes/wiring.md).
import time

import machine

from board_common import BoardBase, RelayChain
from micropython import const

_PWM_BASE = const(0x40050000)  # RP2040 datasheet, PWM registers (section 4.5)
_SLICE = const(0x14)
_IO_BANK0 = const(0x40014000)
_FUNC_PWM = const(4)


class Board(BoardBase):
    def __init__(self, cfg):
        pins = cfg["pins"]
        net = cfg["network"]
        # Output enable first, high (off), before anything can clock the registers.
        oe = machine.Pin(pins.get("relay_oe", 13), machine.Pin.OUT, value=1)
        latch = machine.Pin(pins.get("relay_latch", 17), machine.Pin.OUT, value=0)
        spi = machine.SPI(0, baudrate=1000000, sck=machine.Pin(pins.get("relay_sck", 18)),
                          mosi=machine.Pin(pins.get("relay_mosi", 19)))
        self.relays = RelayChain(spi, latch, oe, len(net["inductors_uh"]), len(net["capacitors_pf"]))
        self.adc_f = machine.ADC(pins.get("adc_fwd", 26))
        self.adc_r = machine.ADC(pins.get("adc_ref", 27))
        self.burst = cfg["detector"].get("burst", 16)
        self.led_pin = machine.Pin(pins.get("led", 25), machine.Pin.OUT, value=0)
        self.btn = machine.Pin(pins.get("tune_button", 15), machine.Pin.IN, machine.Pin.PULL_UP)
        self.prescale = cfg["counter"]["prescale"]
        self.gate_ms = cfg["counter"]["gate_ms"]
        self.cnt_pin = pins.get("freq_in", 21)  # must be an odd GPIO (PWM channel B)
        self.slice = (self.cnt_pin >> 1) & 7
        # An input first (the pad's input enable), then over to the PWM block.
        machine.Pin(self.cnt_pin, machine.Pin.IN)
        machine.mem32[_IO_BANK0 + 8 * self.cnt_pin + 4] = _FUNC_PWM
        self.wdt = machine.WDT(timeout=4000)
        import sys
        self.uart = None
        tx = pins.get("uart_tx")
        if tx is not None:
            # A receive buffer of 2 KB: a whole frame waits while a tune step runs;
            # garbage beyond it is dropped by the UART, never waited behind.
            self.uart = machine.UART(0, baudrate=cfg["link"]["baud"], tx=machine.Pin(tx),
                                     rx=machine.Pin(pins.get("uart_rx", tx + 1)), timeout=0, rxbuf=2048)
        else:
            import select
            self.poll = select.poll()
            self.poll.register(sys.stdin, select.POLLIN)
            self.rx = bytearray(64)
            self.stdin = sys.stdin.buffer
            self.stdout = sys.stdout.buffer

    def count_freq(self):
        gate_ms = self.gate_ms
        base = _PWM_BASE + _SLICE * self.slice
        machine.mem32[base + 0x00] = 0          # CSR: disabled
        machine.mem32[base + 0x04] = 1 << 4     # DIV = 1.0
        machine.mem32[base + 0x10] = 0xFFFF     # TOP
        machine.mem32[base + 0x00] = (2 << 4) | 1  # DIVMODE rising edge of B, enable
        # The count is the counter's advance over the gate (modulo its 16 bits),
        # whatever it held before.
        c0 = machine.mem32[base + 0x08] & 0xFFFF
        t0 = time.ticks_us()
        time.sleep_ms(gate_ms)
        n = ((machine.mem32[base + 0x08] & 0xFFFF) - c0) & 0xFFFF
        dt = time.ticks_diff(time.ticks_us(), t0)
        machine.mem32[base + 0x00] = 0
        # Over the gate as it really lasted (sleep_ms is not exact to the microsecond).
        return n * self.prescale * 1e6 / (dt if dt > 0 else gate_ms * 1000)

    def link_read(self):
        if self.uart is not None:
            return self.uart.read()
        # USB stdin has no non-blocking bulk read: up to 64 bytes, one at a time
        # while more is ready (the controller calls again while the link is busy).
        n = 0
        rx = self.rx
        while n < 64 and self.poll.poll(0):
            rx[n] = self.stdin.read(1)[0]
            n += 1
        return bytes(rx[:n]) if n else None

    def link_write(self, data):
        if self.uart is not None:
            self.uart.write(data)
        else:
            self.stdout.write(data)
