"""The README's example runs, checked and refreshed from real output.

Every fenced block whose commands are all in RUNNABLE is run in a scratch
directory, command by command; each command's output must match what the
README shows after it.  Numbers are compared to 3 significant digits, so a
last-digit change between numpy builds is not a drift, but any other change is.

The runs take minutes, so `--write` also keeps them in CACHE, keyed by a hash
of every source file they executed (each module the runs imported, found with
Python's -X importtime, in this checkout), the package data, the NEC-2 engine's
build files and the commands themselves.  The check compares the README with
the cache while that key still holds; when any of those files or commands
changed, it runs the examples for real (and says to refresh the cache).

    python -m tests.readme_examples --write     rewrite the outputs in README.md and the cache
    python -m tests.readme_examples --live      check by running the examples, whatever the cache
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
import os
import re
import shlex
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
BIN = Path(sys.executable).parent
# Commands that need nothing but this checkout (no board, no running demo, not the bench).
RUNNABLE = ("simulate", "loads", "score", "antenna")
_NUM = re.compile(r"[-+]?\d+(?:\.\d+)?(?:e[-+]?\d+)?")
CACHE = Path(__file__).resolve().parent / "readme_runs.json"
# Read by the runs but never imported: in the key whatever the import trace says.
DATA_DIRS = ("host/feedmatch/data", "third_party/necpp")
# The checkout's own sources; installed packages (numpy, matplotlib...) are not in the key
# (numbers are compared to 3 significant digits, so a rebuilt numpy is not a drift).
OWN = ("host/", "firmware/", "third_party/")
_IMPORT = re.compile(r"^import time:\s+\d+ \|\s+\d+ \|\s*(\S+)\s*$")


def blocks(text: str) -> list[tuple[int, int, list[str]]]:
    """(first line, end line, lines) of every fenced block of runnable commands."""
    lines = text.split("\n")
    out, i = [], 0
    while i < len(lines):
        if lines[i].startswith("```"):
            j = i + 1
            while not lines[j].startswith("```"):
                j += 1
            body = lines[i + 1: j]
            cmds = [ln for ln in body if ln.startswith("$ ")]
            if cmds and all(c.split()[1:2] == ["feedmatch"] and c.split()[2] in RUNNABLE for c in cmds):
                out.append((i + 1, j, body))
            i = j
        i += 1
    return out


def steps(body: list[str]) -> list[tuple[str, list[str]]]:
    out: list[tuple[str, list[str]]] = []
    for ln in body:
        if ln.startswith("$ "):
            out.append((ln[2:], []))
        else:
            out[-1][1].append(ln)
    return out


def run(cmd: str, cwd: Path, modules: set[str] | None = None) -> list[str]:
    """The command's output lines; with modules, the names of every module it (and any
    worker process it started) imported are added to that set."""
    argv = shlex.split(cmd)
    argv = [str(ROOT / a) if a.startswith("host/") else a for a in argv]
    env = dict(os.environ, PYTHONPROFILEIMPORTTIME="1") if modules is not None else None
    r = subprocess.run([str(BIN / argv[0]), *argv[1:]], capture_output=True, text=True, cwd=str(cwd),
                       timeout=600, env=env)
    if r.returncode != 0:
        raise AssertionError(f"README command failed: {cmd}\n{r.stderr}")
    err = r.stderr
    if modules is not None:
        kept = []
        for ln in err.split("\n"):
            m = _IMPORT.match(ln)
            if m:
                modules.add(m.group(1))
            elif not ln.startswith("import time: self [us]"):
                kept.append(ln)
        err = "\n".join(kept)
    return (r.stdout + err).rstrip("\n").split("\n")


def _module_files(modules: set[str]) -> set[str]:
    """The files of this checkout that hold those modules (paths relative to ROOT)."""
    out = set()
    for name in sorted(modules):
        try:
            spec = importlib.util.find_spec(name)
        except (ImportError, ValueError):
            continue
        origin = Path(spec.origin).resolve() if spec is not None and spec.origin else None
        if origin is not None and origin.is_file() and ROOT in origin.parents:
            rel = origin.relative_to(ROOT).as_posix()
            if rel.startswith(OWN):
                out.add(rel)
    return out


def _data_files() -> set[str]:
    out = set()
    for d in DATA_DIRS:
        for p in (ROOT / d).rglob("*"):
            if p.is_file() and "__pycache__" not in p.parts:
                out.add(p.relative_to(ROOT).as_posix())
    return out


def cache_key(files: list[str], commands: list[str]) -> str:
    """sha256 over each file's path and content (a missing file counts as such) and the commands."""
    h = hashlib.sha256()
    for f in sorted(files):
        p = ROOT / f
        h.update(f.encode() + b"\0" + (hashlib.sha256(p.read_bytes()).digest() if p.is_file() else b"missing"))
    for c in commands:
        h.update(b"$ " + c.encode() + b"\n")
    return h.hexdigest()


