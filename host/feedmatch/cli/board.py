"""One-shot board commands: ask the board (real or virtual), print, exit."""

from __future__ import annotations

import math
import sys
import time

from feedmatch.cli.common import (
    add_port_options,
    bound_text,
    check_wait,
    mhz,
    open_link,
    plural,
    state_text,
    swr_text,
    values_text,
)
from feedmatch.cli.output import emit_json
from feedmatch.errors import BoardRefused, InputError
from feedmatch.outpaths import output_file
from feedmatch.seam.bank import side_name


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


def _state_words(st: dict) -> str:
    """The board's state, said so that a result is not mistaken for the present:
    "locked" with no carrier now is the last tune's result."""
    state, why = st.get("state", "?"), st.get("why", "")
    swr = st.get("swr")
    carrier = isinstance(swr, (int, float)) and swr >= 1.0
    if state in ("locked", "best-effort") and not carrier:
        return f"{state} at the last tune ({why}); no carrier now"
    return f"{state} - {why}"


def cmd_status(a) -> int:

    with open_link(a) as ln:
        st = ln.request("status")
        bank = None if a.json else ln.bank()
    if a.json:
        emit_json(st)
        return 0
    swr = st.get("swr")
    print(f"board {st['board_id']} (firmware {st['version']}, boot {st['boot']}): {_state_words(st)}")
    print(f"  relays {state_text(st['relays'], bank)}; forward {st['fwd_w']} W, "
          f"SWR {swr_text(swr) if swr is not None else 'no RF'}{bound_text(st.get('swr_bound'))}; "
          f"{mhz(st['freq_hz'])}")
    print(f"  {plural(st['mem_entries'], 'memory entry', 'memory entries')}; last record no. {st['seq']}; "
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
    from feedmatch.rf import bands

    check_wait(a)
    f = bands.parse_freq(a.freq) if a.freq else 0.0
    deadline = time.monotonic() + a.wait
    with open_link(a) as ln:
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
            print(f"refused: {rec['why']}; relays left at {state_text(rec['after'], bank)}")
        else:
            head = (f"ended worse than it started ({rec['outcome']}: {rec['why']})" if worse
                    else f"{rec['outcome']}: {rec['why']}")
            print(f"{head}; SWR {swr_text(b)} -> "
                  f"{swr_text(af)}{bound_text(rec.get('swr_bound'))} at {mhz(rec['freq_hz'])}, "
                  f"{state_text(rec['after'], bank)}, "
                  f"{plural(rec['n'], 'measurement')} in {rec['ms']} ms")
        note = _freq_disagrees(a.freq, f, rec.get("freq_hz") or 0.0)
        if note:
            print("note: " + note)
    from feedmatch.seam.logic import BEST, LOCKED, THROUGH

    # A tune that left the SWR higher than it found it is not a success.
    return 0 if rec["outcome"] in (LOCKED, BEST, THROUGH) and not worse else 1


def cmd_selftest(a) -> int:
    from feedmatch.board.selftest import run_selftest

    check_wait(a)
    with open_link(a) as ln:
        res = run_selftest(ln, a.wait, say=(lambda t: None) if a.json else
                           (lambda t: sys.stderr.write(f"feedmatch: {t}\n")))
        if a.write:
            res["written"] = _write_faults(ln, res)
    if a.json:
        emit_json({k: res[k] for k in ("faults", "readings", "untested", "values_unmeasured", "freq_hz", "refs",
                                      "chi2_healthy",
                                      "tuned_first") if k in res} | ({"written": res["written"]}
                                                                     if "written" in res else {}))
        return 0 if not res["faults"] else 1
    vals = res["values"]
    print(f"self-test at {mhz(res['freq_hz'])}, {res['fwd_w']} W: {res['readings']} readings "
          f"from L{res['refs'][0][0]} C{res['refs'][0][1]} and L{res['refs'][1][0]} C{res['refs'][1][1]}")
    if not res["faults"]:
        print("  every relay acts as the model says")
    for f in res["faults"]:
        what = f.get("value") and f"now about {f['value']} ({f['drift_percent']:+g} %)" or ""
        print(f"  {f['element']}{' (' + f['nominal'] + ')' if 'nominal' in f else ''}: {f['kind']} {what}".rstrip())
        for t in f["evidence"]["telling"]:
            st = t["state"]
            where = "bypass" if st == ["bypass"] else f"L{st[0]} C{st[1]} {side_name(st[2])}"
            print(f"    {where}: read |gamma| {t['measured_gamma']:.3f}, "
                  f"healthy box {t['healthy_gamma']:.3f}, with this fault {t['fault_gamma']:.3f}")
        print(f"    fit chi-square: healthy {f['evidence']['chi2_healthy']}, this fault {f['evidence']['chi2_fault']}")
        if f.get("fits_as_well"):
            print(f"    the readings fit {', '.join(f['fits_as_well'])} as well: "
                  "repeat on a lower band to tell them apart")
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
    if res.get("values_unmeasured"):
        names = []
        for e in res["values_unmeasured"]:
            v = vals["inductors_uh" if e[0] == "L" else "capacitors_pf"][int(e[1:])]
            names.append(f"{e} ({v:g} {'uH' if e[0] == 'L' else 'pF'})")
        print(f"  values not measured at this carrier (a drift there would pass unseen): {', '.join(names)}")
    if "written" in res:
        print(f"  {res['written']}")
    return 0 if not res["faults"] else 1


def _write_faults(ln, res) -> str:
    """--write: a stuck element goes into the board's network.failed (the search then
    keeps to states it can reach); a drift is for fit-box's correction, not written here."""
    from feedmatch.seam.logic import FAILED_KINDS

    stuck = [f"{f['element']}:{f['kind']}" for f in res["faults"] if f["kind"] in FAILED_KINDS]
    if not stuck:
        return "nothing written: no stuck element" + (" (a drift is learned by fit-box)" if res["faults"] else "")
    have = ln.request("cfg-get", {"section": "network"})["value"].get("failed") or []
    new = list(have) + [s for s in stuck if s.split(":")[0] not in [h.split(":")[0] for h in have]]
    ln.request("cfg-set", {"path": "network.failed", "value": new})
    return f"written to the board's config: network.failed = {new}"


def cmd_bypass(a) -> int:

    with open_link(a) as ln:
        r = ln.request("bypass", {"on": not a.off})
        bank = None if a.json else ln.bank()
    if a.json:
        emit_json(r)
    else:
        print(f"relays now {state_text(r['relays'], bank)}")
    return 0


def cmd_memory(a) -> int:

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
    with open_link(a) as ln:
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
        (sys.stderr if a.json else sys.stdout).write(f"wrote {plural(len(items), 'stored state')} to {a.export}\n")
    if a.json:
        emit_json({"bin_hz": r["bin_hz"], "entries": items})
        return 0
    print(f"{plural(len(items), 'stored state')} (bins of {r['bin_hz'] / 1e3:g} kHz)")
    for f, l, c, sh, swr, _t in items:
        print(f"  {f / 1e6:9.4f} MHz  L{l:<4d} C{c:<4d} {side_name(sh):>3}  SWR {swr:.2f}"
              f"{values_text(bank, l, c)}")
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
    from feedmatch.logbook.store import board_key
    from feedmatch.seam.logic import PUT_MAX, check_entries

    doc = _memory_file(a.import_)
    ents = doc["entries"]
    with open_link(a) as ln:
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
            args = {"bin_hz": doc["bin_hz"], "entries": ents[k:k + PUT_MAX], "rebin": bool(a.mismatch_ok),
                    "foreign": bool(a.mismatch_ok), "save": last}
            if "/" in doc["board"]:
                args["from_uid"] = doc["board"].rsplit("/", 1)[1]  # the box checks it is its own too
            r = ln.request("mem-put", args)
            stored += r["stored"]
            kept += r["kept"]
    out = {"imported": stored, "kept": kept, "in_file": len(ents), "entries": r["entries"],
           "max_entries": r["max_entries"], "saved": r["saved"], "board": here}
    if a.json:
        emit_json(out)
    else:
        print(f"imported {plural(stored, 'stored state')} of {len(ents)} from {a.import_}"
              + (f"; {plural(kept, 'bin')} kept the board's own state" if kept else "")
              + f"; the board now holds {plural(r['entries'], 'stored state')}")
        if r["max_entries"] is not None and status.get("mem_entries", 0) + stored > r["entries"]:
            print(f"note: the board keeps at most {r['max_entries']}: the oldest states made room")
    if not r["saved"]:
        sys.stderr.write("the board could not write its memory to flash: the states are in its RAM only "
                         "(see status); import again after fixing the flash\n")
        return 1
    return 0


def _parser_status(sub) -> None:
    s = sub.add_parser("status", help="the board's state, relays, power and SWR")
    add_port_options(s)
    s.set_defaults(fn=cmd_status)


def _parser_tune(sub) -> None:
    s = sub.add_parser("tune", help="tune now (a carrier must be keyed) and print the result")
    add_port_options(s)
    s.add_argument("--freq", help="frequency hint in Hz or a band name")
    s.add_argument("--wait", type=float, default=15.0, help="seconds to wait for the result (default 15; 1 to 600)")
    s.set_defaults(fn=cmd_tune)


def _parser_selftest(sub) -> None:
    s = sub.add_parser("selftest", help="step each relay under a tune carrier and name any that misbehaves")
    add_port_options(s)
    s.add_argument("--wait", type=float, default=20.0,
                   help="seconds to wait for the tune that comes first (default 20; 1 to 600)")
    s.add_argument("--write", action="store_true",
                   help="mark a stuck element failed in the board's config (the search then works around it)")
    s.set_defaults(fn=cmd_selftest)


def _parser_bypass(sub) -> None:
    s = sub.add_parser("bypass", help="put the tuner through (or back in line with --off)")
    add_port_options(s)
    s.add_argument("--off", action="store_true", help="put the network back in line instead")
    s.set_defaults(fn=cmd_bypass)


def _parser_memory(sub) -> None:
    s = sub.add_parser("memory", help="list, --export, --import or --clear the stored states")
    add_port_options(s)
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


# The commands of this module (feedmatch.cli.COMMANDS): name -> the function that adds its
# parser, which sets fn, the function that runs it.
PARSERS = {
    "status": _parser_status,
    "tune": _parser_tune,
    "selftest": _parser_selftest,
    "bypass": _parser_bypass,
    "memory": _parser_memory,
}
