"""Sub-commands that talk to a board (real or virtual) or read the logbook."""

from __future__ import annotations

import argparse
import sys
import time

from feedmatch.errors import BoardRefused, InputError, LinkError
from feedmatch.outpaths import output_dir, output_file


def check_link_options(a: argparse.Namespace) -> None:
    """--timeout and --baud within their ranges, before any port is opened (one line, exit 2)."""
    import math

    if not (math.isfinite(a.timeout) and 0.1 <= a.timeout <= 120):
        raise InputError(f"--timeout must be 0.1 to 120 s, got {a.timeout:g}")
    if not 300 <= a.baud <= 4_000_000:
        raise InputError(f"--baud must be 300 to 4000000 bit/s, got {a.baud}")


def _link(a: argparse.Namespace):
    from feedmatch.board.link import BoardLink

    check_link_options(a)
    return BoardLink(a.port, a.baud, timeout=a.timeout).open()


def _check_wait(a: argparse.Namespace) -> None:
    import math

    if not (math.isfinite(a.wait) and 1.0 <= a.wait <= 600.0):
        raise InputError(f"--wait must be 1 to 600 s, got {a.wait:g}")


def _check_full_power(a: argparse.Namespace) -> None:
    import math

    if not (math.isfinite(a.rig_full_power) and 0 < a.rig_full_power <= 10000):
        raise InputError(f"--rig-full-power must be above 0 and up to 10000 W, got {a.rig_full_power:g}")


def _add_port(s) -> None:
    s.add_argument("--port", required=True,
                   help="device path, pyserial URL (socket://, rfc2217://, loop://) or auto")
    s.add_argument("--baud", type=int, default=115200, help="serial speed in bit/s (default 115200)")
    s.add_argument("--timeout", type=float, default=2.0,
                   help="seconds to wait for each answer of the board (default 2; 0.1 to 120)")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def _state_text(r, bank=None) -> str:
    """Relays as codes and, with the board's bank, the values a builder measures."""
    if not r:
        return "-"
    l, c, sh, byp = r
    if byp:
        return "through (bypass)"
    return f"L{l} C{c} {'tx' if sh == 0 else 'ant'}{_values_text(bank, l, c)}"


def _values_text(bank, l: int, c: int) -> str:
    from feedmatch.board.link import state_values

    v = state_values(bank, l, c)
    return f" ({v[0]:.2f} uH, {v[1]:.0f} pF)" if v else ""


def _mhz(f_hz) -> str:
    return f"{f_hz / 1e6:.4f} MHz" if f_hz else "no carrier counted"


def _freq_disagrees(asked: str | None, asked_hz: float, counted_hz: float) -> str:
    """A sentence when the frequency the board counted is not the one asked for
    (a band name: outside the band; a frequency: more than 1 % off), else ""."""
    from feedmatch.rf import bands

    if not asked or counted_hz <= 0:
        return ""
    try:
        b = bands.by_name(asked)
    except InputError:
        b = None
    if b is not None:
        if b.holds(counted_hz):
            return ""
        return (f"the board counted {counted_hz / 1e6:.4f} MHz, outside {b.name} "
                f"({b.low_hz / 1e6:g}-{b.high_hz / 1e6:g} MHz) that was asked for: the carrier decides")
    if abs(counted_hz - asked_hz) <= 0.01 * asked_hz:
        return ""
    return (f"the board counted {counted_hz / 1e6:.4f} MHz, not the {asked_hz / 1e6:.4f} MHz asked for: "
            "the carrier decides")


def _swr_text(swr) -> str:
    # The board's -1 means no reading (no RF) and its 999 (fmlogic.swr.SWR_MAX) a
    # reflection as large as the forward power: neither is printed as a number.
    if not isinstance(swr, (int, float)) or isinstance(swr, bool) or swr < 1.0:
        return "-"
    return "above 99" if swr >= 99.0 else f"{swr:.3f}"


def ended_worse(rec: dict) -> bool:
    """A tune that left the SWR higher than it found it: only when the relays moved
    and the SWR rose beyond what two readings of one state differ by (half the
    bound the board gives, else 2 %); a confirmation of the same state that reads
    a hair higher is noise, not a worse match."""
    b, af = rec.get("swr_before"), rec.get("swr_after")
    if not all(isinstance(x, (int, float)) and 1.0 <= x < 99.0 for x in (b, af)):
        return False
    bound = rec.get("swr_bound")
    noise = (bound[1] - bound[0]) / 2 if isinstance(bound, list) and len(bound) == 2 else 0.02 * b
    moved = list(rec.get("before") or []) != list(rec.get("after") or [])
    return moved and af > b + max(noise, 0.01)


def _plural(n, one: str, many: str | None = None) -> str:
    return f"{n} {one if n == 1 else (many or one + 's')}"


def _state_words(st: dict) -> str:
    """The board's state, said so that a result is not mistaken for the present:
    "locked" with no carrier now is the last tune's result."""
    state, why = st.get("state", "?"), st.get("why", "")
    swr = st.get("swr")
    carrier = isinstance(swr, (int, float)) and swr >= 1.0
    if state in ("locked", "best-effort") and not carrier:
        return f"{state} at the last tune ({why}); no carrier now"
    return f"{state} - {why}"


def _bound_text(b) -> str:
    """The true SWR a reading allows with the coupler's error bounds (the board's
    swr_bound), as ' (true 1.05-1.51)'; empty when the board gave none."""
    if not isinstance(b, list) or len(b) != 2:
        return ""
    return f" (true {b[0]:.2f}-{b[1]:.2f})"


