"""The passive watch (logbook.watch): an element that stopped acting or moved,
named from the tunes' traces alone, and its line in report and on the page.

Check values: the fault a test injects into the simulated box (the fault kinds
of fmlogic.selftest) is the one the watch must name, with the element's
nominal value from the shipped network file; the model of the readings is the
network model held to scikit-rf in test_network.py.
"""

from __future__ import annotations

import json

import pytest
from feedmatch.logbook.watch import watch, watch_lines, watch_logbook
from feedmatch.resources import DATA
from feedmatch.rf.network import load_network
from feedmatch.sim.boxes import draw_box
from feedmatch.sim.faults import NONE, parse_faults
from feedmatch.sim.loads import smith_loads
from feedmatch.sim.scorer import ScoreConfig, score_one
from feedmatch.sim.selftest import model_of

NET = load_network()


def _records(spec: str, n: int, seed: int = 7001) -> tuple[list[dict], object]:
    box = draw_box(NET, seed, 0.05, "default")
    faults = parse_faults(spec, NET) if spec else NONE
    recs = []
    for i, ld in enumerate(smith_loads(n, seed=seed)):
        r = score_one(ld, box.network, NET, ScoreConfig(strategy="model", detector=box.detector, faults=faults),
                      seed=i)
        tr = [x for s in (r.get("trace") or []) for x in (int(s[0]), int(s[1]), int(s[2]), int(round(s[3] * 1000)))]
        recs.append({"freq_hz": ld.freq_hz, "trace": tr, "seq": i + 1})
    return recs, box


@pytest.mark.parametrize("spec,value", [("C4:stuck-out", "160 pF"), ("L3:stuck-in", "0.8 uH")])
def test_a_stuck_element_is_named_from_the_tunes_alone(spec, value):
    recs, box = _records(spec, 30)
    res = watch(model_of(NET, box.detector.calibrated_leak()), recs)
    el, kind = spec.split(":")
    f = res["finding"]
    assert f is not None and (f["element"], f["kind"]) == (el, kind), res["windows"]
    assert f["value"] == value and value in f["words"]


def test_a_healthy_box_is_left_alone_and_too_few_tunes_are_said():
    recs, box = _records("", 30, seed=7502)
    m = model_of(NET, box.detector.calibrated_leak())
    res = watch(m, recs)
    assert res["finding"] is None, res["windows"]
    short = watch(m, recs[:5])
    assert short["finding"] is None and "too few tunes" in short["note"]


def test_the_report_line_and_a_record_without_a_trace():
    recs, _ = _records("C4:stuck-out", 30)
    recs.insert(3, {"freq_hz": 14.2e6, "outcome": "preset"})  # no trace: skipped, not an error
    rows = [{"raw": json.dumps(r), "board_id": "hollow-oak-1"} for r in recs]
    sections = {"hollow-oak-1": {"network": json.loads((DATA / "network_default.json").read_text())}}
    found = watch_logbook(rows, sections)
    lines = watch_lines(found)
    assert len(lines) == 1 and lines[0].startswith("parts: CHECK C4 (160 pF) stopped acting")
