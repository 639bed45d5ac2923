# The directional coupler's error model: what a reading says about the true
# reflection coefficient, shared by the firmware and the host.
#
# A coupler of finite directivity leaks a little of the opposite wave into
# each port, each port with its own leakage vector, and its two detectors
# never have quite the same gain:
#     forward sample    ~ a + d_f b
#     reflected sample  ~ k (b + d_r a)          b = gamma a
# so the reading (reflected over forward, in voltage) is
#     m = k |gamma + d_r| / |1 + d_f gamma|.
# This is the error-box model of a reflectometer with scalar detectors (Engen,
# "Calibrating the six-port reflectometer by means of sliding terminations",
# IEEE T-MTT 26(12), 1978, and the multi-state least-squares solution in IEEE
# T-MTT 28(12), 1980).  As a map of gamma it is a Moebius transformation, so a
# state of the network followed by the coupler is still one (compose()).
#
# Two levels of knowledge:
#   cold     the calibration into a dummy load gave |d_r| (and the reversed pass
#            |d_f|); the phases are unknown, the gain ratio is known to within
#            gain_tol_db.
#   learned  d_r, d_f (complex) and k from the multi-state calibration, each to
#            within err (an absolute bound on the complex leakage error).
# bounds(w) gives the true |gamma| a reading can hide either way (from the
# magnitudes, which hold whatever the model leaves out); a lock is claimed only
# where the upper bound is at or below the target.  compose() puts the learned
# terms into the search's model of each state.
import math

# The forward/reflected gain ratio a calibrated pair of detectors holds: each
# detector's table within 0.3 dB of its own curve after the two calibration
# passes (common practice for a careful bench calibration; from memory).
GAIN_TOL_DB = 0.6
# Noise and table error on a reading (|gamma|), absolute plus relative, beyond
# the detector's floor (Coupler.floor_w, added in quadrature: a few counts of
# offset are a fixed power in the square-law region): 12-bit converter, the
# firmware's averaging, the calibration table's interpolation (common
# practice; held to the bench's detector model by tests/firmware/test_coupler.py).
NOISE_ABS = 0.003
NOISE_REL = 0.02


