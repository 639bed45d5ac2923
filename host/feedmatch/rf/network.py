"""The relay-switched L-network: file format and a vectorised numpy model.

A state is (l_code, c_code, shunt).  Bit i of l_code puts inductors_uh[i] in
series (selected inductors add); bit i of c_code puts capacitors_pf[i] in
parallel; shunt "tx" puts the capacitor across the transmitter side (ahead of
the inductor), "ant" across the antenna side.  Each inductance L has series
resistance wL/inductor_q, each capacitance C parallel conductance
wC/capacitor_q; a missing or null Q is lossless.

Arrays of all states are indexed [shunt, l_code, c_code] with shunt 0 = tx,
1 = ant, matching the firmware's SHUNT_TX / SHUNT_ANT.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from feedmatch.errors import InputError
from feedmatch.jsonfile import check_keys, load_json, number, number_list
from feedmatch.resources import DATA
from feedmatch.seam import bank as seam
from feedmatch.seam.bank import MAX_BITS, network_range, parse_side

DEFAULT_NETWORK = DATA / "network_default.json"
# Typical strays of a relay-switched bank, from memory (not a particular
# datasheet): 1 pF across an open relay contact (small signal and power relays
# list 0.5-2 pF), 8 pF from each switched node to the chassis, 15 nH of series
# lead per element (about 1 nH per mm).  The drawn boxes carry them
# (sim.boxes), and the self-test's diagnosis assumes them for a real box.
STRAY_DEFAULTS = {"relay_open_pf": 1.0, "node_pf": 8.0, "lead_nh": 15.0}


@dataclass
class Network:
    """Element values of the banks (nominal or drawn) and their losses."""

    z0_ohm: float
    inductors_uh: list[float]
    capacitors_pf: list[float]
    inductor_q: float | None = None
    capacitor_q: float | None = None
    name: str = ""
    # Optional non-idealities, off by default so the model above is exact:
    # node-to-chassis capacitance at the input and output, per-element Q,
    # capacitance across each open relay contact, series lead inductance per element.
    stray_in_pf: float = 0.0
    stray_out_pf: float = 0.0
    inductor_q_each: list[float] | None = None
    capacitor_q_each: list[float] | None = None
    relay_open_pf: float = 0.0
    lead_nh: float = 0.0
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def n_l(self) -> int:
        return len(self.inductors_uh)

    @property
    def n_c(self) -> int:
        return len(self.capacitors_pf)

    @property
    def n_states(self) -> int:
        return 2 * (1 << self.n_l) * (1 << self.n_c)

    def l_table_uh(self) -> np.ndarray:
        """Inductance of every l_code (uH)."""
        return _code_table(self.inductors_uh)

    def c_table_pf(self) -> np.ndarray:
        return _code_table(self.capacitors_pf)

    def to_json(self) -> dict[str, Any]:
        d: dict[str, Any] = {"z0_ohm": self.z0_ohm, "inductors_uh": self.inductors_uh,
                             "capacitors_pf": self.capacitors_pf,
                             "inductor_q": self.inductor_q, "capacitor_q": self.capacitor_q}
        if self.name:
            d["name"] = self.name
        if self.stray_in_pf:
            d["stray_in_pf"] = self.stray_in_pf
        if self.stray_out_pf:
            d["stray_out_pf"] = self.stray_out_pf
        return d

    def board_section(self) -> dict[str, Any]:
        """The network as a board config carries it (feedmatch.seam.bank)."""
        return seam.network_section(self)

    def firmware_bank(self) -> seam.Bank:
        """The same network as the firmware's lnet.Bank (nominal values; feedmatch.seam.bank)."""
        return seam.bank_of_network(self)


def _bits(n: int) -> np.ndarray:
    codes = np.arange(1 << n)
    return ((codes[:, None] >> np.arange(n)[None, :]) & 1).astype(float)


def _code_table(values: list[float]) -> np.ndarray:
    return _bits(len(values)) @ np.asarray(values, dtype=float)


def _has_extras(net: Network) -> bool:
    return bool(net.inductor_q_each or net.capacitor_q_each or net.relay_open_pf or net.lead_nh)


def _q_each(values: list[float], each: list[float] | None, q: float | None) -> np.ndarray:
    if each:
        return np.asarray(each, dtype=float)
    return np.full(len(values), float(q) if q else np.inf)


