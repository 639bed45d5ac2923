"""The main job on the built-in simulated station (`feedmatch demo`, `make demo`).

Boots the real firmware on the virtual station of the invented Hollow Oak
field vertical, plays three operating sessions over every band the network
can match (before the third a mower cuts ten of the sixteen radials),
logs every tune into a fresh SQLite logbook over the pseudo-terminal link,
then prints the per-band report and writes the plots.
"""

from __future__ import annotations

import json
import shutil
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from feedmatch.errors import InputError
from feedmatch.logbook.logger import Logger
from feedmatch.logbook.report import make_report, report_lines, report_plots, write_csv
from feedmatch.outpaths import output_dir
from feedmatch.rf.antenna import Monopole
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualBoard

DEMO_MARK = ".feedmatch-demo"  # a directory the demo made, so it may replace its own logbook
SESSIONS = (("session 1", 0), ("session 2", 0),
            ("session 3: a mower has cut ten of the sixteen radials", 10))


def run_demo(out_dir: str | Path, use_python: bool = False, station_file: str | None = None,
             say: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Run the demo into out_dir; say(line) narrates it (the command line passes print)."""
    t_start = time.monotonic()
    out = output_dir(out_dir, "--out")
    db = out / "station.sqlite"
    mark = out / DEMO_MARK
    if db.exists() and not mark.exists():
        # Somebody's real logbook, perhaps: the demo only ever replaces its own.
        raise InputError(f"{db} exists and was not written by the demo; nothing was changed "
                         "(choose another --out)")
    out.mkdir(exist_ok=True)
    mark.write_text("written by feedmatch demo: its logbook here is replaced on every run\n")
    for p in (db, Path(str(db) + "-wal"), Path(str(db) + "-shm")):
        p.unlink(missing_ok=True)
    board_dir = out / "board-flash"
    shutil.rmtree(board_dir, ignore_errors=True)
    st = load_station(station_file)
    vs = VirtualBoard(st, board_dir, use_python=use_python)
    pty = vs.start()
    lg = Logger(pty, str(db))
    stop = threading.Event()
    th = threading.Thread(target=lg.run, args=(stop,), daemon=True)
    th.start()
    target = st.board_config.get("tune", {}).get("target_swr", 1.5)
    say = say or (lambda _line: None)
    say(f"station: {st.name}")
    say(f"site: {st.site}")
    say(f"antenna: {st.antenna.describe()}; firmware: "
        f"{'CPython' if use_python else 'MicroPython unix port'}; link: {pty}")
    base = st.antenna
    played = 0
    try:
        _wait(lambda: lg.status.get("board_id") is not None, 10)
        for title, damage in SESSIONS:
            if damage:
                with vs.lock:
                    vs.hardware.antenna = damaged(base, damage)
                    vs.hardware._zcache.clear()
                    vs.hardware._cache.clear()
            say(f"{title}: {len(st.script)} frequency changes")
            for step in st.script:
                vs.play(step, target)
                played += 1
        # Everything the board recorded must reach the logbook.
        want = vs.records_on_flash()
        _wait(lambda: lg.last_committed >= want, 10)
    finally:
        stop.set()
        th.join(timeout=10)
        violations = list(vs.hardware.violations)
        resets = vs.resets
        vs.stop()
    rep = make_report(str(db))
    say("")
    for line in report_lines(rep):
        say(line)
    plots = report_plots(str(out / "plots"), rep["rows"], rep["bin_widths"])
    csv_path = out / "tunes.csv"
    write_csv(str(csv_path), rep["rows"], rep["banks"])
    elapsed = time.monotonic() - t_start
    say("")
    say(f"hot-switch violations: {len(violations)}; watchdog resets: {resets}; "
        f"corrupted frames: {lg.corrupt}; {played} carriers keyed in {elapsed:.0f} s")
    say(f"logbook: {db}")
    say(f"plots:   {', '.join(str(p) for p in plots)}")
    say(f"table:   {csv_path}")
    return {"db": str(db), "report": rep, "violations": violations, "plots": plots,
            "elapsed_s": elapsed, "played": played}


def damaged(ant, n: int):
    """The same antenna with n radials lost (or, for the closed form, their loss added)."""
    from feedmatch.rf.nec import NecAntenna

    if isinstance(ant, NecAntenna) and ant.desc["ground"]["type"] != "perfect":
        desc = json.loads(json.dumps(ant.desc))
        desc["ground"]["radials"] = max(1, desc["ground"]["radials"] - n)
        return NecAntenna(desc, ant.name)
    if isinstance(ant, Monopole):
        return Monopole(ant.height_m, ant.radius_m, ant.ground_loss_ohm + 2.5 * n)
    return ant


def _wait(pred, timeout: float) -> bool:
    t = time.monotonic() + timeout
    while time.monotonic() < t:
        if pred():
            return True
        time.sleep(0.05)
    return False
