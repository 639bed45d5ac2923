# Persistent memory of good states per frequency bin, and the tune records.
#
# Memory file (text, ours):
#   line 1: "FMMEM 1 <generation> <count> <crc>"  crc = CRC-16 of the lines after it
#   then one line per entry: "<bin> <l> <c> <shunt> <swr*1000> <t>"
#   optional last line:      "last <bin> <l> <c> <shunt> <bypass>"
# Written atomically: the new copy goes to mem.new, the previous good copy is
# kept as mem.bak, then mem.new is renamed into mem.dat.  At load the valid
# copy with the highest generation wins, so power loss at any point leaves a
# good memory (at worst the previous one).  Writes happen only on change, and a
# copy that fails its check is never moved into the backup slot.  Copies are
# read a line at a time (no buffer the size of the file).
#
# Records: see Records below (segment files on flash, nothing kept in RAM).
import json
import os

from fmlogic.link import crc16

MEM = "mem.dat"
NEW = "mem.new"
BAK = "mem.bak"
REC = "rec.log"
JOURNAL = "tune.jnl"
# What the start-up is reading now (a file name), so a failure there names it.
STAGE = [""]


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
            parsed = _parse_mem(_join(self.d, name), True)
            if parsed is None:
                continue
            if parsed is False:
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
        cur = _join(self.d, MEM)
        if _parse_mem(cur, False) is False:
            # The copy in place fails its check: it never becomes the backup (the
            # good backup stays), so a second fault loses at most this change.
            _remove(cur)
        try:
            atomic_write(self.d, MEM, head.encode() + body, BAK, NEW)
        except OSError as e:
            # A full or failing flash: the memory stays right in RAM and is written
            # at the next change; the tune it belongs to goes on.
            self.load_error = "not saved: " + _oserr(e)
            return False
        self.dirty = False
        return True

    def listing(self):
        out = []
        for k in sorted(self.entries):
            e = self.entries[k]
            out.append([k * self.bin_hz, e[0], e[1], e[2], e[3], e[4]])
        return out


def _parse_mem(p, keep):
    """A memory copy read a line at a time: (generation, entries, last) when keep,
    True when it passes its check and not keep; None when missing, False when
    it fails its check (CRC, format, count)."""
    try:
        f = open(p, "rb")
    except OSError:
        return None
    with f:
        try:
            head = f.readline().decode().split()
            if len(head) != 5 or head[0] != "FMMEM" or head[1] != "1" or not head[4]:
                return False
            want = int(head[4], 16)
            gen = int(head[2])
            count = int(head[3])
            crc = 0xFFFF
            n = 0
            entries = {}
            last = None
            while True:
                line = f.readline()
                if not line:
                    break
                crc = crc16(line, crc)
                p_ = line.split()
                if not p_:
                    continue
                if p_[0] == b"last":
                    if keep:
                        last = (int(p_[1]), int(p_[2]), int(p_[3]), int(p_[4]), int(p_[5]))
                    continue
                n += 1
                if keep:
                    entries[int(p_[0])] = (int(p_[1]), int(p_[2]), int(p_[3]), int(p_[4]) / 1000.0,
                                           int(p_[5]))
            if crc != want or n != count:
                return False
        except (ValueError, IndexError, UnicodeError):
            return False
    return (gen, entries, last) if keep else True


# Records on flash: segment files rec/<n>.log, segment n holding the records
# numbered n*SEG .. n*SEG+SEG-1, one per line "<seq> <json>*<crc>" (CRC-16 of
# everything before "*"), appended.  RAM holds a few integers whatever the
# history: a record is read back from its segment when the host asks, the
# oldest segment is removed whole when the store holds more than `keep`
# (compaction copies nothing), and a boot reads the newest segment only.
# rec.top holds the highest number a segment was ever opened for, written
# before the segment's first record: a number is never given twice, even when
# a segment is damaged or lost (the count then jumps to a fresh segment and
# the gap is said on the link).
SEG = 50
RDIR = "rec"
TOP = "rec.top"


