# Scalar L-network model shared by the firmware strategies and the host scorer.
#
# Units are MHz, uH, pF and ohms so that every intermediate stays well inside
# single-precision range on boards without double floats.
#
# A state is (l_code, c_code, shunt): bit i of l_code adds inductor i in series,
# bit i of c_code adds capacitor i in parallel, shunt is SHUNT_TX (capacitor on
# the transmitter side, ahead of the inductor) or SHUNT_ANT (antenna side).
# Losses: series R = X_L / Q_L for the inductance, parallel G = B_C / Q_C for the
# capacitance; Q of 0 means lossless.

from array import array

try:
    import micropython
except ImportError:  # CPython: the same code, run as plain Python (fmlogic.shim)
    from fmlogic.shim import micropython, ptr32


SHUNT_TX = 0
SHUNT_ANT = 1
TWO_PI = 6.283185307179586


class Bank:
    """Description of the relay banks as the firmware knows them.

    Per-code values are tabulated once (array of single floats) so the search
    never re-sums bits in its inner loop; set_values() installs learned
    effective element values and rebuilds the tables.
    """

    def __init__(self, z0, inductors_uh, capacitors_pf, inductor_q=0.0, capacitor_q=0.0):
        self.z0 = float(z0)
        self.nominal_l = [float(v) for v in inductors_uh]
        self.nominal_c = [float(v) for v in capacitors_pf]
        self.ql = float(inductor_q or 0.0)
        self.qc = float(capacitor_q or 0.0)
        self.nl = len(self.nominal_l)
        self.nc = len(self.nominal_c)
        self.l_max = (1 << self.nl) - 1
        self.c_max = (1 << self.nc) - 1
        self.lv = array("f", bytes(4 * (self.l_max + 1)))
        self.cv = array("f", bytes(4 * (self.c_max + 1)))
        # The same tables as integers (value x lk, x ck) for the code lookups,
        # which run in viper: on the board a float comparison costs an object.
        self.li = array("i", bytes(4 * (self.l_max + 1)))
        self.ci = array("i", bytes(4 * (self.c_max + 1)))
        self.set_values(self.nominal_l, self.nominal_c)

    def set_values(self, inductors_uh, capacitors_pf, l_fixed=0.0, c_fixed=0.0):
        """l_fixed, c_fixed: inductance (uH) and capacitance (pF) always in
        circuit, whatever the codes (an element stuck in: fmlogic.selftest.Damage)."""
        self.ind = [float(v) for v in inductors_uh]
        self.cap = [float(v) for v in capacitors_pf]
        _tabulate(self.lv, self.ind)
        _tabulate(self.cv, self.cap)
        self._loc = (_locality(self.lv, 0.015), _locality(self.cv, 0.015),
                     _locality(self.lv, 0.0006), _locality(self.cv, 0.0006))
        self.l_fixed = float(l_fixed)
        self.c_fixed = float(c_fixed)
        if l_fixed:
            for i in range(len(self.lv)):
                self.lv[i] += self.l_fixed
        if c_fixed:
            for i in range(len(self.cv)):
                self.cv[i] += self.c_fixed
        self.lk, self.lmax = _scaled(self.li, self.lv)
        self.ck, self.cmax = _scaled(self.ci, self.cv)
        # A bank that is not binary-weighted (an element taken out by
        # fmlogic.selftest.Damage) has no good first guess: look codes up by scan.
        self.l_scan = not _binary(self.ind)
        self.c_scan = not _binary(self.cap)

    def locality(self, shunt):
        """Per-code factors of the fit's locality weight (search.ModelFit._fit)
        for states on this shunt side: (indexed by the XOR of two L codes, by
        the XOR of two C codes); the load-side element's factor is the steep
        one.  Made with the value tables (at boot, not in a tune)."""
        t = self._loc
        return (t[2], t[1]) if shunt == SHUNT_ANT else (t[0], t[3])

    def l_uh(self, code):
        return self.lv[code]

    def c_pf(self, code):
        return self.cv[code]

    @micropython.native
    def l_code_for(self, l_uh):
        """Code whose inductance is nearest to l_uh."""
        if l_uh <= 0.0:
            return 0
        if self.l_scan:
            return _scan(self.li, self.l_max, int((l_uh if l_uh < self.lmax else self.lmax) * self.lk + 0.5))
        return _nearest(self.li, self.l_max, int((l_uh if l_uh < self.lmax else self.lmax) * self.lk + 0.5))

    @micropython.native
    def c_code_for(self, c_pf):
        """Code whose capacitance is nearest to c_pf."""
        if c_pf <= 0.0:
            return 0
        if self.c_scan:
            return _scan(self.ci, self.c_max, int((c_pf if c_pf < self.cmax else self.cmax) * self.ck + 0.5))
        return _nearest(self.ci, self.c_max, int((c_pf if c_pf < self.cmax else self.cmax) * self.ck + 0.5))