def _commands(text: str) -> list[str]:
    return [cmd for _a, _b, body in blocks(text) for cmd, _shown in steps(body)]


CACHE_FORMAT = 2  # runs: [command, output lines] in the README's order


def cached_runs(text: str) -> list[list] | None:
    """The cached [command, output lines] of each README command, in order, while the
    cache's key holds, else None."""
    try:
        doc = json.loads(CACHE.read_text())
    except (OSError, ValueError):
        return None
    cmds = _commands(text)
    if not isinstance(doc, dict) or doc.get("format") != CACHE_FORMAT or \
            doc.get("key") != cache_key(doc.get("files", []), cmds):
        return None
    runs = doc.get("runs")
    if not isinstance(runs, list) or [r[0] for r in runs] != cmds:
        return None
    return runs


def _norm(line: str) -> tuple[str, list[float]]:
    nums = [float(x) for x in _NUM.findall(line)]
    return _NUM.sub("#", line.rstrip()), nums


def same(shown: list[str], got: list[str]) -> str | None:
    """None when alike; else the first difference."""
    if len(shown) != len(got):
        return f"{len(got)} lines of output, the README shows {len(shown)}"
    for a, b in zip(shown, got):
        (ta, na), (tb, nb) = _norm(a), _norm(b)
        if ta != tb or len(na) != len(nb) or any(
                abs(x - y) > 1e-3 * max(abs(x), abs(y)) + 1e-12 for x, y in zip(na, nb)):
            return f"README: {a!r}\n   now: {b!r}"
    return None


def check_cached(text: str) -> list[str] | None:
    """Problems found against the cached runs; None when the cache does not hold."""
    runs = cached_runs(text)
    if runs is None:
        return None
    problems = []
    shown_runs = [st for _a, _b, body in blocks(text) for st in steps(body)]
    for (cmd, shown), (_cmd, out) in zip(shown_runs, runs):
        diff = same(shown, out)
        if diff:
            problems.append(f"$ {cmd}\n{diff}")
    return problems


def check_all() -> list[str]:
    """Problems found by running every example for real."""
    problems = []
    for _a, _b, body in blocks(README.read_text()):
        with tempfile.TemporaryDirectory() as d:
            for cmd, shown in steps(body):
                diff = same(shown, run(cmd, Path(d)))
                if diff:
                    problems.append(f"$ {cmd}\n{diff}")
    return problems


def write() -> None:
    """Run every example, put its output into README.md, and keep the runs in CACHE."""
    lines = README.read_text().split("\n")
    modules: set[str] = set()
    runs: list[list] = []
    for a, b, body in reversed(blocks("\n".join(lines))):
        new = []
        block_runs = []
        with tempfile.TemporaryDirectory() as d:
            for cmd, _shown in steps(body):
                out = run(cmd, Path(d), modules)
                block_runs.append([cmd, out])
                new.append("$ " + cmd)
                new += out
        lines[a:b] = new
        runs[:0] = block_runs  # blocks run last to first: kept in the README's order
    text = "\n".join(lines)
    README.write_text(text)
    # The command modules come in by importlib.import_module (feedmatch.cli.COMMANDS), which
    # -X importtime does not report (it sees import statements only): named here, every run
    # imports them all to build its parser.
    from feedmatch.cli import COMMANDS

    modules |= set(COMMANDS.values())
    cmds = _commands(text)
    files = sorted(_module_files(modules) | _data_files()
                   | {a for c in cmds for a in shlex.split(c) if a.startswith("host/")})
    CACHE.write_text(json.dumps({"note": "written by `make readme` (tests/readme_examples.py): the README "
                                         "examples' output, valid while these files and commands are unchanged",
                                 "format": CACHE_FORMAT, "key": cache_key(files, cmds), "files": files,
                                 "runs": runs}, indent=1) + "\n")


if __name__ == "__main__":
    if "--write" in sys.argv:
        write()
    else:
        bad = None if "--live" in sys.argv else check_cached(README.read_text())
        if bad is None:
            bad = check_all()
        print("\n\n".join(bad) or "README examples match")
        sys.exit(1 if bad else 0)
