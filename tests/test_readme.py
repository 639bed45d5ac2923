"""The README's example outputs are what the commands print today (see readme_examples.py)."""

from __future__ import annotations

from .readme_examples import README, blocks, check_all


def test_readme_examples_are_real_output():
    assert len(blocks(README.read_text())) >= 3  # simulate, antenna, loads/score
    problems = check_all()
    assert not problems, "README drifted; refresh with `make readme`:\n\n" + "\n\n".join(problems)