def _tabulate(table, values):
    for code in range(len(table)):
        s = 0.0
        i = 0
        c = code
        while c:
            if c & 1:
                s += values[i]
            c >>= 1
            i += 1
        table[code] = s


def _locality(table, k):
    # 1 / (1 + (v / v1)^2 k) per code: v the value of the code, v1 the smallest.
    out = array("f", bytes(4 * len(table)))
    v1 = table[1] if table[1] > 0.0 else 1.0
    for i in range(len(table)):
        d = table[i] / v1
        out[i] = 1.0 / (1.0 + d * d * k)
    return out


def _scaled(itab, ftab):
    # Fill itab with ftab x k, k a power of two that keeps twice the largest
    # value below 2^29 (so no viper intermediate overflows 31 bits); returns
    # k and the largest value a lookup needs (twice the top: beyond it every
    # code is worse than the top one anyway).
    top = 0.0
    for v in ftab:
        if v > top:
            top = v
    k = 1.0
    while top * k * 4.0 < 536870912.0 and k < 1073741824.0:
        k *= 2.0
    for i in range(len(ftab)):
        itab[i] = int(ftab[i] * k + 0.5)
    return k, 2.0 * top


def _binary(values):
    # Each value within 40 % of twice the one before: the first guess of _nearest holds.
    for i in range(1, len(values)):
        r = values[i] / values[i - 1] if values[i - 1] > 0.0 else 0.0
        if not 1.2 < r < 2.8:
            return False
    return True


@micropython.viper
def _scan(table, top: int, v: int) -> int:
    # Code of the value nearest v, every code looked at.
    t = ptr32(table)
    best = 0
    err = t[0] - v
    if err < 0:
        err = -err
    code = 1
    while code <= top:
        e = t[code] - v
        if e < 0:
            e = -e
        if e < err:
            err = e
            best = code
        code += 1
    return best


@micropython.viper
def _nearest(table, top: int, v: int) -> int:
    # Code of the value nearest v in table (integers, v > 0).  Binary weighting
    # makes v / table[1] a good first guess; walking downhill a few codes
    # absorbs banks whose effective values are off nominal.
    t = ptr32(table)
    base = t[0]  # 0 unless an element is stuck in (Bank.set_values' l_fixed, c_fixed)
    step = t[1] - base
    if step <= 0:
        step = 1
    best = (v - base + (step >> 1)) // step
    if best < 0:
        best = 0
    if best > top:
        best = top
    err = t[best] - v
    if err < 0:
        err = -err
    d = 1 if t[best] < v else -1
    code = best + d
    k = 0
    while 0 <= code and code <= top and k < 3:
        e = t[code] - v
        if e < 0:
            e = -e
        if e >= err:
            break
        err = e
        best = code
        code += d
        k += 1
    return best


@micropython.native
def z_in(bank, f_mhz, zl, l_code, c_code, shunt):
    """Input impedance of the network terminated in zl (complex ohms)."""
    w = TWO_PI * f_mhz
    xl = w * bank.l_uh(l_code)
    zs = complex(xl / bank.ql if bank.ql > 0.0 else 0.0, xl)
    b = w * bank.c_pf(c_code) * 1e-6
    yc = complex(b / bank.qc if bank.qc > 0.0 else 0.0, b)
    if shunt == SHUNT_ANT:
        yl = 1.0 / zl if zl != 0 else complex(1e9, 0.0)
        return zs + 1.0 / (yl + yc)
    zt = zs + zl
    yt = 1.0 / zt if zt != 0 else complex(1e9, 0.0)
    return 1.0 / (yt + yc)


@micropython.native
def load_matched_by(bank, f_mhz, l_code, c_code, shunt):
    """The load that this state would match exactly to z0 (the network inverted)."""
    w = TWO_PI * f_mhz
    xl = w * bank.l_uh(l_code)
    zs = complex(xl / bank.ql if bank.ql > 0.0 else 0.0, xl)
    b = w * bank.c_pf(c_code) * 1e-6
    yc = complex(b / bank.qc if bank.qc > 0.0 else 0.0, b)
    z0 = bank.z0
    try:
        if shunt == SHUNT_ANT:
            return 1.0 / (1.0 / (z0 - zs) - yc)
        return 1.0 / (1.0 / z0 - yc) - zs
    except ZeroDivisionError:
        return None


