# Virtual board: the same interface as the hardware boards, answered by the
# host's simulated station over two local TCP sockets (control and serial link).
# Control lines: "R" -> "<fwd> <ref>" raw counts; "F" -> "<hz>"; "B" -> "0|1";
# "S l c sh byp" -> "ok"; "L 0|1" -> "ok".  The station treats each request as
# the watchdog's feed: a loop that stops asking is reset like a real board.
import socket
import time

try:
    _ticks_ms = time.ticks_ms
    _ticks_diff = time.ticks_diff
    _sleep_ms = time.sleep_ms
except AttributeError:  # CPython
    def _ticks_ms():
        return int(time.monotonic() * 1000)

    def _ticks_diff(a, b):
        return a - b

    def _sleep_ms(ms):
        time.sleep(ms / 1000.0)


def _connect(host, port):
    s = socket.socket()
    s.connect(socket.getaddrinfo(host, port)[0][-1])
    return s


class Board:
    def __init__(self, host, port, ser_port, cfg=None):
        self.ctl = _connect(host, port)
        self.ctl_buf = b""
        self.ser = _connect(host, ser_port)
        self.ser.setblocking(False)
        # The link's receive buffer, allocated once: recv(4096) would take a fresh 4 KB
        # block at every poll, which a long-lived small heap (--heap 256) may not have
        # (then no request is ever read).  MicroPython's socket reads into it with
        # readinto (None: nothing waiting), CPython's with recv_into.
        self.rbuf = bytearray(4096)
        self.rmv = memoryview(self.rbuf)
        self._rx = getattr(self.ser, "recv_into", None) or self.ser.readinto

    def _ask(self, line):
        self.ctl.send(line.encode() + b"\n")
        while b"\n" not in self.ctl_buf:
            chunk = self.ctl.recv(256)
            if not chunk:
                raise OSError("station closed")
            self.ctl_buf += chunk
        i = self.ctl_buf.find(b"\n")
        out = self.ctl_buf[:i].decode()
        self.ctl_buf = self.ctl_buf[i + 1:]
        return out

    def read_detectors(self):
        p = self._ask("R").split()
        return (float(p[0]), float(p[1]))

    def set_relays(self, l, c, sh, bypass):
        self._ask("S %d %d %d %d" % (l, c, sh, 1 if bypass else 0))

    def count_freq(self):
        return float(self._ask("F"))

    def tune_button(self):
        return self._ask("B") == "1"

    def led(self, on):
        pass

    def wdt_feed(self):
        pass

    def ticks_ms(self):
        return _ticks_ms()

    def ticks_diff(self, a, b):
        return _ticks_diff(a, b)

    def sleep_ms(self, ms):
        _sleep_ms(ms)

    def link_read(self):
        try:
            n = self._rx(self.rbuf)
        except OSError:
            return None
        if not n:
            return None  # nothing waiting, or the host closed the link
        return bytes(self.rmv[:n])

    def link_write(self, data):
        view = memoryview(data)
        while len(view):
            try:
                n = self.ser.send(view)
            except OSError:
                _sleep_ms(1)
                continue
            view = view[n:]
