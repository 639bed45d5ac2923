"""What a preset saves the operator: the first carrier after a band change.

The firmware's Controller runs in this process on the demo station's model
(the NEC-2 vertical, the shipped network, the station's detector), with
virtual time.  It learns one frequency per band once, then follows a seeded
sequence of band changes twice: with the box left as it was (the carrier
finds the previous band's state), and with a `preset` for the new frequency
before the carrier (what `feedmatch follow` does).  For each change it notes
the true SWR the first carrier meets, the readings the tune took, and any
relay switched above the hot-switch limit.
"""

from __future__ import annotations

import random
import statistics
import tempfile
from typing import Any

from fmlogic import link
from fmlogic.controller import Controller

from feedmatch.sim.inproc import InProcessBoard
from feedmatch.sim.station import load_station

# One frequency per band the shipped network matches on the demo vertical.
FREQS = (7.1e6, 10.12e6, 14.2e6, 18.1e6, 21.2e6, 24.94e6, 28.5e6)
TUNE_W = 10.0


def _run(ctl: Controller, until, steps: int = 3000) -> bool:
    for _ in range(steps):
        ctl.step()
        if until(ctl):
            return True
    return False


def _session(preset: bool, changes: int, seed: int) -> dict[str, Any]:
    st = load_station()
    model = st.hardware()
    board = InProcessBoard(model)
    hot_sets = [0]  # relay changes made while a carrier was on (allowed below the limit, but not cold)
    counting = [False]

    def on_set(b: InProcessBoard) -> None:
        if counting[0] and model.tx_w > 0:
            hot_sets[0] += 1
    board.on_set = on_set
    with tempfile.TemporaryDirectory() as d:
        ctl = Controller(board, st.board_config, d)
        for f in FREQS:  # learn each band once
            n = ctl.rec.seq
            model.key(TUNE_W, f)
            _run(ctl, lambda c, n=n: c.rec.seq > n)
            model.key(0, 0)
            _run(ctl, lambda c: False, 5)
        rng = random.Random(seed)
        counting[0] = True
        first, readings, locked_first = [], [], 0
        last = FREQS[-1]
        for k in range(changes):
            base = rng.choice([x for x in FREQS if x != last])
            f = base + rng.uniform(-8e3, 8e3)  # near the learned frequency, within its memory reach
            last = base
            if preset:
                board.inbox += link.encode("Q", k + 1, "preset", {"freq_hz": f})
                _run(ctl, lambda c: False, 5)
                board.outbox.clear()
            n = ctl.rec.seq
            model.key(TUNE_W, f)
            first.append(model.swr())  # what the first carrier meets, before any relay moves
            _run(ctl, lambda c, n=n: c.rec.seq > n and c.tune is None)
            recs = ctl.rec.since(n, 10)
            if recs:
                rec = recs[-1]
                readings.append(rec["n"])
                locked_first += rec["n"] == 1 and rec["outcome"] == "locked"
            model.key(0, 0)
            _run(ctl, lambda c: False, 5)
    return {"first_swr_median": statistics.median(first),
            "first_swr_above_3": sum(s > 3.0 for s in first) / len(first),
            "readings_median": statistics.median(readings) if readings else None,
            "one_reading_rate": locked_first / changes, "hot_switches": len(model.violations),
            "switches_under_carrier": hot_sets[0] / changes}


def bench_presets(changes: int = 40, seed: int = 7) -> dict[str, Any]:
    a = _session(False, changes, seed)
    b = _session(True, changes, seed)
    return {"band_changes": changes,
            "first_carrier_swr_median_no_preset": round(a["first_swr_median"], 2),
            "first_carrier_swr_median_preset": round(b["first_swr_median"], 2),
            "first_carrier_above_swr3_no_preset": round(a["first_swr_above_3"], 3),
            "first_carrier_above_swr3_preset": round(b["first_swr_above_3"], 3),
            "preset_one_reading_rate": round(b["one_reading_rate"], 3),
            "no_preset_one_reading_rate": round(a["one_reading_rate"], 3),
            "relay_changes_under_carrier_per_change_no_preset": round(a["switches_under_carrier"], 2),
            "relay_changes_under_carrier_per_change_preset": round(b["switches_under_carrier"], 2),
            "preset_hot_switches": b["hot_switches"] + a["hot_switches"]}


