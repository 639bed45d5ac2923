# The fit's arithmetic in integers: each reading is a row (the state's Moebius
# coefficients, the reading, its weight), and the misfit of a load hypothesis
# is summed over the rows by a viper kernel, about 4 us per row on an RP2040
# against about 200 us in floating point.  A fit is then a search over a small
# grid around a start, three times finer each level, spaced evenly in the
# chart's hyperbolic metric (which is conformal: a grid step of s (1 - |g|^2)/2
# in gamma is s in that metric, the same in every direction).
#
# Fixed point Q14 (16384 = 1.0) for gamma and the coefficients, all values in
# array('H') biased by 32768; no intermediate exceeds 31 bits, so the plain
# Python run of the same code (CPython, or a port without viper) gives the same
# integers.  Per row and hypothesis the misfit is 16 (dm2 / sigma)^2, capped at
# (4 sigma)^2: a reading the model cannot explain weighs no more than that.
from array import array

try:
    import micropython
except ImportError:  # CPython: the same code, run as plain Python (fmlogic.shim)
    from fmlogic.shim import micropython, ptr16, ptr32


ONE = 16384
BIAS = 32768
ROW = 8          # ar ai br bi cr ci m2 w
MAX_PTS = 24     # starts ranked in one kernel pass
CAP = 256        # (4 sigma)^2 * 16


@micropython.native
def q14(x):
    v = int(x * ONE + (0.5 if x >= 0 else -0.5))
    if v > 32767:
        v = 32767
    elif v < -32768:
        v = -32768
    return v + BIAS


@micropython.viper
def _grid(rows, n: int, cx: int, cy: int, step: int, half: int, out) -> int:
    # The least misfit on a (2 half + 1)^2 grid around (cx, cy) (half 0: the
    # point itself), points outside the chart skipped; out[0], out[1] get its
    # coordinates (biased), out[2], out[3] the rows evaluated (low, high 16
    # bits, for the cost model), the return value is its misfit (-1: no point
    # inside), also in out[5] plus one (for a viper caller).
    r = ptr16(rows)
    o = ptr16(out)
    best = -1
    cnt = 0
    bx = cx
    by = cy
    for i in range(2 * half + 1):
        gx = cx + (i - half) * step
        for j in range(2 * half + 1):
            gy = cy + (j - half) * step
            if gx * gx + gy * gy >= 268402689:   # (16384 - 1)^2: on or past the edge
                continue
            e = 0
            for k in range(n):
                cnt += 1
                q = k * 8
                ar = int(r[q]) - 32768
                ai = int(r[q + 1]) - 32768
                br = int(r[q + 2]) - 32768
                bi = int(r[q + 3]) - 32768
                cr = int(r[q + 4]) - 32768
                ci = int(r[q + 5]) - 32768
                nr = ((ar * gx - ai * gy) >> 14) + br
                ni = ((ar * gy + ai * gx) >> 14) + bi
                dr = ((cr * gx - ci * gy) >> 14) + 16384
                di = (cr * gy + ci * gx) >> 14
                # |num|^2 and |den|^2 in Q27, each square halved first (31 bits)
                n2 = ((nr * nr) >> 1) + ((ni * ni) >> 1)
                d2 = ((dr * dr) >> 1) + ((di * di) >> 1)
                p2 = n2 // ((d2 >> 14) + 1)
                if p2 > 16384:
                    p2 = 16384
                z = ((p2 - int(r[q + 6])) * int(r[q + 7])) >> 14
                if z > 64 or z < -64:
                    e += 256
                else:
                    e += (z * z) >> 4
                if best >= 0 and e >= best:
                    break
            if best < 0 or e < best:
                best = e
                bx = gx
                by = gy
    o[0] = bx + 32768
    o[1] = by + 32768
    o[2] = cnt & 0xFFFF
    o[3] = (cnt >> 16) & 0xFFFF
    o[5] = best + 1
    return best


