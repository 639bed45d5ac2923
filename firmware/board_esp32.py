# ESP32 board: the same duties as board_rp2040 on ESP32 peripherals.  ADC1
# channels (ADC2 is unusable with Wi-Fi), relays through 74HC595s on SPI(2),
# the frequency counter on the PCNT unit where the firmware has esp32.PCNT,
# else an edge-counting interrupt (good only to a few kHz after the prescaler).
import time

import machine

from board_common import BoardBase, RelayChain


class Board(BoardBase):
    def __init__(self, cfg):
        pins = cfg["pins"]
        net = cfg["network"]
        # Output enable first, high (off), before anything can clock the registers.
        oe = machine.Pin(pins.get("relay_oe", 4), machine.Pin.OUT, value=1)
        latch = machine.Pin(pins.get("relay_latch", 5), machine.Pin.OUT, value=0)
        spi = machine.SPI(2, baudrate=1000000, sck=machine.Pin(pins.get("relay_sck", 18)),
                          mosi=machine.Pin(pins.get("relay_mosi", 23)))
        self.relays = RelayChain(spi, latch, oe, len(net["inductors_uh"]), len(net["capacitors_pf"]))
        self.adc_f = machine.ADC(machine.Pin(pins.get("adc_fwd", 34)), atten=machine.ADC.ATTN_11DB)
        self.adc_r = machine.ADC(machine.Pin(pins.get("adc_ref", 35)), atten=machine.ADC.ATTN_11DB)
        self.burst = cfg["detector"].get("burst", 16)
        self.led_pin = machine.Pin(pins.get("led", 2), machine.Pin.OUT, value=0)
        self.btn = machine.Pin(pins.get("tune_button", 0), machine.Pin.IN, machine.Pin.PULL_UP)
        self.prescale = cfg["counter"]["prescale"]
        self.gate_ms = cfg["counter"]["gate_ms"]
        self.count = 0
        fin = machine.Pin(pins.get("freq_in", 27), machine.Pin.IN)
        self.pcnt = None
        try:
            import esp32
            self.pcnt = esp32.PCNT(0, pin=fin, rising=esp32.PCNT.INCREMENT)
        except (ImportError, AttributeError, TypeError, ValueError):
            fin.irq(self._edge, machine.Pin.IRQ_RISING)
        self.wdt = machine.WDT(timeout=4000)
        self.uart = machine.UART(1, baudrate=cfg["link"]["baud"], tx=pins.get("uart_tx", 17),
                                 rx=pins.get("uart_rx", 16), timeout=0)

    def _edge(self, _pin):
        self.count += 1

    def count_freq(self):
        gate_ms = self.gate_ms
        if self.pcnt is not None:
            self.pcnt.value(0)
            self.pcnt.start()
            time.sleep_ms(gate_ms)
            n = self.pcnt.value()
        else:
            self.count = 0
            time.sleep_ms(gate_ms)
            n = self.count
        return n * self.prescale * 1000.0 / gate_ms

    def link_read(self):
        return self.uart.read()

    def link_write(self, data):
        self.uart.write(data)