def cmd_status(a) -> int:
    from feedmatch.cli.output import emit_json

    with _link(a) as ln:
        st = ln.request("status")
        bank = None if a.json else ln.bank()
    if a.json:
        emit_json(st)
        return 0
    swr = st.get("swr")
    print(f"board {st['board_id']} (firmware {st['version']}, boot {st['boot']}): {_state_words(st)}")
    print(f"  relays {_state_text(st['relays'], bank)}; forward {st['fwd_w']} W, "
          f"SWR {_swr_text(swr) if swr is not None else 'no RF'}{_bound_text(st.get('swr_bound'))}; "
          f"{_mhz(st['freq_hz'])}")
    print(f"  {_plural(st['mem_entries'], 'memory entry', 'memory entries')}; last record no. {st['seq']}; "
          f"bad frames {st['bad_frames']}; hot-switch refusals {st['hot_refusals']}")
    if st.get("file"):
        print(f"  concerns {st['file']}" + ("; the board is in safe mode: relays through, no tunes"
                                             if st.get("safe_mode") else ""))
    if st.get("advice"):
        print(f"  what to do: {st['advice']}")
    for w in st.get("warnings") or []:
        print(f"  note: {w}")
    if st.get("rec_error"):
        print(f"  records: {st['rec_error']}")
    return 0


def cmd_tune(a) -> int:
    from feedmatch.cli.output import emit_json
    from feedmatch.rf import bands

    _check_wait(a)
    f = bands.parse_freq(a.freq) if a.freq else 0.0
    deadline = time.monotonic() + a.wait
    with _link(a) as ln:
        while True:
            before = ln.request("status")["seq"]
            try:
                ln.request("tune", {"freq_hz": f})
                break
            except BoardRefused as e:
                # The board is finishing a tune of its own (a carrier was already keyed):
                # let it end, then ask.
                if e.why != "busy" or time.monotonic() > deadline:
                    raise
                ln.wait_event("record", lambda o, b=before: o.get("seq", 0) > b,
                              timeout=max(0.1, deadline - time.monotonic()))
        rec = ln.wait_event("record", lambda o: o.get("seq", 0) > before,
                            timeout=max(0.1, deadline - time.monotonic()))
        if rec is None:
            recs = ln.records_since(before)
            rec = recs[0] if recs else None
        bank = None if a.json else ln.bank()
    if rec is None:
        # The same answer as the board's own "no RF" refusal: exit 1, whatever --wait was.
        sys.stderr.write(f"feedmatch: no tune result within {a.wait:g} s: is a carrier of the tune power "
                         "keyed?\n")
        return 1
    b, af = rec.get("swr_before"), rec.get("swr_after")
    worse = ended_worse(rec)
    if a.json:
        emit_json(rec)
    else:
        if rec["outcome"] == "refused":
            print(f"refused: {rec['why']}; relays left at {_state_text(rec['after'], bank)}")
        else:
            head = (f"ended worse than it started ({rec['outcome']}: {rec['why']})" if worse
                    else f"{rec['outcome']}: {rec['why']}")
            print(f"{head}; SWR {_swr_text(b)} -> "
                  f"{_swr_text(af)}{_bound_text(rec.get('swr_bound'))} at {_mhz(rec['freq_hz'])}, "
                  f"{_state_text(rec['after'], bank)}, "
                  f"{_plural(rec['n'], 'measurement')} in {rec['ms']} ms")
        note = _freq_disagrees(a.freq, f, rec.get("freq_hz") or 0.0)
        if note:
            print("note: " + note)
    from fmlogic.controller import BEST, LOCKED, THROUGH

    # A tune that left the SWR higher than it found it is not a success.
    return 0 if rec["outcome"] in (LOCKED, BEST, THROUGH) and not worse else 1


def cmd_selftest(a) -> int:
    from feedmatch.board.selftest import run_selftest
    from feedmatch.cli.output import emit_json

    _check_wait(a)
    with _link(a) as ln:
        res = run_selftest(ln, a.wait, say=(lambda t: None) if a.json else
                           (lambda t: sys.stderr.write(f"feedmatch: {t}\n")))
        if a.write:
            res["written"] = _write_faults(ln, res)
    if a.json:
        emit_json({k: res[k] for k in ("faults", "readings", "untested", "freq_hz", "refs", "chi2_healthy",
                                      "tuned_first") if k in res} | ({"written": res["written"]}
                                                                     if "written" in res else {}))
        return 0 if not res["faults"] else 1
    vals = res["values"]
    print(f"self-test at {_mhz(res['freq_hz'])}, {res['fwd_w']} W: {res['readings']} readings "
          f"from L{res['refs'][0][0]} C{res['refs'][0][1]} and L{res['refs'][1][0]} C{res['refs'][1][1]}")
    if not res["faults"]:
        print("  every relay acts as the model says")
    for f in res["faults"]:
        what = f.get("value") and f"now about {f['value']} ({f['drift_percent']:+g} %)" or ""
        print(f"  {f['element']}{' (' + f['nominal'] + ')' if 'nominal' in f else ''}: {f['kind']} {what}".rstrip())
        for t in f["evidence"]["telling"]:
            st = t["state"]
            print(f"    L{st[0]} C{st[1]} {'tx' if st[2] == 0 else 'ant'}: read |gamma| {t['measured_gamma']:.3f}, "
                  f"healthy box {t['healthy_gamma']:.3f}, with this fault {t['fault_gamma']:.3f}")
        print(f"    fit chi-square: healthy {f['evidence']['chi2_healthy']}, this fault {f['evidence']['chi2_fault']}")
    if res["untested"]:
        names = []
        for e in res["untested"]:
            if e == "side":
                names.append("side")
            else:
                v = vals["inductors_uh" if e[0] == "L" else "capacitors_pf"][int(e[1:])]
                names.append(f"{e} ({v:g} {'uH' if e[0] == 'L' else 'pF'})")
        print(f"  not tested at this carrier (their steps barely move the reading): {', '.join(names)}; "
              "repeat on another band")
    if "written" in res:
        print(f"  {res['written']}")
    return 0 if not res["faults"] else 1


