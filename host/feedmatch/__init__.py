"""feedmatch: host tools for a remote automatic L-network matching unit."""

from __future__ import annotations

__version__ = "0.1.0"

# The shared firmware logic is the top-level package fmlogic, installed from
# firmware/fmlogic beside this one; the board tree is package data
# (feedmatch.resources.FIRMWARE).  One source of truth either way.
