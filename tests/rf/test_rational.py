"""AAA rational fit and the adaptive sampler, on functions whose values are known in closed form."""

from __future__ import annotations

import numpy as np
from feedmatch.rf.rational import aaa, adaptive_sample


def _parallel_rlc(f, r=2000.0, l_h=2e-6, c_f=200e-12):
    """Parallel RLC impedance; resonant at 1 / (2 pi sqrt(LC)), Q = R sqrt(C / L)."""
    w = 2 * np.pi * np.asarray(f, dtype=float)
    return 1.0 / (1.0 / r + 1.0 / (1j * w * l_h) + 1j * w * c_f)


def test_aaa_recovers_a_rational_function_from_a_few_support_points():
    # A parallel RLC impedance is rational of type (1, 2) in frequency; AAA in barycentric form
    # represents type (m-1, m-1) with m support points, so it is exact once m >= 3 (Nakatsukasa,
    # Sete, Trefethen, SIAM J. Sci. Comput. 40(3), 2018, section 2).
    f = np.linspace(5e6, 15e6, 200)
    x = (f - 10e6) / 5e6
    z = _parallel_rlc(f)
    r = aaa(x, z, rtol=1e-13)
    assert len(r.z) <= 5
    xt = np.linspace(-1, 1, 1001)
    zt = _parallel_rlc(10e6 + 5e6 * xt)
    assert np.max(np.abs(r(xt) - zt) / np.abs(zt)) < 1e-9


def test_adaptive_sampling_finds_a_resonance_narrower_than_the_grid():
    # Parallel RLC with Q = R sqrt(C/L) = 400 at f0 = 7.96 MHz: a bandwidth f0/Q of 20 kHz
    # against a 50 kHz grid step, so the peak falls between grid points.
    l_h, c_f = 2e-6, 200e-12
    r = 400 * np.sqrt(l_h / c_f)
    f = np.linspace(3e6, 18e6, 301)
    truth = _parallel_rlc(f, r, l_h, c_f)
    calls = []

    def solve(fs):
        calls.append(len(fs))
        return _parallel_rlc(fs, r, l_h, c_f)

    s = adaptive_sample(f, solve, rtol=1e-3)
    err = np.abs(s.values - truth) / (np.abs(truth) + 5.0)
    assert err.max() <= 1e-3
    assert s.solved.sum() < 60 and sum(calls) == s.solved.sum()  # each target solved at most once
    assert np.array_equal(s.values[s.solved], truth[s.solved])


def test_adaptive_sampling_solves_everything_when_nothing_fits():
    # Values with no structure at all (independent random numbers): no fit can predict them, so
    # the sampler must end up solving every target rather than return an interpolation.
    rng = np.random.default_rng(7)
    f = np.linspace(1e6, 2e6, 120)
    table = dict(zip(f.tolist(), (rng.normal(50, 20, 120) + 1j * rng.normal(0, 30, 120)).tolist()))
    s = adaptive_sample(f, lambda fs: np.array([table[v] for v in fs.tolist()]), rtol=1e-3)
    assert s.solved.all() and s.est_err == 0.0
    assert np.array_equal(s.values, np.array([table[v] for v in f.tolist()]))
