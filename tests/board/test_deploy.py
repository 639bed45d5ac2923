"""Deploying the firmware and the board config: staged, verified, switched whole, refused when bad."""

from __future__ import annotations

import json
import shutil
import subprocess
import threading
import time

import pytest
from feedmatch.board import deploy
from feedmatch.errors import LinkError

from ..conftest import FIRMWARE, run_cli, run_mpy


# -- deploy -----------------------------------------------------------------------
def _fw_copy(tmp_path, monkeypatch):
    fw = tmp_path / "fw"
    shutil.copytree(FIRMWARE, fw, ignore=shutil.ignore_patterns("__pycache__"))
    monkeypatch.setattr(deploy, "FIRMWARE", fw)
    return fw


def test_deploy_stages_verifies_switches_and_skips_matching(tmp_path, monkeypatch):
    fw = _fw_copy(tmp_path, monkeypatch)
    board = tmp_path / "board"
    board.mkdir()
    r = run_cli("deploy", "--port", str(board), "--dry-run", "--json")
    assert r.returncode == 0, r.stderr
    assert list(board.iterdir()) == []  # a dry run writes nothing
    t = deploy.DirTarget(board)
    cfg = deploy.CONFIGS / "rp2040.json"
    p = deploy.plan("rp2040", cfg, False, t, tmp_path / "w1")
    assert all(i.action == "send" for i in p["items"])
    deploy.apply(p, t)
    v1 = (board / "fm" / "current").read_text()
    assert (board / "main.py").read_text() == (fw / "loader.py").read_text()
    assert json.loads((board / "config.json").read_text())["board"] == "rp2040"
    p = deploy.plan("rp2040", cfg, False, t, tmp_path / "w2")
    assert {i.action for i in p["items"]} == {"keep"} and p["config_action"] == "keep"
    # One changed file: only it crosses the link; the rest are copied on the board.
    (fw / "fmlogic" / "swr.py").write_text((fw / "fmlogic" / "swr.py").read_text() + "\n# changed\n")
    p = deploy.plan("rp2040", cfg, False, t, tmp_path / "w3")
    sent = [i.remote for i in p["items"] if i.action == "send"]
    assert len(sent) == 1 and sent[0].endswith("fmlogic/swr.py")
    assert all(i.action.startswith("copy:") for i in p["items"] if i.action != "send")
    deploy.apply(p, t)
    v2 = (board / "fm" / "current").read_text()
    assert v2 != v1 and (board / "fm" / v1).is_dir()  # the previous version stays for rollback


def test_deploy_never_switches_to_a_half_written_version(tmp_path, monkeypatch):
    _fw_copy(tmp_path, monkeypatch)
    board = tmp_path / "board"
    board.mkdir()
    t = deploy.DirTarget(board)
    cfg = deploy.CONFIGS / "rp2040.json"
    deploy.apply(deploy.plan("rp2040", cfg, False, t, tmp_path / "w"), t)
    before = (board / "fm" / "current").read_text()

    class Flaky(deploy.DirTarget):
        def put(self, local, remote):
            super().put(local, remote)
            if remote.endswith("search.mpy"):
                (self.root / remote).write_bytes(b"torn")  # the link dropped mid-file

    ft = Flaky(board)
    p = deploy.plan("rp2040", cfg, True, ft, tmp_path / "w2")
    with pytest.raises(LinkError, match="verification failed"):
        deploy.apply(p, ft)
    assert (board / "fm" / "current").read_text() == before


def test_deploy_refuses_bad_config(tmp_path):
    bad = json.loads((deploy.CONFIGS / "rp2040.json").read_text())
    bad["power"]["hot_switch_w"] = 5
    p = tmp_path / "bad.json"
    p.write_text(json.dumps(bad))
    board = tmp_path / "b"
    board.mkdir()
    r = run_cli("deploy", "--port", str(board), "--config", str(p))
    assert r.returncode == 2 and "hot_switch" in r.stderr and list(board.iterdir()) == []
    r = run_cli("deploy", "--port", str(board), "--board", "esp32", "--config",
                str(deploy.CONFIGS / "rp2040.json"))
    assert r.returncode == 2 and "not 'esp32'" in r.stderr