def series_table(net: Network, f_hz) -> np.ndarray:
    """Series impedance of every l_code: shape f.shape + (2^nL,)."""
    w = 2 * np.pi * np.asarray(f_hz, dtype=float)[..., None]
    if not _has_extras(net):
        xl = w * net.l_table_uh() * 1e-6
        rl = xl / net.inductor_q if net.inductor_q else 0.0
        return rl + 1j * xl
    ind = np.asarray(net.inductors_uh) * 1e-6
    q = _q_each(net.inductors_uh, net.inductor_q_each, net.inductor_q)
    z = w * ind / q + 1j * w * (ind + net.lead_nh * 1e-9)
    if net.relay_open_pf:
        # The relay across an inductor is open when the inductor is in circuit.
        z = 1.0 / (1.0 / z + 1j * w * net.relay_open_pf * 1e-12)
    return z @ _bits(net.n_l).T


def shunt_table(net: Network, f_hz) -> np.ndarray:
    """Shunt admittance of every c_code: shape f.shape + (2^nC,)."""
    w = 2 * np.pi * np.asarray(f_hz, dtype=float)[..., None]
    if not _has_extras(net):
        bc = w * net.c_table_pf() * 1e-12
        gc = bc / net.capacitor_q if net.capacitor_q else 0.0
        return gc + 1j * bc
    cap = np.asarray(net.capacitors_pf) * 1e-12
    q = _q_each(net.capacitors_pf, net.capacitor_q_each, net.capacitor_q)
    y = w * cap / q + 1j * w * cap
    if net.lead_nh:
        y = 1.0 / (1.0 / y + 1j * w * net.lead_nh * 1e-9)
    bits = _bits(net.n_c)
    out = y @ bits.T
    if net.relay_open_pf:
        # A capacitor whose relay is open still hangs on through the contact capacitance.
        yo = 1.0 / (1.0 / (1j * w * cap) + 1.0 / (1j * w * net.relay_open_pf * 1e-12))
        out = out + yo @ (1.0 - bits).T
    return out


_KEYS = {"z0_ohm", "inductors_uh", "capacitors_pf", "inductor_q", "capacitor_q", "name",
         "stray_in_pf", "stray_out_pf", "comment"}


def network_from_dict(data: dict[str, Any], where: str = "network") -> Network:
    """Validate a network description; every error names the field."""
    check_keys(data, _KEYS, {"z0_ohm", "inductors_uh", "capacitors_pf"}, where)
    # The firmware's validator's ranges (feedmatch.seam.bank): a file the host reads is one a board takes.
    z0 = number(data, "z0_ohm", where, minimum=network_range("z0_ohm")[0], maximum=network_range("z0_ohm")[1])
    ind = number_list(data, "inductors_uh", where, max_len=MAX_BITS)
    cap = number_list(data, "capacitors_pf", where, max_len=MAX_BITS)
    ql = number(data, "inductor_q", where, optional=True, minimum=network_range("inductor_q")[0],
                maximum=network_range("inductor_q")[1])
    qc = number(data, "capacitor_q", where, optional=True, minimum=network_range("capacitor_q")[0],
                maximum=network_range("capacitor_q")[1])
    sin = number(data, "stray_in_pf", where, minimum=0.0, optional=True, default=0.0)
    sout = number(data, "stray_out_pf", where, minimum=0.0, optional=True, default=0.0)
    name = data.get("name", "")
    if not isinstance(name, str):
        raise InputError(f"{where}: field 'name' must be a string")
    return Network(z0, ind, cap, ql, qc, name, sin or 0.0, sout or 0.0)


def load_network(path: str | Path | None = None) -> Network:
    p = Path(path) if path else DEFAULT_NETWORK
    return network_from_dict(load_json(p, "network"), f"network file {p}")


