"""Antenna models against Balanis and Touchstone files in every option-line form."""

from __future__ import annotations

import numpy as np
import pytest
import skrf
from feedmatch.errors import InputError
from feedmatch.rf.antenna import (
    C0,
    FixedLoad,
    Monopole,
    TouchstoneSweep,
    load_antenna,
    short_monopole_radiation_resistance,
    write_s1p,
)


def test_quarter_wave_monopole_balanis():
    # Balanis, Antenna Theory, 3rd ed. (Wiley, 2005), section 4.6 / 8.5: a thin quarter-wave
    # monopole over perfect ground is 36.5 + j21.25 ohm (half the half-wave dipole's 73 + j42.5).
    f = 10e6
    h = C0 / f / 4
    z = complex(Monopole(h, 1e-5).impedance(f))
    assert z.real == pytest.approx(36.5, abs=0.1)
    assert z.imag == pytest.approx(21.25, abs=0.05)


def test_monopole_resonance_slightly_below_quarter_wave():
    # Same source: the reactance at a quarter wave is inductive, so resonance (X = 0) comes at a
    # slightly shorter height, a few per cent short for practical diameters (common practice).
    f = np.linspace(8e6, 10.5e6, 2001)
    h = C0 / 10e6 / 4
    z = Monopole(h, 0.01).impedance(f)
    i = int(np.argmin(np.abs(z.imag)))
    ratio = f[i] / 10e6
    assert 0.9 < ratio < 0.99
    assert 30 < z[i].real < 36.5


@pytest.mark.parametrize("h_over_lambda", [0.01, 0.02, 0.04])
def test_short_monopole_radiation_resistance(h_over_lambda):
    # Short monopole R = 40 pi^2 (h/lambda)^2 (Balanis 3rd ed., short dipole 20 pi^2 (l/lambda)^2,
    # halved by image theory); the induced-EMF result agrees within a few per cent for h < lambda/20.
    f = 7e6
    h = h_over_lambda * C0 / f
    r = complex(Monopole(h, 1e-4).impedance(f)).real
    assert r == pytest.approx(40 * np.pi**2 * h_over_lambda**2, rel=0.03)
    assert short_monopole_radiation_resistance(h, f) == pytest.approx(40 * np.pi**2 * h_over_lambda**2)


def test_short_monopole_reactance_is_capacitive_and_ground_loss_adds():
    m = Monopole(4.0, 0.012, ground_loss_ohm=8.0)
    z = complex(m.impedance(3.6e6))
    assert z.imag < -500
    assert z.real == pytest.approx(8.0 + short_monopole_radiation_resistance(4.0, 3.6e6), rel=0.05)


def test_monopole_refuses_its_invalid_range():
    with pytest.raises(InputError, match="valid up to"):
        Monopole(10.0, 0.01).impedance(14e6)


S1P_VARIANTS = {
    # Touchstone 1.1 option lines: unit, parameter, format, reference (open standard).
    "hz_ri": ("# Hz S RI R 50", 1.0, "ri"),
    "khz_ma": ("# kHz S MA R 50", 1e3, "ma"),
    "mhz_db": ("# MHz S DB R 50", 1e6, "db"),
    "ghz_ri75": ("# GHz S RI R 75", 1e9, "ri"),
}


@pytest.mark.parametrize("name", list(S1P_VARIANTS))
def test_touchstone_option_lines(tmp_path, name):
    opt, scale, form = S1P_VARIANTS[name]
    z0 = 75.0 if "75" in opt else 50.0
    f = np.array([7.0e6, 7.1e6, 7.2e6])
    z = np.array([20 - 80j, 25 - 60j, 30 - 40j])
    s = (z - z0) / (z + z0)
    lines = ["! test sweep", opt]
    for fi, si in zip(f, s):
        if form == "ri":
            a, b = si.real, si.imag
        elif form == "ma":
            a, b = abs(si), np.degrees(np.angle(si))
        else:
            a, b = 20 * np.log10(abs(si)), np.degrees(np.angle(si))
        lines.append(f"{fi / scale:.12g} {a:.12g} {b:.12g}")
    p = tmp_path / f"{name}.s1p"
    p.write_text("\n".join(lines) + "\n")
    sw = load_antenna(p)
    got = sw.impedance(f)
    assert np.allclose(got, z, rtol=1e-7)
    mid = sw.impedance(7.05e6)
    assert complex(mid) == pytest.approx((z[0] + z[1]) / 2, rel=1e-9)
    with pytest.raises(InputError, match="outside the sweep"):
        sw.impedance(8e6)


def test_s1p_export_reads_back_with_scikit_rf(tmp_path):
    f = np.linspace(7e6, 7.3e6, 7)
    z = Monopole(4.5, 0.012, 6.0).impedance(f)
    write_s1p(tmp_path / "v.s1p", f, z)
    ntw = skrf.Network(str(tmp_path / "v.s1p"))
    assert np.allclose(ntw.z[:, 0, 0], z, rtol=1e-6)
    assert np.allclose(TouchstoneSweep(tmp_path / "v.s1p").impedance(f), z, rtol=1e-6)


def test_bad_touchstone_is_a_clear_error(tmp_path):
    p = tmp_path / "bad.s1p"
    p.write_text("# MHz S RI R 50\n7.0 banana 0.1\n")
    with pytest.raises(InputError, match="cannot be read"):
        TouchstoneSweep(p)
    with pytest.raises(InputError, match="not found"):
        TouchstoneSweep(tmp_path / "none.s1p")


def test_antenna_json_kinds(tmp_path):
    p = tmp_path / "a.json"
    p.write_text('{"kind": "fixed", "r_ohm": 12, "x_ohm": -150}')
    assert isinstance(load_antenna(p), FixedLoad)
    p.write_text('{"kind": "monopole", "height_m": 0, "radius_m": 0.01}')
    with pytest.raises(InputError, match="'height_m' must be > 0"):
        load_antenna(p)
    p.write_text('{"kind": "dish"}')
    with pytest.raises(InputError, match="'kind'"):
        load_antenna(p)
