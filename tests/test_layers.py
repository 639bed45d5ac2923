"""The house's boundaries hold: import contracts (pyproject [tool.importlinter]) and one command table."""

from __future__ import annotations

import subprocess

from .conftest import BIN, ROOT


def test_import_contracts_are_kept():
    r = subprocess.run([str(BIN / "lint-imports"), "--no-cache"], capture_output=True, text=True, cwd=str(ROOT),
                       timeout=300)
    assert r.returncode == 0, r.stdout[-3000:] + r.stderr[-2000:]
    assert "4 kept, 0 broken" in r.stdout


def test_every_command_is_registered():
    # A module that fails to import must fail loudly, not drop its commands.
    from feedmatch.cli import build_parser

    sub = next(a for a in build_parser()._actions if a.dest == "cmd" or getattr(a, "choices", None))
    names = set(sub.choices)
    assert {"simulate", "loads", "score", "bench", "antenna", "virtual-board", "status", "tune", "bypass",
            "memory", "log", "report", "demo", "fit-box", "deploy", "calibrate"} <= names


def test_nothing_below_the_command_line_prints():
    # Output belongs to cli/: the layers below return values (strings in board code don't count).
    import ast

    pkg = ROOT / "host" / "feedmatch"
    offenders = []
    for f in pkg.rglob("*.py"):
        rel = f.relative_to(pkg)
        if rel.parts[0] in ("cli", "data"):
            continue
        for node in ast.walk(ast.parse(f.read_text())):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "print":
                offenders.append(f"{rel}:{node.lineno}")
    assert not offenders, offenders