def _write_faults(ln, res) -> str:
    """--write: a stuck element goes into the board's network.failed (the search then
    keeps to states it can reach); a drift is for fit-box's correction, not written here."""
    from fmlogic.selftest import FAILED_KINDS

    stuck = [f"{f['element']}:{f['kind']}" for f in res["faults"] if f["kind"] in FAILED_KINDS]
    if not stuck:
        return "nothing written: no stuck element" + (" (a drift is learned by fit-box)" if res["faults"] else "")
    have = ln.request("cfg-get", {"section": "network"})["value"].get("failed") or []
    new = list(have) + [s for s in stuck if s.split(":")[0] not in [h.split(":")[0] for h in have]]
    ln.request("cfg-set", {"path": "network.failed", "value": new})
    return f"written to the board's config: network.failed = {new}"


def cmd_bypass(a) -> int:
    from feedmatch.cli.output import emit_json

    with _link(a) as ln:
        r = ln.request("bypass", {"on": not a.off})
        bank = None if a.json else ln.bank()
    if a.json:
        emit_json(r)
    else:
        print(f"relays now {_state_text(r['relays'], bank)}")
    return 0


def cmd_memory(a) -> int:
    from feedmatch.cli.output import emit_json

    if sum(1 for x in (a.export, a.clear, a.import_) if x) > 1:
        raise InputError("give one of --export, --clear and --import (export first, then clear, then import)")
    if a.mismatch_ok and not a.import_:
        raise InputError("--mismatch-ok goes with --import")
    if a.import_:
        return _memory_import(a)
    if a.export:
        output_file(a.export, "--export", (".json",))
    if a.clear and not a.yes:
        # Every stored state goes, on the box, for good: ask first.
        if not sys.stdin.isatty():
            raise InputError("--clear wipes every stored state on the box: add --yes to confirm")
        sys.stderr.write(f"clear every stored state on the board at {a.port}? This cannot be undone. "
                         "Type yes: ")
        sys.stderr.flush()
        if sys.stdin.readline().strip().lower() != "yes":
            sys.stderr.write("nothing was cleared\n")
            return 1
    with _link(a) as ln:
        if a.clear:
            ln.request("mem-clear")
            if a.json:
                emit_json({"cleared": True})
            else:
                print("memory cleared")
            return 0
        items = []
        start = 0
        while True:
            r = ln.request("mem-list", {"start": start})
            items += r["entries"]
            start += len(r["entries"])
            if not r["entries"] or start >= r["total"]:
                break
        bank = None if a.json else ln.bank()
        status = ln.request("status") if a.export else {}
        sections = ln.element_sections() if a.export else None
    if a.export:
        import datetime as dt
        import json

        from feedmatch.logbook.store import board_key

        # The box's memory as a file of its own: kept before a re-flash or a board swap.
        doc = {"format": "feedmatch-memory", "version": 1, "board": board_key(status),
               "exported": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"), "bin_hz": r["bin_hz"],
               "fields": ["freq_hz", "l_code", "c_code", "side (0 tx, 1 ant)", "swr", "t"], "entries": items}
        if sections:
            # The codes mean these element values only: an import checks them.
            net = sections["network"]
            doc["network"] = {"inductors_uh": net.get("inductors_uh"), "capacitors_pf": net.get("capacitors_pf")}
        # One stored state a line, so the file reads (and diffs) as a table.
        text = json.dumps({**doc, "entries": [None]}, indent=1).replace(
            "[\n  null\n ]", "[\n" + ",\n".join("  " + json.dumps(e) for e in items) + "\n ]" if items else "[]")
        with open(a.export, "w", encoding="utf-8") as fh:
            fh.write(text + "\n")
        # "wrote" lines go where the other commands print them: standard output (stderr under --json).
        (sys.stderr if a.json else sys.stdout).write(f"wrote {_plural(len(items), 'stored state')} to {a.export}\n")
    if a.json:
        emit_json({"bin_hz": r["bin_hz"], "entries": items})
        return 0
    print(f"{_plural(len(items), 'stored state')} (bins of {r['bin_hz'] / 1e3:g} kHz)")
    for f, l, c, sh, swr, _t in items:
        print(f"  {f / 1e6:9.4f} MHz  L{l:<4d} C{c:<4d} {'tx' if sh == 0 else 'ant':>3}  SWR {swr:.2f}"
              f"{_values_text(bank, l, c)}")
    return 0


def _banks_differ(mine: dict, theirs: dict) -> str:
    """Words naming the first element value that differs by more than 1 % between
    two network sections, or "" when they are the same banks."""
    for key, unit in (("inductors_uh", "uH"), ("capacitors_pf", "pF")):
        a_, b_ = mine.get(key), theirs.get(key)
        if not isinstance(a_, list) or not isinstance(b_, list):
            continue
        if len(a_) != len(b_):
            return f"{len(b_)} {key.split('_')[0]} in the file, {len(a_)} on this board"
        for i, (x, y) in enumerate(zip(a_, b_, strict=True)):
            if isinstance(x, (int, float)) and isinstance(y, (int, float)) and abs(x - y) > 0.01 * abs(x):
                return f"{key.split('_')[0][0].upper()}{i} is {y:g} {unit} in the file, {x:g} {unit} on this board"
    return ""


def _memory_file(path: str) -> dict:
    """An exported memory file, its shape checked (the entries' ranges are the board's to check)."""
    import math

    from feedmatch.jsonfile import load_json

    doc = load_json(path, "memory")
    where = f"memory file {path}"
    if doc.get("format") != "feedmatch-memory":
        raise InputError(f"{where} is not a feedmatch memory export (field 'format')")
    if doc.get("version") != 1:
        raise InputError(f"{where}: version {doc.get('version')!r} is not one this feedmatch reads (1)")
    w = doc.get("bin_hz")
    if isinstance(w, bool) or not isinstance(w, (int, float)) or not math.isfinite(w) or not 100 <= w <= 1e7:
        raise InputError(f"{where}: field 'bin_hz' must be 100 to 1e7 Hz, got {w!r}")
    ents = doc.get("entries")
    if not isinstance(ents, list):
        raise InputError(f"{where}: field 'entries' must be a list of [freq_hz, l, c, shunt, swr, t]")
    for i, e in enumerate(ents):
        if not isinstance(e, list) or len(e) != 6:
            raise InputError(f"{where}: entries[{i}] must be [freq_hz, l, c, shunt, swr, t]")
    if not isinstance(doc.get("board"), str):
        raise InputError(f"{where}: field 'board' (the board it came from) is missing")
    return doc