@micropython.native
def mobius(bank, f_mhz, l_code, c_code, shunt):
    """The state as a bilinear map of the load's reflection coefficient g:

        gamma_in = (a g + b) / (c g + 1)

    A two-port's input reflection is a Moebius transform of its load's
    (Pozar, Microwave Engineering, 4th ed., section 4.3, from its S-parameters);
    here from the ABCD matrix normalised to z0.  A reading |gamma| of this
    state is therefore a circle in the plane of g, which is what the search
    fits.  Losses are included (series R = X_L/Q_L, parallel G = B_C/Q_C).
    """
    z0 = bank.z0
    w = TWO_PI * f_mhz
    x = w * bank.lv[l_code] / z0
    z = complex(x / bank.ql, x) if bank.ql > 0.0 else complex(0.0, x)
    b = w * bank.cv[c_code] * 1e-6 * z0
    y = complex(b / bank.qc, b) if bank.qc > 0.0 else complex(0.0, b)
    # S-parameters from ABCD (Pozar, table 4.2), each over A + B + C + D:
    #   antenna side: A = 1 + zy, B = z, C = y, D = 1
    #   transmitter side: A = 1, B = z, C = y, D = 1 + zy
    # Both share A + B + C + D and A - B - C + D; one reciprocal serves all three
    # (every complex operation allocates on the board: fewer of them is faster).
    zy = z * y
    s = z + y
    dd = z - y
    inv = 1.0 / (2.0 + s + zy)
    if shunt == SHUNT_ANT:
        return ((2.0 - s + zy) * inv, (zy + dd) * inv, (zy - dd) * inv)
    return ((2.0 - s + zy) * inv, (dd - zy) * inv, -(dd + zy) * inv)


@micropython.native
def gamma_of(z, z0):
    """Magnitude of the reflection coefficient of z against real z0."""
    d = z + z0
    ad = abs(d)
    if ad == 0.0:
        return 1.0
    g = abs(z - z0) / ad
    return 1.0 if g > 1.0 else g


def gamma_state(bank, f_mhz, zl, l_code, c_code, shunt):
    return gamma_of(z_in(bank, f_mhz, zl, l_code, c_code, shunt), bank.z0)


@micropython.native
def z_from_gamma(g, z0):
    """Load impedance from a complex reflection coefficient."""
    d = 1.0 - g
    if abs(d) < 1e-9:
        d = complex(1e-9, 0.0)
    return z0 * (1.0 + g) / d


@micropython.native
def analytic_match(bank, f_mhz, zl, shunt):
    """Ideal lossless L-network element values (l_uh, c_pf) matching zl, or None.

    Textbook L-network design (e.g. ARRL Handbook, chapter on impedance matching):
    with the capacitor across the antenna the load conductance must not exceed
    1/z0; with the capacitor across the transmitter the load resistance must not
    exceed z0.  Only a series inductor and a shunt capacitor exist here, so the
    root with both reactances non-negative is taken.
    """
    z0 = bank.z0
    w = TWO_PI * f_mhz
    r = zl.real
    x = zl.imag
    if r <= 0.0:
        return None
    if shunt == SHUNT_ANT:
        y = 1.0 / zl
        g = y.real
        bl = y.imag
        d = g / z0 - g * g
        if d < 0.0:
            return None
        best = None
        for sgn in (1.0, -1.0):
            bt = sgn * (d ** 0.5)
            bc = bt - bl
            if bc < -1e-12:
                continue
            zp = 1.0 / complex(g, bt)
            xs = -zp.imag
            if xs < -1e-9:
                continue
            cand = (max(xs, 0.0) / w, max(bc, 0.0) / w * 1e6)
            if best is None or cand[0] + cand[1] * 1e-3 < best[0] + best[1] * 1e-3:
                best = cand
        return best
    d = r * z0 - r * r
    if d < 0.0:
        return None
    xt = d ** 0.5
    xs = xt - x
    if xs < -1e-9:
        return None
    zt = complex(r, xt)
    bc = -(1.0 / zt).imag
    if bc < -1e-12:
        return None
    return (max(xs, 0.0) / w, max(bc, 0.0) / w * 1e6)
