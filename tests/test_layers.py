"""The house's boundaries hold: import contracts (pyproject [tool.importlinter]), one command table,
and output only from the command line."""

from __future__ import annotations

import subprocess

from .conftest import BIN, ROOT


def test_import_contracts_are_kept():
    r = subprocess.run([str(BIN / "lint-imports"), "--no-cache"], capture_output=True, text=True, cwd=str(ROOT),
                       timeout=300)
    assert r.returncode == 0, r.stdout[-3000:] + r.stderr[-2000:]
    assert "5 kept, 0 broken" in r.stdout


def test_the_command_table_is_the_parser():
    """cli.COMMANDS is the one way to add a command: the parser holds exactly its names, in its
    order, each run by a function of the module the table names; the README names each."""
    import importlib

    from feedmatch.cli import COMMANDS, build_parser

    sub = next(a for a in build_parser()._actions if a.dest == "cmd")
    assert list(sub.choices) == list(COMMANDS)
    for name, module in COMMANDS.items():
        fn = sub.choices[name].get_default("fn")
        assert fn is not None and fn.__module__ == module, (name, fn, module)
        assert name in importlib.import_module(module).PARSERS
    readme = (ROOT / "README.md").read_text()
    unnamed = [n for n in COMMANDS if f"feedmatch {n}" not in readme and f"`{n}" not in readme]
    assert not unnamed, f"commands the README never names: {unnamed}"
    # The long-running services stop on SIGTERM through one helper, apart from the one-shot commands.
    services = [n for n, m in COMMANDS.items() if m == "feedmatch.cli.services"]
    assert set(services) == {"virtual-board", "follow", "log", "serve"}
    for f in (ROOT / "host" / "feedmatch" / "cli").glob("*.py"):
        assert f.read_text().count("signal.SIGTERM") == (1 if f.name == "common.py" else 0), f.name


def _writes_to_a_terminal(node) -> bool:
    """print(...), pprint(...), any use of sys.stdout / sys.stderr, os.write(1 or 2, ...)."""
    import ast

    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id in ("print", "pprint"):
        return True
    if isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) and node.value.id == "sys" and \
            node.attr in ("stdout", "stderr", "__stdout__", "__stderr__"):
        return True
    return (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "write"
            and isinstance(node.func.value, ast.Name) and node.func.value.id == "os" and node.args
            and isinstance(node.args[0], ast.Constant) and node.args[0].value in (1, 2))


def test_nothing_below_the_command_line_prints():
    # Output belongs to cli/: the layers below return values or write to a stream they are
    # given (the logger's out), never to the terminal themselves.
    import ast

    assert _writes_to_a_terminal(ast.parse("sys.stderr.write('x')").body[0].value.func.value)
    assert _writes_to_a_terminal(ast.parse("print('x')").body[0].value)
    assert not _writes_to_a_terminal(ast.parse("self.out.write('x')").body[0].value)
    pkg = ROOT / "host" / "feedmatch"
    offenders = []
    for f in pkg.rglob("*.py"):
        rel = f.relative_to(pkg)
        if rel.parts[0] in ("cli", "data"):
            continue
        for node in ast.walk(ast.parse(f.read_text())):
            if _writes_to_a_terminal(node):
                offenders.append(f"{rel}:{node.lineno}")
    assert not offenders, offenders
