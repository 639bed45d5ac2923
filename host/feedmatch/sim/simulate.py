"""The `simulate` job: figures of one state, or the exhaustive best, over frequency."""

from __future__ import annotations

from typing import Any

import numpy as np

from feedmatch.rf import bands
from feedmatch.rf.network import Network, best_state, evaluate
from feedmatch.seam.bank import side_name


def point(net: Network, f_hz: float, z_load: complex, l_code: int, c_code: int, shunt: int,
          power_w: float | None = None) -> dict[str, Any]:
    e = evaluate(net, f_hz, z_load, l_code, c_code, shunt, power_w)
    zin = complex(e["z_in"])
    out: dict[str, Any] = {
        "freq_hz": float(f_hz), "band": bands.band_of(f_hz),
        "z_load_ohm": [float(z_load.real), float(z_load.imag)],
        "l_code": int(l_code), "c_code": int(c_code), "shunt": side_name(shunt),
        "l_uh": float(net.l_table_uh()[l_code]), "c_pf": float(net.c_table_pf()[c_code]),
        "z_in_ohm": [zin.real, zin.imag], "gamma_mag": float(e["gamma_mag"]),
        "swr": float(e["swr"]), "return_loss_db": float(e["return_loss_db"]),
        "mismatch_loss_db": float(e["mismatch_loss_db"]), "efficiency": float(e["efficiency"]),
    }
    if power_w is not None:
        out["power_w"] = power_w
        out["v_cap_rms"] = float(e["v_cap_rms"])
        out["v_cap_peak"] = float(e["v_cap_rms"]) * np.sqrt(2)
        out["i_ind_rms"] = float(e["i_ind_rms"])
        out["p_load_w"] = float(e["p_load_w"])
    return out


def best_point(net: Network, f_hz: float, z_load: complex,
               power_w: float | None = None) -> dict[str, Any]:
    l, c, sh, _g = best_state(net, f_hz, z_load)
    return point(net, f_hz, z_load, l, c, sh, power_w)


def ratings(net: Network, antenna, band_names: list[str], power_w: float,
            target_swr: float = 2.0, points: int = 5) -> list[dict[str, Any]]:
    """Worst capacitor voltage and inductor current per band at the best states.

    For each band a few frequencies are matched exhaustively; the worst figures
    of the best states are what the parts must withstand in use.
    """
    rows = []
    for name in band_names:
        b = bands.by_name(name)
        fs = np.linspace(b.low_hz, b.high_hz, points)
        zs = antenna.impedance(fs)
        worst_v = worst_i = 0.0
        worst_swr = 0.0
        for f, z in zip(fs, zs):
            p = best_point(net, float(f), complex(z), power_w)
            worst_swr = max(worst_swr, p["swr"])
            worst_v = max(worst_v, p["v_cap_peak"])
            worst_i = max(worst_i, p["i_ind_rms"])
        rows.append({"band": name, "power_w": power_w, "worst_best_swr": worst_swr,
                     "matchable": worst_swr <= target_swr,
                     "v_cap_peak_max": worst_v, "i_ind_rms_max": worst_i})
    return rows
