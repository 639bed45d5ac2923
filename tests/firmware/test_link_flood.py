"""Never deaf: garbage on the link (random bytes, a line with no end) and the board still
answers the next request at once.  "At once" is counted in the firmware's own CPU time
(the kernel's account of its process), so a loaded machine that gives it less of the CPU
makes the answer later in wall time, never a failure; the wall-clock limits only stop a
hang.  The measured figures go to the bench and the notes."""

from __future__ import annotations

import os
import random
import time

import pytest
from feedmatch.board.link import BoardLink
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualBoard


def _cpu_s(pid: int) -> float:
    """CPU seconds (user + system) the process has used (proc(5): stat fields 14 and 15)."""
    f = open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()
    return (int(f[11]) + int(f[12])) / os.sysconf("SC_CLK_TCK")


def _flood(pty_fd, data, chunk=1 << 16):
    view = memoryview(data)
    while len(view):
        n = os.write(pty_fd, view[:chunk])
        view = view[n:]


@pytest.mark.parametrize("kind,size", [("random", 10 << 20), ("no-newline", 1 << 20)])
def test_the_board_answers_within_a_second_of_the_last_garbage_byte(tmp_path, kind, size):
    st = load_station(None)
    vs = VirtualBoard(st, tmp_path / "board")
    pty = vs.start()
    try:
        with BoardLink(pty) as ln:
            deadline = time.monotonic() + 120  # a hang guard only
            while True:
                try:
                    ln.request("status", timeout=1.0)
                    break
                except Exception:
                    assert time.monotonic() < deadline, "the board never answered"
            rnd = random.Random(7)
            if kind == "random":
                data = rnd.randbytes(size)
            else:
                data = bytes(rnd.choice(b"ABCDEFGHIJKLMNOPQRSTUVWXYZ{}\":,0123456789 ") for _ in range(4096))
                data = data * (size // len(data))
            fd = os.open(pty, os.O_WRONLY | os.O_NOCTTY)
            try:
                t0 = time.monotonic()
                _flood(fd, data)
                t_last = time.monotonic()
                cpu_last = _cpu_s(vs.proc.pid)
            finally:
                os.close(fd)
            # The next request, as the host sends it (a newline first): answered, after at
            # most a second of the firmware's own work (the garbage still in the pty buffer).
            st_ = ln.request("status", timeout=60.0, retries=0)
            cpu = _cpu_s(vs.proc.pid) - cpu_last
            dt = time.monotonic() - t_last
            print(f"{kind} {size} bytes: written in {t_last - t0:.2f} s, answered {dt:.3f} s "
                  f"({cpu:.3f} s of the firmware's CPU) after the last byte")
            assert st_["bad_frames"] >= 1
            assert cpu < 1.0, cpu
    finally:
        vs.stop()


def test_the_virtual_board_runs_on_the_chip_sized_heap_and_single_precision(tmp_path):
    from feedmatch.sim.virtual import SHARED_FLOAT32

    if not SHARED_FLOAT32.is_file() and not os.environ.get("FEEDMATCH_MICROPYTHON_FLOAT32"):
        pytest.skip("the single-precision unix port is not beside the checkout (../shared/rp2040)")
    st = load_station(None)
    vs = VirtualBoard(st, tmp_path / "board", heap_kib=256, micropython="float32")
    pty = vs.start()
    try:
        cmd = vs._cmd()
        assert "heapsize=256K" in cmd and cmd[0].endswith("unix-float32")
        with BoardLink(pty) as ln:
            deadline = time.monotonic() + 120  # a hang guard only
            while True:
                try:
                    s = ln.request("status", timeout=1.0)
                    break
                except Exception:
                    assert time.monotonic() < deadline, "the board never answered"
            assert s["state"] != "fault", (s["why"], s.get("file"))
            assert s["board_id"] == st.board_config["board_id"]
    finally:
        vs.stop()
