"""A heap that lasts: the real controller on the single-precision unix port at a 256 KB heap
(its 64-bit objects about twice the chip's: stricter than the Pico's 246 KB), the loads
moving up one memory bin a round so that every tune is a cold search storing a new bin,
the host's backfill asking for records after every tune.  Before the controller collected
within a tune (in the relays' settling wait) this ran out of heap from the 62nd tune with
48 KB nominally free and no free block over 864 bytes; the long run (5000 tunes, the
largest free block every 100) is the bench's group `life`."""

from __future__ import annotations

import pytest
from feedmatch.bench.life import DRIFT_HZ, run_unix, unix_port


def test_cold_searches_in_a_row_never_run_the_small_heap_out():
    mp, kind = unix_port()
    if kind != "float32":
        pytest.skip("the single-precision unix port is not beside the checkout (../shared/rp2040)")
    r = run_unix(160, 256, 40, micropython=mp, timeout_s=600.0, drift_hz=DRIFT_HZ)
    assert r["done"] == (160, 0), (r["errors"][:3], r.get("tail"))
    # Every tune is a new bin: the drift reached the run (8 loads a round, 20 rounds).
    assert len(r["tunes"]) == 160 and all(t["records"] == 1 for t in r["tunes"])
    # The largest free block at each log (HEAP every 40 tunes and at the end) stays above
    # the 1 KB a cold search's dicts and strings ask for in one piece.
    assert len(r["heap"]) == 5
    assert min(h[2] for h in r["heap"]) > 4096
