# Entry point on every board.  On hardware it runs at boot; for the virtual
# station: micropython main.py --station HOST:PORT:SERIALPORT --dir DIR
# fmlogic.boot starts the controller, or the safe mode if anything fails.
import sys

from fmlogic import boot


def _arg(name, default=None):
    argv = getattr(sys, "argv", [])
    for i in range(len(argv) - 1):
        if argv[i] == name:
            return argv[i + 1]
    return default


def make_board(cfg):
    """The board for this config (None: the board's defaults, for the safe mode)."""
    station = _arg("--station")
    if station is not None:
        import board_virtual

        host, port, ser_port = station.split(":")
        return board_virtual.Board(host, int(port), int(ser_port), cfg)
    kind = (cfg or {}).get("board", "rp2040")
    if kind == "esp32":
        import board_esp32 as bmod
    else:
        import board_rp2040 as bmod
    from fmlogic.config import merged

    c = merged(cfg if isinstance(cfg, dict) else {})
    if cfg is None:
        c["pins"] = {}
    return bmod.Board(c)


boot.start(_arg("--dir", ""), make_board)