@micropython.viper
def _points(rows, n: int, pts, k: int, costs):
    # The misfit of each of k points (biased Q14 pairs in pts) into costs[]
    # (-1 outside the chart), costs[k] the rows evaluated (for the cost model).
    r = ptr16(rows)
    p = ptr16(pts)
    cs = ptr32(costs)
    cnt = 0
    for t in range(k):
        gx = int(p[2 * t]) - 32768
        gy = int(p[2 * t + 1]) - 32768
        if gx * gx + gy * gy >= 268402689:
            cs[t] = -1
            continue
        e = 0
        for j in range(n):
            cnt += 1
            q = j * 8
            ar = int(r[q]) - 32768
            ai = int(r[q + 1]) - 32768
            br = int(r[q + 2]) - 32768
            bi = int(r[q + 3]) - 32768
            cr = int(r[q + 4]) - 32768
            ci = int(r[q + 5]) - 32768
            nr = ((ar * gx - ai * gy) >> 14) + br
            ni = ((ar * gy + ai * gx) >> 14) + bi
            dr = ((cr * gx - ci * gy) >> 14) + 16384
            di = (cr * gy + ci * gx) >> 14
            n2 = ((nr * nr) >> 1) + ((ni * ni) >> 1)
            d2 = ((dr * dr) >> 1) + ((di * di) >> 1)
            p2 = n2 // ((d2 >> 14) + 1)
            if p2 > 16384:
                p2 = 16384
            z = ((p2 - int(r[q + 6])) * int(r[q + 7])) >> 14
            if z > 64 or z < -64:
                e += 256
            else:
                e += (z * z) >> 4
        cs[t] = e
    cs[k] = cnt


@micropython.viper
def _compact(rows, n: int, dst, wmin: int) -> int:
    # Copy the rows whose weight is at least wmin into dst; returns how many.
    r = ptr16(rows)
    d = ptr16(dst)
    m = 0
    for k in range(n):
        q = k * 8
        if int(r[q + 7]) >= wmin:
            o = m * 8
            for j in range(8):
                d[o + j] = r[q + j]
            m += 1
    return m


class Rows:
    """The readings of one tune as rows for the kernels, preallocated (take one
    with rows_for, give it back with release)."""

    def __init__(self, cap):
        self.room = cap   # rows the buffers hold
        self.r = array("H", bytes(2 * ROW * cap))
        self.out = array("H", bytes(12))
        self.sel = array("H", bytes(2 * ROW * cap))
        self.pts = array("H", bytes(4 * MAX_PTS))
        self.pcost = array("i", bytes(4 * (MAX_PTS + 1)))
        self.reset(cap)

    def reset(self, cap):
        """Empty, for a tune of at most cap readings (the kernels read rows below n
        and m only, so what an earlier tune left in the buffers is never seen)."""
        self.cap = cap
        self.n = 0
        self.m = 0      # rows in sel (the weighty ones, for fits of many readings)
        self.evals = 0    # row evaluations by the kernel (the cost model counts them)
        self.calls = 0

    @micropython.native
    def put(self, k, a, b, c, m, w):
        """Row k: coefficients of gamma = (a g + b) / (c g + 1), reading m (|gamma|),
        weight w = 1 / sigma of m^2 (sets how much a misfit counts)."""
        r = self.r
        o = k * ROW
        # A passive state's coefficients stay within +-1.1 (well inside Q14's +-2),
        # so the biased value is positive and int() rounds it.
        r[o] = int(a.real * 16384.0 + 32768.5)
        r[o + 1] = int(a.imag * 16384.0 + 32768.5)
        r[o + 2] = int(b.real * 16384.0 + 32768.5)
        r[o + 3] = int(b.imag * 16384.0 + 32768.5)
        r[o + 4] = int(c.real * 16384.0 + 32768.5)
        r[o + 5] = int(c.imag * 16384.0 + 32768.5)
        r[o + 6] = int(m * m * 16384.0 + 0.5)
        v = int(16.0 * w + 0.5)
        r[o + 7] = v if v < 65535 else 65535

    @micropython.native
    def weigh(self, k, w):
        v = int(16.0 * w + 0.5)
        self.r[k * ROW + 7] = v if v < 65535 else 65535

    @micropython.native
    def select(self, share=0.01):
        """Fit with the rows whose weight is at least share of the largest only:
        the rest cannot move the answer but would cost a kernel pass each."""
        r = self.r
        top = 0
        for k in range(self.n):
            w = r[k * ROW + 7]
            if w > top:
                top = w
        self.m = _compact(r, self.n, self.sel, int(top * share))

    @micropython.native
    def rank(self, starts):
        """The misfit of each start (list of complex gamma), in one kernel pass:
        a list of ints, 65535 outside the chart."""
        pts = self.pts
        k = len(starts)
        if k > MAX_PTS:
            k = MAX_PTS
        for i in range(k):
            g = starts[i]
            pts[2 * i] = int(g.real * 16384.0 + 32768.5)
            pts[2 * i + 1] = int(g.imag * 16384.0 + 32768.5)
        pc = self.pcost
        _points(self.sel, self.m, pts, k, pc)
        self.evals += pc[k]
        self.calls += 1
        out = []
        for i in range(k):
            e = pc[i]
            out.append(e if e >= 0 else 65535)
        return out

    @micropython.native
    def refine(self, g):
        """The best load near g: grids of 5 x 5 points, hyperbolic spacing 0.3,
        then two and a half times finer (_refine).  Returns (misfit, gamma)."""
        out = self.out
        e = _refine(self.sel, self.m, q14(g.real) - BIAS, q14(g.imag) - BIAS, out)
        self.evals += out[2] + (out[3] << 16)
        self.calls += out[4]
        return (e, complex((out[0] - BIAS) / ONE, (out[1] - BIAS) / ONE))