class Records:
    """Tune records on flash; see above.  d is the board's directory."""

    def __init__(self, d, keep):
        self.d = d
        self.keep = int(keep)
        self.seq = 0
        self.first = 0      # the lowest segment that may still exist
        self.cur = -1       # the segment being appended to (-1: the next record opens one)
        self.lost = None    # (first, last) numbers that may be lost, found at load
        self.note = None    # what load found damaged, in words
        self.floor_lost = False  # neither segments nor rec.top: a wiped store (or a new board)
        self.err = None     # the last write failure, in words

    def _seg(self, n):
        return _join(_join(self.d, RDIR), "%d.log" % n)

    def load(self, write=True):
        """Find where the numbers stand (reads the newest segment only); write
        False leaves the flash untouched (the host reading a copy)."""
        lo, hi = _segments(_join(self.d, RDIR))
        top = _read_int(_join(self.d, TOP))
        seq = 0
        clean = True
        if hi >= 0:
            last, clean = _scan(self._seg(hi))
            if clean and last >= hi * SEG:
                seq = last
                self.cur = hi
            else:
                # A damaged or empty newest segment: which of its numbers went out
                # is unknown, so none of them is given again.
                seq = (hi + 1) * SEG - 1
                self.note = "rec/%d.log damaged: its records after %d may be lost" % (hi, max(last, hi * SEG - 1))
                self.lost = (max(last, hi * SEG - 1) + 1, seq)
            self.first = lo
        if top is not None and top > seq and top // SEG > hi:
            # Numbers were reserved for a segment that is not there (lost, or a power
            # cut before its first record): they are skipped too.
            self.lost = (seq + 1, top) if self.lost is None else (self.lost[0], top)
            if self.note is None:
                self.note = "rec/%d.log missing: records %d-%d may be lost" % (top // SEG, seq + 1, top)
            seq = top
            self.cur = -1
        if top is None and hi < 0:
            legacy = _legacy_seq(_join(self.d, "rec.log"))
            if legacy > 0:
                seq = legacy  # records of an older firmware: their numbers stay used
            else:
                self.floor_lost = True
        if hi < 0 and self.first == 0:
            self.first = (seq + 1) // SEG
        self.seq = seq
        # rec.top always covers the segment being appended to (all of its numbers).
        want = (self.cur + 1) * SEG - 1 if self.cur >= 0 else seq
        if write and (top is None or top < want):
            self._reserve(want)
        return clean

    def _reserve(self, top):
        try:
            _write_sync(_join(self.d, TOP), ("%d\n" % top).encode())
        except OSError as e:
            self.err = "rec.top not written: %s" % _oserr(e)

    def _open_segment(self, n):
        """Start segment n: reserve its numbers first, then drop what is over `keep`."""
        self._reserve((n + 1) * SEG - 1)
        try:
            os.mkdir(_join(self.d, RDIR))
        except OSError:
            pass  # it exists
        nkeep = (self.keep + SEG - 1) // SEG
        while self.first <= n - nkeep - 1:
            _remove(self._seg(self.first))
            self.first += 1
        self.cur = n

    def _drop_oldest(self):
        """Room on a full flash: the oldest segment goes (never the one being written)."""
        while self.first < self.cur:
            p = self._seg(self.first)
            self.first += 1
            if _exists(p):
                _remove(p)
                return True
        return False

    def add(self, rec):
        self.seq += 1
        rec["seq"] = self.seq
        n = self.seq // SEG
        if n != self.cur:
            self._open_segment(n)
        line = _record_line(rec)
        for _ in range(4):
            try:
                with open(self._seg(n), "ab") as f:
                    f.write(line)
                self.err = None
                break
            except OSError as e:
                self.err = "record %d not stored: %s" % (self.seq, _oserr(e))
                if not self._drop_oldest():
                    break
        return rec

    def since(self, seq, limit):
        """Up to limit records numbered above seq, oldest first, read from flash."""
        out = []
        want = seq + 1
        n = want // SEG
        if n < self.first:
            n = self.first
        top = self.seq // SEG
        while n <= top and len(out) < limit:
            try:
                f = open(self._seg(n), "rb")
            except OSError:
                n += 1
                continue
            with f:
                while len(out) < limit:
                    line = f.readline()
                    if not line:
                        break
                    if _line_seq(line) < want:
                        continue  # not parsed: only its number is read
                    r = _parse_record(line)
                    if r is not None and r["seq"] >= want:
                        out.append(r)
                        want = r["seq"] + 1
            n += 1
        return out

    def count(self):
        """How many segments the store holds now (a directory listing, no reads)."""
        lo, hi = _segments(_join(self.d, RDIR))
        return 0 if hi < 0 else hi - lo + 1


def highest_seq(d):
    """The highest record number written whole in d's record store (read only;
    the host's look at a board's flash)."""
    lo, hi = _segments(_join(d, RDIR))
    n = hi
    while n >= lo and n >= 0:
        last = _scan(_join(_join(d, RDIR), "%d.log" % n))[0]
        if last >= 0:
            return last
        n -= 1
    return _legacy_seq(_join(d, "rec.log"))


def _oserr(e):
    code = e.args[0] if e.args else 0
    if code == 28:
        return "flash full"
    return "flash error %s" % code


def _segments(dirp):
    """(lowest, highest) segment number in the records directory, (-1, -1) if none."""
    lo = -1
    hi = -1
    try:
        names = os.listdir(dirp)
    except OSError:
        return (-1, -1)
    for name in names:
        if not name.endswith(".log"):
            continue
        try:
            n = int(name[:-4])
        except ValueError:
            continue
        if n < 0:
            continue
        if lo < 0 or n < lo:
            lo = n
        if n > hi:
            hi = n
    return (lo, hi)


def _read_int(p):
    """A small file holding one non-negative integer, or None when missing or damaged."""
    try:
        with open(p, "rb") as f:
            raw = f.read(24)
    except OSError:
        return None
    try:
        v = int(raw.decode().strip())
    except (ValueError, UnicodeError):
        return None
    return v if v >= 0 else None


def _scan(p):
    """(last good record number, clean?) of a segment, a line at a time; -1 if none."""
    last = -1
    clean = True
    try:
        f = open(p, "rb")
    except OSError:
        return (-1, False)
    with f:
        empty = True
        while True:
            line = f.readline()
            if not line:
                break
            empty = False
            r = _line_seq(line) if line.endswith(b"\n") else -1
            if r < 0 or _parse_record(line) is None:
                clean = False
                continue
            if r > last:
                last = r
    return (last, clean and not empty)


def _legacy_seq(p):
    """The highest record number in an older firmware's rec.log (read a line at a time)."""
    last = 0
    try:
        f = open(p, "rb")
    except OSError:
        return 0
    with f:
        while True:
            line = f.readline()
            if not line:
                break
            r = _parse_record(line)
            if r is not None and r["seq"] > last:
                last = r["seq"]
    return last


def _record_line(rec):
    b = ("%d " % rec["seq"] + json.dumps(rec)).encode()
    return b + ("*%04X\n" % crc16(b)).encode()


def _line_seq(line):
    """The record number a line starts with, -1 when it does not start with one."""
    sp = line.find(b" ", 0, 12)
    if sp <= 0:
        return -1
    try:
        return int(line[:sp])
    except ValueError:
        return -1


def _parse_record(line):
    if line.endswith(b"\n"):
        line = line[:-1]
    star = line.rfind(b"*")
    if star < 0 or len(line) - star != 5:
        return None
    try:
        if int(line[star + 1:].decode(), 16) != crc16(line[:star]):
            return None
        body = line[:star]
        if not body.startswith(b"{"):
            sp = body.find(b" ")
            body = body[sp + 1:]
        r = json.loads(body.decode())
    except (ValueError, UnicodeError, TypeError):
        return None
    if not isinstance(r, dict) or not isinstance(r.get("seq"), int):
        return None
    return r


def journal_write(d, obj):
    """Note that a tune is under way, so a reset mid-tune still ends in a record.

    One plain write, no copy and rename: littlefs commits a file whole when it
    is closed, and a torn journal elsewhere only fails to parse (the tune
    itself is not lost, only its reset record)."""
    try:
        _write_sync(_join(d, JOURNAL), json.dumps(obj).encode())
    except OSError:
        pass  # a full flash must not stop a tune


def journal_take(d):
    p = _join(d, JOURNAL)
    raw = None
    try:
        with open(p, "rb") as f:
            raw = f.read(1025)
    except OSError:
        pass
    if raw is not None and len(raw) > 1024:
        raw = b""  # a journal is a hundred bytes: anything this long is damage
    _remove(p)
    _remove(p + ".bak")
    if raw is None:
        return None
    try:
        obj = json.loads(raw.decode())
    except (ValueError, UnicodeError):
        return None
    return obj if isinstance(obj, dict) else None


# The boot counter (boot.cnt: boots so far) and the failed starts in a row
# (boot.try, cleared once a start has run a while, and by a deploy).  Read as
# bytes: random bytes are a damaged counter, never an exception.
BOOTS = "boot.cnt"
TRIES = "boot.try"


def read_boots(d):
    """Boots so far from boot.cnt (or its previous copy), 0 when both are damaged."""
    for name in (BOOTS, BOOTS + ".bak"):
        v = _read_int(_join(d, name))
        if v is not None:
            return v
    return 0


def write_boots(d, n):
    try:
        atomic_write(d, BOOTS, ("%d\n" % n).encode())
        return True
    except OSError:
        return False  # a full flash: the count is lost, the boot goes on


def read_tries(d):
    v = _read_int(_join(d, TRIES))
    return 0 if v is None else v


def write_tries(d, n):
    try:
        if n:
            _write_sync(_join(d, TRIES), ("%d\n" % n).encode())
        else:
            _remove(_join(d, TRIES))
        return True
    except OSError:
        return False


def note_fault(d, text):
    """The last start-up fault, kept where the flash allows (fault.txt, overwritten)."""
    try:
        _write_sync(_join(d, "fault.txt"), text.encode()[:200])
        return True
    except OSError:
        return False