class Coupler:
    """The coupler as the firmware knows it.

    leak: |d_r| as the dummy-load calibration read it (|gamma| units);
    leak_fwd: |d_f| from the reversed pass (None: taken equal to leak);
    gain_tol_db: how far the gain ratio k may be from 1;
    learned: None, or (dr_re, dr_im, df_re, df_im, k, err) from the
    multi-state calibration.
    """

    def __init__(self, leak, leak_fwd=None, gain_tol_db=GAIN_TOL_DB, learned=None, floor_w=0.0):
        # floor_w: the reflected power (W) of the detector's floor plus an
        # offset's worth of counts: a reading cannot resolve less (see bounds).
        self.floor_w = float(floor_w)
        self.leak = float(leak)
        self.leak_fwd = self.leak if leak_fwd is None else float(leak_fwd)
        self.tol_db = float(gain_tol_db)
        self.k_lo = 10.0 ** (-self.tol_db / 20.0)
        self.k_hi = 1.0 / self.k_lo
        self.learned = learned is not None
        if learned is not None:
            self.dr = complex(learned[0], learned[1])
            self.df = complex(learned[2], learned[3])
            self.k = float(learned[4])
            self.err = float(learned[5])
        else:
            self.dr = 0j
            self.df = 0j
            self.k = 1.0
            self.err = 0.0

    # -- the reading --------------------------------------------------------------
    def correct(self, m):
        """The reading the search works with: the gain ratio divided out where it
        is known (the learned k), the raw reading otherwise."""
        return m / self.k if self.learned else m

    def raw(self, w):
        """Inverse of correct() (the trace keeps what the detectors read)."""
        return w * self.k if self.learned else w

    def compose(self, a, b, c):
        """The state's Moebius map gamma_in = (a g + b) / (c g + 1) followed by the
        learned coupler: corrected reading = |(a' g + b') / (c' g + 1)|.
        Unchanged when the coupler is not learned (the search allows for it)."""
        if not self.learned:
            return (a, b, c)
        dr = self.dr
        df = self.df
        n = 1.0 + df * b
        return ((a + dr * c) / n, (b + dr) / n, (c + df * a) / n)

    def reading_of(self, g):
        """The corrected reading a true gamma_in gives (learned) or its nominal
        value (cold: no leakage known by phase)."""
        if not self.learned:
            return abs(g)
        return abs((g + self.dr) / (1.0 + self.df * g))

    # -- what a reading proves ------------------------------------------------------
    def floor_g(self, fwd_w):
        """The detector floor as a reading (|gamma|) at forward power fwd_w (W)."""
        if fwd_w <= 0.0 or self.floor_w <= 0.0:
            return 0.0
        return math.sqrt(self.floor_w / fwd_w)

    def bounds(self, w, fg=0.0):
        """(lo, hi): the true |gamma_in| a corrected reading w can come from,
        allowing for noise, the leakage and the gain ratio as far as they are
        known.  fg: the detector floor as a reading at the tune's power
        (floor_g): a diode detector is square-law down there, so a few counts
        of offset or a reading at the floor are a fixed power, added in
        quadrature.  hi never exceeds 1."""
        if not w >= 0.0:
            return (0.0, 1.0)
        nz = NOISE_ABS + NOISE_REL * w
        f2 = fg * fg
        w_hi = math.sqrt(w * w + f2) + nz
        w_lo = w * w - f2
        w_lo = math.sqrt(w_lo) - nz if w_lo > 0.0 else 0.0
        if w_lo < 0.0:
            w_lo = 0.0
        # The single-reading bound uses what the dummy-load passes measured
        # (magnitudes) whatever else is known: the learned terms describe the
        # coupler together with what the model of the network leaves out (the
        # input strays compose into them), so they can sharpen the search's
        # model but not prove a bound.  A learned gain ratio is divided out of
        # w (correct()); the raw reading is what the magnitudes bound.
        if self.learned:
            w_hi = w_hi * self.k
            w_lo = w_lo * self.k
        dr = self.leak / self.k_lo + 0.002
        df = self.leak_fwd / self.k_lo + 0.002
        u = w_hi / self.k_lo
        hi = (u + dr) / (1.0 - u * df) if u * df < 1.0 else 1.0
        v = w_lo / self.k_hi
        lo = (v - dr) / (1.0 + v * df)
        if hi > 1.0:
            hi = 1.0
        if lo < 0.0:
            lo = 0.0
        return (lo, hi)

    def lock_level(self, target_g, fg=0.0):
        """The highest corrected reading whose upper bound is at or below
        target_g; -1.0 when no reading can prove it (a coupler too leaky for
        the target).

        bounds()' upper bound inverted in closed form: (u + d_r) / (1 - u d_f) = t
        gives u, then sqrt(w^2 + fg^2) + NOISE_ABS + NOISE_REL w = u k_lo (over k
        when learned) is a quadratic in w.  Then checked against bounds() and
        lowered a step while rounding left it above the target, so the level
        never claims more than the bound allows.  (A bisection of 24 calls of
        bounds() took 16.5 ms on the chip, at every tune's start.)"""
        if self.bounds(0.0, fg)[1] > target_g:
            return -1.0
        top = 1.0 - 1.0 / 16777216.0
        if self.bounds(top, fg)[1] <= target_g:
            return top
        t = target_g
        dr = self.leak / self.k_lo + 0.002
        df = self.leak_fwd / self.k_lo + 0.002
        wh = (t - dr) / (1.0 + t * df) * self.k_lo
        if self.learned:
            wh = wh / self.k
        a = wh - NOISE_ABS
        r = NOISE_REL
        q = 1.0 - r * r
        disc = a * a * r * r - q * (fg * fg - a * a)
        w = (math.sqrt(disc) - a * r) / q if disc > 0.0 else 0.0
        if w < 0.0:
            w = 0.0
        if w > top:
            w = top
        step = 1e-7
        while w > 0.0 and self.bounds(w, fg)[1] > target_g:
            w -= step
            step *= 2.0
        return w if w > 0.0 else 0.0


def from_config(det, ref_cal=None):
    """The Coupler of a config's detector section; ref_cal: the reflected
    detector's Calibration (its floor, two counts of offset above it)."""
    fw = ref_cal.watts(ref_cal.floor + 2.0) if ref_cal is not None else 0.0
    return Coupler(det.get("leak", 0.056), det.get("leak_fwd"), det.get("gain_tol_db", GAIN_TOL_DB),
                   det.get("coupler"), fw)
