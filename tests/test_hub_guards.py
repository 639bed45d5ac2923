"""The hub's socket on a shared computer, and many tools at once.

Who may talk to whom: the hub socket lives in a directory only its user can
enter, and each end asks the kernel who is at the other (SO_PEERCRED, socket(7)).
The other-user cases need root (to become another user); they skip otherwise.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import threading
import time
from pathlib import Path

import pytest
import serial
from feedmatch.board import hub as hubmod
from feedmatch.board.hub import LinkHub, hub_path, private_dir
from feedmatch.board.link import BoardLink
from feedmatch.errors import LinkError
from feedmatch.sim.demo import _wait
from feedmatch.sim.station import load_station
from feedmatch.sim.virtual import VirtualStation
from fmlogic import link as frames

from .conftest import BIN

NOBODY = 65534  # Debian's "nobody" (base-passwd)


@pytest.fixture
def no_xdg(monkeypatch, tmp_path):
    monkeypatch.delenv("XDG_RUNTIME_DIR", raising=False)
    monkeypatch.setattr(hubmod.tempfile, "gettempdir", lambda: str(tmp_path))
    return tmp_path


def test_without_xdg_runtime_dir_the_socket_is_in_a_private_directory(no_xdg):
    d = private_dir()
    st = os.lstat(d)
    assert d.parent == no_xdg and st.st_uid == os.getuid() and st.st_mode & 0o777 == 0o700
    assert hub_path("/dev/ttyACM0").parent == d


@pytest.mark.parametrize("spoil", ["open to all", "a symbolic link"])
def test_a_directory_someone_else_could_use_is_refused(no_xdg, spoil):
    d = no_xdg / f"feedmatch-{os.getuid()}"
    if spoil == "open to all":
        d.mkdir(mode=0o777)
        d.chmod(0o777)
    else:
        (no_xdg / "elsewhere").mkdir(mode=0o700)
        d.symlink_to(no_xdg / "elsewhere")
    with pytest.raises(LinkError, match="not private to you"):
        private_dir()


@pytest.fixture
def board(tmp_path):
    vs = VirtualStation(load_station(), tmp_path / "flash")
    pty = vs.start()
    yield vs, pty
    vs.stop()


def test_fifty_simultaneous_tools_all_get_their_answer(board, tmp_path):
    vs, pty = board
    db = tmp_path / "station.sqlite"
    lg = subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", str(db)],
                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        assert _wait(lambda: hubmod.hub_alive(hub_path(pty)), 20), "the logger did not start its hub"
        n = 50
        gate = threading.Barrier(n)
        answers: list[str] = []
        errors: list[str] = []

        def tool() -> None:
            gate.wait()  # all connect and ask in the same instant
            try:
                with BoardLink(pty, timeout=3.0).open() as ln:
                    answers.append(ln.request("status")["board_id"])
            except LinkError as e:
                errors.append(str(e))
        ths = [threading.Thread(target=tool) for _ in range(n)]
        for t in ths:
            t.start()
        for t in ths:
            t.join(60)
        assert len(answers) == n and not errors, (len(answers), errors[:3])
        assert set(answers) == {load_station().board_config["board_id"]}
    finally:
        lg.send_signal(signal.SIGTERM)
        _out, err = lg.communicate(timeout=20)
    assert lg.returncode == 0, err


def _as_nobody(fn) -> int:
    """Run fn() in a child process as user nobody; its exit status."""
    pid = os.fork()
    if pid == 0:
        try:
            os.setgid(NOBODY)
            os.setuid(NOBODY)
            os._exit(fn() or 0)
        except BaseException:  # noqa: BLE001 (the child must never return into pytest)
            os._exit(99)
    return os.waitstatus_to_exitcode(os.waitpid(pid, 0)[1])


needs_root = pytest.mark.skipif(os.geteuid() != 0, reason="becoming another user needs root")


@pytest.fixture
def open_dir(monkeypatch):
    """A directory every user may write in (like /tmp), as XDG_RUNTIME_DIR: the
    directory's protection is gone, so the uid checks alone must hold."""
    import shutil
    import tempfile

    d = tempfile.mkdtemp(prefix="feedmatch-shared-", dir="/tmp")
    os.chmod(d, 0o1777)
    monkeypatch.setenv("XDG_RUNTIME_DIR", d)
    yield Path(d)
    shutil.rmtree(d, ignore_errors=True)


@needs_root
def test_the_hub_does_not_answer_another_user(board, open_dir):
    vs, pty = board
    hub = LinkHub(pty).start()
    try:
        os.chmod(hub.path, 0o666)  # as if the socket's own mode were lost too

        def ask() -> int:
            s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            s.settimeout(3.0)
            try:
                s.connect(str(hub.path))
            except OSError:
                return 4  # the socket could not even be reached: the test proves nothing
            try:
                s.sendall(frames.encode("Q", 1, "status", {}))
                got = s.recv(4096)
            except TimeoutError:
                return 2
            except ConnectionError:
                return 0
            return 3 if got else 0  # closed unheard: 0
        assert _as_nobody(ask) == 0
        assert hub.refused == 1
        with BoardLink(f"fmhub://{hub.path}").open() as ln:  # its own user is answered
            assert ln.request("status")["board_id"]
    finally:
        hub.close()


@needs_root
def test_a_tool_never_talks_to_a_socket_another_user_put_there(board, open_dir):
    vs, pty = board
    path = hub_path(pty)
    heard = open_dir / "heard"
    ready = open_dir / "ready"

    def fake_hub() -> int:  # another user's process binds the name first and listens
        srv = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        os.umask(0)
        srv.bind(str(path))
        srv.listen(8)
        srv.settimeout(8.0)
        ready.write_text("1")
        try:
            while True:
                c, _ = srv.accept()
                c.settimeout(1.0)
                try:
                    if c.recv(4096):
                        heard.write_text("1")
                except TimeoutError:
                    pass
                c.close()
        except TimeoutError:
            return 0
    pid = os.fork()
    if pid == 0:
        try:
            os.setgid(NOBODY)
            os.setuid(NOBODY)
            os._exit(fake_hub())
        except BaseException:  # noqa: BLE001 (the child must never return into pytest)
            os._exit(99)
    try:
        assert _wait(ready.exists, 10)
        with pytest.raises(LinkError, match="run by user id 65534"):
            with BoardLink(pty, timeout=1.0).open() as ln:
                ln.request("status")
        time.sleep(1.2)
        assert not heard.exists(), "a request reached the other user's socket"
    finally:
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)


def test_a_logger_keeps_no_queue_of_the_events_it_handled():
    ln = BoardLink("loop://")
    ln.ser = serial.serial_for_url("loop://", timeout=0.05)
    got: list[str] = []
    ln.on_event = lambda word, obj: got.append(word)
    for i in range(3000):
        ln.ser.write(frames.encode("E", 0, "record", {"seq": i + 1, "raw": "x" * 200}))
        ln.pump()
    assert len(got) == 3000 and len(ln.events) == 0
    ln.on_event = None  # a reader without a handler keeps a bounded queue
    for i in range(3000):
        ln.ser.write(frames.encode("E", 0, "state", {"n": i}))
        ln.pump()
    assert len(ln.events) == ln.events.maxlen <= 1000 and ln.events[-1][1] == {"n": 2999}
    ln.ser.close()