def _memory_import(a) -> int:
    """memory --import: an exported memory written back into a board's memory
    (mem-put, a frame of at most memory.PUT_MAX states at a time, one flash write
    at the end). A file from another board, bin width or banks is refused unless
    --mismatch-ok; the board checks every entry's codes itself."""
    from fmlogic.memory import PUT_MAX, check_entries

    from feedmatch.cli.output import emit_json
    from feedmatch.logbook.store import board_key

    doc = _memory_file(a.import_)
    ents = doc["entries"]
    with _link(a) as ln:
        status = ln.request("status")
        here = board_key(status)
        own_w = ln.request("mem-list", {"start": 0})["bin_hz"]
        sections = ln.element_sections()
        bank = ln.bank()
        problems = []
        if doc["board"] != here:
            problems.append(f"it comes from board {doc['board']}, this is {here}")
        if abs(doc["bin_hz"] - own_w) > own_w * 1e-6:
            problems.append(f"its bins are {doc['bin_hz']:g} Hz wide, this board's {own_w:g} Hz "
                            "(the states would be moved to this board's bins)")
        if sections and isinstance(doc.get("network"), dict):
            diff = _banks_differ(sections["network"], doc["network"])
            if diff:
                problems.append(f"its element values differ ({diff}): a code there is another network here")
        if problems and not a.mismatch_ok:
            raise InputError(f"not imported: {'; '.join(problems)}. Add --mismatch-ok to import it anyway")
        if bank is not None:
            # The firmware's own check, before the first frame: a bad entry anywhere stores nothing.
            for k in range(0, len(ents), PUT_MAX):
                err = check_entries(ents[k:k + PUT_MAX], bank.l_max, bank.c_max)
                if err:
                    n, _, rest = err.partition(": ")
                    idx = int(n.split()[1]) + k if n.startswith("entry ") else None
                    raise InputError(f"memory file {a.import_}: "
                                     + (f"entries[{idx}]: {rest}" if idx is not None else err)
                                     + "; nothing was imported")
        stored = kept = 0
        r: dict = {"entries": status.get("mem_entries", 0), "saved": True, "max_entries": None}
        for k in range(0, len(ents), PUT_MAX):
            last = k + PUT_MAX >= len(ents)
            r = ln.request("mem-put", {"bin_hz": doc["bin_hz"], "entries": ents[k:k + PUT_MAX],
                                       "rebin": bool(a.mismatch_ok), "save": last})
            stored += r["stored"]
            kept += r["kept"]
    out = {"imported": stored, "kept": kept, "in_file": len(ents), "entries": r["entries"],
           "max_entries": r["max_entries"], "saved": r["saved"], "board": here}
    if a.json:
        emit_json(out)
    else:
        print(f"imported {_plural(stored, 'stored state')} of {len(ents)} from {a.import_}"
              + (f"; {_plural(kept, 'bin')} kept the board's own state" if kept else "")
              + f"; the board now holds {_plural(r['entries'], 'stored state')}")
        if r["max_entries"] is not None and status.get("mem_entries", 0) + stored > r["entries"]:
            print(f"note: the board keeps at most {r['max_entries']}: the oldest states made room")
    if not r["saved"]:
        sys.stderr.write("the board could not write its memory to flash: the states are in its RAM only "
                         "(see status); import again after fixing the flash\n")
        return 1
    return 0


def cmd_log(a) -> int:
    import signal
    from pathlib import Path

    from feedmatch.logbook.logger import Logger
    from feedmatch.logbook.store import START_FLOOR, Logbook, LogbookUnwritable, free_bytes

    if Path(a.db).exists():
        if not Path(a.db).is_file():
            raise InputError(f"logbook {a.db} is not a file")
    else:
        output_file(a.db, "--db", (Path(a.db).suffix.lower(),))  # any name; its directory must exist
    free = free_bytes(a.db)
    if free is not None and free < START_FLOOR:
        # A logger restarted on a full disk would take its last bytes and die again.
        raise InputError(f"logbook {a.db}: only {free // 1024} KiB free on its disk; the logger needs "
                         f"{START_FLOOR // 1024} KiB to start. Free some space: the board keeps its records "
                         "and the next `feedmatch log` fetches them")
    if Path(a.db).exists():
        Logbook(a.db).close()  # refuse a non-SQLite file before touching the port
    lg = Logger(a.port, a.db, a.baud, out=sys.stdout if sys.stdout.isatty() and not a.json else None)

    def _term(_sig, _frame):
        raise KeyboardInterrupt  # SIGTERM ends the session as cleanly as Ctrl-C

    signal.signal(signal.SIGTERM, _term)
    failed = ""
    try:
        lg.run(first_connect_s=5.0)
    except KeyboardInterrupt:
        pass
    except LogbookUnwritable as e:
        failed = str(e)
        sys.stderr.write(f"{chr(10) if lg.out else ''}feedmatch: error: {e} ({lg.added} new records "
                         "were logged this run)\n")
    if a.json:
        from feedmatch.cli.output import emit_json

        emit_json({"db": a.db, "added": lg.added, "board": lg.board_id, "bad_frames": lg.corrupt,
                   "notices": lg.notices, **({"error": failed} if failed else {})})
        return 2 if failed else 0
    if failed:
        return 2
    print(f"\nlogged {lg.added} new records into {a.db}")
    for note in lg.notices:
        print("note: " + note)
    return 0


