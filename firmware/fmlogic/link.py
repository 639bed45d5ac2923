# The serial link protocol: one frame per line.
#
#   frame  = KIND SEQ " " WORD " " JSON "*" CRC "\n"
#   KIND   = "Q" (request, host to board) | "A" (answer) | "E" (event, unsolicited)
#   SEQ    = decimal 0..65535; an answer repeats its request's SEQ, events
#            carry the board's own counter
#   WORD   = request name, "ok"/"err" in answers, event name in events
#   JSON   = a JSON object (may be {})
#   CRC    = CRC-16/CCITT-FALSE of every byte before "*", 4 upper-case hex digits
#
# Example:  Q7 status {}*2C4A
# The parser never raises: bad frames come back as (None, reason) so the
# caller can answer with an error and change nothing.
import json
from array import array

try:
    import micropython
    from micropython import const
except ImportError:  # CPython: the same code, run as plain Python (fmlogic.shim)
    from fmlogic.shim import const, micropython, ptr8, ptr16


MAX_LINE = const(2048)


def _make_table():
    t = []
    for i in range(256):
        c = i << 8
        for _ in range(8):
            c = ((c << 1) ^ 0x1021) if c & 0x8000 else (c << 1)
        t.append(c & 0xFFFF)
    return t


_TABLE = array("H", _make_table())


@micropython.viper
def _crc(data, n: int, crc: int, table) -> int:
    # Machine code on the boards (viper): about a microsecond a byte on an RP2040,
    # where a bytecode loop took tens, and flash files are checked whole.
    p = ptr8(data)
    t = ptr16(table)
    i = 0
    while i < n:
        crc = ((crc << 8) & 0xFFFF) ^ t[((crc >> 8) ^ p[i]) & 0xFF]
        i += 1
    return crc


def crc16(data, crc=0xFFFF):
    """CRC-16/CCITT-FALSE (poly 0x1021, init 0xFFFF, no reflection, no xor-out) of
    bytes, a bytearray or a memoryview."""
    return _crc(data, len(data), crc, _TABLE)


def encode(kind, seq, word, obj):
    body = "%s%d %s %s" % (kind, seq & 0xFFFF, word, json.dumps(obj))
    b = body.encode()
    return b + ("*%04X\n" % crc16(b)).encode()


def decode(line):
    """(kind, seq, word, obj), or (None, reason) for a bad frame."""
    if len(line) > MAX_LINE:
        return (None, "oversize")
    if line.endswith(b"\n"):
        line = line[:-1]
    if line.endswith(b"\r"):
        line = line[:-1]
    star = line.rfind(b"*")
    if star < 0 or len(line) - star != 5:
        return (None, "no-crc")
    body = line[:star]
    try:
        want = int(line[star + 1:].decode(), 16)
    except (ValueError, UnicodeError):
        return (None, "no-crc")
    if crc16(body) != want:
        return (None, "bad-crc")
    try:
        text = body.decode()
    except UnicodeError:
        return (None, "malformed")
    sp1 = text.find(" ")
    if sp1 < 2:
        return (None, "malformed")
    sp2 = text.find(" ", sp1 + 1)
    if sp2 < 0:
        return (None, "malformed")
    kind = text[0]
    if kind not in "QAE":
        return (None, "malformed")
    try:
        seq = int(text[1:sp1])
    except ValueError:
        return (None, "malformed")
    if seq < 0 or seq > 0xFFFF:
        return (None, "malformed")
    word = text[sp1 + 1:sp2]
    if not word or len(word) > 16:
        return (None, "malformed")
    try:
        obj = json.loads(text[sp2 + 1:])
    except (ValueError, TypeError):
        return (None, "malformed")
    if not isinstance(obj, dict):
        return (None, "malformed")
    return (kind, seq, word, obj)


class LineReader:
    """Splits a byte stream into lines without ever holding more than MAX_LINE.

    An over-long line is dropped up to its newline and reported once.
    """

    def __init__(self):
        self.buf = bytearray()
        self.skipping = False

    def feed(self, data):
        """Return a list of complete lines (bytes, with the newline) and b'' for
        each over-long line that was dropped.

        Works a line segment at a time (bytes.find), not a byte at a time: on
        the chip that is what lets a burst of garbage pass in milliseconds."""
        out = []
        i = 0
        n = len(data)
        while i < n:
            j = data.find(b"\n", i)
            end = n if j < 0 else j + 1
            if self.skipping:
                if j >= 0:
                    self.skipping = False
                i = end
                continue
            # the line's length without its newline, if this segment joins it
            size = len(self.buf) + end - i - (1 if j >= 0 else 0)
            if size > MAX_LINE:
                self.buf = bytearray()
                out.append(b"")
                self.skipping = j < 0
            else:
                self.buf.extend(data[i:end])
                if j >= 0:
                    out.append(bytes(self.buf))
                    self.buf = bytearray()
            i = end
        return out