@pytest.mark.parametrize("compiled", [False, True])
def test_deployed_tree_boots_on_the_unix_port_up_to_the_hardware(tmp_path, micropython, compiled):
    board = tmp_path / "board"
    board.mkdir()
    t = deploy.DirTarget(board)
    # Compiled for the unix port's own architecture: the viper kernels are machine code.
    deploy.apply(deploy.plan("rp2040", deploy.CONFIGS / "rp2040.json", compiled, t, tmp_path / "w", arch="x64"), t)
    r = subprocess.run([micropython, "main.py"], cwd=str(board), capture_output=True, text=True, timeout=60)
    # The loader found the version, imported the app and the logic; only 'machine' is missing here.
    assert "machine" in (r.stderr + r.stdout), r.stderr + r.stdout
    assert "fmlogic" not in (r.stderr + r.stdout).split("machine")[0].split("ImportError")[-1]


def test_board_validator_same_under_unix_port(micropython):
    cfgs = [json.loads((deploy.CONFIGS / n).read_text()) for n in ("rp2040.json", "esp32.json")]
    bad = json.loads(json.dumps(cfgs[0]))
    bad["tune"]["target_swr"] = 0.2
    bad["pins"]["led"] = 99
    bad["colour"] = "red"
    cases = cfgs + [bad]
    from fmlogic import config as fcfg

    ours = [fcfg.validate(c) for c in cases]
    code = ("import json\nfrom fmlogic import config\n"
            f"for c in json.loads({json.dumps(cases)!r}):\n print(json.dumps(config.validate(c)))")
    theirs = [json.loads(x) for x in run_mpy(micropython, code).strip().splitlines()]
    assert ours == theirs and ours[0] == [] and len(ours[2]) == 3


def test_deploy_through_mpremote_to_the_unix_port(tmp_path, micropython):
    """The real mpremote path: the unix port's raw REPL on a pseudo-terminal stands in for a board."""
    import os
    import pty
    import select
    import tty

    root = tmp_path / "flash"
    root.mkdir()

    def boot():
        m1, s1 = pty.openpty()
        tty.setraw(s1)
        p = subprocess.Popen([micropython], stdin=s1, stdout=s1, stderr=s1, cwd=str(root))
        return p, m1, s1

    m2, s2 = pty.openpty()
    tty.setraw(s2)
    state = {"board": boot(), "stop": False}

    def bridge():
        while not state["stop"]:
            p, m1, _ = state["board"]
            r, _, _ = select.select([m1, m2], [], [], 0.1)
            for fd in r:
                try:
                    d = os.read(fd, 4096)
                    os.write(m2 if fd == m1 else m1, d)
                except OSError:
                    pass
    th = threading.Thread(target=bridge, daemon=True)
    th.start()
    port = os.ttyname(s2)
    try:
        time.sleep(0.5)
        r = run_cli("deploy", "--port", port, "--board", "esp32", "--json", timeout=400)
        assert r.returncode == 0, r.stderr
        v = json.loads(r.stdout)["version"]
        assert (root / "fm" / "current").read_text() == v
        sent = root / "fm" / v / "fmlogic" / "search.py"
        assert sent.read_bytes() == (FIRMWARE / "fmlogic" / "search.py").read_bytes()
        assert json.loads((root / "config.json").read_text())["board"] == "esp32"
        # The board "reboots"; a second deploy of the same version sends nothing.
        state["board"][0].kill()
        state["board"] = boot()
        time.sleep(0.5)
        r = run_cli("deploy", "--port", port, "--board", "esp32", "--dry-run", "--json", timeout=200)
        assert r.returncode == 0, r.stderr
        plan = json.loads(r.stdout)
        assert plan["current"] == v and {f["action"] for f in plan["files"]} == {"keep"}
    finally:
        state["stop"] = True
        state["board"][0].kill()