@micropython.viper
def _refine(rows, n: int, cx: int, cy: int, out) -> int:
    # Two levels of 5 x 5 grids around (cx, cy): hyperbolic spacing 0.3 (Q14:
    # 4915), then 2.5 times finer; a grid step of s in that metric is
    # s (1 - |g|^2) / 2 in gamma.  A first-level best on the grid's rim moves
    # the grid there (three times at most).  out[0], out[1]: the best point
    # (biased), out[2], out[3]: rows evaluated, out[4]: grid passes; returns
    # its misfit (-1: no point inside the chart; also out[5] - 1).  The whole loop stays in
    # integers: on the board each Python-level step costs more than a pass.
    o = ptr16(out)
    s = 4915
    e = -1
    lev = 0
    moves = 0
    cnt = 0
    calls = 0
    while lev < 2:
        r2 = (cx * cx + cy * cy) >> 14          # |g|^2 in Q14
        step = (s * (16384 - r2) + 16384) >> 15  # s (1 - |g|^2) / 2
        if step < 1:
            step = 1
        _grid(rows, n, cx, cy, step, 2, out)
        e = int(o[5]) - 1    # the misfit, read back as a machine int
        cnt += int(o[2]) + (int(o[3]) << 16)
        calls += 1
        if e < 0:
            break
        nx = int(o[0]) - 32768
        ny = int(o[1]) - 32768
        rim = nx == cx - 2 * step or nx == cx + 2 * step or ny == cy - 2 * step or ny == cy + 2 * step
        cx = nx
        cy = ny
        if rim and lev == 0 and moves < 3:
            moves += 1
            continue
        lev += 1
        s = (s * 2 + 2) // 5
    o[0] = cx + 32768
    o[1] = cy + 32768
    o[2] = cnt & 0xFFFF
    o[3] = (cnt >> 16) & 0xFFFF
    o[4] = calls
    return e


# One set of rows for the default budget (60 readings, + 2), allocated at import like
# the hunt's buffers: a tune then takes no KB-sized block from the heap (on a heap
# fragmented by a long life that is what fails first).  A tune with a larger budget,
# or a second search alive at once, gets its own; the last one given back is kept.
POOL_ROWS = 62
_POOL = [Rows(POOL_ROWS)]


def rows_for(cap):
    """Rows for a tune of at most cap readings: the pooled set when it is large enough."""
    r = _POOL.pop() if _POOL else None
    if r is None or r.room < cap:
        return Rows(cap)
    r.reset(cap)
    return r


def release(rows):
    """The tune is over: its rows go back to the pool (when it is empty)."""
    if not _POOL:
        _POOL.append(rows)
