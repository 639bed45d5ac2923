"""The hunt's stored grid (fmlogic/hunt_grid.py) is the grid hunt._build() computes."""

from __future__ import annotations

import os
import sys

from fmlogic import hunt

from ..conftest import FIRMWARE


def _render() -> str:
    g, u, r, n = hunt._build()

    def lit(b: bytes, name: str) -> str:
        return "\n".join([f"{name} = ("] + ["    " + repr(b[i:i + 32]) for i in range(0, len(b), 32)] + [")"])

    head = (FIRMWARE / "fmlogic" / "hunt_grid.py").read_text().split("N = ", 1)[0]
    return head + f"N = {n}\n" + "\n".join([lit(g.tobytes(), "GRID"), lit(u.tobytes(), "UU"),
                                             lit(bytes(r), "RING")]) + "\n"


def test_the_stored_grid_is_the_built_grid():
    assert sys.byteorder == "little"  # the stored arrays are little-endian, as every board
    text = _render()
    path = FIRMWARE / "fmlogic" / "hunt_grid.py"
    if os.environ.get("FEEDMATCH_WRITE_GRID") == "1":
        path.write_text(text)
    assert path.read_text() == text
    g, u, r, n = hunt._build()
    assert (hunt.GRID, hunt.UU, hunt.RING, hunt.N) == (g, u, r, n)