def cmd_report(a) -> int:
    from feedmatch.cli.output import emit_json
    from feedmatch.logbook.report import make_report, report_lines, report_plots, write_csv

    if a.since:
        from datetime import datetime

        try:
            datetime.fromisoformat(a.since)
        except ValueError:
            raise InputError(f"--since needs an ISO date such as 2026-11-01, got '{a.since}'") from None
    if a.csv:
        output_file(a.csv, "--csv", (".csv",))
    if a.plots:
        output_dir(a.plots, "--plots")
    rep = make_report(a.db, a.since)
    from feedmatch.sim.curve import add_antenna

    add_antenna(rep, a.db, a.since)  # health in ohms, from the antenna the tunes measured
    if a.csv:
        write_csv(a.csv, rep["rows"], rep["banks"])
    files = report_plots(a.plots, rep["rows"]) if a.plots else []
    if a.json:
        emit_json({"tunes": rep["tunes"], "bands": rep["bands"], "antenna_notes": rep["antenna_notes"]})
    else:
        print("\n".join(report_lines(rep)))
        for f in files:
            print(f"wrote {f}")
    return 0


def _check_uf2(path: str) -> None:
    """InputError unless path starts with a UF2 block (Microsoft's UF2 specification,
    github.com/microsoft/uf2: magic words 0x0A324655 and 0x9E5D5157, little endian)."""
    import struct
    from pathlib import Path

    p = Path(path)
    try:
        with p.open("rb") as f:
            head = f.read(8)
    except FileNotFoundError:
        raise InputError(f"--image {p} does not exist") from None
    except OSError as e:
        raise InputError(f"--image {p} cannot be read: {e.strerror or e}") from None
    if len(head) < 8 or struct.unpack("<II", head) != (0x0A324655, 0x9E5D5157):
        raise InputError(f"--image {p} is not a UF2 firmware image: give MicroPython's .uf2 for the "
                         "Raspberry Pi Pico")


def cmd_virtual_board(a) -> int:
    from feedmatch.sim.station import load_station
    from feedmatch.sim.virtual import VirtualStation

    st = load_station(a.station)
    if a.fault:
        from feedmatch.sim.faults import parse_faults

        st.faults = parse_faults(a.fault, st.network)
    import math
    import signal
    import tempfile

    from feedmatch.rf import bands

    carrier = None
    if a.carrier:
        # Checked before anything starts: a bad value is one line, never a thread's traceback.
        w, at, f = a.carrier.partition("@")
        try:
            watts = float(w)
        except ValueError:
            raise InputError(f"--carrier must be W@Hz or W@band, e.g. 10@7.1e6 or 10@40m; got '{a.carrier}'") \
                from None
        if not at or not math.isfinite(watts) or not 0 < watts <= 2000:
            raise InputError(f"--carrier needs a power of 0 to 2000 W and a frequency, e.g. 10@40m; "
                             f"got '{a.carrier}'")
        f_hz = bands.parse_freq(f)
        if not f_hz <= 60e6:
            raise InputError(f"--carrier frequency {f} is above the HF and 6 m range this box is built for")
        carrier = (watts, f_hz)

    def _term(_signum, _frame):
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _term)
    if a.rig:
        from feedmatch.board.rigctl import RigClient, parse_hostport

        _check_full_power(a)

        RigClient(*parse_hostport(a.rig)).open().close()  # an unreachable rigctld is one line, now
    if a.dir:
        output_dir(a.dir, "--dir")
    d = a.dir or tempfile.mkdtemp(prefix="feedmatch-board-")
    if a.image:
        _check_uf2(a.image)  # a wrong file fails now, not after the emulator's half-minute start
    if a.emulate:
        from feedmatch.sim.emulated import EmulatedStation
        from feedmatch.sim.emulator import EmulatorMissing

        vs = EmulatedStation(st, d, uf2=a.image)
        try:
            path = vs.start()
        except EmulatorMissing as e:
            raise InputError(f"cannot run the emulated {a.emulate}: {e}") from None
    else:
        vs = VirtualStation(st, d, use_python=a.python, heap_kib=a.heap, micropython=a.micropython)
        path = vs.start()
    print(path, flush=True)
    what = f"emulated {a.emulate}" if a.emulate else "virtual board"
    sys.stderr.write(f"{what} '{st.board_config.get('board_id')}' on {path} "
                     f"(flash in {d}); Ctrl-C stops it\n")
    bridge = None
    if a.rig:
        from feedmatch.board.rigctl import RigClient, parse_hostport
        from feedmatch.sim.radio import RigBridge

        bridge = RigBridge(vs, RigClient(*parse_hostport(a.rig)), a.rig_full_power).start()
    try:
        if carrier:
            vs.key(*carrier)
        elif a.play:
            for step in st.script:
                vs.play(step, st.board_config.get("tune", {}).get("target_swr", 1.5))
        while True:
            time.sleep(0.5)
    except KeyboardInterrupt:
        pass
    finally:
        if bridge is not None:
            bridge.close()
        vs.stop()
        if vs.model.violations:
            sys.stderr.write(f"hot-switch violations: {len(vs.model.violations)}\n")
    return 0


