# Entry point on every board.  On hardware it runs at boot; for the virtual
# station: micropython main.py --station HOST:PORT:SERIALPORT --dir DIR
import sys

from fmlogic.controller import Controller, load_config


def _arg(name, default=None):
    argv = getattr(sys, "argv", [])
    for i in range(len(argv) - 1):
        if argv[i] == name:
            return argv[i + 1]
    return default


def start():
    d = _arg("--dir", "")
    cfg = load_config(d)
    station = _arg("--station")
    if station is not None:
        import board_virtual
        host, port, ser_port = station.split(":")
        board = board_virtual.Board(host, int(port), int(ser_port), cfg)
    else:
        kind = cfg.get("board", "rp2040")
        if kind == "esp32":
            import board_esp32 as bmod
        else:
            import board_rp2040 as bmod
        from fmlogic.config import merged
        board = bmod.Board(merged(cfg))
    Controller(board, cfg, d).run()


start()
