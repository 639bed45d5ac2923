# Search strategies: ask/tell objects that choose the next relay state.
#
#   s = ModelFit(bank, freq_hz, target_swr=1.5, budget=60)
#   while not s.done:
#       state = s.propose()                 # (l_code, c_code, shunt)
#       ... set relays, settle, measure ...
#       s.observe(fwd_w, ref_w)
#   state, swr = s.result()
#
# They know nothing of hardware or time.  Each is written as a generator that
# yields the state it wants measured and receives |gamma| back, which keeps the
# sequential logic plain; memory is bounded by the measurement budget.
import math
from array import array

from fmlogic import lnet
from fmlogic.swr import gamma_from_powers, gamma_from_swr, swr_from_gamma

try:
    from micropython import const
except ImportError:  # CPython

    def const(x):
        return x


_MAX_JUMPS = const(6)
# The scan for strongly reactive loads: hypotheses on circles near the edge of
# the chart, at most _SCAN_STEPS readings, until one shows a near match.
_SCAN_RHO = (0.9, 0.96, 0.985, 0.995, 0.999)
_SCAN_THETA = const(72)
_SCAN_STEPS = const(16)
_NEAR_G = 0.6
# Readings near the target cannot be trusted to the last few per cent (coupler
# directivity), so a reading between the comfortable and the target SWR buys
# at most this many extra measurements to look for a clearly better state.
_MARGINAL_EXTRA = const(6)
_GRID_THETA = const(36)
_GN_ITERS = const(10)
BYPASS = (0, 0, lnet.SHUNT_ANT)


class _Stop(Exception):
    pass


