"""What the commands share: argparse types, the port options and link, the SIGTERM
helper of the long-running commands, and the board's state in words."""

from __future__ import annotations

import argparse
import math

from feedmatch.errors import InputError
from feedmatch.seam.bank import side_name, state_values


def watts(text: str) -> float:
    """argparse type: a transmitter power in W."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"needs a power in W, got '{text}'") from None
    if not (math.isfinite(v) and 0.0 < v <= 10000.0):
        raise argparse.ArgumentTypeError(f"needs a power above 0 and up to 10000 W, got '{text}'")
    return v


def seed_number(text: str) -> int:
    """argparse type: a random seed (numpy takes 0 to 2**32 - 1)."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"needs a whole number, got '{text}'") from None
    if not 0 <= v < 2 ** 32:
        raise argparse.ArgumentTypeError(f"needs 0 to {2 ** 32 - 1}, got '{text}'")
    return v


def check_link_options(a: argparse.Namespace) -> None:
    """--timeout and --baud within their ranges, before any port is opened (one line, exit 2)."""
    import math

    if not (math.isfinite(a.timeout) and 0.1 <= a.timeout <= 120):
        raise InputError(f"--timeout must be 0.1 to 120 s, got {a.timeout:g}")
    if not 300 <= a.baud <= 4_000_000:
        raise InputError(f"--baud must be 300 to 4000000 bit/s, got {a.baud}")


def open_link(a: argparse.Namespace):
    from feedmatch.board.link import BoardLink

    check_link_options(a)
    return BoardLink(a.port, a.baud, timeout=a.timeout).open()


def check_wait(a: argparse.Namespace) -> None:
    import math

    if not (math.isfinite(a.wait) and 1.0 <= a.wait <= 600.0):
        raise InputError(f"--wait must be 1 to 600 s, got {a.wait:g}")


def check_full_power(a: argparse.Namespace) -> None:
    import math

    if not (math.isfinite(a.rig_full_power) and 0 < a.rig_full_power <= 10000):
        raise InputError(f"--rig-full-power must be above 0 and up to 10000 W, got {a.rig_full_power:g}")


def add_port_options(s) -> None:
    s.add_argument("--port", required=True,
                   help="device path, pyserial URL (socket://, rfc2217://, loop://) or auto")
    s.add_argument("--baud", type=int, default=115200, help="serial speed in bit/s (default 115200)")
    s.add_argument("--timeout", type=float, default=2.0,
                   help="seconds to wait for each answer of the board (default 2; 0.1 to 120)")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def state_text(r, bank=None) -> str:
    """Relays as codes and, with the board's bank, the values a builder measures."""
    if not r:
        return "-"
    l, c, sh, byp = r
    if byp:
        return "through (bypass)"
    return f"L{l} C{c} {side_name(sh)}{values_text(bank, l, c)}"


def values_text(bank, l: int, c: int) -> str:
    v = state_values(bank, l, c)
    return f" ({v[0]:.2f} uH, {v[1]:.0f} pF)" if v else ""


def mhz(f_hz) -> str:
    return f"{f_hz / 1e6:.4f} MHz" if f_hz else "no carrier counted"


def swr_text(swr) -> str:
    # The board's -1 means no reading (no RF) and its 999 (fmlogic.swr.SWR_MAX) a
    # reflection as large as the forward power: neither is printed as a number.
    if not isinstance(swr, (int, float)) or isinstance(swr, bool) or swr < 1.0:
        return "-"
    return "above 99" if swr >= 99.0 else f"{swr:.3f}"


def plural(n, one: str, many: str | None = None) -> str:
    return f"{n} {one if n == 1 else (many or one + 's')}"


def bound_text(b) -> str:
    """The true SWR a reading allows with the coupler's error bounds (the board's
    swr_bound), as ' (true 1.05-1.51)'; empty when the board gave none."""
    if not isinstance(b, list) or len(b) != 2:
        return ""
    return f" (true {b[0]:.2f}-{b[1]:.2f})"


def stop_on_sigterm() -> None:
    """SIGTERM ends a long-running command as cleanly as Ctrl-C: it raises KeyboardInterrupt,
    which each service catches to close its port, hub, keyer or server on the way out."""
    import signal

    def _term(_signum, _frame):
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _term)
