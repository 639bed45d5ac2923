"""feedmatch: host tools for a remote automatic L-network matching unit."""

from __future__ import annotations

import sys
from pathlib import Path

__version__ = "0.1.0"

# The shared firmware logic (fmlogic) is installed alongside this package; in a
# plain checkout it sits in ../../firmware.  One source of truth either way.
_FW = Path(__file__).resolve().parents[2] / "firmware"
if (_FW / "fmlogic").is_dir() and str(_FW) not in sys.path:
    sys.path.insert(0, str(_FW))