class Strategy:
    """Common bookkeeping: budget, cache of measured states, best state seen."""

    name = "base"

    def __init__(self, bank, freq_hz, target_swr=1.5, budget=60, memory_hint=None):
        self.bank = bank
        self.f_mhz = freq_hz / 1e6
        self.target_swr = target_swr
        self.target_g = gamma_from_swr(target_swr)
        # Comfortable: 60 % of the way from 1 to the target SWR.
        self.accept_g = gamma_from_swr(1.0 + 0.6 * (target_swr - 1.0))
        self.extra = -1
        self.budget = budget
        self.hint = memory_hint
        self.seen = {}
        self.order = []
        self.n = 0
        self.done = False
        self.best_state = None
        self.best_g = 2.0
        self.no_rf = False
        self._gen = self._run()
        self._next = None

    # -- ask/tell -------------------------------------------------------------
    def propose(self):
        if self.done:
            return self.best_state
        if self._next is None:
            self._advance(None, first=True)
        return self._next

    def observe(self, fwd_w, ref_w):
        g = gamma_from_powers(fwd_w, ref_w)
        self.observe_gamma(g)

    def observe_gamma(self, g):
        state = self._next
        self.n += 1
        if g < 0.0:
            # No carrier: the reading says nothing about the state; the
            # controller decides whether to abort.
            self.no_rf = True
            self._finish()
            return
        self.seen[state] = g
        self.order.append(state)
        if g < self.best_g:
            self.best_g = g
            self.best_state = state
        if self.extra >= 0:
            self.extra += 1
        elif self.best_g <= self.target_g:
            self.extra = 0
        if self._satisfied() or self.n >= self.budget:
            self._finish()
            return
        self._advance(g)

    def result(self):
        if self.best_state is None:
            return (BYPASS, -1.0)
        return (self.best_state, swr_from_gamma(self.best_g))

    # -- internals ------------------------------------------------------------
    def _finish(self):
        self.done = True
        self._next = None
        try:
            self._gen.close()
        except Exception:
            pass

    def _advance(self, g, first=False):
        try:
            if first:
                self._next = next(self._gen)
            else:
                self._next = self._gen.send(g)
        except StopIteration:
            self._finish()
        except _Stop:
            self._finish()

    def _measure(self, state):
        """Generator helper: measured |gamma| of a state, measuring only once."""
        g = self.seen.get(state)
        if g is None:
            g = yield state
        if self._satisfied():
            raise _Stop()
        return g

    def _satisfied(self):
        if self.best_g <= self.accept_g:
            return True
        return self.best_g <= self.target_g and self.extra >= _MARGINAL_EXTRA

    def _valid(self, l, c):
        return 0 <= l <= self.bank.l_max and 0 <= c <= self.bank.c_max

    def _descend(self, start, steps, predict=None):
        """Coordinate descent on the codes from start, coarse to fine.

        predict(state) -> modelled |gamma| orders the neighbours so the likely
        improvement is measured first; without it the order is fixed.
        """
        best = start
        bg = yield from self._measure(best)
        for step in steps:
            improved = True
            while improved:
                improved = False
                l, c, sh = best
                cands = []
                for dl, dc in ((step, 0), (-step, 0), (0, step), (0, -step),
                               (step, -step), (-step, step), (step, step), (-step, -step)):
                    if self._valid(l + dl, c + dc):
                        cands.append((l + dl, c + dc, sh))
                if predict is not None:
                    # MicroPython's sort is not stable: break ties explicitly.
                    cands.sort(key=lambda st: (predict(st), st))
                    if step > 1:
                        cands = cands[:4]
                    # At the finest step all neighbours stay, in the model's order:
                    # with a high-Q load a misfit model can rank the one way
                    # out last, and the fallback grid is too coarse to find it.
                for s in cands:
                    g = yield from self._measure(s)
                    if g < bg:
                        bg = g
                        best = s
                        improved = True
                        # Pattern move: while the same direction keeps paying, double
                        # it, so a long shallow valley costs a few readings, not one
                        # per code (Hooke and Jeeves, J. ACM 8(2), 1961).
                        dl, dc = s[0] - l, s[1] - c
                        k = 2
                        while self._valid(best[0] + k * dl, best[1] + k * dc):
                            t = (best[0] + k * dl, best[1] + k * dc, sh)
                            gt = yield from self._measure(t)
                            if gt >= bg:
                                break
                            bg = gt
                            best = t
                            k *= 2
                        break
        return best

    def _coarse_then_descend(self):
        """The baseline: coarse grid on both banks and both shunt sides, then descent."""
        b = self.bank
        levels_l = _levels(b.l_max)
        levels_c = _levels(b.c_max)
        for sh in (lnet.SHUNT_TX, lnet.SHUNT_ANT):
            for l in levels_l:
                for c in levels_c:
                    s = (l, c, sh) if c else (l, 0, lnet.SHUNT_ANT)
                    yield from self._measure(s)
        start = self.best_state
        steps = _steps(max(b.l_max, b.c_max) // 8)
        yield from self._descend(start, steps)
        l, c, sh = self.best_state
        if c:
            other = (l, c, 1 - sh)
            yield from self._measure(other)
            if self.best_state == other:
                yield from self._descend(other, (2, 1))

    def _run(self):
        yield from self._measure(BYPASS)


def _scan_gamma(i):
    r = _SCAN_RHO[i // _SCAN_THETA]
    th = 6.283185307179586 * (i % _SCAN_THETA) / _SCAN_THETA
    return complex(r * math.cos(th), r * math.sin(th))


def _q(x):
    # Interpreters differ in the last bits of complex arithmetic; a 1e-9 grid
    # makes near-ties resolve the same way on every port.
    return int(x * 1e9 + 0.5) * 1e-9


def _levels(top):
    # Roughly 4x apart: reactance matters on a log scale.
    out = [0]
    v = 3
    while v < top:
        out.append(v)
        v = v * 4 + 3
    out.append(top)
    return out


def _steps(first):
    out = []
    s = 1
    while s <= first:
        out.append(s)
        s <<= 1
    out.reverse()
    return out


class GridDescent(Strategy):
    """Baseline a careful builder writes: a coarse grid over both banks on each
    shunt side (codes about 4x apart), then coordinate descent on the codes with
    halving steps, then a check of the other shunt side.  No model needed.
    """

    name = "grid"

    def _run(self):
        yield from self._measure(BYPASS)
        yield from self._coarse_then_descend()


class ModelFit(Strategy):
    """Model-based search from scalar readings.

    Method: the bypass reading fixes |gamma_load| (a circle on the Smith chart);
    two probe states (a series reactance near z0, a shunt susceptance near
    1/z0) add circles whose intersection locates the load.  The load's complex
    reflection coefficient is estimated by non-linear least squares (a grid in
    angle, then Gauss-Newton) on the same network equations, for the few best
    separated minima, so ambiguous fits are kept rather than guessed.  For the
    best candidate the ideal L-network (textbook closed form) is quantised to
    codes and polished on the model; that state is measured, the reading joins
    the fit, and the loop repeats a bounded number of times.  Then coordinate
    descent ordered by the model, and if still unmatched the baseline grid.
    """

    name = "model"

    def __init__(self, bank, freq_hz, target_swr=1.5, budget=60, memory_hint=None):
        Strategy.__init__(self, bank, freq_hz, target_swr, budget, memory_hint)
        self.cands = []

    # -- model helpers ----------------------------------------------------------
    def _pred(self, gl, state):
        zl = lnet.z_from_gamma(gl, self.bank.z0)
        return _q(lnet.gamma_state(self.bank, self.f_mhz, zl, state[0], state[1], state[2]))

    def _resid(self, gl):
        s = 0.0
        for st in self.order:
            d = self._pred(gl, st) - self.seen[st]
            s += d * d
        return s

    def _fit(self):
        """Candidate load gammas, best first: [(sum sq residual, gamma), ...]."""
        g0 = self.seen.get(BYPASS, 0.5)
        rhos = []
        for d in (-0.08, 0.0, 0.08):
            r = g0 + d
            if 0.0 <= r <= 0.995:
                rhos.append(r)
        if not rhos:
            rhos.append(min(g0, 0.995))
        # Best rho per angle on the grid, then local minima in angle.
        grid = []
        step = 2.0 * math.pi / _GRID_THETA
        for k in range(_GRID_THETA):
            th = k * step
            ct = math.cos(th)
            stt = math.sin(th)
            best = None
            for r in rhos:
                gl = complex(r * ct, r * stt)
                e = self._resid(gl)
                if best is None or e < best[0]:
                    best = (e, gl)
            grid.append(best)
        minima = []
        n = len(grid)
        for k in range(n):
            e = grid[k][0]
            if e <= grid[k - 1][0] and e <= grid[(k + 1) % n][0]:
                minima.append(grid[k])
        minima.sort(key=lambda t: (t[0], t[1].real, t[1].imag))
        out = []
        for e, gl in minima[:3]:
            gl = self._refine(gl)
            out.append((self._resid(gl), gl))
        starts = [c[1] for c in self.cands]
        if self.best_state is not None and self.best_g < 0.6:
            # The best reading is the most telling: start from the load that
            # state would match exactly.
            zs = lnet.load_matched_by(self.bank, self.f_mhz, self.best_state[0],
                                      self.best_state[1], self.best_state[2])
            if zs is not None and zs.real > 0.0:
                g = (zs - self.bank.z0) / (zs + self.bank.z0)
                if abs(g) < 0.998:
                    starts.append(g)
        for g in starts:
            gl = self._refine(g)
            out.append((self._resid(gl), gl))
        out.sort(key=lambda t: (t[0], t[1].real, t[1].imag))
        uniq = []
        for e, gl in out:
            dup = False
            for e2, g2 in uniq:
                if abs(gl - g2) < 0.02:
                    dup = True
                    break
            if not dup:
                uniq.append((e, gl))
        self.cands = uniq[:3]
        return self.cands

    def _refine(self, gl):
        """Levenberg-Marquardt on (re, im) of gamma_load: a step is kept only if it
        lowers the residual; the damping adapts (the problem is very badly
        conditioned near the edge of the chart, where short verticals live)."""
        h = 1e-5
        lam = 1e-3
        e = self._resid(gl)
        for _ in range(_GN_ITERS):
            a11 = a12 = a22 = b1 = b2 = 0.0
            for st in self.order:
                p = self._pred(gl, st)
                r = p - self.seen[st]
                ju = (self._pred(gl + h, st) - p) / h
                jv = (self._pred(gl + complex(0.0, h), st) - p) / h
                a11 += ju * ju
                a12 += ju * jv
                a22 += jv * jv
                b1 += ju * r
                b2 += jv * r
            moved = False
            for _try in range(4):
                d11 = a11 * (1.0 + lam) + 1e-12
                d22 = a22 * (1.0 + lam) + 1e-12
                det = d11 * d22 - a12 * a12
                if det <= 0.0:
                    lam *= 10.0
                    continue
                du = -(d22 * b1 - a12 * b2) / det
                dv = -(d11 * b2 - a12 * b1) / det
                st_len = math.sqrt(du * du + dv * dv)
                if st_len > 0.2:
                    du *= 0.2 / st_len
                    dv *= 0.2 / st_len
                new = gl + complex(du, dv)
                m = abs(new)
                if m > 0.999:
                    new = new * (0.999 / m)
                en = self._resid(new)
                if en < e:
                    gl = new
                    e = en
                    lam = lam * 0.1 if lam > 1e-9 else lam
                    moved = True
                    break
                lam *= 10.0
            if not moved or e < 1e-12:
                break
        return gl

    def _model_best(self, gl):
        """Best state for a modelled load: closed form, quantise, polish on the model."""
        b = self.bank
        zl = lnet.z_from_gamma(gl, b.z0)
        f = self.f_mhz
        best = None
        bg = 2.0
        for sh in (lnet.SHUNT_TX, lnet.SHUNT_ANT):
            m = lnet.analytic_match(b, f, zl, sh)
            if m is None:
                start = (b.l_code_for(0.0), 0, sh)
            else:
                start = (b.l_code_for(m[0]), b.c_code_for(m[1]), sh)
            s, g = self._model_descend(zl, start)
            if g < bg:
                bg = g
                best = s
        return best, bg

    def _model_descend(self, zl, s):
        b = self.bank
        f = self.f_mhz
        g = _q(lnet.gamma_state(b, f, zl, s[0], s[1], s[2]))
        step = 8
        while step >= 1:
            moved = True
            while moved:
                moved = False
                l, c, sh = s
                for dl, dc in ((step, 0), (-step, 0), (0, step), (0, -step),
                               (step, -step), (-step, step)):
                    nl = l + dl
                    nc = c + dc
                    if 0 <= nl <= b.l_max and 0 <= nc <= b.c_max:
                        gn = _q(lnet.gamma_state(b, f, zl, nl, nc, sh))
                        if gn < g:
                            g = gn
                            s = (nl, nc, sh)
                            moved = True
                            break
            step >>= 1
        return s, g

    def _probes(self):
        b = self.bank
        w = lnet.TWO_PI * self.f_mhz
        lp = b.l_code_for(b.z0 / w)
        cp = b.c_code_for(1e6 / (w * b.z0))
        return ((lp if lp else 1, 0, lnet.SHUNT_ANT), (0, cp if cp else 1, lnet.SHUNT_ANT))

    # -- the search -------------------------------------------------------------
    def _run(self):
        yield from self._measure(BYPASS)
        for p in self._probes():
            yield from self._measure(p)
        yield from self._jumps()
        if self.best_g > _NEAR_G:
            yield from self._scan()
            yield from self._jumps()
        yield from self._polish()
        if self.best_g > self.target_g:
            yield from self._rows()
        if self._model_agrees():
            return  # the model explains the readings and knows nothing better
        yield from self._coarse_then_descend()

    def _rows(self):
        """Golden-section search along C on the neighbouring L codes.

        With a high-Q load one L code moves the match by tens of C codes, so
        the valley runs diagonally between L rows and no single-code step
        reaches the next row's minimum; each row is unimodal in C.
        """
        l0, _, sh = self.best_state
        for dl in (1, -1):
            l = l0 + dl
            if not self._valid(l, 0):
                continue
            # Golden section on integer codes: each step keeps one interior point.
            a, b = 0, self.bank.c_max
            x1 = b - (b - a) * 618 // 1000
            x2 = a + (b - a) * 618 // 1000
            g1 = yield from self._measure((l, x1, sh))
            g2 = yield from self._measure((l, x2, sh))
            while b - a > 3:
                if g1 <= g2:
                    b, x2, g2 = x2, x1, g1
                    x1 = b - (b - a) * 618 // 1000
                    if x1 >= x2:
                        x1 = x2 - 1
                    g1 = yield from self._measure((l, x1, sh))
                else:
                    a, x1, g1 = x1, x2, g2
                    x2 = a + (b - a) * 618 // 1000
                    if x2 <= x1:
                        x2 = x1 + 1
                    g2 = yield from self._measure((l, x2, sh))
            for c in range(a, b + 1):
                yield from self._measure((l, c, sh))
        if self.best_state[0] != l0:
            yield from self._descend(self.best_state, (2, 1))

    def _jumps(self):
        for _ in range(_MAX_JUMPS):
            cands = self._fit()
            target = None
            for e, gl in cands:
                s, g = self._model_best(gl)
                if s is None:
                    continue
                got = self.seen.get(s)
                if got is None:
                    target = s
                    break
                if got - g < 0.1:
                    # This candidate already led here and the reading agrees
                    # with it: the model is right, only polishing is left.
                    return
            if target is None:
                return
            yield from self._measure(target)

    def _polish(self):
        if not self.cands:
            self._fit()
        gl = self.cands[0][1] if self.cands else complex(0.0, 0.0)

        def predict(s):
            return self._pred(gl, s)

        yield from self._descend(self.best_state, (4, 2, 1), predict)

    def _scan(self):
        """Elimination over a grid of strongly reactive load hypotheses.

        Far from a match every reading is close to 1 (a short vertical on a low
        band), so least squares has nothing to hold on to.  Each hypothesis keeps
        its squared residual over all readings; the next state measured is the
        ideal match of the most consistent hypothesis not yet tried.  It stops at
        the first reading that shows a near match, which the fit then uses.
        Memory: one float32 and one flag per hypothesis; hypotheses are computed
        from their index, never stored.
        """
        n = len(_SCAN_RHO) * _SCAN_THETA
        res = array("f", bytes(4 * n))
        tried = bytearray(n)
        for i in range(n):
            gl = _scan_gamma(i)
            e = 0.0
            for st in self.order:
                d = self._pred(gl, st) - self.seen[st]
                e += d * d
            res[i] = e
        for _ in range(_SCAN_STEPS):
            best_s = None
            while best_s is None:
                bi = -1
                for i in range(n):
                    if not tried[i] and (bi < 0 or res[i] < res[bi]):
                        bi = i
                if bi < 0:
                    return
                tried[bi] = 1
                s = self._ideal_state(_scan_gamma(bi))
                if s is not None and s not in self.seen:
                    best_s = s
            g = yield from self._measure(best_s)
            for i in range(n):
                d = self._pred(_scan_gamma(i), best_s) - g
                res[i] += d * d
            if self.best_g <= _NEAR_G:
                break
        # The most consistent hypotheses seed the next fit.
        for _ in range(2):
            bi = 0
            for i in range(n):
                if res[i] < res[bi]:
                    bi = i
            self.cands.append((res[bi], _scan_gamma(bi)))
            res[bi] = 3.0e38

    def _ideal_state(self, gl):
        """Quantised closed-form match for a load hypothesis (no polishing: cheap)."""
        b = self.bank
        zl = lnet.z_from_gamma(gl, b.z0)
        best = None
        bg = 2.0
        for sh in (lnet.SHUNT_TX, lnet.SHUNT_ANT):
            m = lnet.analytic_match(b, self.f_mhz, zl, sh)
            if m is None:
                continue
            st = (b.l_code_for(m[0]), b.c_code_for(m[1]), sh)
            g = lnet.gamma_state(b, self.f_mhz, zl, st[0], st[1], sh)
            if g < bg:
                bg = g
                best = st
        return best

    def _model_agrees(self):
        """True when a refit explains the best reading and predicts no clearly better state."""
        if len(self.order) < 4:
            return False
        cands = self._fit()
        if not cands:
            return False
        e, gl = cands[0]
        rms = (e / len(self.order)) ** 0.5
        if rms > 0.06:
            return False
        if abs(self._pred(gl, self.best_state) - self.best_g) > 0.06:
            return False
        s, g = self._model_best(gl)
        return g > self.best_g - 0.05


class Recall(ModelFit):
    """Start from a stored state for a nearby frequency.

    One reading verifies it: accepted when it meets the target, or when it
    reproduces the SWR stored with it (the best this box could do there
    before).  Otherwise the model-based search runs with that reading in its
    fit, where a reading near the match is the most informative one.
    """

    name = "recall"

    def _run(self):
        hint = self.hint
        if hint is not None and self._valid(hint[0], hint[1]) and hint[2] in (0, 1):
            st = (hint[0], hint[1], hint[2])
            g = yield from self._measure(st)
            if len(hint) > 3 and hint[3] > 0.0:
                known = gamma_from_swr(hint[3])
                if g <= known + 0.03:
                    return
        yield from ModelFit._run(self)


STRATEGIES = {"grid": GridDescent, "model": ModelFit, "recall": Recall}


def make(name, bank, freq_hz, target_swr=1.5, budget=60, memory_hint=None):
    cls = STRATEGIES.get(name)
    if cls is None:
        raise ValueError("unknown strategy: " + str(name))
    return cls(bank, freq_hz, target_swr, budget, memory_hint)
