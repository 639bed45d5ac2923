"""Presets on any frequency: the state for a frequency never tuned, from the measured antenna.

The measured curve (sim/curve.py) holds the antenna's impedance at the
frequencies the box tuned.  Between them the feed-point impedance is a smooth,
nearly rational function of frequency, so it is interpolated with the AAA
rational fit the NEC-2 sweep uses (rf/rational.py), with that sweep's own error
estimate (the fit through all points against fits through the even- and the
odd-numbered points alone) added to the nearby points' measurement errors.  The
best state for the interpolated load is then found exhaustively on the box's
element values (learned ones where it has them, its learned node strays
included), choosing the state whose predicted reading is least: the firmware
confirms a computed preset by its first reading, and the coupler's leakage
(learned from the logbook, where it is) shifts that reading by up to |d|; a
preset the first carrier has to move away from costs relay changes under
power.  Nothing here switches anything: `follow` sends the state in a
`preset` request and the firmware switches it cold.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from feedmatch.rf.network import Network, all_states_zin, gamma, swr_of
from feedmatch.rf.rational import aaa

MAX_REACH = 0.08  # relative distance to the nearest measured point beyond which no preset is offered
MAX_PREDICTED_SWR = 3.0  # a computed state predicted worse than this is not offered


class CurvePresets:
    """plan(f_hz) -> the state to preset at f_hz, or None where the curve does not reach."""

    def __init__(self, freqs_hz, z, z_err, net: Network, leak28: complex = 0j):
        f = np.asarray(freqs_hz, dtype=float)
        order = np.argsort(f)
        self.f = f[order]
        self.z = np.asarray(z, dtype=complex)[order]
        self.err = np.asarray(z_err, dtype=float)[order]
        self.net = net
        self.leak28 = complex(leak28)  # the coupler's leakage at 28 MHz (grows with f), as learned
        self._lo, self._hi = float(self.f[0]), float(self.f[-1])
        span = (self._hi - self._lo) or 1.0
        self._mid, self._scale = 0.5 * (self._lo + self._hi), 2.0 / span
        u = self._u(self.f)
        n = len(self.f)
        # Through the points (their errors are mostly shared, systematic: smoothing would
        # not remove them); the fit's own error is judged by cross-validation below.
        # AAA needs points left over beside its support points (a least-squares fit there),
        # so a sparse curve gets at most half its points as support.
        self._full = aaa(u, self.z, rtol=1e-9, mmax=max(1, (n + 1) // 2)) if n >= 1 else None
        self._even = aaa(u[::2], self.z[::2], rtol=1e-9, mmax=max(1, (n // 2 + 1) // 2)) if n >= 4 else None
        self._odd = aaa(u[1::2], self.z[1::2], rtol=1e-9, mmax=max(1, (n // 2 + 1) // 2)) if n >= 4 else None

    def _through_points(self, fit, u: np.ndarray) -> np.ndarray:
        """The fit, with its misses at the measured points interpolated between them (so
        the curve goes through every point; the fit gives the shape in between)."""
        miss = self.z - fit(self._u(self.f))
        corr = np.interp(u, self._u(self.f), miss.real) + 1j * np.interp(u, self._u(self.f), miss.imag)
        return fit(u) + corr

    def _u(self, f):
        return (np.asarray(f, dtype=float) - self._mid) * self._scale

    @classmethod
    def from_points(cls, points, net: Network, leak28: complex = 0j) -> CurvePresets:
        return cls([p.freq_hz for p in points], [p.z for p in points],
                   [float(np.hypot(p.r_err, p.x_err)) for p in points], net, leak28)

    def impedance(self, f_hz: float) -> tuple[complex, float] | None:
        """The antenna's impedance at f_hz and its one-sigma error (ohm, as |delta Z|)."""
        if self._full is None or not len(self.f):
            return None
        near = np.abs(self.f - f_hz) / f_hz
        if near.min() > MAX_REACH:
            return None
        u = self._u([f_hz])
        z = complex(self._through_points(self._full, u)[0])
        if not np.isfinite(z) or z.real <= 0:
            return None
        # The fit's own error (cross-validation), plus the errors of the two nearest points.
        cv = 0.0
        if self._even is not None and self._odd is not None:
            cv = max(abs(z - complex(self._even(u)[0])), abs(z - complex(self._odd(u)[0])))
            if not np.isfinite(cv):
                cv = abs(z)
        i = np.argsort(near)[:2]
        meas = float(np.max(self.err[i]))
        return z, float(np.hypot(cv, meas))

    def plan(self, f_hz: float) -> dict[str, Any] | None:
        got = self.impedance(f_hz)
        if got is None:
            return None
        z, err = got
        # The load and its uncertainty: the centre and four points one sigma out.
        e = err / np.sqrt(2)
        loads = np.array([z, z + e, z - e, z + 1j * e, z - 1j * e])
        loads = np.where(loads.real > 0.1, loads, 0.1 + 1j * loads.imag)
        gi = gamma(all_states_zin(self.net, np.full(len(loads), f_hz), loads), self.net.z0_ohm)
        gm = np.abs(gi)
        worst = gm.max(axis=0)
        # The state whose first reading is least at the centre: the reflected over the forward
        # port's wave with the coupler's leakage d (as BoxModel.read, equal gains).  The reading
        # is what confirms the preset (at or below the lock level it proves the target, above
        # the target it sends the recall searching on); the lowest reading lies where gamma_in
        # cancels the leakage, |d| away from the match.  Measured on the presets bench (the
        # demo's sessions, 200 new frequencies): ranked by the true |gamma_in| the states on
        # 10 m read above the target and the recall searched 35 readings under the carrier;
        # ranked by the worst |gamma| over the stated error (8 points: stated some ten times
        # the real error), the states were a code step off on 15 and 20 m.
        d = self.leak28 * (f_hz / 28e6)
        g0 = gi[0]
        rd = np.abs(g0 + d) / np.maximum(np.abs(1 + g0 * d), 1e-12)
        idx = int(np.argmin(rd))
        sh, l, c = np.unravel_index(idx, rd.shape)
        g0 = float(gm[0][sh, l, c])
        swr = float(swr_of(g0))
        if not swr <= MAX_PREDICTED_SWR:
            return None
        # expect_swr: what the first reading should allow (the preset request's field; the
        # firmware judges the reading against it with the coupler's bounds, which carry the
        # leakage the learned phase may still leave, so the centre is sent as it is).
        return {"state": [int(l), int(c), int(sh)], "swr": round(swr, 2), "expect_swr": round(swr, 2),
                "worst_swr": round(float(swr_of(float(worst[sh, l, c]))), 2),
                "reading": round(float(rd[sh, l, c]), 4),
                "z_ohm": [round(z.real, 2), round(z.imag, 2)], "z_err_ohm": round(err, 2)}