def _carrier_policy(a):
    """--tune-carrier's checks, all before anything connects: one line and exit 2 on any."""
    from feedmatch.board import keying
    from feedmatch.rf import bands

    st = None
    if a.station:
        from feedmatch.sim.station import load_station

        st = load_station(a.station)
    if a.tune_carrier is None:
        return None, []
    mode = keying.check_mode(a.carrier_mode)
    if a.segments:
        segs = keying.parse_segments(a.segments)
    elif st is not None and st.segments:
        segs = st.segments
    else:
        raise InputError("--tune-carrier keys only inside the segments you may transmit in: give --segments "
                         "(MHz, e.g. 7.0-7.2,14.0-14.35, or a file) or put \"segments\" in the --station file")
    region = a.region if a.region is not None else (st.region if st is not None else None)
    if region is None:
        raise InputError("--tune-carrier needs your ITU Region: --region 1, 2 or 3 (or \"region\" in the "
                         "--station file)")
    bands.check_region(region)
    if not a.tune_carrier <= a.rig_full_power:
        raise InputError(f"--tune-carrier {a.tune_carrier:g} W is above the radio's full power "
                         f"(--rig-full-power {a.rig_full_power:g} W)")
    from fmlogic.config import merged

    cfg = merged(st.board_config if st is not None else {})
    keying.check_power(a.tune_carrier, cfg["power"],
                       f"the board config of {a.station}" if st is not None else "the firmware's default board "
                       "config; the board's own limits are checked again before keying")
    antenna = st.antenna if st is not None else None
    if a.antenna:
        from feedmatch.rf.antenna import load_antenna

        antenna = load_antenna(a.antenna)
    from feedmatch.rf.network import load_network

    pol = keying.KeyPolicy(segs, int(region), mode, a.tune_carrier,
                           network=st.network if st is not None else load_network(), antenna=antenna,
                           swr_limit=float(cfg["tune"]["retune_swr"]))
    notes = pol.check_declared()
    if antenna is None:
        notes.append(f"no antenna model (--station or --antenna): keying only from "
                     f"{pol.box_range_hz[0] / 1e6:g} to {pol.box_range_hz[1] / 1e6:g} MHz where the box's network "
                     "can match every load within SWR 3, without knowing whether it can match your antenna")
    return pol, notes


def cmd_follow(a) -> int:
    import datetime as dt
    import signal

    from feedmatch.board.follow import Follower
    from feedmatch.board.keying import KeyerLock
    from feedmatch.board.rigctl import RigClient, parse_hostport

    _check_full_power(a)
    host, port = parse_hostport(a.rig)
    policy, notes = _carrier_policy(a)

    def say(text: str) -> None:
        now = dt.datetime.now()
        if a.json:  # one JSON object per line, for other programs
            import json

            print(json.dumps({"time": now.isoformat(timespec="seconds"), "message": text}), flush=True)
        else:
            print(f"{now.strftime('%H:%M:%S')} {text}", flush=True)

    lock = KeyerLock(f"{host}:{port}", a.port) if policy is not None else None
    fo = Follower(a.port, RigClient(host, port), say, a.baud, tune_carrier_w=a.tune_carrier,
                  carrier_mode=policy.mode if policy else "CW", rig_full_w=a.rig_full_power,
                  policy=policy, lock=lock)
    try:
        fo.rig.open()      # a wrong address is one line, at once
        if policy is not None:
            fo.rig.ptt()   # a radio without a PTT rigctld can switch cannot key: said now, in words
            fo.rig.power()
        fo._board()        # so is a port that is not a board
    except LinkError:
        fo.close()
        raise
    if a.curve:
        from feedmatch.rf.network import load_network
        from feedmatch.sim.curvepreset import presets_from_logbook

        cp = presets_from_logbook(a.curve, load_network(None).firmware_bank())
        if cp is None:
            say(f"--curve: {a.curve} holds no measured antenna yet; presets from the board's memory only")
        else:
            fo.curve_preset = cp.plan
            say(f"--curve: where nothing is stored, presets computed from the antenna measured at {len(cp.f)} "
                f"frequencies ({cp.f[0] / 1e6:.3f}-{cp.f[-1] / 1e6:.3f} MHz)")
    if policy is not None:
        say(f"--tune-carrier: this program will KEY THE RADIO at {a.tune_carrier:g} W {policy.mode} for at most "
            f"{fo.max_key_s:g} s where nothing is stored, only inside "
            f"{', '.join(f'{lo / 1e6:g}-{hi / 1e6:g}' for lo, hi in policy.segments)} MHz (ITU Region "
            f"{policy.region}); you stay responsible for the station")
        for n in notes:
            say("note: " + n)

    def _term(_sig, _frame):
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _term)
    # Ctrl-C must always stop a keyer, even when started where SIGINT was ignored (a
    # background job of a non-interactive shell): it unkeys on the way out.
    signal.signal(signal.SIGINT, signal.default_int_handler)
    say(f"following the radio at {host}:{port} for the board on {a.port} (Ctrl-C stops)")
    try:
        fo.run()
    except KeyboardInterrupt:
        pass
    finally:
        fo.close()
        if lock is not None:
            lock.release()
    say(f"stopped: {fo.presets} presets, {fo.keyed_tunes} keyed tunes"
        + (f", {fo.unkey_failures} FAILED UNKEYS" if fo.unkey_failures else ""))
    return 0


TOKEN_ENV = "FEEDMATCH_CONTROL_TOKEN"


def _control_token(a) -> str | None:
    """The control token from --allow-control-file, the environment or (visible to
    every local user in `ps`) --allow-control; None: the page is read-only."""
    import os
    import stat
    from pathlib import Path

    env = os.environ.get(TOKEN_ENV) or None
    given = [n for n, v in (("--allow-control", a.allow_control), ("--allow-control-file", a.allow_control_file),
                            (TOKEN_ENV, env)) if v is not None]
    if len(given) > 1:
        raise InputError(f"give the control token one way only, not {' and '.join(given)}")
    token = a.allow_control or env
    if a.allow_control_file is not None:
        p = Path(a.allow_control_file)
        try:
            st = p.stat()
            if not stat.S_ISREG(st.st_mode):
                raise InputError(f"--allow-control-file {p} is not a file")
            if st.st_mode & 0o077:
                raise InputError(f"--allow-control-file {p} can be read by other users (mode "
                                 f"{stat.S_IMODE(st.st_mode):o}); chmod 600 it")
            lines = p.read_text().splitlines()
        except FileNotFoundError:
            raise InputError(f"--allow-control-file {p} does not exist") from None
        except (OSError, UnicodeDecodeError) as e:
            raise InputError(f"--allow-control-file {p} cannot be read: {e}") from None
        token = lines[0].strip() if lines else ""
    if token is not None and (len(token) < 8 or any(ord(ch) < 33 or ord(ch) > 126 for ch in token)):
        raise InputError(f"the control token ({given[0]}) needs at least 8 printable characters, no spaces")
    if a.allow_control is not None:
        sys.stderr.write(f"feedmatch: warning: a token on the command line is visible to every user of this "
                         f"machine (ps); prefer --allow-control-file FILE or {TOKEN_ENV}\n")
    return token