def bench_presets_new(n: int = 200, seed: int = 11) -> dict[str, Any]:
    """Presets where nothing is stored, from the antenna the box measured.

    The demo's first two sessions are played (its script twice) and logged; from
    those records alone the antenna curve is measured (sim/curve.py: the demo
    box's nominal values, the coupler and node strays learned from the traces)
    and the preset computation built (sim/curvepreset.py).  Then, for n
    frequencies drawn in the 40-10 m bands outside every tuned memory bin, with
    the board's memory set aside (so each is a frequency with nothing stored),
    the computed state is sent in a preset request with no carrier, and the
    carrier comes: the true SWR it meets, the readings its tune takes, relay
    changes under the carrier and switches above the hot-switch limit; how many tunes
    ended on a first reading that bore the host's prediction out (expect_swr, no search),
    and the true SWR the carrier is left with (median, worst)."""
    from fmlogic import config as fcfg

    from feedmatch.rf import bands
    from feedmatch.sim.curve import ELEMENT_SIGMA_NOMINAL, Detectors, curve_points, learn_extras, solve_records
    from feedmatch.sim.curvepreset import CurvePresets, box_leak, box_network

    st = load_station()
    model = st.hardware()
    board = InProcessBoard(model)
    recs: list[dict[str, Any]] = []
    hot_sets = [0]
    counting = [False]

    def on_set(b: InProcessBoard) -> None:
        if counting[0] and model.tx_w > 0:
            hot_sets[0] += 1
    board.on_set = on_set
    with tempfile.TemporaryDirectory() as d:
        ctl = Controller(board, st.board_config, d)
        emit = ctl._event

        def catch(word, obj):
            if word == "record":
                recs.append(dict(obj))
            emit(word, obj)
        ctl._event = catch
        for _ in range(2):
            for step in st.script:
                k = ctl.rec.seq
                model.key(step.tune_w, step.freq_hz)
                _run(ctl, lambda c, k=k: c.rec.seq > k and c.tune is None)
                model.key(0, 0)
                _run(ctl, lambda c: False, 5)
        bank = ctl.bank
        leak = float(ctl.cfg["detector"]["leak"])
        from feedmatch.sim.curve import _trace_of

        extras = learn_extras(bank, [t for t in (_trace_of(r) for r in recs) if t is not None], leak,
                              element_sigma=ELEMENT_SIGMA_NOMINAL, det=Detectors.of_section(ctl.cfg["detector"]))
        bin_hz = float(fcfg.DEFAULTS["memory"]["bin_hz"])
        pts = curve_points(solve_records(recs, bank, False, leak, extras), bin_hz)
        planner = CurvePresets.from_points(pts, box_network(bank, extras), box_leak(extras))
        tuned = {int(r["freq_hz"] // bin_hz) for r in recs if r.get("freq_hz")}
        names = ("40m", "30m", "20m", "17m", "15m", "12m", "10m")
        rng = random.Random(seed)
        counting[0] = True
        first, readings, offered, provable, carrier_sets = [], [], 0, [], []
        after, as_predicted = [], 0
        changes = 0
        while changes < n:
            b = bands.by_name(rng.choice(names))
            f = round(rng.uniform(b.low_hz + 2e3, b.high_hz - 2e3), -2)
            if int(f // bin_hz) in tuned:
                continue
            changes += 1
            ctl.mem.n = 0  # nothing stored (the memory set aside), as on a frequency far from any tuned one
            plan = planner.plan(f)
            if plan is not None:
                offered += 1
                board.inbox += link.encode("Q", changes, "preset", {"freq_hz": f, "state": plan["state"],
                                                                    "swr": plan["swr"],
                                                                    "expect_swr": plan["expect_swr"]})
                _run(ctl, lambda c: False, 5)
                board.outbox.clear()
            k = ctl.rec.seq
            before_sets = hot_sets[0]
            model.key(TUNE_W, f)
            first.append(model.swr())
            _run(ctl, lambda c, k=k: c.rec.seq > k and c.tune is None)
            got = ctl.rec.since(k, 10)
            # Where the box cannot prove the target at all (its best state reads above the
            # accept level), the recall searches on whatever the preset: counted apart.  One
            # entry per change (no record: the carrier met the preset and nothing tuned), so
            # it stays aligned with carrier_sets.
            provable.append(bool(got) and got[-1]["outcome"] == "locked")
            if got:
                readings.append(got[-1]["n"])
                # The first reading bore the host's prediction out: the tune ended on it.
                as_predicted += str(got[-1].get("why", "")).startswith("preset as predicted")
            after.append(model.swr())  # the true SWR the carrier is left with
            model.key(0, 0)
            _run(ctl, lambda c: False, 5)
            carrier_sets.append(hot_sets[0] - before_sets)
    return {"new_changes": n, "new_offered_rate": round(offered / n, 3),
            "new_first_carrier_swr2_rate": round(sum(s <= 2.0 for s in first) / n, 3),
            "new_first_carrier_swr_median": round(statistics.median(first), 2),
            "new_median_readings": statistics.median(readings) if readings else None,
            "new_relay_changes_under_carrier_per_change": round(hot_sets[0] / n, 3),
            "new_locked_rate": round(sum(provable) / n, 3),
            "new_relay_changes_under_carrier_per_locked_change": round(
                sum(c for c, p in zip(carrier_sets, provable) if p) / max(sum(provable), 1), 3),
            "new_as_predicted_rate": round(as_predicted / n, 3),
            "new_after_swr_median": round(statistics.median(after), 2),
            "new_after_swr_max": round(max(after), 2),
            "new_hot_switches": len(model.violations), "new_curve_points": len(pts)}
