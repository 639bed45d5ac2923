# Persistent memory of good states per frequency bin, and the tune records.
#
# Memory file (text, ours):
#   line 1: "FMMEM 1 <generation> <count> <crc>"  crc = CRC-16 of the lines after it
#   then one line per entry: "<bin> <l> <c> <shunt> <swr*1000> <t>"
#   optional last line:      "last <bin> <l> <c> <shunt> <bypass>"
# Written atomically: the new copy goes to mem.new, the previous good copy is
# kept as mem.bak, then mem.new is renamed into mem.dat.  At load the valid
# copy with the highest generation wins, so power loss at any point leaves a
# good memory (at worst the previous one).  Writes happen only on change.
#
# Records file: one record per line, "<json>*<crc>", appended; a torn last
# line fails its CRC and is ignored.  Compacted to the newest `keep` records
# (atomically, same scheme) when it grows to twice that.
import json
import os

from fmlogic.link import crc16

MEM = "mem.dat"
NEW = "mem.new"
BAK = "mem.bak"
REC = "rec.log"
JOURNAL = "tune.jnl"


def _join(d, name):
    if not d:
        return name
    return d + "/" + name if not d.endswith("/") else d + name


def _exists(p):
    try:
        os.stat(p)
        return True
    except OSError:
        return False


def _remove(p):
    try:
        os.remove(p)
    except OSError:
        pass


def _read(p):
    try:
        with open(p, "rb") as f:
            return f.read()
    except OSError:
        return None


def _write_sync(p, data):
    with open(p, "wb") as f:
        f.write(data)
        try:
            f.flush()
            os.fsync(f.fileno())
        except (AttributeError, OSError):
            pass  # MicroPython closes to flush; littlefs commits on close


def atomic_write(d, name, data, bak=None, new=None):
    """Write name in directory d so a power cut leaves either old or new."""
    path = _join(d, name)
    newp = _join(d, new or (name + ".new"))
    bakp = _join(d, bak or (name + ".bak"))
    _write_sync(newp, data)
    if _exists(path):
        _remove(bakp)
        os.rename(path, bakp)
    os.rename(newp, path)


# How far either side of a frequency a stored state is still worth a first
# reading: 2 % (an operator's step within a band, or a move to its other end on
# the narrow bands), at least one bin.
REACH = 0.02