def cmd_serve(a) -> int:
    import signal

    from feedmatch.web.server import serve

    if a.port is None and a.db is None:
        raise InputError("give --port (the board), --db (a logbook) or both")
    if not 1 <= a.http_port <= 65535:
        raise InputError(f"--http-port must be 1 to 65535, got {a.http_port}")
    token = _control_token(a)
    if not 0.5 <= a.idle_timeout <= 3600:
        raise InputError(f"--idle-timeout must be 0.5 to 3600 s, got {a.idle_timeout:g}")
    if a.hamlib_amp_port is not None and (a.port is None or not 1 <= a.hamlib_amp_port <= 65535):
        raise InputError("--hamlib-amp-port needs --port (the board) and a TCP port of 1 to 65535")
    if a.no_page and a.hamlib_amp_port is None:
        raise InputError("--no-page serves nothing without --hamlib-amp-port")
    if a.db is not None:
        from feedmatch.logbook.store import open_existing

        # A bad or missing logbook is one line now, not a broken page later
        # (start `feedmatch log` first: it makes the logbook).
        open_existing(a.db).close()

    def _term(_sig, _frame):
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _term)

    if token is not None and a.listen not in ("127.0.0.1", "localhost", "::1"):
        sys.stderr.write("feedmatch: warning: --allow-control on a network address: the token and the "
                         "page travel unencrypted; anyone who can read the network can tune the box\n")

    def ready(url: str) -> None:
        what = " and ".join(x for x in ((f"the board on {a.port}" if a.port else ""),
                                         (f"the logbook {a.db}" if a.db else "")) if x)
        mode = "tune and bypass buttons need the token" if token else "read-only"
        print(f"serving {what} at {url} ({mode}; Ctrl-C stops)", flush=True)

    amp = None
    try:  # a Ctrl-C at any moment from here on still closes the amplifier server and its board watch
        if a.hamlib_amp_port is not None:
            from feedmatch.web.hamlib_amp import serve_board

            amp = serve_board(a.port, a.baud, a.hamlib_amp_listen, a.hamlib_amp_port)
            print(f"serving the board's SWR, forward and reflected power and frequency to Hamlib amplifier "
                  f"clients on {a.hamlib_amp_listen}:{amp[0].port} (ampctld protocol, read-only)", flush=True)
        if a.no_page:
            while True:
                time.sleep(3600)
        serve(a.db, a.port, a.listen, a.http_port, token, a.baud, ready=ready,
              allow_hosts=tuple(a.allow_host or ()), idle_timeout_s=a.idle_timeout)
    except KeyboardInterrupt:
        pass
    finally:
        if amp is not None:
            amp[0].close()
            amp[1].close()
    return 0


def cmd_demo(a) -> int:
    from feedmatch.sim.demo import run_demo

    res = run_demo(a.out, use_python=a.python, station_file=a.station, say=print)
    return 1 if res["violations"] else 0


