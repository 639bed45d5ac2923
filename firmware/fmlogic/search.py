# Search strategies: ask/tell objects that choose the next relay state.
#
#   s = make("model", bank, freq_hz, target_swr=1.5, budget=60)
#   while not s.done:
#       state = s.propose()                 # (l_code, c_code, shunt)
#       ... set relays, settle, measure ...
#       s.observe(fwd_w, ref_w)
#   state, swr = s.result()
#
# They know nothing of hardware or time, except through the optional guard()
# the controller sets: called inside long work, it feeds the watchdog and says
# when the tune's time is up.  Each strategy is a generator that yields the
# state it wants measured and receives |gamma| back, which keeps the
# sequential logic plain; memory is bounded by the measurement budget.
#
# Every reading is checked before use (swr.reading_gamma): a bad one (NaN,
# infinite, negative, impossible) is counted against the budget and measured
# again, three in a row end the tune with a fault; a reflected detector that
# reads nothing on two very different states is a dead detector, not a match.
from fmlogic import hunt, lnet, qfit
from fmlogic.coupler import Coupler
from fmlogic.swr import BAD_READING, GAMMA_MAX, NO_RF, gamma_from_swr, reading_gamma, swr_from_gamma

try:
    import micropython
    from micropython import const
except ImportError:  # CPython: the same code, run as plain Python (fmlogic.shim)
    from fmlogic.shim import const, micropython


BYPASS = (0, 0, lnet.SHUNT_ANT)
_BAD_MAX = const(3)
# Default coupler leakage |d| when the config gives none: 25 dB directivity,
# typical of a home-built tandem coupler (common practice, from memory).
LEAK_DEFAULT = 0.056
# A reading at or below this is close enough to a match that local fits hold.
_NEAR = 0.6
# Below this the search is close enough for fits of the nearby readings only.
_CLOSE = 0.3
# Above this bypass reading the two probes and the fit's jumps say little
# about where the load is (a reading near the edge of the chart is a wide
# circle, and the coupler's leakage widens it): the hunt starts at once.
# Measured on drawn boxes behind a 25 dB coupler (feedmatch bench): 0.7
# against 0.93 took the vertical-like loads' median from 11 to 7 readings on a
# sample of 800 tunes, success and the Smith chart unchanged.
_PROBE_BELOW = 0.7
# Readings left for best effort once the hunt finds no matchable load
# consistent; half as many when no reading came near a match (above _HIT): a
# descent from there cannot beat bypass with confidence in a few readings.
_HOPELESS_EXTRA = const(10)
# How far a stored lock's reading may come back above the accept level (noise).
_REPEAT = 0.02
# Readings a recalled or preset state that reads the target may spend on its neighbours for a
# proof (the coupler's bounds) before the tune ends best-effort: relay changes under the carrier.
_CONFIRM_LOCAL = const(6)
# What the first reading of a host-computed preset made of its prediction (Strategy.predicted).
PREDICTED = const(1)
WORSE = const(2)
# A hunt probe aims two hyperbolic units short of its hypothesis: a reading
# there of tanh(1) = 0.76 is a hit; below this, the fit can take over.
_HIT = 0.86
# With a learned coupler the search stops where the modelled true |gamma_in| of
# its best state is this fraction of the target's.
_LEARNED_STOP = 0.5
# ... from this leakage up (|d_r|, 25 dB): below it the readings' own ranking
# does as well with the learned terms in the model (feedmatch bench, group
# coupler: 25-30 dB boxes 99.7 % either way, fewer readings without the
# estimates), above it the estimates win (15-20 dB: 82 % to 91 %).
_LEARNED_FROM = 0.056
_MAX_JUMPS = const(4)
_HUNT_STEPS = const(30)
_LOCAL_STEPS = const(14)
_WIDE = const(8)


class _Stop(Exception):
    pass


@micropython.native
def _q(x):
    # Decisions compare modelled values rounded to 1e-4: far above single
    # precision's resolution near 1 (6e-8), so every port (double, float32)
    # resolves near-ties the same way; ties then fall to the state tuple.
    return int(x * 10000.0 + 0.5)