def _cascade(zs, yc, zl, shunt_ant: bool, y_in=0.0, y_out=0.0):
    """Input impedance and, per unit input voltage, branch quantities.

    Returns z_in, i_l (current in the inductor), v_c (voltage across the
    capacitor), p_load (power into the load), all for V_in = 1 V.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        yl = 1.0 / zl
        if shunt_ant:
            # Capacitor (and output stray) across the load, then the series inductor.
            zp = 1.0 / (yl + yc + y_out)
            z_in = zs + zp
            i_l = 1.0 / z_in
            v_c = i_l * zp
            p_load = np.abs(v_c) ** 2 * yl.real
        else:
            # Series inductor into the load, capacitor across the input (V_in).
            i_l = 1.0 / (zs + 1.0 / (yl + y_out))
            z_in = 1.0 / (i_l + yc)
            v_c = np.ones_like(i_l)
            p_load = np.abs(1.0 - i_l * zs) ** 2 * yl.real
        if np.any(y_in):
            z_in = 1.0 / (1.0 / z_in + y_in)
    return z_in, i_l, v_c, p_load


def _stray_y(net: Network, f_hz):
    w = 2 * np.pi * np.asarray(f_hz, dtype=float)
    return 1j * w * net.stray_in_pf * 1e-12, 1j * w * net.stray_out_pf * 1e-12


def all_states_zin(net: Network, f_hz, z_load) -> np.ndarray:
    """Input impedance of every state: shape f.shape + (2, 2^nL, 2^nC).

    f_hz and z_load broadcast together (one load per frequency).
    """
    f = np.asarray(f_hz, dtype=float)
    zl = np.asarray(z_load, dtype=complex)
    f, zl = np.broadcast_arrays(f, zl)
    fe = f[..., None, None]
    zs = series_table(net, f)[..., :, None]
    yc = shunt_table(net, f)[..., None, :]
    y_in, y_out = _stray_y(net, fe)
    zle = zl[..., None, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        z_tx, z_ant = lnet_zin(zs, yc, 1.0 / zle + y_out)
        out = np.stack([z_tx, z_ant], axis=-3)
        if net.stray_in_pf:
            out = 1.0 / (1.0 / out + y_in[..., None, :, :])
    return out


def lnet_zin(zs, yc, yl):
    """The L-network's input impedance, the host's one formula (arrays broadcast):
    series impedance zs, shunt admittance yc, load admittance yl (the output
    stray included).  Returns (capacitor on the transmitter side, capacitor on
    the antenna side).  The numpy twin of the firmware's fmlogic.lnet.z_in, held
    to it by a test; StateTable.zin is its in-place twin for speed, _cascade adds
    the branch currents, and tests hold both to this one."""
    return lnet_zin_tx(zs, yc, yl), lnet_zin_ant(zs, yc, yl)


def lnet_zin_tx(zs, yc, yl):
    """lnet_zin with the capacitor across the transmitter side only."""
    return 1.0 / (1.0 / (zs + 1.0 / yl) + yc)


def lnet_zin_ant(zs, yc, yl):
    """lnet_zin with the capacitor across the antenna side only."""
    return zs + 1.0 / (yl + yc)


def gamma(z_in, z0: float) -> np.ndarray:
    """Complex reflection coefficient against a real reference z0."""
    z = np.asarray(z_in, dtype=complex)
    with np.errstate(divide="ignore", invalid="ignore"):
        g = (z - z0) / (z + z0)
    return np.where(np.isfinite(g), g, 1.0)


Z0_OHM = 50.0  # the reference impedance of the line, the radio and every SWR figure


def swr_of(gmag) -> np.ndarray:
    """SWR of |gamma|: the host's one conversion (the firmware has its own in
    fmlogic.swr, with its board-side sentinels).  Edges: |gamma| >= 1 and inf
    give inf; NaN stays NaN (no figure, never a match); below 0 (rounding) is 0."""
    g = np.asarray(gmag, dtype=float)
    gc = np.clip(g, 0.0, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.where(gc < 1.0, (1 + gc) / np.maximum(1 - gc, 1e-300), np.inf)
    return np.where(np.isnan(g), np.nan, s)


def return_loss_db(gmag) -> np.ndarray:
    g = np.asarray(gmag, dtype=float)
    with np.errstate(divide="ignore"):
        return -20 * np.log10(np.maximum(g, 1e-15))


def mismatch_loss_db(gmag) -> np.ndarray:
    g = np.asarray(gmag, dtype=float)
    with np.errstate(divide="ignore"):
        return -10 * np.log10(np.maximum(1 - g * g, 1e-300))


def evaluate(net: Network, f_hz, z_load, l_code: int, c_code: int, shunt: int | str,
             power_w: float | None = None) -> dict[str, Any]:
    """All figures for one state; f_hz/z_load may be arrays (a sweep).

    power_w is the forward (incident) power from a z0 source; the capacitor
    voltage and inductor current are RMS values at that power.
    """
    sh = parse_side(shunt)
    if not (0 <= l_code < (1 << net.n_l)):
        raise InputError(f"l_code must be 0..{(1 << net.n_l) - 1}, got {l_code}")
    if not (0 <= c_code < (1 << net.n_c)):
        raise InputError(f"c_code must be 0..{(1 << net.n_c) - 1}, got {c_code}")
    f = np.asarray(f_hz, dtype=float)
    zl = np.asarray(z_load, dtype=complex)
    f, zl = np.broadcast_arrays(f, zl)
    zs = series_table(net, f)[..., l_code]
    yc = shunt_table(net, f)[..., c_code]
    y_in, y_out = _stray_y(net, f)
    z_in, i_l, v_c, p_load = _cascade(zs, yc, zl, bool(sh), y_in, y_out)
    g = gamma(z_in, net.z0_ohm)
    gm = np.abs(g)
    with np.errstate(divide="ignore", invalid="ignore"):
        p_in = (1.0 / np.conj(z_in)).real  # V_in = 1 V
        eff = np.where(p_in > 0, p_load / p_in, 0.0)
    out: dict[str, Any] = {"z_in": z_in, "gamma": g, "gamma_mag": gm, "swr": swr_of(gm),
                           "return_loss_db": return_loss_db(gm),
                           "mismatch_loss_db": mismatch_loss_db(gm), "efficiency": eff}
    if power_w is not None:
        v_in = np.abs(1 + g) * np.sqrt(power_w * net.z0_ohm)
        out["v_cap_rms"] = np.abs(v_c) * v_in
        out["i_ind_rms"] = np.abs(i_l) * v_in
        out["p_load_w"] = power_w * (1 - gm**2) * eff
    return out


def oracle(gm: np.ndarray) -> tuple[int, int, int, float]:
    """The exhaustive optimum of a |gamma| table of shape (2, 2^nL, 2^nC) (from
    all_states_zin or StateTable): (l_code, c_code, shunt, |gamma|).  The one
    oracle; ties go to the first state in (shunt, l, c) order."""
    idx = int(np.argmin(gm))
    sh, l, c = np.unravel_index(idx, gm.shape)
    return int(l), int(c), int(sh), float(gm.flat[idx])


def best_state(net: Network, f_hz: float, z_load: complex) -> tuple[int, int, int, float]:
    """Exhaustive optimum (the oracle): (l_code, c_code, shunt, |gamma|)."""
    return oracle(np.abs(gamma(all_states_zin(net, f_hz, z_load), net.z0_ohm)))


class StateTable:
    """Every state of one network evaluated into reused buffers.

    Fresh arrays of this size cost more to allocate (page faults) than the
    arithmetic itself, so the scorer and the benchmark keep one of these per
    process.  gamma() returns a view into the table's buffer, valid until the
    next call.  Loads broadcast no further: one frequency and one load.
    """

    def __init__(self, net: Network):
        self.net = net
        shape = (2, 1 << net.n_l, 1 << net.n_c)
        self._g = np.empty(shape, dtype=complex)
        self._b = np.empty(shape, dtype=complex)
        self._m = np.empty(shape, dtype=float)

    def zin(self, f_hz: float, z_load: complex) -> np.ndarray:
        net = self.net
        zs = series_table(net, f_hz)[:, None]
        yc = shunt_table(net, f_hz)[None, :]
        y_in, y_out = _stray_y(net, f_hz)
        zl = complex(z_load)
        yl = (1.0 / zl if zl != 0 else 1e12) + complex(y_out)
        a = self._g
        np.add(zs, 1.0 / (yl + yc), out=a[1])  # capacitor across the antenna side
        np.add(1.0 / (zs + 1.0 / yl), yc, out=a[0])  # capacitor across the transmitter side
        np.reciprocal(a[0], out=a[0])
        if net.stray_in_pf:
            np.reciprocal(a, out=a)
            np.add(a, complex(y_in), out=a)
            np.reciprocal(a, out=a)
        return a

    def gamma(self, f_hz: float, z_load: complex) -> np.ndarray:
        a = self.zin(f_hz, z_load)
        z0 = self.net.z0_ohm
        np.add(a, z0, out=self._b)
        np.subtract(a, z0, out=a)
        np.divide(a, self._b, out=a)
        return a

    def gamma_mag(self, f_hz: float, z_load: complex) -> np.ndarray:
        return np.abs(self.gamma(f_hz, z_load), out=self._m)