def box_network(bank, extras=None) -> Network:
    """The box as the preset computation sees it: its (learned) element values and strays
    (sim/curve.py's BoxModel, learned from the logbook), or the board's values alone."""
    if extras is not None and extras.learned:
        return extras.network()
    return Network(bank.z0, list(bank.ind), list(bank.cap), bank.ql or None, bank.qc or None)


def box_leak(extras=None) -> complex:
    """The coupler's leakage at 28 MHz as the logbook taught it (sim/curve.py's BoxModel),
    or 0 where nothing was learned (its phase is then unknown)."""
    if extras is not None and extras.learned:
        from feedmatch.sim.curve import _DIM, _DRE

        x = extras.extras()
        return complex(float(x[_DRE]), float(x[_DIM]))
    return 0j


def presets_from_logbook(db: str, nominal=None, since: str | None = None,
                         until: str | None = None) -> CurvePresets | None:
    """The preset computation for the logbook's antenna and box, or None without a curve."""
    from feedmatch.sim.curve import measured_curve

    cur = measured_curve(db, since, until, nominal=nominal)
    if not cur["points"] or cur.get("bank") is None:
        return None
    return CurvePresets.from_points(cur["points"], box_network(cur["bank"], cur.get("extras")),
                                    box_leak(cur.get("extras")))
