"""The L-network design equations in closed form (lossless elements).

For a load Z = R + jX at angular frequency w and a real source resistance z0,
the low-pass L-network (series inductor, shunt capacitor) matches exactly in
one or both of two arrangements:

* capacitor across the load ("ant"): with Y = 1/Z = G + jB the shunt arm
  brings the susceptance to B' where G / (G^2 + B'^2) = z0, i.e.
  B'^2 = G/z0 - G^2 (needs G <= 1/z0); the series arm then cancels the
  remaining reactance B' / (G^2 + B'^2);
* capacitor across the source ("tx"): the series arm brings the reactance to
  X' where R / (R^2 + X'^2) = 1/z0, i.e. X'^2 = R z0 - R^2 (needs R <= z0); the
  shunt arm cancels the remaining susceptance X' / (R^2 + X'^2).

With a purely resistive load these reduce to the textbook form Q = sqrt(Rhigh /
Rlow - 1), series reactance Q * Rlow, shunt reactance Rhigh / Q (Bowick, "RF
Circuit Design", 2nd ed., ch. 4; the ARRL Handbook's L-network equations).
Only solutions with a positive inductance and a positive capacitance are
kept: this network has no series capacitor and no shunt inductor.
"""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class LSolution:
    shunt: str       # "tx" or "ant": which side the capacitor sits on
    l_uh: float      # series inductance, uH
    c_pf: float      # shunt capacitance, pF
    xs_ohm: float    # series reactance, ohm
    bp_s: float      # shunt susceptance, S


def l_network(z_load: complex, f_hz: float, z0_ohm: float = 50.0) -> list[LSolution]:
    """Every exact lossless match of z_load to z0 with series L and shunt C."""
    w = 2 * math.pi * f_hz
    r, x = z_load.real, z_load.imag
    out: list[LSolution] = []
    if r <= 0 or f_hz <= 0:
        return out
    y = 1 / z_load
    g, b = y.real, y.imag
    d = g / z0_ohm - g * g
    if d >= 0:                                   # capacitor across the load
        for bt in (math.sqrt(d), -math.sqrt(d)):
            bc = bt - b
            xs = bt / (g * g + bt * bt)
            if bc >= 0 and xs >= 0:
                out.append(LSolution("ant", xs / w * 1e6, bc / w * 1e12, xs, bc))
    d = r * z0_ohm - r * r
    if d >= 0:                                   # capacitor across the source
        for xt in (math.sqrt(d), -math.sqrt(d)):
            xs = xt - x
            bc = xt / (r * r + xt * xt)
            if xs >= 0 and bc >= 0:
                out.append(LSolution("tx", xs / w * 1e6, bc / w * 1e12, xs, bc))
    return out
