# The hunt: where is a load that no fit can place?
#
# Far from a match every reading is close to 1 (a short vertical on a low
# band), so a least-squares fit has nothing to hold on to.  What such a
# reading does say is that the load is far from the load that the measured
# state would match.  Hypotheses about the load are kept on a fixed grid over
# the reflection disc, spaced evenly in the chart's hyperbolic metric (a
# lossless network moves loads by isometries of that metric, so "near" there
# means "near in readings"): rings 0.9 apart, points about 2.2 apart along
# each ring.  Each hypothesis keeps a penalty, the squared misfit of all
# readings; the next state measured aims two units inward of the least
# penalised hypothesis not yet tried, where its dip in the readings is widest.
#
# The grid and every kernel are integer-only: Q12 fixed point (4096 = 1.0),
# values in array('H') biased by 32768.  On the board the kernels are compiled
# by viper (about 3 us per hypothesis on an RP2040, against about 240 us in
# floating point); elsewhere the same code runs as plain Python and, since no
# intermediate exceeds 31 bits, gives the same integers on every port.
from array import array

try:
    import micropython
except ImportError:  # CPython: the same code, run as plain Python (fmlogic.shim)
    from fmlogic.shim import micropython, ptr8, ptr16, ptr32


ONE = 4096
BIAS = 32768
# Ring radii in the hyperbolic metric (distance from the matched point, z0):
# 0.9 apart; |gamma| = tanh(r / 2).  The last ring, |gamma| 0.9963, holds
# loads up to abs(X)/R of about 60 near R = 10 ohm.
RING_R = (0.0, 0.9, 1.8, 2.7, 3.6, 4.5, 5.4, 6.3)
# tanh(r/2) in Q12 and points per ring (2 pi sinh(r) / 2.2, at least 6),
# computed once from RING_R (from memory of the formulas, checked by a test).
RING_Q = (0, 1728, 2934, 3580, 3878, 4006, 4059, 4081)
RING_N = (1, 6, 9, 22, 53, 129, 317, 778)
# Where the probe for a hypothesis on ring k aims: two units inward (ring k-2),
# or half way for the inner rings.
AIM_Q = (0, 906, 1728, 2410, 2934, 3475, 3831, 3986)


def _isincos(a):
    """(sin, cos) in Q15 of the angle a * 2 pi / 65536, in integers only."""
    a &= 0xFFFF
    q = a >> 14           # quadrant
    t = a & 0x3FFF        # 0 .. pi/2 in 2^14 steps
    if t > 8192:
        s, c = _oct(16384 - t)
        s, c = c, s
    else:
        s, c = _oct(t)
    if q == 0:
        return (s, c)
    if q == 1:
        return (c, -s)
    if q == 2:
        return (-s, -c)
    return (-c, s)


def _oct(t):
    # t in 0..8192 (0..pi/4): Taylor series in Q30, error below 1e-7.
    x = (t * 1686629713) >> 14  # t * (pi/2) / 2^14 in Q30: 1686629713 = pi/2 * 2^30
    x2 = (x * x) >> 30
    s = x
    term = x
    c = 1 << 30
    cterm = 1 << 30
    for k in range(1, 6):
        term = -((term * x2) >> 30) // ((2 * k) * (2 * k + 1))
        s += term
        cterm = -((cterm * x2) >> 30) // ((2 * k - 1) * (2 * k))
        c += cterm
    return ((s + (1 << 14)) >> 15, (c + (1 << 14)) >> 15)


