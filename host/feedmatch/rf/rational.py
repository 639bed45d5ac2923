"""Adaptive frequency sampling with rational interpolation.

A NEC-2 solve costs tens of milliseconds per frequency, yet an antenna's
feed-point impedance is a smooth, nearly rational function of frequency
(poles at its resonances).  So a dense sweep solves the model at a few
frequencies, fits a rational function by the AAA algorithm (Nakatsukasa, Sete
and Trefethen, "The AAA algorithm for rational approximation", SIAM J. Sci.
Comput. 40(3), 2018) and adds frequencies where the fit is uncertain until it
is not.  Uncertainty is judged by cross-validation: the fit through all samples
against fits through the even- and the odd-numbered samples alone.  Every
solved frequency keeps its solved value.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np


@dataclass
class Rational:
    """r(x) = sum(w f / (x - z)) / sum(w / (x - z)) in barycentric form."""

    z: np.ndarray
    f: np.ndarray
    w: np.ndarray

    def __call__(self, x) -> np.ndarray:
        x = np.atleast_1d(np.asarray(x, dtype=float))
        d = x[:, None] - self.z[None, :]
        exact = d == 0
        with np.errstate(divide="ignore", invalid="ignore"):
            c = 1.0 / d
            v = (c @ (self.w * self.f)) / (c @ self.w)
        hit = exact.any(axis=1)
        if hit.any():
            v[hit] = self.f[np.argmax(exact[hit], axis=1)]
        return v


def aaa(x, f, rtol: float = 1e-6, mmax: int = 60) -> Rational:
    """AAA fit of samples f at real points x; stops when every sample is met
    within rtol * max|f| (a tolerance far below it only fits numerical noise
    and breeds spurious pole-zero pairs)."""
    x = np.asarray(x, dtype=float)
    f = np.asarray(f, dtype=complex)
    m_all = len(x)
    free = np.ones(m_all, dtype=bool)
    r = np.full(m_all, f.mean())
    scale = float(np.abs(f).max()) or 1.0
    cols: list[np.ndarray] = []
    zs: list[int] = []
    w = np.ones(1, dtype=complex)
    for _ in range(min(mmax, m_all)):
        err = np.abs(f - r)
        err[~free] = -1.0
        j = int(np.argmax(err))
        zs.append(j)
        free[j] = False
        col = np.zeros(m_all, dtype=complex)
        col[free] = 1.0 / (x[free] - x[j])
        cols.append(col)
        c = np.array(cols).T
        fz = f[zs]
        if not free.any():
            w = np.linalg.svd((f[:, None] - fz[None, :]) * c, full_matrices=False)[2][-1].conj()
            break
        loewner = (f[free, None] - fz[None, :]) * c[free]
        w = np.linalg.svd(loewner, full_matrices=False)[2][-1].conj()
        with np.errstate(divide="ignore", invalid="ignore"):
            r = f.copy()
            r[free] = (c[free] @ (w * fz)) / (c[free] @ w)
        if np.max(np.abs(f - r)) <= rtol * scale:
            break
    return Rational(x[zs].copy(), f[zs].copy(), w)


@dataclass
class Sampled:
    values: np.ndarray  # at every target
    solved: np.ndarray  # bool: True where the model was solved, not interpolated
    est_err: float  # largest cross-validation disagreement left (relative, see adaptive_sample)


def adaptive_sample(x, solve: Callable[[np.ndarray], np.ndarray], rtol: float = 1e-3,
                    floor: float = 5.0, n0: int = 16, batch: int = 4,
                    max_fraction: float = 0.5) -> Sampled:
    """Values at sorted targets x, solving as few of them as the fit allows.

    The error measure is |a - b| / (|b| + floor): relative, with `floor` (in the
    values' unit) keeping it meaningful where the value passes near zero.  When
    the fits still disagree after max_fraction of the targets are solved, the
    rest are solved too, so the result is never worse than solving them all.
    """
    x = np.asarray(x, dtype=float)
    n = len(x)
    vals = np.zeros(n, dtype=complex)
    solved = np.zeros(n, dtype=bool)
    span = (x[-1] - x[0]) or 1.0
    u = (x - 0.5 * (x[0] + x[-1])) * (2.0 / span)  # [-1, 1] keeps the Loewner matrix well scaled

    def take(idx) -> None:
        idx = np.asarray(sorted(set(int(i) for i in idx) - set(np.flatnonzero(solved).tolist())), dtype=int)
        if len(idx):
            vals[idx] = np.asarray(solve(x[idx]), dtype=complex)
            solved[idx] = True

    take(np.unique(np.round(np.linspace(0, n - 1, min(n, n0))).astype(int)))
    est = 0.0
    while True:
        s = np.flatnonzero(solved)
        if len(s) == n:
            return Sampled(vals, solved, 0.0)
        full = aaa(u[s], vals[s])(u)
        even = aaa(u[s[::2]], vals[s[::2]])(u)
        odd = aaa(u[s[1::2]], vals[s[1::2]])(u)
        with np.errstate(invalid="ignore"):
            d = np.maximum(np.abs(full - even), np.abs(full - odd)) / (np.abs(full) + floor)
        d[~np.isfinite(d)] = np.inf
        d[solved] = 0.0
        est = float(d.max())
        if est <= rtol:
            out = full.copy()
            out[solved] = vals[solved]
            return Sampled(out, solved, est)
        if solved.sum() >= max_fraction * n:
            take(np.flatnonzero(~solved))
            continue
        new: list[int] = []
        for c in np.argsort(-d):
            if d[c] <= rtol or len(new) >= batch:
                break
            if all(abs(int(c) - k) > 1 for k in new):
                new.append(int(c))
        take(new)
