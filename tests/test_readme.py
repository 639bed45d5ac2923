"""The README's example outputs are what the commands print today (see readme_examples.py).

From the cache of their runs while every file they executed is unchanged; else, and
with FEEDMATCH_README_LIVE=1, by running them for real."""

from __future__ import annotations

import json
import os

import pytest

from .readme_examples import README, blocks, cached_runs, check_all, check_cached


def test_readme_examples_are_real_output():
    text = README.read_text()
    assert len(blocks(text)) >= 3  # simulate, antenna, loads/score
    live = os.environ.get("FEEDMATCH_README_LIVE") == "1"
    problems = None if live else check_cached(text)
    how = "from the cache of their runs (tests/readme_runs.json)"
    if problems is None:
        problems = check_all()
        how = "run for real" + ("" if live else ": the cache is stale, refresh it with `make readme`")
    assert not problems, f"README drifted ({how}); refresh with `make readme`:\n\n" + "\n\n".join(problems)


def test_the_cache_is_refused_when_a_file_the_examples_ran_changes(tmp_path, monkeypatch):
    """A cache hit only while every executed source is unchanged: a changed byte in one
    of them, or a changed command, makes the check run the examples for real."""
    from . import readme_examples as rx

    text = README.read_text()
    if cached_runs(text) is None:
        pytest.skip("the README cache is stale here (the examples ran for real above)")
    doc = json.loads(rx.CACHE.read_text())
    assert any(f.startswith("firmware/fmlogic/") for f in doc["files"])  # the firmware's search ran
    assert any(f.startswith("host/feedmatch/rf/") for f in doc["files"])
    fake_root = tmp_path / "root"
    for f in doc["files"]:
        (fake_root / f).parent.mkdir(parents=True, exist_ok=True)
        (fake_root / f).write_bytes((rx.ROOT / f).read_bytes())
    monkeypatch.setattr(rx, "ROOT", fake_root)
    assert rx.cached_runs(text) is not None  # the same bytes: the same key
    victim = fake_root / next(f for f in doc["files"] if f.endswith(".py"))
    victim.write_bytes(victim.read_bytes() + b"\n# changed\n")
    assert rx.cached_runs(text) is None
    monkeypatch.undo()
    assert rx.cached_runs(text.replace("--seed 1", "--seed 2", 1)) is None  # a changed command