def _build():
    n = 0
    for k in range(len(RING_N)):
        n += RING_N[k]
    pts = array("H", bytes(4 * n))
    uu = array("H", bytes(2 * n))
    ring = bytearray(n)
    i = 0
    for k in range(len(RING_N)):
        m = RING_N[k]
        rq = RING_Q[k]
        # Stagger alternate rings by half a step so points do not line up radially.
        off = (32768 // m) if (k & 1) else 0
        for jj in range(m):
            # Points of a ring go out from the positive real axis, below it first,
            # alternating: the hunt tries equally likely hypotheses in this order,
            # and the loads of short verticals (capacitive, high Q) sit just below
            # that axis, long ones (inductive) just above it.
            j = (m - (jj + 1) // 2) % m if jj & 1 else jj // 2
            s, c = _isincos(off + (j * 65536) // m)
            gx = (rq * c + (1 << 14)) >> 15
            gy = (rq * s + (1 << 14)) >> 15
            pts[2 * i] = BIAS + gx
            pts[2 * i + 1] = BIAS + gy
            uu[i] = (gx * gx + gy * gy) >> 12
            ring[i] = k
            i += 1
    return pts, uu, ring, n


def _tables():
    """The grid from its stored copy (hunt_grid.py, the same numbers), or built here."""
    try:
        from fmlogic import hunt_grid as g
    except ImportError:
        return _build()
    t = (array("H", g.GRID), array("H", g.UU), bytearray(g.RING), g.N)
    # The stored bytes are copied: drop the module so they can go.
    import sys

    import fmlogic

    sys.modules.pop("fmlogic.hunt_grid", None)
    if hasattr(fmlogic, "hunt_grid"):
        del fmlogic.hunt_grid
    return t


GRID, UU, RING, N = _tables()


@micropython.native
def point(i):
    """Hypothesis i as a complex reflection coefficient."""
    return complex((GRID[2 * i] - BIAS) / ONE, (GRID[2 * i + 1] - BIAS) / ONE)


@micropython.native
def aim(i):
    """Where to probe for hypothesis i: the same angle, further in."""
    k = RING[i]
    rq = RING_Q[k]
    if rq == 0:
        return complex(0.0, 0.0)
    f = AIM_Q[k] / rq
    return complex((GRID[2 * i] - BIAS) / ONE * f, (GRID[2 * i + 1] - BIAS) / ONE * f)


@micropython.native
def q12(x):
    """A float in [-8, 8) as a biased Q12 integer."""
    v = int(x * ONE + (0.5 if x >= 0 else -0.5))
    if v > 32767:
        v = 32767
    elif v < -32768:
        v = -32768
    return v + BIAS


@micropython.viper
def _reach(grid, flags, pen, act, n: int, xm8: int, bm8: int, x2m: int, b2m: int) -> int:
    # flags[i] = 0 when a lossless L-network of either topology reaches load i
    # (ARRL Handbook L-network design conditions, written without roots or
    # divisions): capacitor across the transmitter needs r <= 1, B_C within
    # range, 0 <= sqrt(r(1-r)) - x <= x_max; across the antenna the same in
    # admittance.  xm8, bm8: x_max and b_max (normalised to z0) in Q8, x2m and
    # b2m: 1 + x_max^2 and 1 + b_max^2 (integers).  A 20 % margin keeps loads
    # just outside the ideal reach that a nearby state still matches.  The
    # same pass clears pen[] and lists the reachable ones in act; returns how
    # many there are.
    g = ptr16(grid)
    fl = ptr8(flags)
    p = ptr32(pen)
    q = ptr16(act)
    na = 0
    for i in range(n):
        p[i] = 0
        gx = int(g[2 * i]) - 32768
        gy = int(g[2 * i + 1]) - 32768
        nn = (16777216 - gx * gx - gy * gy) >> 12          # 1 - |g|^2, Q12
        ok = 0
        # Capacitor across the transmitter: r = nn / d1, x = 2 gy / d1.
        d1 = ((4096 - gx) * (4096 - gx) + gy * gy) >> 12   # |1 - g|^2, Q12
        if nn * 5 <= d1 * 6 and nn * b2m * 6 >= d1 * 5:
            rr = nn * (d1 - nn)
            if rr < 0:
                rr = 0
            rr = (rr * 6) >> 2
            if gy <= 0 or 4 * gy * gy <= rr:
                t = ((xm8 * d1) >> 8) + 2 * gy
                if t >= d1 or (t >= 0 and rr <= t * t):
                    ok = 1
        if ok == 0:
            # Capacitor across the antenna: g = nn / d2, b = -2 gy / d2.
            d2 = ((4096 + gx) * (4096 + gx) + gy * gy) >> 12
            if nn * 5 <= d2 * 6 and nn * x2m * 6 >= d2 * 5:
                rr = nn * (d2 - nn)
                if rr < 0:
                    rr = 0
                rr = (rr * 6) >> 2
                if gy >= 0 or 4 * gy * gy <= rr:
                    t = ((bm8 * d2) >> 8) - 2 * gy
                    if t >= d2 or (t >= 0 and rr <= t * t):
                        ok = 1
        fl[i] = 1 - ok
        if ok:
            q[na] = i
            na += 1
    return na


@micropython.viper
def _update(grid, uu, pen, act, na: int, co, m2: int, inv_s: int, cap: int, cut: int) -> int:
    # For each hypothesis i still in act[0:na]: pen[i] += min(16 ((p2 - m2) / sigma)^2,
    # cap) for the predicted |gamma|^2 p2 through the state with Moebius
    # coefficients co: gamma = (a g + b) / (c g + 1), so, with u = |g|^2
    # (tabulated in uu),
    #   |a g + b|^2 = |a|^2 u + 2 Re(a conj(b) g) + |b|^2
    #   |c g + 1|^2 = |c|^2 u + 2 Re(c g) + 1,
    # six multiplications a hypothesis.  co holds, biased, Q12: |a|^2, re and im of
    # a conj(b), |b|^2, |c|^2, re and im of c.  Hypotheses that reach cut leave
    # act (compacted in place); returns how many stay.  co[7] gets the least
    # penalised of them before this reading (lowest index on a tie; 65535 for
    # none), which best() answers once every hypothesis is out.
    g = ptr16(grid)
    u = ptr16(uu)
    p = ptr32(pen)
    q = ptr16(act)
    c = ptr16(co)
    a2 = int(c[0]) - 32768
    pr = int(c[1]) - 32768
    pi = int(c[2]) - 32768
    b2 = (int(c[3]) - 32768) << 12
    c2 = int(c[4]) - 32768
    cr = int(c[5]) - 32768
    ci = int(c[6]) - 32768
    k = 0
    best = -1
    bv = 0
    for j in range(na):
        i = int(q[j])
        v = int(p[i])
        if best < 0 or v < bv or (v == bv and i < best):
            bv = v
            best = i
        gx = int(g[2 * i]) - 32768
        gy = int(g[2 * i + 1]) - 32768
        ui = int(u[i])
        n2 = a2 * ui + 2 * (pr * gx - pi * gy) + b2
        d2 = c2 * ui + 2 * (cr * gx - ci * gy) + 16777216
        # Rounding can take either just below zero where the true value is ~0.
        if n2 < 0:
            n2 = 0
        if d2 < 4096:
            d2 = 4096
        p2 = (n2 << 3) // ((d2 >> 9) + 1)
        if p2 > 4096:
            p2 = 4096
        z = ((p2 - m2) * inv_s) >> 12
        e = (z * z) >> 4
        if e > cap:
            e = cap
        v += e
        p[i] = v
        if v < cut:
            q[k] = i
            k += 1
    c[7] = best if best >= 0 else 65535
    return k


@micropython.viper
def _pick(pen, tried, act, na: int) -> int:
    # The least penalised active hypothesis not yet tried (lowest index on a tie), or -1.
    p = ptr32(pen)
    t = ptr8(tried)
    q = ptr16(act)
    best = -1
    bv = 0
    for j in range(na):
        i = int(q[j])
        if int(t[i]) == 0:
            v = int(p[i])
            if best < 0 or v < bv or (v == bv and i < best):
                bv = v
                best = i
    return best


@micropython.viper
def _least(pen, act, na: int) -> int:
    p = ptr32(pen)
    q = ptr16(act)
    best = -1
    bv = 0
    for j in range(na):
        i = int(q[j])
        v = int(p[i])
        if best < 0 or v < bv or (v == bv and i < best):
            bv = v
            best = i
    return best


class Hunt:
    """Penalties of the hypotheses for one tune; about 9 KB.  Only hypotheses the
    network can reach at this frequency and that the readings have not ruled out
    are kept in act, so a reading costs in proportion to what is still open."""

    CAP = 144   # one reading adds at most (3 sigma)^2 * 16: a bad reading cannot condemn alone
    CUT = 432   # three readings at the cap: out

    def __init__(self, xm, bm):
        # The penalty buffers come from the pool (one set, allocated at import:
        # a tune then allocates next to nothing, and the board's heap does not
        # fragment); a second hunt alive at once gets its own.
        self.bufs = _POOL.pop() if _POOL else _buffers()
        self.pen, self.tried, self.act = self.bufs
        self.co = array("H", bytes(16))
        self.evals = 0    # hypothesis updates and scans (the cost model counts them)
        self.scans = 0
        xm8 = int(min(xm, 120.0) * 1.1 * 256)
        bm8 = int(min(bm, 120.0) * 1.1 * 256)
        # Unreachable hypotheses start as tried, never aimed at, and out: no
        # reading updates them (a load there cannot be matched anyway).
        self.na = _reach(GRID, self.tried, self.pen, self.act, N, xm8, bm8, int(1 + (xm * 1.1) ** 2),
                         int(1 + (bm * 1.1) ** 2))
        self._last = 0

    def release(self):
        """The tune is over: the buffers go back to the pool (once)."""
        if self.bufs is not None and not _POOL:
            _POOL.append(self.bufs)
        self.bufs = None

    @micropython.native
    def add(self, a, b, c, m, sigma):
        """One reading m (|gamma|) of a state with Moebius coefficients a, b, c, with
        the uncertainty sigma of m."""
        co = self.co
        p = a * complex(b.real, -b.imag)
        # q12() written out seven times: on the board a call costs as much as the
        # arithmetic (the same integers: x * ONE rounded half away from zero, clamped, + BIAS;
        # literals: a module global is a dictionary look-up in native code).
        x = a.real * a.real + a.imag * a.imag
        v = int(x * 4096 + (0.5 if x >= 0 else -0.5))
        co[0] = (32767 if v > 32767 else (-32768 if v < -32768 else v)) + 32768
        x = p.real
        v = int(x * 4096 + (0.5 if x >= 0 else -0.5))
        co[1] = (32767 if v > 32767 else (-32768 if v < -32768 else v)) + 32768
        x = p.imag
        v = int(x * 4096 + (0.5 if x >= 0 else -0.5))
        co[2] = (32767 if v > 32767 else (-32768 if v < -32768 else v)) + 32768
        x = b.real * b.real + b.imag * b.imag
        v = int(x * 4096 + (0.5 if x >= 0 else -0.5))
        co[3] = (32767 if v > 32767 else (-32768 if v < -32768 else v)) + 32768
        x = c.real * c.real + c.imag * c.imag
        v = int(x * 4096 + (0.5 if x >= 0 else -0.5))
        co[4] = (32767 if v > 32767 else (-32768 if v < -32768 else v)) + 32768
        x = c.real
        v = int(x * 4096 + (0.5 if x >= 0 else -0.5))
        co[5] = (32767 if v > 32767 else (-32768 if v < -32768 else v)) + 32768
        x = c.imag
        v = int(x * 4096 + (0.5 if x >= 0 else -0.5))
        co[6] = (32767 if v > 32767 else (-32768 if v < -32768 else v)) + 32768
        s2 = 2.0 * m * sigma + sigma * sigma  # sigma of |gamma|^2
        inv = int(16.0 * ONE / (s2 * ONE) + 0.5)
        if inv > 60000:
            inv = 60000
        na = self.na
        self.evals += na
        self.na = _update(GRID, UU, self.pen, self.act, na, co, int(m * m * ONE + 0.5), inv,
                          self.CAP, self.CUT)
        if na:
            # The last one standing is remembered: best() still has an answer
            # when every hypothesis is out.
            self._last = co[7]

    def pick(self):
        self.scans += 1
        return _pick(self.pen, self.tried, self.act, self.na)

    def left(self):
        return self.na

    def best(self):
        """The least penalised hypothesis still open (or the last one to leave)."""
        self.scans += 1
        i = _least(self.pen, self.act, self.na)
        return i if i >= 0 else self._last


def _buffers():
    return (array("i", bytes(4 * N)), bytearray(N), array("H", bytes(2 * N)))


_POOL = [_buffers()]