class Strategy:
    """Common bookkeeping: budget, checked readings, cache of measured states,
    best state seen, the final choice against bypass."""

    name = "base"

    def __init__(self, bank, freq_hz, target_swr=1.5, budget=60, memory_hint=None, leak=None):
        self.bank = bank
        self.f_mhz = freq_hz / 1e6
        self.w = lnet.TWO_PI * self.f_mhz   # rad/us: reactance in ohm from uH
        self.target_swr = target_swr
        self.target_g = gamma_from_swr(target_swr)
        # leak: the coupler (fmlogic.coupler), or its calibrated |d| alone.
        if isinstance(leak, Coupler):
            self.cp = leak
        else:
            self.cp = Coupler(LEAK_DEFAULT if leak is None else float(leak))
        cp = self.cp
        self.leak = cp.leak
        # The leakage the model cannot see: all of it on a cold coupler, the
        # calibration's residual once its complex error is learned (compose()).
        self._sleak = cp.err if cp.learned else cp.leak
        # lock_g: the highest reading that proves the target with the coupler's
        # error bounds (-1: none can).  accept_g: where the search stops: the
        # lock level when one exists and is not absurdly low, else a reading
        # the leakage allows for (a leaky coupler cannot do better by searching
        # on; the tune then ends best-effort with its bound).
        t = self.target_g
        acc = t - self.leak * (1.0 + t * t) - 0.035 * t - 0.005
        self._acc = acc if acc > 0.5 * t else 0.5 * t
        self.floor_g = 0.0
        # With the coupler's complex error learned, the model strategies rank
        # states by the true |gamma_in| the model and the reading agree on
        # (ModelFit._est), not by the reading: the lowest reading lies where
        # gamma_in cancels the leakage, |d| away from a match.
        self._lm = False
        self._proven = False
        self._ev = {}
        self._levels(0.0)
        self.budget = budget
        self.hint = memory_hint
        # Recall: search again from a best effort that reads as stored (an operator's tune).
        self.retry_best = False
        # ... and a tune the operator asked for (no cap on the local search from a hint).
        self.asked = False
        self._cap = 0  # readings after which the search ends (0: the budget only)
        # The controller: the reflected detector read a reflection lately (no contrast reading).
        self.ref_alive = False
        # Recall from a state the host computed: the true |gamma| it predicts there (-1: no
        # prediction), and what the first reading made of it (0: not judged, PREDICTED, WORSE).
        self.expect_g = -1.0
        self.predicted = 0
        self.seen = {}
        self.order = []
        self.n = 0
        self.done = False
        self.best_state = None
        self.best_g = 2.0
        self.no_rf = False
        self.fault = None
        self.guard = None
        self.timed_out = False
        # A stored lock whose reading came back within noise of the accept level:
        # two readings of the same state now stand behind it.
        self.confirmed = False
        self._bad = 0
        self._check = None    # the state whose zero reading awaits a contrast reading
        self._lost = None     # readings set aside (Recall._run), by state: their weights
        # Operation counts for the host's model of the board's compute time:
        # Moebius maps, float predictions, fits, ideal states, locality weights.
        self.ops = [0, 0, 0, 0, 0]
        self._gen = self._run()
        self._next = None

    # -- ask/tell -------------------------------------------------------------
    def propose(self):
        if self.done:
            return self.best_state if self.best_state is not None else BYPASS
        if self._next is None:
            self._advance(None, first=True)
            if self._next is None:
                return self.best_state if self.best_state is not None else BYPASS
        return self._next

    def _levels(self, fg):
        self.floor_g = fg
        self.lock_g = self.cp.lock_level(self.target_g, fg)
        self.accept_g = self.lock_g if self.lock_g >= 0.5 * self.target_g else self._acc
        if self._lm:
            # Ranked by the modelled true |gamma_in|: stop at half the target's
            # (the model's own error then stays inside the target).
            self.accept_g = _LEARNED_STOP * self.target_g

    @micropython.native
    def observe(self, fwd_w, ref_w):
        g = reading_gamma(fwd_w, ref_w)
        # The detector's floor at the lowest tune power seen so far bounds what a
        # reading can resolve; the lock level follows it (once per power change).
        if fwd_w > 0.0 and self.cp.floor_w > 0.0:
            fg = self.cp.floor_g(fwd_w)
            if fg > self.floor_g:
                self._levels(fg)
        if g > 0.0:
            # The learned gain ratio divided out; a reading near full reflection
            # stays one (a gain ratio below 1 must not make it a bad reading).
            g = self.cp.correct(g)
            if g > GAMMA_MAX:
                g = GAMMA_MAX
        self.observe_gamma(g)

    @micropython.native
    def observe_gamma(self, g):
        if self.done or self._next is None:
            return
        state = self._next
        self.n += 1
        if g == NO_RF:
            # No carrier: the reading says nothing about the state; the
            # controller decides whether to abort.
            self.no_rf = True
            self._finish()
            return
        if not (0.0 <= g <= 1.0) or g == BAD_READING:
            self._bad += 1
            if self._bad >= _BAD_MAX:
                self.fault = "bad readings"
                self._finish()
            elif self.n >= self.budget:
                self._finish()
            return  # the same state is proposed again
        self._bad = 0
        if self._check is not None:
            # The contrast reading for an all-zero start: a load that the first
            # state matches perfectly cannot also be matched by this one.
            self._check = None
            self._record(state, g)
            if g <= 0.0:
                self.fault = "reflected detector reads nothing"
                self.best_state = None
            self._finish()
            return
        self._record(state, g)
        if g <= 0.0 and not self.ref_alive and self._all_zero():
            # Nothing reflected at all, on the first reading: a perfect match or
            # a dead reflected detector.  One reading of a state that no load can
            # share a match with tells them apart; without a reading left for it,
            # the zero cannot be trusted.
            if self.n >= self.budget:
                self.fault = "reflected detector reads nothing"
                self._finish()
                return
            self._check = self._contrast(state)
            self._next = self._check
            return
        if self._satisfied() or self.n >= self.budget:
            self._finish()
            return
        self._advance(g)

    def costs(self):
        """Operation counts of this tune (cost.py turns them into board time)."""
        out = {"read": self.n, "coef": self.ops[0], "pred": self.ops[1], "fit": self.ops[2],
               "ideal": self.ops[3], "near": self.ops[4], "row": 0, "grid": 0, "hyp": 0, "scan": 0}
        rows = getattr(self, "rows", None)
        if rows is not None:
            out["row"] = rows.evals
            out["grid"] = rows.calls
        elif getattr(self, "row_counts", None) is not None:
            out["row"], out["grid"] = self.row_counts  # the rows went back to the pool
        h = getattr(self, "h", None)
        if h is not None:
            out["hyp"] = h.evals
            out["scan"] = h.scans + 1
        return out

    def result(self):
        """(state, SWR) to end in: the best reading, unless it is above target and
        does not beat bypass with confidence; (BYPASS, -1) when there is no result."""
        if self.best_state is None or self.fault is not None:
            return (BYPASS, -1.0)
        gb = self._ev.get(BYPASS) if self._lm else self.seen.get(BYPASS)
        if (gb is not None and self.best_state != BYPASS and self.best_g > self.target_g
                and not self._beats(self.best_g, gb)):
            return (BYPASS, swr_from_gamma(gb))
        return (self.best_state, swr_from_gamma(self.best_g))

    # -- internals ------------------------------------------------------------
    @micropython.native
    def _record(self, state, g):
        if state not in self.seen:
            self.order.append(state)
            self._reading(state, g)
        self.seen[state] = g
        if g < self.best_g or (g == self.best_g and self.best_state is not None and state < self.best_state):
            self.best_g = g
            self.best_state = state

    def _reading(self, state, g):
        pass  # a new state measured: the model strategies keep its row

    def _revive(self, state, g):
        pass  # a reading set aside is asked for again (ModelFit)

    def _all_zero(self):
        for st in self.order:
            if self.seen[st] > 0.0:
                return False
        return True

    @micropython.native
    def _contrast(self, state):
        # Move the series element by about z0 of reactance: a load matched by
        # state then reads about 0.45 (common practice: a j1 step on a matched
        # line, |j1 / (2 + j1)|).
        b = self.bank
        w = self.w
        step = b.l_code_for(b.z0 / w)
        if step < 1:
            step = 1
        l = state[0] + step if state[0] + step <= b.l_max else state[0] - step
        if l < 0:
            l = b.l_max
        return (l, state[1], state[2])

    @micropython.native
    def _beats(self, g, gb):
        # Clearly better than the antenna alone: the coupler's leakage can move
        # each of two readings by |d| (1 + m^2) in opposite directions (the
        # detectors' gain mismatch moves both alike and cancels).
        return g < gb - (0.01 + self.leak * (2.0 + g * g + gb * gb))

    def _finish(self):
        self.done = True
        self._next = None
        h = getattr(self, "h", None)
        if h is not None:
            h.release()
        try:
            self._gen.close()
        except Exception:
            pass
        rows = getattr(self, "rows", None)
        if rows is not None:
            # Closed above: nothing reads the rows any more; their counts stay here.
            self.row_counts = (rows.evals, rows.calls)
            self.rows = None
            qfit.release(rows)

    @micropython.native
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

    def _tick(self):
        """Inside long work: feed the watchdog, stop when the tune's time is up."""
        if self.guard is not None and self.guard():
            self.timed_out = True
            raise _Stop()

    @micropython.native
    def _measure(self, state):
        """Generator helper: measured |gamma| of a state, measuring only once."""
        g = self.seen.get(state)
        if g is None:
            g = yield state
        elif self._lost is not None:
            self._revive(state, g)
        if self._satisfied() or (self._cap and self.n >= self._cap):
            raise _Stop()
        return g

    @micropython.native
    def _satisfied(self):
        if self._lm:
            if self._proven:
                return True
            # A modelled estimate stops the search only from a fit of the readings
            # around that state (a reading equals |d| on a whole circle through
            # the match: one reading and a distant fit can agree by chance).
            return self.best_g <= self.accept_g and self._wc == self.best_state and self._wc is not None
        return self.best_g <= self.accept_g

    def _valid(self, l, c):
        return 0 <= l <= self.bank.l_max and 0 <= c <= self.bank.c_max

    def _descend(self, start, steps):
        """Coordinate descent on the codes from start, coarse to fine, with
        pattern moves: a direction that pays is doubled until it stops paying
        (Hooke and Jeeves, J. ACM 8(2), 1961)."""
        best = start
        bg = yield from self._measure(best)
        for step in steps:
            improved = True
            while improved:
                improved = False
                l, c, sh = best
                for dl, dc in ((step, 0), (-step, 0), (0, step), (0, -step),
                               (step, -step), (-step, step), (step, step), (-step, -step)):
                    if not self._valid(l + dl, c + dc):
                        continue
                    s = (l + dl, c + dc, sh)
                    g = yield from self._measure(s)
                    if g < bg:
                        bg = g
                        best = s
                        improved = True
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

    Method: each state is a Moebius map of the load's reflection coefficient
    (lnet.mobius), so each reading |gamma| puts the load on a circle.  The
    load is fitted to the circles by Gauss-Newton on |gamma|^2 (weighted by
    each reading's uncertainty: noise, the coupler's leakage near a match, the
    detectors' gain mismatch near full reflection), the textbook closed-form
    L-network for the fitted load is quantised to codes, measured, and the
    reading joins the fit.  Where no reading comes near a match (a short
    vertical on a low band: every reading close to 1) the hunt (hunt.py)
    eliminates load hypotheses until one does.  Near the match the fit uses
    the nearby readings only (an effective load that absorbs the bank's
    tolerances and the coupler), and the neighbours it cannot rule out are
    measured, until none is left that could be better.
    """

    name = "model"

    def __init__(self, bank, freq_hz, target_swr=1.5, budget=60, memory_hint=None, leak=None):
        Strategy.__init__(self, bank, freq_hz, target_swr, budget, memory_hint, leak)
        self.co = {}
        self.co0 = {}
        if self.cp.learned and abs(self.cp.dr) >= _LEARNED_FROM:
            self._lm = True
            self._levels(self.floor_g)
        self.g = None
        self.h = None
        self._hn = 0
        self.rows = qfit.rows_for(budget + 2)
        self._w = []
        self._wc = None
        self._wn = 0
        # _valley's packed candidates: c code and shunt in the low bits, l above.
        cb = 1
        while (1 << cb) <= bank.c_max:
            cb += 1
        lb = 1
        while (1 << lb) <= bank.l_max:
            lb += 1
        self._kl = cb + 1
        self._kb = cb + 1 + lb
        self._kmask = (1 << self._kb) - 1
        self._cmask = (1 << cb) - 1

    # -- the model --------------------------------------------------------------
    @micropython.native
    def _coef(self, st):
        c = self.co.get(st)
        if c is None:
            self.ops[0] += 1
            c = lnet.mobius(self.bank, self.f_mhz, st[0], st[1], st[2])
            if self.cp.learned:
                c = self.cp.compose(c[0], c[1], c[2])
            self.co[st] = c
        return c

    @micropython.native
    def _pred(self, g, st):
        self.ops[1] += 1
        a, b, c = self._coef0(st) if self._lm else self._coef(st)
        return abs((a * g + b) / (c * g + 1.0))

    @micropython.native
    def _coef0(self, st):
        # The network alone (the learned coupler's terms left out): true gamma_in.
        c = self.co0.get(st)
        if c is None:
            self.ops[0] += 1
            c = lnet.mobius(self.bank, self.f_mhz, st[0], st[1], st[2])
            self.co0[st] = c
        return c

    @micropython.native
    def _est(self, st, w):
        """The true |gamma_in| of state st read w: the model's prediction for the
        load last fitted, plus how far the reading is from what the model
        predicts for it (learned coupler only; the reading itself before a fit)."""
        g = self.g
        if g is None:
            return w
        a, b, c = self._coef0(st)
        p = (a * g + b) / (c * g + 1.0)
        return abs(p) + abs(w - self.cp.reading_of(p))

    @micropython.native
    def _record(self, state, g):
        if not self._lm:
            Strategy._record(self, state, g)
            return
        if state not in self.seen:
            self.order.append(state)
            self._reading(state, g)
        self.seen[state] = g
        e = self._est(state, g)
        self._ev[state] = e
        if self._proven:
            return
        if 0.0 <= g <= self.lock_g:
            # This reading proves the target whatever the model says: the answer.
            self._proven = True
            self.best_g = e
            self.best_state = state
            return
        if e < self.best_g or (e == self.best_g and self.best_state is not None and state < self.best_state):
            self.best_g = e
            self.best_state = state

    @micropython.native
    def _rerank(self):
        # A new fit: every reading's estimate again, the best by it (quantised,
        # ties to the state tuple: every port agrees).
        if self._proven:
            return
        best = None
        bq = 0
        lost = self._lost
        for st in self.order:
            if lost is not None and st in lost:
                continue
            e = self._est(st, self.seen[st])
            self._ev[st] = e
            q = _q(e)
            if best is None or q < bq or (q == bq and st < best):
                best = st
                bq = q
        if best is not None:
            self.best_state = best
            self.best_g = self._ev[best]

    @micropython.native
    def _sig(self, m):
        # Uncertainty of a reading m (|gamma|): ADC and noise, the coupler's
        # leakage, a 0.3 dB forward/reflected gain mismatch (3.5 % of m), and
        # the model's own error.  The leakage d enters both ports, the reading
        # is |gamma + d| / |1 + d gamma|: off by up to |d| (1 + m^2), |d| at a
        # match and twice that near full reflection, where a complex d even
        # reads a passive load above 1.  Half of that is taken as one sigma.
        return 0.015 + 0.5 * self._sleak * (1.0 + m * m) + 0.035 * m

    @micropython.native
    def _reading(self, st, m):
        a, b, c = self._coef(st)
        s = self._sig(m)
        w = 1.0 / (2.0 * m * s + s * s)
        k = self.rows.n
        if k < self.rows.cap:
            self.rows.put(k, a, b, c, m, w)
            self.rows.n = k + 1
            self._w.append(w)

    def _forget(self):
        """Set every reading so far aside: the model, the hunt and the best
        state start afresh (a search from them would repeat their mistake),
        while the readings stay cached; returns the best so far."""
        saved = (self.best_state, self.best_g)
        lost = {}
        for k in range(self.rows.n):
            lost[self.order[k]] = self._w[k]
            self._w[k] = 0.0
        self._lost = lost
        self._wn = 0
        self._wc = None
        self._hn = len(self.order)
        if self.h is not None:
            self.h.release()
            self.h = None
        self.g = None
        self.best_state = None
        self.best_g = 2.0
        return saved

    def _revive(self, state, g):
        w = self._lost.pop(state, None)
        if w is None:
            return
        # Asked for again by the fresh search: its reading counts once more.
        self._w[self.order.index(state)] = w
        self._wn = 0
        if g < self.best_g or (g == self.best_g and self.best_state is not None and state < self.best_state):
            self.best_g = g
            self.best_state = state

    def _restore(self, saved):
        st, g = saved
        if st is not None and (g < self.best_g or self.best_state is None):
            self.best_state = st
            self.best_g = g

    # How much a reading of state st says about the effective load at state
    # center.  The element on the load side of the network (L with the
    # capacitor across the transmitter, C with it across the antenna) adds its
    # error to the load itself, so states sharing its code share the effective
    # load exactly; other codes share it as far as they share elements (the
    # bits they differ in, weighed by value: lv[a ^ b]).  The other element
    # errs only a little, and the other shunt side not at all alike:
    #   w = 1 / ((1 + dl^2 0.015) (1 + dc^2 0.0006)), or 0.02 across sides,
    # dl, dc the load-side and other element's differing value in units of
    # the smallest one.  The two factors are tabulated per code once per bank
    # (Bank.locality), so a weight is two look-ups.

    @micropython.native
    def _fit(self, center=None, wide=False):
        """Candidate loads (complex gamma) for the readings, best first, as
        [(misfit, gamma), ...], at most 3 and at least 0.05 apart (qfit: a
        robust weighted misfit, minimised on shrinking grids).

        Starts: the last estimate, the load the best-read state matches, the
        hunt's best hypothesis and, when wide, points around the bypass circle
        (the readings may allow two or three places).  center: weigh readings
        by how much they say about the effective load at that state (_near_w),
        so the fit describes the network where the search is."""
        self.ops[2] += 1
        rows = self.rows
        order = self.order
        ws = self._w
        # Rows are weighed for the center of the last fit; only new rows, or all
        # of them for a new center.
        k0 = self._wn if center == self._wc else 0
        if center is None:
            for k in range(k0, rows.n):
                rows.weigh(k, ws[k])
        else:
            cl, cc, sh = center
            fl, fc = self.bank.locality(sh)
            self.ops[4] += rows.n - k0
            for k in range(k0, rows.n):
                st = order[k]
                rows.weigh(k, ws[k] * (fl[st[0] ^ cl] * fc[st[1] ^ cc] if st[2] == sh else 0.02))
        self._wc = center
        self._wn = rows.n
        rows.select()
        starts = []
        if self.g is not None:
            starts.append(self.g)
        if self.h is not None:
            starts.append(hunt.point(self.h.best()))
        if self.best_state is not None and self.best_g < 0.9:
            p = self._matched(self.best_state)
            if p is not None:
                # The best reading puts the load on a circle around the load its
                # state matches (pseudo-hyperbolic radius = the reading): points
                # around it find both places two readings allow.
                r = self.best_g
                pc = complex(p.real, -p.imag)
                for k in range(0, _WIDE, 2 if wide else 4):
                    h = r * _UNIT[k]
                    starts.append((h + p) / (1.0 + pc * h))
        if wide:
            m0 = self.seen.get(BYPASS)
            if m0 is not None:
                r = m0 if m0 < 0.995 else 0.995
                for k in range(_WIDE):
                    starts.append(r * _UNIT[k])
        es = rows.rank(starts)
        out = []
        # Refine the two best starts that are not next to each other (ties to
        # the earlier start: the list order is fixed, so every port agrees).
        for _ in range(2):
            bi = -1
            for i in range(len(es)):
                if es[i] < 65535 and (bi < 0 or es[i] < es[bi]) and not _near(out, starts[i]):
                    bi = i
            if bi < 0:
                break
            e, g = rows.refine(starts[bi])
            es[bi] = 65535
            if e >= 0 and not _near(out, g):
                out.append((e, g))
        if len(out) == 2 and (out[1][0] < out[0][0] or (out[1][0] == out[0][0] and _key(out[1]) < _key(out[0]))):
            out.reverse()
        if out:
            self.g = out[0][1]
            if self._lm:
                self._rerank()
        return out

    @micropython.native
    def _matched(self, st):
        """The load (gamma) this state matches exactly: the root of a g + b."""
        a, b, c = self._coef(st)
        if abs(a) < 1e-9:
            return None
        g = -b / a
        m = abs(g)
        if m >= 0.9995:
            g = g * (0.9995 / m)
        return g

    @micropython.native
    def _ideal(self, g):
        """The state the model predicts best for load g: the textbook closed form
        on either shunt side, rounded both ways in the element that sets the
        transformation (C across the antenna, L into it), the other element
        then set to its best value for that code (the valley of a high-Q load
        runs diagonally across the codes).  The candidates are ranked by what
        is left of the mismatch once the other element cancels the reactance,
        and the two best by the full model (losses, the other element's
        rounding)."""
        self.ops[3] += 1
        cands = self._valley(g)
        if not cands:
            return None
        cands.sort()
        best = self._state(cands[0])
        if len(cands) < 2:
            return best
        st = self._state(cands[1])
        # _pred twice, inlined (a call costs as much as a complex operation on the board).
        self.ops[1] += 2
        coef = self._coef0 if self._lm else self._coef
        a, b, c = coef(best)
        bv = _q(abs((a * g + b) / (c * g + 1.0)))
        a, b, c = coef(st)
        v = _q(abs((a * g + b) / (c * g + 1.0)))
        if v < bv or (v == bv and st < best):
            best = st
        return best

    @micropython.native
    def _state(self, v):
        """The state of a candidate from _valley (its low bits)."""
        k = v & self._kmask
        return (k >> self._kl, (k >> 1) & self._cmask, k & 1)

    @micropython.native
    def _valley(self, g, around=None):
        """Candidate states for load g as integers, (residual << kb) | key: the
        residual the mismatch (|gamma|, in 1e-4, lossless) left by the
        transforming code, key the state (l, c, shunt) packed so that integer
        order is the tuple's (_state unpacks it).  Integers, not tuples: on the
        board a three-item tuple takes two heap blocks, found by a scan of the
        allocation table, and sorting ints compares no tuples.

        The closed form is the textbook L-network design (lnet.analytic_match,
        written out here with the same arithmetic: a call and its tuples cost
        more than the arithmetic on the board)."""
        b = self.bank
        z0 = b.z0
        zl = lnet.z_from_gamma(g, z0)
        w = self.w
        wc = w * 1e-6
        out = []
        kl = self._kl
        kb = self._kb
        if around is not None:
            sh0 = around[2]
            yl = 1.0 / zl if zl != 0 else 0j
            if sh0 == lnet.SHUNT_ANT:
                k = around[1]
            else:
                k = around[0]
            self._vcands(out, zl, yl, sh0, k - 1, w, wc, z0, kl, kb)
            self._vcands(out, zl, yl, sh0, k + 1, w, wc, z0, kl, kb)
            return out
        r = zl.real
        if r <= 0.0:
            return out  # no match on either side (analytic_match: r <= 0)
        x = zl.imag
        yl = 1.0 / zl
        # Capacitor across the transmitter (lnet.analytic_match, shunt TX).
        d = r * z0 - r * r
        if d >= 0.0:
            xt = d ** 0.5
            xs = xt - x
            if xs >= -1e-9:
                bc = -(1.0 / complex(r, xt)).imag
                if bc >= -1e-12:
                    m0 = (xs if xs > 0.0 else 0.0) / w
                    k0 = b.l_code_for(m0)
                    k1 = k0 + (1 if b.lv[k0] < m0 else -1)
                    for k in (k0, k1):
                        if not 0 <= k <= b.l_max:
                            continue
                        # Series L fixed: the shunt C that cancels the susceptance left.
                        zs = zl + complex(0.0, w * b.lv[k])
                        ys = 1.0 / zs if zs != 0 else 0j
                        bc = -ys.imag
                        gg = ys.real * z0
                        e = abs(gg - 1.0) / (gg + 1.0) if bc >= 0.0 else 1.0
                        out.append((_q(e) << kb) | (k << kl) | (b.c_code_for(bc / wc if bc > 0.0 else 0.0) << 1))
        # Capacitor across the antenna (lnet.analytic_match, shunt ANT).
        gy = yl.real
        bl = yl.imag
        d = gy / z0 - gy * gy
        if d >= 0.0:
            bm = None
            lm = 0.0
            for sgn in (1.0, -1.0):
                bt = sgn * (d ** 0.5)
                bc = bt - bl
                if bc < -1e-12:
                    continue
                zp = 1.0 / complex(gy, bt)
                xs = -zp.imag
                if xs < -1e-9:
                    continue
                c0 = (xs if xs > 0.0 else 0.0) / w
                c1 = (bc if bc > 0.0 else 0.0) / w * 1e6
                if bm is None or c0 + c1 * 1e-3 < lm + bm * 1e-3:
                    lm = c0
                    bm = c1
            if bm is not None:
                k0 = b.c_code_for(bm)
                k1 = k0 + (1 if b.cv[k0] < bm else -1)
                for k in (k0, k1):
                    if not 0 <= k <= b.c_max:
                        continue
                    # Capacitor across the load fixed: the series L that cancels
                    # what reactance is left; the resistance left is the mismatch.
                    zp = 1.0 / (yl + complex(0.0, wc * b.cv[k]))
                    x = -zp.imag
                    r = zp.real
                    e = abs(r - z0) / (r + z0) if x >= 0.0 else 1.0
                    out.append((_q(e) << kb) | (b.l_code_for(x / w if x > 0.0 else 0.0) << kl) | (k << 1) | 1)
        return out

    def _vcands(self, out, zl, yl, sh, k, w, wc, z0, kl, kb):
        # _valley's candidate of code k next to a state (_neighbours only: rare,
        # so bytecode, which takes a fraction of native code's RAM).
        b = self.bank
        if sh == lnet.SHUNT_ANT:
            if not 0 <= k <= b.c_max:
                return
            # Capacitor across the load fixed: the series L that cancels
            # what reactance is left; the resistance left is the mismatch.
            zp = 1.0 / (yl + complex(0.0, wc * b.cv[k])) if zl != 0 else 0j
            x = -zp.imag
            r = zp.real
            key = (b.l_code_for(x / w if x > 0.0 else 0.0) << kl) | (k << 1) | 1
            e = abs(r - z0) / (r + z0) if x >= 0.0 else 1.0
        else:
            if not 0 <= k <= b.l_max:
                return
            # Series L fixed: the shunt C that cancels the susceptance left.
            zs = zl + complex(0.0, w * b.lv[k])
            ys = 1.0 / zs if zs != 0 else 0j
            bc = -ys.imag
            gg = ys.real * z0
            key = (k << kl) | (b.c_code_for(bc / wc if bc > 0.0 else 0.0) << 1)
            e = abs(gg - 1.0) / (gg + 1.0) if bc >= 0.0 else 1.0
        out.append((_q(e) << kb) | key)

    # -- the search -------------------------------------------------------------
    def _run(self):
        m0 = yield from self._measure(BYPASS)
        yield from self._cold(m0)
        yield from self._local()

    def _cold(self, m0):
        if m0 < _PROBE_BELOW:
            for p in self._probes():
                yield from self._measure(p)
            yield from self._jumps()
        for _ in range(4):
            if self.best_g <= _NEAR:
                return
            left = yield from self._hunt()
            if not left:
                # No load the network can match is consistent with the readings:
                # a few readings of best effort, then through or the best found.
                extra = _HOPELESS_EXTRA if self.best_g < _HIT else _HOPELESS_EXTRA // 2
                self.budget = min(self.budget, self.n + extra)
            # Trilaterate with every reading and go to the match it gives.
            yield from self._jumps()
            if not left:
                return

    def _probes(self):
        b = self.bank
        w = self.w
        lp = b.l_code_for(b.z0 / w)
        cp = b.c_code_for(1e6 / (w * b.z0))
        return ((lp if lp else 1, 0, lnet.SHUNT_ANT), (0, cp if cp else 1, lnet.SHUNT_ANT))

    def _jumps(self):
        """Measure where the fit's candidates say the match is, best candidate
        first, until a reading comes near a match or the fit has nothing new."""
        for _ in range(_MAX_JUMPS):
            self._tick()
            s = None
            for e, g in self._fit(wide=True):
                t = self._ideal(g)
                if t is not None and t not in self.seen:
                    s = t
                    break
            if s is None:
                return
            yield from self._measure(s)
            if self.best_g <= _CLOSE:
                return

    @micropython.native
    def _hunt(self):
        """Aim at the least penalised load hypotheses until a reading comes near a
        match; False when no hypothesis is left to aim at.

        Until one reading is a hit (below _HIT) the probes aim two units short
        of their hypothesis (wide, shallow dips: more of the chart covered per
        reading); after it, straight at the hypotheses (narrow, deep dips)."""
        h = self.h
        if h is None:
            b = self.bank
            w = self.w
            h = self.h = hunt.Hunt(w * b.lv[b.l_max] / b.z0, w * b.cv[b.c_max] * 1e-6 * b.z0)
        fine = self.best_g < _HIT
        left = True
        for _ in range(_HUNT_STEPS):
            self._tick()
            while self._hn < len(self.order):
                st = self.order[self._hn]
                self._hn += 1
                a, bb, c = self._coef(st)
                m = self.seen[st]
                h.add(a, bb, c, m, self._sig(m))
            if self.best_g <= _NEAR:
                break
            s = None
            for _try in range(8):
                i = h.pick()
                if i < 0:
                    left = False
                    break
                h.tried[i] = 1
                s = self._ideal(hunt.point(i) if fine else hunt.aim(i))
                if s is not None and s not in self.seen:
                    break
                s = None
            if s is None:
                break
            m = yield from self._measure(s)
            if m < _HIT:
                fine = True
        self.g = hunt.point(h.best())
        return left

    def _local(self):
        """Converge near the best reading: fit the nearby readings, go where the
        fit's candidates say, then measure the neighbours it cannot rule out,
        coarse steps first while far from the target."""
        step = 4 if self.best_g > 0.45 else (2 if self.best_g > 0.3 else 1)
        tried_wide = False
        for _ in range(_LOCAL_STEPS):
            self._tick()
            n0 = self.n
            c0 = self.best_state
            cands = self._fit(c0)
            if not cands:
                return
            s = None
            for e, g in cands:
                t = self._ideal(g)
                if t is not None and t not in self.seen:
                    s = t
                    break
            if s is not None:
                before = self.best_g
                yield from self._measure(s)
                if self.best_g < before:
                    continue
            # The fit has nothing new to offer: check the neighbours of the best
            # state it cannot rule out, most promising first.
            e, g = cands[0]
            moved = yield from self._neighbours(g, step)
            if moved:
                continue
            if step > 1:
                step >>= 1
            elif self.n == n0:
                if self.best_g <= self.accept_g:
                    return
                if tried_wide:
                    # Still above the accept level where the model sees nothing
                    # better: the model is off here (tolerances, the coupler),
                    # so the readings alone decide: a descent on the codes.
                    yield from self._descend(self.best_state, (2, 1))
                    return
                # Stuck above target: the other places the readings allow.
                tried_wide = True
                yield from self._jumps()

    def _neighbours(self, g, step):
        c0 = self.best_state
        l, c, sh = c0
        nb = []
        for dl, dc in ((1, 0), (-1, 0), (0, 1), (0, -1), (1, -1), (-1, 1)):
            t = (l + dl * step, c + dc * step, sh)
            if self._valid(t[0], t[1]) and t not in self.seen:
                nb.append((_q(self._pred(g, t)), t, dl, dc))
        if step == 1:
            if c > 0 and (l, c, 1 - sh) not in self.seen:
                t = (l, c, 1 - sh)
                nb.append((_q(self._pred(g, t)), t, 0, 0))
            # Along the valley: the next code of the transforming element, the
            # other element where the model puts its best.
            for v in self._valley(g, c0):
                t = self._state(v)
                if t not in self.seen and t != c0:
                    nb.append((_q(self._pred(g, t)), t, 0, 0))
        nb.sort()
        # A neighbour is worth a reading when the model, allowing for the
        # uncertainty of a reading, cannot say it is worse than the best one.
        slack = 2.0 * self._sig(self.best_g)
        k = 0
        for v, t, dl, dc in nb:
            if k >= 3 or v * 0.0001 >= self.best_g + slack:
                break
            k += 1
            bg = self.best_g
            yield from self._measure(t)
            if self.best_g < bg:
                # Pattern move: while the same direction keeps paying, double it
                # (Hooke and Jeeves, J. ACM 8(2), 1961): a long valley costs a
                # few readings, not one per code.
                m = 2
                while dl or dc:
                    u = (l + dl * step * m, c + dc * step * m, sh)
                    if not self._valid(u[0], u[1]):
                        break
                    bg = self.best_g
                    yield from self._measure(u)
                    if self.best_g >= bg:
                        break
                    m *= 2
                return True
        return False


class Recall(ModelFit):
    """Start from a stored state for a nearby frequency.

    One reading verifies it: accepted only where the model search would accept
    (a stored state above target is a starting point, not an answer).  When it
    reads near a match the local search carries on from there; when that finds
    no lock, the cold search runs as if from nothing, with those readings set
    aside (they stay cached), and the better of the two ends the tune.
    """

    name = "recall"

    def _run(self):
        hint = self.hint
        if hint is not None and self._valid(hint[0], hint[1]) and hint[2] in (0, 1):
            st = (hint[0], hint[1], hint[2])
            g = yield from self._measure(st)
            stored = gamma_from_swr(hint[3]) if len(hint) > 3 and hint[3] >= 1.0 else 2.0
            if g <= self.accept_g + _REPEAT and stored <= self.accept_g and (self.lock_g < 0.0 or g <= self.lock_g):
                # The state was a lock here and reads so again, within a reading's
                # noise, and the reading proves the target (a reading within noise
                # of the lock level but above it would end best-effort on a state
                # a few local readings can usually better).
                self.confirmed = True
                return
            if self.expect_g >= 0.0:
                # A state the host computed from the antenna it measured, with the true
                # |gamma| it predicts there: the host chose it as the best reachable, so
                # where the reading allows that prediction (its lower bound, the coupler's
                # noise, floor, leakage and gain ratio, at or below it) the neighbours
                # cannot honestly be expected to do better, and a search would only walk
                # the relays under the carrier.  It ends on this reading: locked where the
                # reading proves the target (stopped above), else best-effort with its
                # bound.  A reading clearly worse (the curve was wrong, the antenna
                # changed) searches as any other preset.
                if self.cp.bounds(g, self.floor_g)[0] <= self.expect_g:
                    self.predicted = PREDICTED
                    return
                self.predicted = WORSE
            if (not self.retry_best and self.accept_g < stored <= self.target_g
                    and g <= stored + _REPEAT):
                # A best effort (stored above the accept level: not a lock) that read
                # the target but could not prove it (the coupler's bounds), reading as
                # it did: the same antenna through the same state, so a search would
                # walk the relays under the carrier only to come back to it.  It ends
                # best-effort with its bound, as before; a tune the operator asks for
                # searches again (retry_best), and a stored state above target is
                # still a start, not an answer.
                self.confirmed = True
                return
            if g <= _NEAR:
                short = g <= self.target_g and not self.asked
                if short:
                    # The state reads the target, short of proof (the coupler's bounds):
                    # a few local readings may prove a neighbour; past them the search
                    # would walk the relays under the carrier for a proof it rarely
                    # finds.  It then ends best-effort with its bound; a tune the
                    # operator asks for searches on.
                    self._cap = self.n + _CONFIRM_LOCAL
                yield from self._local()
                if self.best_g <= self.accept_g or short:
                    return
            # The stored state led to no lock: the cold search, as if from
            # nothing (a model fitted to the readings around a wrong valley
            # keeps returning there); the best of both is the answer.
            saved = self._forget()
            try:
                yield from ModelFit._run(self)
            finally:
                self._restore(saved)
            return
        yield from ModelFit._run(self)


STRATEGIES = {"grid": GridDescent, "model": ModelFit, "recall": Recall}
NAMES = ("grid", "model", "recall")


def make(name, bank, freq_hz, target_swr=1.5, budget=60, memory_hint=None, leak=None):
    cls = STRATEGIES.get(name)
    if cls is None:
        raise ValueError("unknown strategy: " + str(name))
    return cls(bank, freq_hz, target_swr, budget, memory_hint, leak)


# -- the fit's arithmetic (module level: no attribute lookups in the loops) ------
_UNIT = (complex(1.0, 0.0), complex(0.7071067811865476, 0.7071067811865476), complex(0.0, 1.0),
         complex(-0.7071067811865476, 0.7071067811865476), complex(-1.0, 0.0),
         complex(-0.7071067811865476, -0.7071067811865476), complex(0.0, -1.0),
         complex(0.7071067811865476, -0.7071067811865476))


@micropython.native
def _key(t):
    # Sort key for (misfit, gamma): MicroPython's sort is not stable, so ties
    # fall to the coordinates, rounded like every other decision.
    return (_q(t[0]), _q(t[1].real), _q(t[1].imag))


@micropython.native
def _near(out, g):
    for e, h in out:
        if abs(g - h) < 0.05:
            return True
    return False