class Memory:
    """Good states per frequency bin, bounded, persisted atomically (d is the
    directory; None keeps the memory in RAM only, as the host's scorer does)."""

    def __init__(self, d, bin_hz, max_entries):
        self.d = d
        self.bin_hz = float(bin_hz)
        self.max_entries = int(max_entries)
        self.entries = {}
        self.gen = 0
        self.last = None
        self.dirty = False
        self.load_error = None

    def bin_of(self, f_hz):
        return int(f_hz // self.bin_hz)

    def load(self):
        if self.d is None:
            return False
        best = None
        errors = []
        for name in (MEM, NEW, BAK):
            raw = _read(_join(self.d, name))
            if raw is None:
                continue
            parsed = _parse_mem(raw)
            if parsed is None:
                errors.append(name)
                continue
            if best is None or parsed[0] > best[0]:
                best = parsed
        if errors:
            self.load_error = "damaged copy ignored: " + ",".join(errors)
        if best is not None:
            self.gen, self.entries, self.last = best
        return best is not None

    def lookup(self, f_hz):
        """The stored (l, c, shunt, swr, t) nearest to f_hz within REACH, or None;
        of two equally near, the one with the lower SWR."""
        b = self.bin_of(f_hz)
        e = self.entries.get(b)
        if e is not None:
            return e
        span = int(REACH * f_hz / self.bin_hz) + 1
        for k in range(1, span + 1):
            e1 = self.entries.get(b - k)
            e2 = self.entries.get(b + k)
            if e1 is not None or e2 is not None:
                if e1 is not None and (e2 is None or e1[3] <= e2[3]):
                    return e1
                return e2
        return None

    def store(self, f_hz, state, swr, t):
        b = self.bin_of(f_hz)
        old = self.entries.get(b)
        rec = (state[0], state[1], state[2], int(swr * 1000 + 0.5) / 1000.0, int(t))
        if old is not None and old[:3] == rec[:3] and abs(old[3] - rec[3]) < 0.05:
            return False
        self.entries[b] = rec
        if len(self.entries) > self.max_entries:
            oldest = None
            for k in self.entries:
                if oldest is None or self.entries[k][4] < self.entries[oldest][4]:
                    oldest = k
            del self.entries[oldest]
        self.dirty = True
        return True

    def set_last(self, f_hz, state, bypass):
        last = (self.bin_of(f_hz) if f_hz else -1, state[0], state[1], state[2], 1 if bypass else 0)
        if last != self.last:
            self.last = last
            self.dirty = True

    def last_state(self):
        if self.last is None:
            return None
        return self.last

    def clear(self):
        self.entries = {}
        self.dirty = True
        self.flush()

    def flush(self):
        if not self.dirty or self.d is None:
            self.dirty = False
            return False
        self.gen += 1
        lines = []
        keys = sorted(self.entries)
        for k in keys:
            e = self.entries[k]
            lines.append("%d %d %d %d %d %d" % (k, e[0], e[1], e[2], int(e[3] * 1000), e[4]))
        if self.last is not None:
            lines.append("last %d %d %d %d %d" % self.last)
        body = ("\n".join(lines) + "\n").encode() if lines else b""
        head = "FMMEM 1 %d %d %04X\n" % (self.gen, len(keys), crc16(body))
        atomic_write(self.d, MEM, head.encode() + body, BAK, NEW)
        self.dirty = False
        return True

    def listing(self):
        out = []
        for k in sorted(self.entries):
            e = self.entries[k]
            out.append([k * self.bin_hz, e[0], e[1], e[2], e[3], e[4]])
        return out


def _parse_mem(raw):
    try:
        nl = raw.find(b"\n")
        if nl < 0:
            return None
        head = raw[:nl].decode().split()
        body = raw[nl + 1:]
        if len(head) != 5 or head[0] != "FMMEM" or head[1] != "1":
            return None
        if int(head[4], 16) != crc16(body):
            return None
        gen = int(head[2])
        count = int(head[3])
        entries = {}
        last = None
        for line in body.decode().split("\n"):
            if not line:
                continue
            p = line.split()
            if p[0] == "last":
                last = (int(p[1]), int(p[2]), int(p[3]), int(p[4]), int(p[5]))
                continue
            entries[int(p[0])] = (int(p[1]), int(p[2]), int(p[3]), int(p[4]) / 1000.0, int(p[5]))
        if len(entries) != count:
            return None
        return (gen, entries, last)
    except (ValueError, IndexError, UnicodeError):
        return None


class Records:
    """Tune records: a bounded ring in RAM backed by an append-only file."""

    def __init__(self, d, keep):
        self.d = d
        self.keep = int(keep)
        self.ring = []
        self.seq = 0
        self.lines = 0

    def load(self):
        raw = _read(_join(self.d, REC))
        if raw is None:
            raw = _read(_join(self.d, REC + ".bak"))
        if raw is None:
            return
        ring = []
        n = 0
        for line in raw.split(b"\n"):
            n += 1
            r = _parse_record(line)
            if r is not None:
                ring.append(r)
        ring.sort(key=lambda r: r["seq"])
        self.ring = ring[-self.keep:]
        self.lines = n
        if self.ring:
            self.seq = self.ring[-1]["seq"]

    def add(self, rec):
        self.seq += 1
        rec["seq"] = self.seq
        self.ring.append(rec)
        if len(self.ring) > self.keep:
            self.ring.pop(0)
        line = _record_line(rec)
        path = _join(self.d, REC)
        with open(path, "ab") as f:
            f.write(line)
        self.lines += 1
        if self.lines >= 2 * self.keep:
            self._compact()
        return rec

    def _compact(self):
        data = b"".join(_record_line(r) for r in self.ring)
        atomic_write(self.d, REC, data)
        self.lines = len(self.ring)

    def since(self, seq, limit):
        out = []
        for r in self.ring:
            if r["seq"] > seq:
                out.append(r)
                if len(out) >= limit:
                    break
        return out


def _record_line(rec):
    b = json.dumps(rec).encode()
    return b + ("*%04X\n" % crc16(b)).encode()


def _parse_record(line):
    star = line.rfind(b"*")
    if star < 0 or len(line) - star != 5:
        return None
    try:
        if int(line[star + 1:].decode(), 16) != crc16(line[:star]):
            return None
        r = json.loads(line[:star].decode())
    except (ValueError, UnicodeError):
        return None
    if not isinstance(r, dict) or not isinstance(r.get("seq"), int):
        return None
    return r


def journal_write(d, obj):
    """Note that a tune is under way, so a reset mid-tune still ends in a record."""
    atomic_write(d, JOURNAL, json.dumps(obj).encode())


def journal_take(d):
    p = _join(d, JOURNAL)
    raw = _read(p)
    _remove(p)
    _remove(p + ".bak")
    if raw is None:
        return None
    try:
        obj = json.loads(raw.decode())
    except (ValueError, UnicodeError):
        return None
    return obj if isinstance(obj, dict) else None
