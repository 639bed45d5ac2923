"""`feedmatch selftest` over the link: the box steps its relays (firmware
`selftest` request, under its hot-switch gate), the host picks the second
reference and diagnoses (rf.diagnose).

Two steps: from the box's tuned state (tuned first when it is not), with one
reading through the bypass (the load's own |gamma|), then from the reference
second_ref() picks on the other capacitor side.  The model is
what the box knows of itself: its element values (learned ones where its config
holds a correction), Qs, the coupler leak from its calibration, and the typical
build strays (rf.network.STRAY_DEFAULTS).
"""

from __future__ import annotations

import time
from typing import Any

from feedmatch.errors import BoardRefused, LinkError
from feedmatch.rf.diagnose import Model, Readings, diagnose, second_ref
from feedmatch.rf.network import STRAY_DEFAULTS
from feedmatch.seam.bank import side_name


def model_from_config(net: dict[str, Any], correction: dict[str, Any] | None, det: dict[str, Any]) -> Model:
    """The diagnosis model from the board's config sections."""
    corr = correction or {}
    s = STRAY_DEFAULTS
    return Model(list(corr.get("inductors_uh", net["inductors_uh"])),
                 list(corr.get("capacitors_pf", net["capacitors_pf"])),
                 float(net.get("inductor_q") or 0.0), float(net.get("capacitor_q") or 0.0),
                 float(net.get("z0_ohm", 50.0)), float(det.get("leak", 0.0)),
                 s["node_pf"], s["node_pf"], s["relay_open_pf"], s["lead_nh"])


def _step(link, args: dict[str, Any], nl: int, nc: int) -> tuple[list, list[float], dict[str, Any]]:
    from feedmatch.seam.logic import plan

    try:
        try:
            ans = link.request("selftest", args, timeout=15.0, retries=0)
        except BoardRefused as e:
            if e.why != "busy":
                raise
            # The box began a tune of its own (its state was above the retune SWR):
            # let it end, then step from the asked reference.
            link.wait_event("record", timeout=10.0)
            ans = link.request("selftest", args, timeout=15.0, retries=0)
    except BoardRefused as e:
        raise LinkError(f"the board refused the self-test: {e.words}") from None
    ref = tuple(ans["ref"])
    states = plan(ref, nl, nc, bool(ans.get("side", True)))[:len(ans["g"])]
    # A reading the box could not use (-1) is left out with its state.
    keep = [i for i, g in enumerate(ans["g"]) if g >= 0]
    return [states[i] for i in keep], [ans["g"][i] / 1000.0 for i in keep], ans


def run_selftest(link, wait_s: float = 20.0, say=None) -> dict[str, Any]:
    """The self-test on a board with a tune carrier keyed: readings, faults, untested elements."""
    say = say or (lambda _t: None)
    net = link.request("cfg-get", {"section": "network"})["value"]
    det = link.request("cfg-get", {"section": "detector"})["value"]
    try:
        corr = link.request("cfg-get", {"section": "correction"})["value"]
    except BoardRefused:
        corr = None
    m = model_from_config(net, corr, det)
    nl, nc = len(m.inductors_uh), len(m.capacitors_pf)
    st = link.request("status")
    tuned_before = st["state"] in ("locked", "best-effort") and not st["relays"][3]
    if not tuned_before:
        say("tuning first: the test steps each relay from the tuned state")
        before = st["seq"]
        try:
            link.request("tune", {"freq_hz": 0.0})
        except BoardRefused as e:
            raise LinkError(f"the board refused to tune first: {e.words}") from None
        if link.wait_event("record", lambda o: o.get("seq", 0) > before, timeout=wait_s) is None:
            raise LinkError(f"no tune result within {wait_s:g} s (is a carrier keyed in the tune window?)")
    s1, g1, a1 = _step(link, {"bypass": True}, nl, nc)
    if a1.get("stopped"):
        raise LinkError(f"the self-test stopped: {a1['stopped']}")
    f = float(a1.get("freq_hz") or 0.0)
    if f <= 0:
        raise LinkError("the board counted no frequency: the self-test needs the carrier's frequency")
    gb = a1.get("gb", -1)
    g_byp = gb / 1000.0 if isinstance(gb, int) and gb >= 0 else None
    ref2 = second_ref(m, Readings(f, s1, g1, g_byp))
    say(f"second step from L{ref2[0]} C{ref2[1]} {side_name(ref2[2])}")
    time.sleep(0.05)
    s2, g2, a2 = _step(link, {"l": ref2[0], "c": ref2[1], "sh": ref2[2], "side": False}, nl, nc)
    if a2.get("stopped"):
        raise LinkError(f"the self-test stopped: {a2['stopped']}")
    res = diagnose(m, Readings(f, s1 + s2, g1 + g2, g_byp))
    res.update({"readings": len(g1) + len(g2) + (g_byp is not None), "freq_hz": f, "fwd_w": a1.get("fwd_w"),
                "refs": [list(s1[0]), list(s2[0])], "tuned_first": not tuned_before,
                "values": {"inductors_uh": m.inductors_uh, "capacitors_pf": m.capacitors_pf}})
    return res