def add_commands(sub) -> None:
    s = sub.add_parser("virtual-board", help="run the firmware on the simulated station; prints its port")
    s.add_argument("--station", help="station JSON (default: the built-in demo station)")
    s.add_argument("--python", action="store_true", help="run the firmware under CPython")
    s.add_argument("--dir", help="directory standing in for the board's flash")
    s.add_argument("--carrier", help="key a steady carrier, e.g. 10@7.1e6 (W@Hz or W@band)")
    s.add_argument("--play", action="store_true", help="play the station's operating script once")
    s.add_argument("--emulate", choices=["rp2040"],
                   help="run the firmware as deployed on an emulated chip (rp2040js, needs node and npm)")
    s.add_argument("--image", help="with --emulate: the MicroPython .uf2 image for the Raspberry Pi Pico")
    s.add_argument("--rig", metavar="HOST:PORT",
                   help="a rigctld radio keys the station: its PTT, frequency and RF power become the carrier")
    s.add_argument("--rig-full-power", type=float, default=100.0,
                   help="the radio's power in W at RF power level 1.0 (with --rig; default 100)")
    s.add_argument("--fault", metavar="SPEC",
                   help="damage the simulated box, e.g. L3:stuck-out,C5:stuck-in,L6:drift=-30%%,side:stuck-ant")
    s.add_argument("--heap", type=int, metavar="KB",
                   help="the firmware's MicroPython heap in KB (-X heapsize; default 2048): rehearse the chip's "
                        "limits (the unix port's objects are twice the Pico's, so 256 is stricter than a Pico)")
    s.add_argument("--micropython", metavar="PORT",
                   help="which MicroPython unix port runs the firmware: 'float32' (single precision, as on "
                        "the chip), or a path to one (default: the installed port)")
    s.set_defaults(fn=cmd_virtual_board)

    s = sub.add_parser("follow", help="follow the radio's frequency through rigctld: preset the box before "
                       "the first carrier")
    _add_port(s)
    s.add_argument("--rig", required=True, metavar="HOST:PORT", help="rigctld's address (default port 4532)")
    s.add_argument("--tune-carrier", type=float, metavar="WATTS",
                   help="KEYS THE RADIO: where nothing is stored, key this power in --carrier-mode for a tune "
                        "(at most 5 s), then unkey and restore power and mode. Off by default")
    s.add_argument("--carrier-mode", default="CW",
                   help="the Hamlib mode of the tune carrier (default CW: a key-down carrier); AM or FM only "
                        "where the band plan allows them")
    s.add_argument("--segments", metavar="LIST|FILE",
                   help="with --tune-carrier: the segments you may transmit in, MHz, e.g. 7.0-7.2,14.0-14.35 "
                        "(or a file of them); nothing is keyed outside them")
    s.add_argument("--region", type=int, choices=[1, 2, 3],
                   help="your ITU Region (1 Europe/Africa, 2 Americas, 3 Asia-Pacific): the band edges")
    s.add_argument("--station", help="station JSON: its segments, region, antenna, network and board limits")
    s.add_argument("--antenna", help="antenna JSON or .s1p: key only where the box can match it")
    s.add_argument("--rig-full-power", type=float, default=100.0,
                   help="the radio's power in W at RF power level 1.0 (to set --tune-carrier; default 100)")
    s.add_argument("--curve", metavar="DB", help="logbook whose measured antenna gives presets where nothing "
                   "is stored (computed on the box's element values, switched cold, confirmed by the first carrier)")
    s.set_defaults(fn=cmd_follow)

    s = sub.add_parser("status", help="the board's state, relays, power and SWR")
    _add_port(s)
    s.set_defaults(fn=cmd_status)

    s = sub.add_parser("tune", help="tune now (a carrier must be keyed) and print the result")
    _add_port(s)
    s.add_argument("--freq", help="frequency hint in Hz or a band name")
    s.add_argument("--wait", type=float, default=15.0, help="seconds to wait for the result (default 15; 1 to 600)")
    s.set_defaults(fn=cmd_tune)

    s = sub.add_parser("selftest", help="step each relay under a tune carrier and name any that misbehaves")
    _add_port(s)
    s.add_argument("--wait", type=float, default=20.0,
                   help="seconds to wait for the tune that comes first (default 20; 1 to 600)")
    s.add_argument("--write", action="store_true",
                   help="mark a stuck element failed in the board's config (the search then works around it)")
    s.set_defaults(fn=cmd_selftest)

    s = sub.add_parser("bypass", help="put the tuner through (or back in line with --off)")
    _add_port(s)
    s.add_argument("--off", action="store_true", help="put the network back in line instead")
    s.set_defaults(fn=cmd_bypass)

    s = sub.add_parser("memory", help="list, --export, --import or --clear the stored states")
    _add_port(s)
    s.add_argument("--clear", action="store_true",
                   help="wipe every stored state on the box (asks first; --yes does not ask)")
    s.add_argument("--yes", action="store_true", help="with --clear: do not ask for confirmation")
    s.add_argument("--export", metavar="FILE.json",
                   help="also write the stored states to a JSON file (keep it before re-flashing a board)")
    s.add_argument("--import", dest="import_", metavar="FILE.json",
                   help="write the states of an --export file into the board's memory (a bin it already "
                        "holds keeps the board's own state); a file from another board, bin width or "
                        "element values is refused without --mismatch-ok")
    s.add_argument("--mismatch-ok", action="store_true",
                   help="with --import: import a file from another board identity, bin width (its states "
                        "move to this board's bins) or element values anyway (off by default)")
    s.set_defaults(fn=cmd_memory)

    s = sub.add_parser("log", help="log every tune into an SQLite logbook until stopped")
    _add_port(s)
    s.add_argument("--db", required=True, help="the SQLite logbook file (made if missing; its directory must exist)")
    s.set_defaults(fn=cmd_log)

    s = sub.add_parser("serve", help="a live web page of the station (board state, logbook, charts)")
    s.add_argument("--port", help="the board's serial port (optional: without it, the logbook alone)")
    s.add_argument("--baud", type=int, default=115200, help="serial speed in bit/s (default 115200)")
    s.add_argument("--db", help="the logbook to show (an existing file: `feedmatch log` makes it)")
    s.add_argument("--listen", default="127.0.0.1", help="address to bind (default 127.0.0.1: this machine only)")
    s.add_argument("--http-port", type=int, default=8765, help="TCP port of the page (default 8765)")
    s.add_argument("--allow-host", action="append", metavar="NAME",
                   help="another host name the page may be reached by (repeatable; 127.0.0.1, localhost "
                        "and the --listen address are always served)")
    s.add_argument("--allow-control-file", metavar="FILE",
                   help="add tune and bypass buttons; each request must carry the token on the first line "
                        "of FILE (mode 600). The environment variable FEEDMATCH_CONTROL_TOKEN does the same")
    s.add_argument("--allow-control", metavar="TOKEN",
                   help="as --allow-control-file, with the token on the command line (visible in ps)")
    s.add_argument("--idle-timeout", type=float, default=10.0, metavar="SECONDS",
                   help="close a connection that sends no complete request for this long (default 10 s)")
    s.add_argument("--hamlib-amp-port", type=int, metavar="PORT",
                   help="also serve the box's SWR, forward and reflected power and frequency, read-only, on "
                        "Hamlib's network amplifier protocol (what ampctld serves) at this TCP port")
    s.add_argument("--hamlib-amp-listen", default="127.0.0.1", metavar="ADDR",
                   help="address for --hamlib-amp-port (default 127.0.0.1: this machine only)")
    s.add_argument("--no-page", action="store_true", help="with --hamlib-amp-port: no web page, the amplifier "
                   "protocol alone")
    s.set_defaults(fn=cmd_serve)

    s = sub.add_parser("report", help="per-band table and antenna-health flags from the logbook")
    s.add_argument("--db", required=True, help="the SQLite logbook that `feedmatch log` writes")
    s.add_argument("--since", help="ISO date, e.g. 2026-11-01")
    s.add_argument("--plots", help="directory for PNG plots")
    s.add_argument("--csv", help="write the tune rows as CSV")
    s.add_argument("--json", action="store_true", help="print one JSON object instead of the table")
    s.set_defaults(fn=cmd_report)

    s = sub.add_parser("demo", help="the main job on the built-in simulated station")
    s.add_argument("--out", default="demo-out",
                   help="directory for the demo's logbook, plots and CSV (default demo-out)")
    s.add_argument("--python", action="store_true", help="firmware under CPython")
    s.add_argument("--station", help="station JSON (default: built-in)")
    s.set_defaults(fn=cmd_demo)
