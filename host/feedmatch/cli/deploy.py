"""The `deploy` command: the firmware and the board config onto a board (mpremote)."""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

from feedmatch.cli.output import emit_json
from feedmatch.errors import InputError


def cmd_deploy(a: argparse.Namespace) -> int:
    from feedmatch.board.deploy import CONFIGS, DirTarget, MpremoteTarget, apply, plan

    cfg = Path(a.config) if a.config else CONFIGS / f"{a.board}.json"
    if a.port.startswith("/") and not Path(a.port).exists():
        # mpremote would say it "failed to access" the port "(it may be in use)": it is not there.
        raise InputError(f"there is no device {a.port}: is the board plugged in? (see `ls /dev/ttyACM* "
                         "/dev/ttyUSB*`)")
    if a.config and cfg.is_file():
        from feedmatch.jsonfile import load_json

        doc = load_json(cfg, "board config")
        if isinstance(doc, dict) and "board" not in doc and "inductors_uh" in doc:
            raise InputError(f"--config {cfg} is a network file (design --out), not a board config: "
                             "write the banks into your board config with `feedmatch design ... --into-config "
                             "CONFIG`")
    if not Path(a.port).is_dir():
        from feedmatch.board.hub import hub_alive, hub_path

        if hub_alive(hub_path(a.port)):
            # mpremote needs the port to itself (the raw REPL), and the board reboots.
            from feedmatch.errors import PortOwned

            raise PortOwned(f"{a.port} is in use by a running feedmatch log, follow or serve; stop it, "
                            "deploy, then start it again")
    target = DirTarget(a.port) if Path(a.port).is_dir() else MpremoteTarget(a.port)
    with tempfile.TemporaryDirectory() as d:
        p = plan(a.board, cfg, a.compile, target, Path(d))
        rows = [{"file": i.remote, "action": i.action.split(":")[0], "bytes": i.local.stat().st_size}
                for i in p["items"]]
        if a.json and a.dry_run:
            emit_json({"version": p["version"], "current": p["current"], "files": rows,
                       "config": p["config_action"]})
            return 0
        if not a.json:
            print(f"firmware version {p['version']} (board runs {p['current'] or 'nothing'}), config "
                  f"{cfg.name}: {p['config_action']}")
            for r in rows:
                print(f"  {r['action']:>5} {r['file']} ({r['bytes']} bytes)")
        if a.dry_run:
            print("dry run: nothing was written")
            return 0
        res = apply(p, target)
    note = getattr(target, "reset_note", "")
    if a.json:
        emit_json(dict(res, reset_note=note))
    else:
        print(f"switched to version {res['version']} ({res['sent']} files sent), verified, "
              + (note or "soft reset"))
    return 0


def _parser_deploy(sub) -> None:
    s = sub.add_parser("deploy", help="copy the firmware and the board config to a board (mpremote)")
    s.add_argument("--port", required=True, help="serial device of the board, or a directory (for tests)")
    s.add_argument("--board", choices=["rp2040", "esp32"], default="rp2040",
                   help="the board's chip: rp2040 (Raspberry Pi Pico) or esp32 (default rp2040)")
    s.add_argument("--config", help="board config JSON (default: the shipped one for --board)")
    s.add_argument("--compile", action="store_true", help="precompile with mpy-cross to save RAM")
    s.add_argument("--dry-run", action="store_true", help="print the plan only")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    s.set_defaults(fn=cmd_deploy)


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "deploy": _parser_deploy,
}
