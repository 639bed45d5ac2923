"""The README's example runs, checked and refreshed from real output.

Every fenced block whose commands are all in RUNNABLE is run in a scratch
directory, command by command; each command's output must match what the
README shows after it.  Numbers are compared to 3 significant digits, so a
last-digit change between numpy builds is not a drift, but any other change is.

    python -m tests.readme_examples --write     rewrite those outputs in README.md
"""

from __future__ import annotations

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


def run(cmd: str, cwd: Path) -> list[str]:
    argv = shlex.split(cmd)
    argv = [str(ROOT / a) if a.startswith("host/") else a for a in argv]
    r = subprocess.run([str(BIN / argv[0]), *argv[1:]], capture_output=True, text=True, cwd=str(cwd),
                       timeout=600)
    if r.returncode != 0:
        raise AssertionError(f"README command failed: {cmd}\n{r.stderr}")
    return (r.stdout + r.stderr).rstrip("\n").split("\n")


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


def check_all() -> list[str]:
    problems = []
    for _a, _b, body in blocks(README.read_text()):
        with tempfile.TemporaryDirectory() as d:
            for cmd, shown in steps(body):
                diff = same(shown, run(cmd, Path(d)))
                if diff:
                    problems.append(f"$ {cmd}\n{diff}")
    return problems


def write() -> None:
    lines = README.read_text().split("\n")
    for a, b, body in reversed(blocks("\n".join(lines))):
        new = []
        with tempfile.TemporaryDirectory() as d:
            for cmd, _shown in steps(body):
                new.append("$ " + cmd)
                new += run(cmd, Path(d))
        lines[a:b] = new
    README.write_text("\n".join(lines))


if __name__ == "__main__":
    if "--write" in sys.argv:
        write()
    else:
        bad = check_all()
        print("\n\n".join(bad) or "README examples match")
        sys.exit(1 if bad else 0)
