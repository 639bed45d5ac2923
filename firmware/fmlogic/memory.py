# Persistent memory of good states per frequency bin, and the tune records.
#
# Memory file (text, ours):
#   line 1: "FMMEM 3 <generation> <count> <upto>" (upto: the highest record number
#           whose memory change this copy holds; format 2 had no upto)
#   then one line per entry: "<bin> <l> <c> <shunt> <swr*1000> <t>"
#   optional:                "last <bin> <l> <c> <shunt> <bypass>"
#   last line:               "crc <CRC-16 of every line before it>"
# (format 1, still read, had "FMMEM 1 <generation> <count> <crc of the lines after it>").
# Written atomically: the new copy goes to mem.new, the previous good copy is
# kept as mem.bak, then mem.new is renamed into mem.dat.  At load the valid
# copy with the highest generation wins, so power loss at any point leaves a
# good memory (at worst the previous one).  A copy that fails its check is never
# moved into the backup slot.  Copies are read a line at a time (no buffer the
# size of the file).
#
# A change learned in a tune is not saved by itself: the tune's record carries
# it ("mset": bin, l, c, shunt, swr*1000, t) and the last state ("lst"), and the
# whole memory is saved only every SAVE_EVERY changes (or SAVE_SPAN records
# after the first unsaved one).  At boot the changes in the records after the
# copy's `upto` are put back in order, so a reset loses nothing the records
# hold, and a tune's end costs one small record write instead of a rewrite of
# the memory and of mem.last (the flash's wear and time, hardware_notes/flash.md).
#
# Records: see Records below (segment files on flash, nothing kept in RAM).
import json
import os
from array import array

from fmlogic.link import crc16

MEM = "mem.dat"
LAST = "mem.last"
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


# A whole save rewrites about 9 KB (3 sectors) at 400 entries; 32 changes between
# saves make it about 0.15 sector erases a change, and SAVE_SPAN bounds the records
# a boot reads to put the unsaved changes back (a few dozen lines, most skipped
# unparsed: only lines carrying "mset" are parsed).
SAVE_EVERY = 32
SAVE_SPAN = 100

# How far either side of a frequency a stored state is still worth a first
# reading: 2 % (an operator's step within a band, or a move to its other end on
# the narrow bands), at least one bin.
REACH = 0.02


