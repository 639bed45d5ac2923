"""The link's frames across the seam: the firmware's own frame code (fmlogic.link), which
the serial client (board.link) and the hub (board.hub) speak; docs/protocol.md describes it."""

from __future__ import annotations

from fmlogic.link import LineReader, decode, encode

__all__ = ["LineReader", "decode", "encode"]
