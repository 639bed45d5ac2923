# SWR maths and detector calibration, shared by the firmware and the host.
#
# Formulas are the usual transmission-line ones (e.g. Pozar, Microwave
# Engineering, 4th ed., section 2.3): |gamma| = sqrt(Pr/Pf),
# SWR = (1+|gamma|)/(1-|gamma|), return loss = -20 log10 |gamma|,
# mismatch loss = -10 log10 (1-|gamma|^2).
import math

try:
    import micropython
except ImportError:  # CPython: the same code, run as plain Python (fmlogic.shim)
    from fmlogic.shim import micropython

SWR_MAX = 999.0
GAMMA_MAX = (SWR_MAX - 1.0) / (SWR_MAX + 1.0)
NO_RF = -1.0
BAD_READING = -2.0
# Reflected above forward by more than this (in voltage) is not a reading of a
# passive load: a detector or wiring fault.  Up to it, the forward/reflected gain
# mismatch of a real coupler near full reflection (clipped to GAMMA_MAX).
RATIO_MAX = 1.2
_BIG = 1e30


@micropython.native
def _number(x):
    # NaN fails both comparisons; infinities and absurd magnitudes fail the bound.
    return -_BIG < x < _BIG


@micropython.native
def reading_gamma(fwd_w, ref_w):
    """|gamma| of one reading, checked before use.

    NO_RF when there is no carrier (forward 0 W); BAD_READING for NaN,
    infinite, negative or impossible powers (reflected well above forward);
    0.0 when the reflected detector reads nothing at real forward power (a
    perfect match, or a dead detector: the search tells them apart).
    """
    if not (_number(fwd_w) and _number(ref_w)) or fwd_w < 0.0 or ref_w < 0.0:
        return BAD_READING
    if fwd_w == 0.0:
        return NO_RF
    r = ref_w / fwd_w
    if r > RATIO_MAX * RATIO_MAX:
        return BAD_READING
    if r <= 0.0:
        return 0.0
    g = math.sqrt(r)
    return GAMMA_MAX if g > GAMMA_MAX else g


def gamma_from_powers(fwd_w, ref_w):
    """|gamma| from forward and reflected power; NO_RF when there is no carrier
    or the reading is not a number (for displays: never a false 1.00)."""
    g = reading_gamma(fwd_w, ref_w)
    if g == BAD_READING:
        return NO_RF if not (_number(fwd_w) and fwd_w > 0.0) else GAMMA_MAX
    return g


def swr_from_gamma(g):
    """SWR of |gamma|: NO_RF (-1) for a missing or bad reading (negative or NaN),
    SWR_MAX from GAMMA_MAX up."""
    if not g >= 0.0:
        return NO_RF
    if g >= GAMMA_MAX:
        return SWR_MAX
    return (1.0 + g) / (1.0 - g)


def gamma_from_swr(s):
    if not s >= 1.0:
        return NO_RF
    return (s - 1.0) / (s + 1.0)


def swr_from_powers(fwd_w, ref_w):
    return swr_from_gamma(gamma_from_powers(fwd_w, ref_w))


def return_loss_db(g):
    if g <= 0.0:
        return 99.0
    return -20.0 * math.log10(g)


def mismatch_loss_db(g):
    if g >= 1.0:
        return 99.0
    return -10.0 * math.log10(1.0 - g * g)


class Calibration:
    """Raw detector counts to watts through a table, piecewise linear in log-log.

    points: list of (counts, watts) pairs with counts and watts strictly rising.
    floor_counts: readings at or below it mean "no RF" (returned as 0.0 W);
    a missing carrier must never look like a perfect match.
    """

    def __init__(self, points, floor_counts):
        if len(points) < 2:
            raise ValueError("calibration needs at least 2 points")
        lc = []
        lw = []
        prev_c = 0.0
        prev_w = 0.0
        for p in points:
            c = float(p[0])
            w = float(p[1])
            if c <= prev_c or w <= prev_w:
                raise ValueError("calibration points must rise in counts and watts")
            prev_c = c
            prev_w = w
            lc.append(math.log(c))
            lw.append(math.log(w))
        self.lc = lc
        self.lw = lw
        self.floor = float(floor_counts)
        self.n = len(lc)

    def watts(self, counts):
        if counts <= self.floor or counts <= 0:
            return 0.0
        x = math.log(counts)
        lc = self.lc
        lw = self.lw
        n = self.n
        if x < lc[0]:
            # Below the table a diode detector is square-law: power proportional
            # to the reading (common practice); the table's own lowest slope would
            # belong to the linear region and understate small reflected powers.
            return math.exp(lw[0] + (x - lc[0]))
        # Above it the last segment's slope carries on.
        i = 0
        if x >= lc[n - 1]:
            i = n - 2
        elif x > lc[0]:
            lo = 0
            hi = n - 1
            while hi - lo > 1:
                mid = (lo + hi) >> 1
                if lc[mid] <= x:
                    lo = mid
                else:
                    hi = mid
            i = lo
        t = (x - lc[i]) / (lc[i + 1] - lc[i])
        return math.exp(lw[i] + t * (lw[i + 1] - lw[i]))

    def counts(self, watts):
        """Inverse of watts(): the counts a power should read (for limits)."""
        if watts <= 0.0:
            return 0.0
        y = math.log(watts)
        lc = self.lc
        lw = self.lw
        n = self.n
        if y < lw[0]:
            return math.exp(lc[0] + (y - lw[0]))
        i = 0
        if y >= lw[n - 1]:
            i = n - 2
        elif y > lw[0]:
            while i < n - 2 and lw[i + 1] <= y:
                i += 1
        t = (y - lw[i]) / (lw[i + 1] - lw[i])
        return math.exp(lc[i] + t * (lc[i + 1] - lc[i]))


class Meter:
    """Forward and reflected calibrations together: raw counts to a reading."""

    def __init__(self, fwd_cal, ref_cal, min_fwd_w):
        self.fwd = fwd_cal
        self.ref = ref_cal
        self.min_fwd_w = float(min_fwd_w)

    def rf_present_w(self, fwd_counts, ref_counts):
        """The larger of the powers seen by either detector, with no threshold:
        power coming in from the antenna side (a nearby transmitter, the box
        wired backwards) shows on the reflected detector alone."""
        pf = self.fwd.watts(fwd_counts)
        pr = self.ref.watts(ref_counts)
        return pf if pf > pr else pr

    def powers(self, fwd_counts, ref_counts):
        """(forward W, reflected W); forward 0.0 means no RF."""
        pf = self.fwd.watts(fwd_counts)
        if pf < self.min_fwd_w:
            return (0.0, 0.0)
        pr = self.ref.watts(ref_counts)
        if pr > pf:
            pr = pf
        return (pf, pr)
