"""The wheel a user installs works on its own: firmware and data inside, no checkout needed."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

from .conftest import BIN, ROOT

pytestmark = pytest.mark.slow  # builds and installs a wheel: make test-slow (CI runs it after make test)


@pytest.fixture(scope="module")
def installed(tmp_path_factory) -> dict:
    """Build the wheel from this tree, install it alone into a fresh venv, and
    borrow the dependencies (not feedmatch) from the test venv."""
    tmp = tmp_path_factory.mktemp("wheel")
    r = subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "-w", str(tmp), str(ROOT)],
                       capture_output=True, text=True, timeout=600)
    err = (r.stderr + r.stdout).lower()
    if r.returncode != 0 and any(w in err for w in ("network", "connection", "no matching distribution",
                                                    "could not find a version")):
        pytest.skip("pip could not fetch setuptools for the isolated build (no network): " + r.stderr[-200:])
    assert r.returncode == 0, r.stderr
    (whl,) = tmp.glob("feedmatch-*.whl")
    venv = tmp / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=120)
    py = venv / "bin" / "python"
    site = subprocess.run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                          capture_output=True, text=True, check=True).stdout.strip()
    # Dependencies from the test venv: a path line, so that venv's own .pth files
    # (the editable install of this checkout among them) are not run.
    Path(site, "deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    r = subprocess.run([sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--target", site, str(whl)],
                       timeout=300, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    # The wheel's own console-script entry point, as pip writes it into a venv.
    (ep,) = [ln for ln in zipfile.ZipFile(whl).read("feedmatch-0.1.0.dist-info/entry_points.txt").decode().splitlines()
             if ln.startswith("feedmatch")]
    mod, fn = ep.split("=")[1].strip().split(":")
    (venv / "bin" / "feedmatch").write_text(f"#!{py}\nimport sys\nfrom {mod} import {fn}\nsys.exit({fn}())\n")
    (venv / "bin" / "feedmatch").chmod(0o755)
    env = dict(os.environ, PATH=f"{venv / 'bin'}:{BIN}:{os.environ.get('PATH', '')}")
    env.pop("PYTHONPATH", None)
    return {"whl": whl, "venv": venv, "py": py, "env": env, "cwd": tmp}


def _run(inst: dict, *args: str, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([str(inst["venv"] / "bin" / "feedmatch"), *args], capture_output=True, text=True,
                          env=inst["env"], cwd=str(inst["cwd"]), timeout=timeout)


def test_the_wheel_carries_the_firmware_and_every_data_file(installed):
    names = set(zipfile.ZipFile(installed["whl"]).namelist())
    for f in ("feedmatch/cli/__init__.py", "feedmatch/rf/network.py", "feedmatch/sim/virtual.py",
              "feedmatch/firmware/main.py", "feedmatch/firmware/loader.py", "feedmatch/firmware/board_rp2040.py",
              "feedmatch/firmware/board_virtual.py", "feedmatch/firmware/fmlogic/search.py", "fmlogic/search.py",
              "feedmatch/data/boards/rp2040.json", "feedmatch/data/antennas/hollow_oak_vertical.json",
              "feedmatch/data/emu/pico.mjs", "feedmatch/data/network_default.json"):
        assert f in names, f
    # The installed package is the wheel's, not this checkout.
    r = subprocess.run([str(installed["py"]), "-c", "import feedmatch, fmlogic, feedmatch.resources as r;"
                        "print(feedmatch.__file__, fmlogic.__file__, r.FIRMWARE)"],
                       capture_output=True, text=True, env=installed["env"], cwd=str(installed["cwd"]))
    assert r.returncode == 0, r.stderr
    assert str(ROOT) not in r.stdout and str(installed["venv"]) in r.stdout
    # No firmware module leaks onto the host's import path.
    r = subprocess.run([str(installed["py"]), "-c", "import feedmatch.cli, importlib.util as u;"
                        "print([m for m in ('main', 'loader', 'board_common') if u.find_spec(m)])"],
                       capture_output=True, text=True, env=installed["env"], cwd=str(installed["cwd"]))
    assert r.stdout.strip() == "[]", r.stdout + r.stderr


def test_commands_from_the_installed_wheel(installed, tmp_path):
    r = _run(installed, "demo", "--help")
    assert r.returncode == 0 and "usage" in r.stdout
    (tmp_path / "flash").mkdir()
    r = _run(installed, "deploy", "--port", str(tmp_path / "flash"), "--board", "rp2040", "--dry-run", "--json")
    assert r.returncode == 0, r.stderr
    sent = {f["file"].split("/", 2)[2] for f in json.loads(r.stdout)["files"]}
    assert {"fm_main.py", "board_common.py", "board_rp2040.py", "fmlogic/search.py", "fmlogic/hunt.py"} <= sent
    p = subprocess.Popen([str(installed["venv"] / "bin" / "feedmatch"), "virtual-board", "--carrier", "10@14.2e6",
                          "--dir", str(tmp_path / "vb")], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True, env=installed["env"], cwd=str(installed["cwd"]))
    try:
        port = p.stdout.readline().strip()
        assert port.startswith("/dev/"), p.stderr.read() if p.poll() is not None else port
        r = _run(installed, "tune", "--port", port, "--freq", "14.2e6", "--json", timeout=90)
        assert r.returncode == 0, r.stderr
        assert json.loads(r.stdout)["outcome"] == "locked"
    finally:
        p.send_signal(signal.SIGINT)
        p.wait(10)