class Memory:
    """Good states per frequency bin, bounded, persisted atomically (d is the
    directory; None keeps the memory in RAM only, as the host's scorer does).

    Held in arrays allocated once for max_entries, sorted by bin: the heap it
    takes never grows with use, and loading a full memory never fragments the
    heap with thousands of small objects.  An entry is (l, c, shunt, swr, t);
    the SWR is kept in thousandths (exact on every port)."""

    def __init__(self, d, bin_hz, max_entries):
        self.d = d
        self.bin_hz = float(bin_hz)
        self.gen = 0
        self.last = None
        self.dirty = False       # entries changed since the last save
        self.last_dirty = False  # the last state changed since it was saved
        self.dat_ok = False      # mem.dat passed its check (at load, or we wrote it)
        self.load_error = None
        self.n = 0
        self.cap = 0
        self.tmax = 0  # the newest time stamp held (stamps never go back, see store)
        self.wbuf = bytearray(512)
        self.change = None  # the last store's (bin, l, c, shunt, milli, t) until a record holds it
        self.nlog = 0       # changes held by records only (not in the saved copy)
        self.m0 = 0         # the first record holding such a change (0: none)
        self.upto = 0       # the highest record number whose change the saved copy holds
        self.whole = False  # a change no record holds (clear, a smaller limit): save whole
        self.last_seq = 0   # the record number when mem.last was written
        self.room = None    # called on a full flash to free room (the oldest records go); True if it did
        self.set_max(max_entries)

    def set_max(self, max_entries):
        """(Re)size the arrays; entries over a smaller limit go oldest first."""
        m = int(max_entries)
        if m == self.cap:
            return
        old = None
        if self.n:
            old = [self._entry(i) + (self.bins[i],) for i in range(self.n)]
        self.cap = m
        self.max_entries = m
        z = bytes(4 * (m + 1))  # + 1: room for the one over, before the oldest goes
        self.bins = array("i", z)
        self.codes = array("i", z)
        self.milli = array("i", z)
        self.t = array("i", z)
        self.ins = array("i", z)  # order of first insertion: the tie-break between equally old
        self.n = 0
        self.next_ins = 0
        if old:
            for e in old:
                self._put(e[5], e[0], e[1], e[2], int(e[3] * 1000 + 0.5), e[4])
            self.dirty = True
            self.whole = True

    @property
    def entries(self):
        """{bin: (l, c, shunt, swr, t)}, made on demand (tests, tools; not the board's loop)."""
        return {self.bins[i]: self._entry(i) for i in range(self.n)}

    def _entry(self, i):
        c = self.codes[i]
        return (c & 0xFFF, (c >> 12) & 0xFFF, (c >> 24) & 1, self.milli[i] / 1000.0, self.t[i])

    def _find(self, b):
        """(index, found): where bin b is, or where it would go, by binary search."""
        lo = 0
        hi = self.n
        bins = self.bins
        while lo < hi:
            mid = (lo + hi) >> 1
            if bins[mid] < b:
                lo = mid + 1
            else:
                hi = mid
        return (lo, lo < self.n and bins[lo] == b)

    def _put(self, b, l, c, sh, milli, t):
        """Insert or replace bin b; the oldest entry goes when over max_entries."""
        n = self.n
        if n == 0 or b > self.bins[n - 1]:
            i, found = n, False  # in order (a copy being read): no search, nothing to move
        else:
            i, found = self._find(b)
        if not found:
            for arr in (self.bins, self.codes, self.milli, self.t, self.ins):
                j = n
                while j > i:
                    arr[j] = arr[j - 1]
                    j -= 1
            self.bins[i] = b
            self.ins[i] = self.next_ins
            self.next_ins += 1
            self.n = n + 1
        self.codes[i] = (l & 0xFFF) | ((c & 0xFFF) << 12) | ((1 if sh else 0) << 24)
        self.milli[i] = milli
        self.t[i] = t
        if t > self.tmax:
            self.tmax = t
        if self.n > self.cap:
            oldest = 0
            for k in range(1, self.n):
                if self.t[k] < self.t[oldest] or (self.t[k] == self.t[oldest] and self.ins[k] < self.ins[oldest]):
                    oldest = k
            self._drop(oldest)

    def _drop(self, i):
        n = self.n - 1
        for arr in (self.bins, self.codes, self.milli, self.t, self.ins):
            for j in range(i, n):
                arr[j] = arr[j + 1]
        self.n = n

    def bin_of(self, f_hz):
        return int(f_hz // self.bin_hz)

    def load(self):
        if self.d is None:
            return False
        # The copies in order of the generation their first line claims; the first
        # that passes its check while being read is the one (one pass, normally).
        cands = []
        errors = []
        for name in (MEM, NEW, BAK):
            g = _mem_gen(_join(self.d, name))
            if g is not None and g < 0:
                errors.append(name)  # not even a head: damaged
            elif g is not None:
                cands.append((g, name))
        cands.sort(key=lambda c: (-c[0], c[1]))
        found = False
        for g, name in cands:
            self.n = 0
            self.next_ins = 0
            self.last = None
            self.upto = 0
            if _parse_mem(_join(self.d, name), self) is False:
                errors.append(name)
                continue
            self.gen = g
            found = True
            if name == MEM:
                self.dat_ok = True
            break
        if not found:
            self.n = 0
            self.last = None
        if errors:
            self.load_error = "damaged copy ignored: " + ",".join(errors)
        last = _read_last(_join(self.d, LAST))
        if last is not None:
            self.last = last[:5]  # newer than any last line in a memory copy
            self.last_seq = last[5]
        self.dirty = False
        self.last_dirty = False
        self.change = None
        self.nlog = 0
        self.m0 = 0
        self.whole = False
        return found

    def replay(self, r):
        """Put back a memory change a record holds (records after the saved copy's
        upto, in order: the same _put the tune made, so the same entries and the
        same eviction)."""
        ms = r.get("mset")
        seq = r.get("seq", 0)
        if seq <= self.upto or not isinstance(ms, list) or len(ms) != 6:
            return False
        try:
            b, l, c, sh, milli, t = [int(x) for x in ms]
        except (TypeError, ValueError):
            return False
        self._put(b, l, c, sh, milli, t)
        self.nlog += 1
        if not self.m0:
            self.m0 = seq
        self.dirty = True
        return True

    def logged(self, seq):
        """A record numbered seq now holds the last state and the last change."""
        self.last_dirty = False
        if self.change is not None:
            self.change = None
            self.nlog += 1
            if not self.m0:
                self.m0 = seq

    def lookup(self, f_hz):
        """The stored (l, c, shunt, swr, t) nearest to f_hz within REACH, or None;
        of two equally near, the one with the lower SWR (the lower bin on a tie)."""
        b = self.bin_of(f_hz)
        i, found = self._find(b)
        if found:
            return self._entry(i)
        span = int(REACH * f_hz / self.bin_hz) + 1
        k1 = b - self.bins[i - 1] if i > 0 else span + 1
        k2 = self.bins[i] - b if i < self.n else span + 1
        if k1 > span and k2 > span:
            return None
        if k1 < k2:
            return self._entry(i - 1)
        if k2 < k1:
            return self._entry(i)
        return self._entry(i - 1) if self.milli[i - 1] <= self.milli[i] else self._entry(i)

    def store(self, f_hz, state, swr, t):
        b = self.bin_of(f_hz)
        milli = int(swr * 1000 + 0.5)
        i, found = self._find(b)
        if found:
            c = self.codes[i]
            if ((c & 0xFFF, (c >> 12) & 0xFFF, (c >> 24) & 1) == (state[0], state[1], 1 if state[2] else 0)
                    and abs(self.milli[i] - milli) < 50):
                return False
        t = int(t)
        if t < self.tmax:
            # The clock went back (the board restarted: its uptime begins again at 0).
            # An entry stored now is still the newest, so the oldest-first eviction
            # never takes what was just learned.
            t = self.tmax
        self.tmax = t
        self._put(b, state[0], state[1], state[2], milli, t)
        self.change = (b, state[0], state[1], 1 if state[2] else 0, milli, t)
        self.dirty = True
        return True

    def set_last(self, f_hz, state, bypass):
        last = (self.bin_of(f_hz) if f_hz else -1, state[0], state[1], state[2], 1 if bypass else 0)
        if last != self.last:
            self.last = last
            self.last_dirty = True

    def last_state(self):
        if self.last is None:
            return None
        return self.last

    def clear(self, seq=0):
        self.n = 0
        self.dirty = True
        self.whole = True
        self.change = None
        self.flush(seq)

    def flush(self, seq=0):
        """Save what no record holds (seq: the highest record number now): the last
        state to its own small file (a note of a few bytes, not a copy of the memory),
        the entries to mem.dat (a new copy, the previous one kept as mem.bak) when a
        change is in no record, or every SAVE_EVERY changes the records hold."""
        if self.d is None:
            self.dirty = self.last_dirty = False
            self.change = None
            return False
        wrote = False
        if self.last_dirty and self.last is not None:
            try:
                body = "last %d %d %d %d %d %d" % (self.last + (seq,))
                _write_sync(_join(self.d, LAST), ("%s*%04X\n" % (body, crc16(body.encode()))).encode())
                self.last_dirty = False
                self.last_seq = seq
                wrote = True
            except OSError as e:
                self.load_error = "not saved: " + _oserr(e)
        if not self.dirty:
            return wrote
        if (not self.whole and self.change is None and self.nlog < SAVE_EVERY
                and (not self.m0 or seq - self.m0 < SAVE_SPAN)):
            return wrote  # every change since the saved copy is in a record
        self.gen += 1
        cur = _join(self.d, MEM)
        if _mem_ok(cur, self.wbuf) is False:
            # The copy in place fails its check (at load, or now: flash can go bad
            # under a running board): it never becomes the backup (the good backup
            # stays), so a second fault loses at most this change.
            _remove(cur)
        for _ in range(3):
            ok = self._save(cur, seq)
            # A full flash: the memory matters more than the oldest records.
            if ok is not False or self.room is None or not self.room():
                break
        if not ok:
            return wrote
        self.dirty = False
        self.whole = False
        self.change = None
        self.nlog = 0
        self.m0 = 0
        return True

    def _save(self, cur, seq):
        """Write the whole memory as mem.new, keep the copy in place as mem.bak and
        rename: True when done, False on a full flash, None on another error."""
        newp = _join(self.d, NEW)
        buf = self.wbuf
        mv = memoryview(buf)
        try:
            # Written in 512-byte blocks from one buffer, the CRC in the last line: no
            # buffer the size of the memory (on a fragmented heap that is what fails).
            with open(newp, "wb") as f:
                head = ("FMMEM 3 %d %d %d\n" % (self.gen, self.n, seq)).encode()
                crc = crc16(head)
                k = len(head)
                buf[0:k] = head
                for i in range(self.n):
                    c = self.codes[i]
                    line = ("%d %d %d %d %d %d\n" % (self.bins[i], c & 0xFFF, (c >> 12) & 0xFFF, (c >> 24) & 1,
                                                    self.milli[i], self.t[i])).encode()
                    crc = crc16(line, crc)
                    if k + len(line) > len(buf):
                        f.write(mv[:k])
                        k = 0
                    buf[k:k + len(line)] = line
                    k += len(line)
                tail = ("crc %04X\n" % crc).encode()
                if k + len(tail) > len(buf):
                    f.write(mv[:k])
                    k = 0
                buf[k:k + len(tail)] = tail
                f.write(mv[:k + len(tail)])
            if _exists(cur):
                _remove(_join(self.d, BAK))
                os.rename(cur, _join(self.d, BAK))
            os.rename(newp, cur)
            self.dat_ok = True
            self.upto = seq
            return True
        except OSError as e:
            # A full or failing flash: the memory stays right in RAM and is written
            # at the next change; the tune it belongs to goes on.
            self.load_error = "not saved: " + _oserr(e)
            _remove(newp)
            return False if (e.args and e.args[0] == 28) else None

    def put_many(self, ents, from_bin_hz, replace):
        """Entries [freq_hz, l, c, shunt, swr, t_s] (as listing() gives them, checked
        by check_entries) into the memory: the host's import of an exported memory.
        Each goes to the bin that holds the middle of the bin it was listed for
        (from_bin_hz wide), so an export from bins of this width lands exactly where
        it came from, whatever the float precision.  A bin that already holds a
        state keeps it unless replace (what this box learned itself is the better
        guess).  Returns (stored, kept); nothing is written until flush()."""
        stored = 0
        kept = 0
        half = from_bin_hz / 2.0
        for e in ents:
            b = int((e[0] + half) // self.bin_hz)
            if not replace and self._find(b)[1]:
                kept += 1
                continue
            self._put(b, e[1], e[2], e[3], int(e[4] * 1000 + 0.5), int(e[5]))
            stored += 1
        if stored:
            self.dirty = True
            self.whole = True  # no record holds these: the next flush saves the whole memory
        return stored, kept

    def listing(self):
        out = []
        for i in range(self.n):
            e = self._entry(i)
            out.append([self.bins[i] * self.bin_hz, e[0], e[1], e[2], e[3], e[4]])
        return out


# At most this many entries in one mem-put request (about 50 bytes each in the frame).
PUT_MAX = 16
_T_MAX = 2147483647  # the time stamps' array holds 32-bit signed integers


def _is_int(v):
    return isinstance(v, int) and not isinstance(v, bool)


def _is_num(v):
    return (isinstance(v, int) or isinstance(v, float)) and not isinstance(v, bool) and v == v


def check_entries(ents, l_max, c_max):
    """None when every entry of a mem-put can be stored, else what is wrong, in
    short words naming the entry: a frame with one bad entry stores nothing."""
    if not isinstance(ents, list) or not 1 <= len(ents) <= PUT_MAX:
        return "entries: a list of 1 to %d" % PUT_MAX
    for i in range(len(ents)):
        e = ents[i]
        if not isinstance(e, list) or len(e) != 6:
            return "entry %d: not [freq_hz, l, c, shunt, swr, t]" % i
        if not _is_num(e[0]) or not 0 < e[0] <= 1e9:
            return "entry %d: freq_hz not in 0..1e9 Hz" % i
        if not _is_int(e[1]) or not 0 <= e[1] <= l_max:
            return "entry %d: l code not in 0..%d" % (i, l_max)
        if not _is_int(e[2]) or not 0 <= e[2] <= c_max:
            return "entry %d: c code not in 0..%d" % (i, c_max)
        if not _is_int(e[3]) or not 0 <= e[3] <= 1:
            return "entry %d: shunt not 0 or 1" % i
        if not _is_num(e[4]) or not 1.0 <= e[4] <= 99.0:
            return "entry %d: swr not in 1..99" % i
        if not _is_num(e[5]) or not 0 <= e[5] <= _T_MAX:
            return "entry %d: t not a time stamp in s" % i
    return None


def _mem_gen(p):
    """The generation a memory copy's first line claims (-1 if it has none), None if missing."""
    try:
        with open(p, "rb") as f:
            head = f.readline(80).split()
    except OSError:
        return None
    try:
        return int(head[2]) if len(head) >= 4 and head[0] == b"FMMEM" else -1
    except ValueError:
        return -1


def _mem_ok(p, buf):
    """The CRC of a memory copy checked in place, a buffer at a time (no parsing):
    True when it passes, False when damaged, None when missing."""
    try:
        size = os.stat(p)[6]
    except OSError:
        return None
    try:
        with open(p, "rb") as f:
            first = f.readline(80)
            head = first.split()
            if len(head) < 4 or head[0] != b"FMMEM" or head[1] not in (b"1", b"2", b"3"):
                return False
            v2 = head[1] != b"1"  # formats 2 and 3: the CRC in the last line
            crc = crc16(first) if v2 else 0xFFFF
            left = size - len(first) - (9 if v2 else 0)
            want = -1 if v2 else int(head[4], 16)
            mv = memoryview(buf)
            while left > 0:
                k = f.readinto(mv[:left if left < len(buf) else len(buf)])
                if not k:
                    return False
                crc = crc16(mv[:k], crc)
                left -= k
            if v2:
                tail = f.read(10)
                if len(tail) != 9 or tail[:4] != b"crc ":
                    return False
                want = int(tail[4:8], 16)
            return crc == want
    except (ValueError, IndexError, OSError):
        return False


def _read_last(p):
    """The last state from its file ("last <bin> <l> <c> <shunt> <bypass> [<record no.>]*<crc>")
    as (bin, l, c, shunt, bypass, record no.), or None."""
    try:
        with open(p, "rb") as f:
            raw = f.read(64)
    except OSError:
        return None
    star = raw.rfind(b"*")
    try:
        if star < 0 or int(raw[star + 1:star + 5], 16) != crc16(raw[:star]):
            return None
        p_ = raw[:star].split()
        if len(p_) not in (6, 7) or p_[0] != b"last":
            return None
        return (int(p_[1]), int(p_[2]), int(p_[3]), int(p_[4]), int(p_[5]), int(p_[6]) if len(p_) == 7 else 0)
    except (ValueError, IndexError):
        return None


def _parse_mem(p, into):
    """Check a memory copy, read a line at a time: its generation when it passes,
    None when missing, False when it fails (CRC, format, count).  With into (a
    Memory), its entries and last state go there.  Format 2 carries its CRC in
    the last line ("crc XXXX", over every line before it); format 1 in its head
    (over the lines after it)."""
    try:
        f = open(p, "rb")
    except OSError:
        return None
    with f:
        try:
            first = f.readline(80)
            head = first.decode().split()
            if head[0] != "FMMEM" or head[1] not in ("1", "2", "3"):
                return False
            v2 = head[1] != "1"
            if len(head) != (5 if head[1] != "2" else 4):
                return False
            if head[1] == "3" and into is not None:
                into.upto = int(head[4])
            gen = int(head[2])
            count = int(head[3])
            want = -1 if v2 else int(head[4], 16)
            crc = crc16(first) if v2 else 0xFFFF
            n = 0
            while True:
                line = f.readline(120)
                if not line:
                    break
                p_ = line.split()
                if v2 and p_ and p_[0] == b"crc":
                    want = int(p_[1], 16)
                    if f.readline(8):
                        return False  # bytes after the CRC line
                    break
                crc = crc16(line, crc)
                if not p_:
                    continue
                if p_[0] == b"last":
                    if into is not None:
                        into.last = (int(p_[1]), int(p_[2]), int(p_[3]), int(p_[4]), int(p_[5]))
                    continue
                n += 1
                if into is not None:
                    into._put(int(p_[0]), int(p_[1]), int(p_[2]), int(p_[3]), int(p_[4]), int(p_[5]))
            if crc != want or n != count:
                return False
        except (ValueError, IndexError, UnicodeError):
            return False
    return gen


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
#
# A new record first goes to a file of its own, rec/q/<seq> (a few hundred
# bytes: littlefs keeps it inside its directory block, a small commit and no
# sector erase), and every BATCH records those move into their segment in one
# append.  An append to a littlefs file copies the file's partly written last
# sector into a fresh, erased one, so appending each record costs a sector
# erase; in batches it costs one for BATCH records.  A reset between the
# append and the removal of the small files leaves copies that the next load
# recognises (numbers not above the segment's last) and removes.
SEG = 50
RDIR = "rec"
QDIR = "q"
TOP = "rec.top"
BATCH = 8


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
        self.npend = 0      # records in rec/q, not yet in their segment
        self.tail = None    # the newest record found at load (its last state, its memory log)

    def _seg(self, n):
        return _join(_join(self.d, RDIR), "%d.log" % n)

    def _qdir(self):
        return _join(_join(self.d, RDIR), QDIR)

    def _pend(self, seq):
        return _join(self._qdir(), "%d" % seq)

    def load(self, write=True):
        """Find where the numbers stand (reads the newest segment only); write
        False leaves the flash untouched (the host reading a copy)."""
        lo, hi = _segments(_join(self.d, RDIR))
        top = _read_int(_join(self.d, TOP))
        seq = 0
        clean = True
        last = -1
        damaged = None  # the damaged newest segment's last safe number
        self.tail = None
        keep = [None]
        if hi >= 0:
            last, clean = _scan(self._seg(hi), keep)
            self.tail = keep[0]
            if clean and last >= hi * SEG:
                seq = last
                self.cur = hi
            else:
                # A damaged or empty newest segment: which of its numbers went out
                # is unknown, so none of them is given again.
                seq = (hi + 1) * SEG - 1
                damaged = max(last, hi * SEG - 1)  # said below, after the records waiting in rec/q
            self.first = lo
        # Records not yet moved into their segment: newer than any in a segment,
        # except copies a reset left after the move (not above the segment's last).
        used = hi
        self.npend = 0
        pend = _pending(self._qdir())
        for s in pend:
            if s <= last:
                if write:
                    _remove(self._pend(s))
                continue
            r = _read_record(self._pend(s))
            if r is None or r["seq"] != s:
                # A damaged record file: its number may have gone out on the link.
                if write:
                    _remove(self._pend(s))
                if s > seq:
                    self.lost = (seq + 1, s) if self.lost is None else (self.lost[0], s)
                    if self.note is None:
                        self.note = "rec/q/%d damaged: record %d may be lost" % (s, s)
                    seq = s
                    self.cur = -1
                used = max(used, s // SEG)
                continue
            self.npend += 1
            used = max(used, s // SEG)
            if damaged is not None and s == damaged + 1:
                damaged = s  # the damaged segment's next records were safe in rec/q
            if s > seq:
                seq = s
                self.tail = r
                self.cur = s // SEG
        if damaged is not None and damaged < (hi + 1) * SEG - 1:
            self.note = "rec/%d.log damaged: its records after %d may be lost" % (hi, damaged)
            self.lost = (damaged + 1, (hi + 1) * SEG - 1) if self.lost is None else (damaged + 1, self.lost[1])
        if top is not None and top > seq and top // SEG > used:
            # Numbers were reserved for a segment that is not there (lost, or a power
            # cut before its first record): they are skipped too.
            self.lost = (seq + 1, top) if self.lost is None else (self.lost[0], top)
            if self.note is None:
                self.note = "rec/%d.log missing: records %d-%d may be lost" % (top // SEG, seq + 1, top)
            seq = top
            self.cur = -1
        if top is None and hi < 0 and not pend:
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

    def floor(self, s):
        """Numbers up to s went out (the tune journal says so): none is given again,
        and those no store holds are said lost.  True when some were."""
        if s <= self.seq:
            return False
        self.lost = (self.seq + 1, s) if self.lost is None else (self.lost[0], s)
        self.note = "records %d-%d missing from the store" % (self.seq + 1, s)
        self.seq = s
        self.cur = -1
        return True

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
        try:
            os.mkdir(self._qdir())
        except OSError:
            pass
        nkeep = (self.keep + SEG - 1) // SEG
        while self.first <= n - nkeep - 1:
            _remove(self._seg(self.first))
            self.first += 1
        self.cur = n

    def settle(self):
        """Move the records waiting in rec/q into their segments: one append per
        segment, then the small files go (see above for a reset in between)."""
        pend = _pending(self._qdir())
        i = 0
        while i < len(pend):
            n = pend[i] // SEG
            j = i
            while j < len(pend) and pend[j] // SEG == n:
                j += 1
            try:
                with open(self._seg(n), "ab") as f:
                    for s in pend[i:j]:
                        raw = _read(self._pend(s))
                        if raw and raw.endswith(b"\n"):
                            f.write(raw)
            except OSError as e:
                self.err = "records not moved: %s" % _oserr(e)
                return False
            for s in pend[i:j]:
                _remove(self._pend(s))
            i = j
        self.npend = 0
        return True

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
        for k in range(4):
            try:
                _write_sync(self._pend(self.seq), line)
                self.err = None
                self.npend += 1
                break
            except OSError as e:
                self.err = "record %d not stored: %s" % (self.seq, _oserr(e))
                if k == 0 and e.args and e.args[0] == 2:
                    self._open_segment(n)  # its directory went: made again
                elif not self._drop_oldest():
                    break
        if self.npend >= BATCH:
            self.settle()
        return rec

    def since(self, seq, limit, need=None):
        """Up to limit records numbered above seq, oldest first, read from flash
        (with need, only those whose line holds those bytes)."""
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
                    if need is not None and line.find(need) < 0:
                        continue
                    r = _parse_record(line)
                    if r is not None and r["seq"] >= want:
                        out.append(r)
                        want = r["seq"] + 1
            n += 1
        if len(out) < limit and self.npend:
            for s in _pending(self._qdir()):
                if len(out) >= limit:
                    break
                if s < want:
                    continue
                r = _read_record(self._pend(s), need)
                if r is not None and r["seq"] == s:
                    out.append(r)
                    want = s + 1
        return out

    def count(self):
        """How many segments the store holds now (a directory listing, no reads)."""
        lo, hi = _segments(_join(self.d, RDIR))
        return 0 if hi < 0 else hi - lo + 1


def highest_seq(d):
    """The highest record number written whole in d's record store (read only;
    the host's look at a board's flash)."""
    lo, hi = _segments(_join(d, RDIR))
    for s in reversed(_pending(_join(_join(d, RDIR), QDIR))):
        r = _read_record(_join(_join(_join(d, RDIR), QDIR), "%d" % s))
        if r is not None and r["seq"] == s:
            return s
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


def _pending(qdir):
    """The numbers of the records waiting in rec/q, in order (at most a few: BATCH)."""
    try:
        names = os.listdir(qdir)
    except OSError:
        return []
    out = []
    for name in names:
        try:
            out.append(int(name))
        except ValueError:
            pass
    out.sort()
    return out


def _read_record(p, need=None):
    """The record in a file of its own (rec/q/<seq>), or None when missing or damaged."""
    try:
        # MicroPython's readline(n) takes n bytes from the heap before it reads: bounded
        # by the file's size, a record asks for its own length (a few hundred bytes), not
        # for a 4 KB block a long-lived heap may no longer have (measured on the emulated
        # Pico: the backfill's `records` failed with MemoryError allocating 4096 bytes).
        n = os.stat(p)[6]
        with open(p, "rb") as f:
            line = f.readline(n if n < 4096 else 4096)
    except OSError:
        return None
    if not line.endswith(b"\n") or (need is not None and line.find(need) < 0):
        return None
    return _parse_record(line)


def _scan(p, keep=None):
    """(last good record number, clean?) of a segment, a line at a time; -1 if none.
    keep (a list of one): the record numbered last goes in keep[0]."""
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
            rec = _parse_record(line) if r >= 0 else None
            if rec is None:
                clean = False
                continue
            if r > last:
                last = r
                if keep is not None:
                    keep[0] = rec
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
    # Compact (no blanks after , and :): a tune's record stays under the 512 bytes
    # littlefs keeps inside a directory block (see BATCH), about 60 bytes less.
    b = ("%d " % rec["seq"] + json.dumps(rec, separators=(",", ":"))).encode()
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
