#!/usr/bin/env python3
"""Build (once) and install necpp with feedmatch's fixes applied.

Downloads the pinned necpp source release from the package index, checks its
SHA-256, applies feedmatch-fixes.patch, builds a wheel and keeps it in the
user cache so later virtual environments install it in seconds.

Usage: python build_wheel.py [--install] [--cache DIR]
Exit status 0 on success; 1 with a one-line reason otherwise (the Makefile then
falls back to the unpatched wheel from the index and feedmatch warns at run time).
"""

from __future__ import annotations

import argparse
import hashlib
import os
import subprocess
import sys
import sysconfig
import tarfile
import tempfile
from pathlib import Path

VERSION = "2.3.4"
LOCAL = "feedmatch.1"  # bump with every change to the patch
SDIST_SHA256 = "a3b12517f71c7deabea0a7f97b918dc8a1b45f2f82854cae543603b4e935cb79"
HERE = Path(__file__).resolve().parent
PATCH = HERE / "feedmatch-fixes.patch"


def cache_dir(arg: str | None) -> Path:
    if arg:
        return Path(arg)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "feedmatch" / "wheels"


def wheel_tag() -> str:
    return f"cp{sys.version_info.major}{sys.version_info.minor}-{sysconfig.get_platform().replace('-', '_')}"


def run(cmd: list[str], cwd: Path | None = None) -> None:
    r = subprocess.run(cmd, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    if r.returncode != 0:
        tail = "\n".join(r.stdout.strip().splitlines()[-15:])
        raise RuntimeError(f"{' '.join(cmd[:4])} ... failed:\n{tail}")


def build(cache: Path) -> Path:
    patch_id = hashlib.sha256(PATCH.read_bytes()).hexdigest()[:12]
    slot = cache / f"necpp-{VERSION}+{LOCAL}-{patch_id}-{wheel_tag()}"
    found = sorted(slot.glob("necpp-*.whl")) if slot.is_dir() else []
    if found:
        return found[-1]
    with tempfile.TemporaryDirectory(prefix="necpp-build-") as tmp:
        t = Path(tmp)
        run([sys.executable, "-m", "pip", "download", "-q", "--no-deps", "--no-binary", ":all:",
             f"necpp=={VERSION}", "-d", str(t)])
        sdists = list(t.glob(f"necpp-{VERSION}.tar.gz"))
        if not sdists:
            raise RuntimeError(f"the index gave no source release necpp-{VERSION}.tar.gz")
        digest = hashlib.sha256(sdists[0].read_bytes()).hexdigest()
        if digest != SDIST_SHA256:
            raise RuntimeError(f"necpp-{VERSION}.tar.gz has SHA-256 {digest}, expected {SDIST_SHA256}")
        with tarfile.open(sdists[0]) as tf:
            tf.extractall(t, filter="data") if hasattr(tarfile, "data_filter") else tf.extractall(t)
        src = t / f"necpp-{VERSION}"
        run(["git", "apply", "-p1", str(PATCH)], cwd=src)
        out = t / "wheel"
        run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "-w", str(out), str(src)])
        wheels = list(out.glob("necpp-*.whl"))
        if not wheels:
            raise RuntimeError("pip wheel produced no wheel")
        slot.mkdir(parents=True, exist_ok=True)
        dest = slot / wheels[0].name
        tmp_dest = dest.with_suffix(".part")
        tmp_dest.write_bytes(wheels[0].read_bytes())
        tmp_dest.replace(dest)  # a build killed half-way never leaves a wheel that looks whole
        return dest


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--install", action="store_true", help="pip install the wheel into this Python")
    ap.add_argument("--cache", help="wheel cache directory (default ~/.cache/feedmatch/wheels)")
    a = ap.parse_args()
    try:
        whl = build(cache_dir(a.cache))
        if a.install:
            run([sys.executable, "-m", "pip", "install", "-q", "--force-reinstall", "--no-deps", str(whl)])
    except (RuntimeError, OSError) as e:
        print(f"necpp build: {e}", file=sys.stderr)
        return 1
    print(f"necpp {VERSION}+{LOCAL}: {whl}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
