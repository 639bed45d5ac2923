"""The hub: one process owns a serial port, every other feedmatch process attaches.

Who may talk to whom: the hub socket lives in a directory only its user can
enter, and each end asks the kernel who is at the other (SO_PEERCRED, socket(7)).
The other-user cases need root (to become another user); they skip otherwise.
Many tools at once, commands beside a running logger, a killed owner, and the
typed errors the hub's start gives (busy, owned)."""

from __future__ import annotations

import json
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
from feedmatch.sim.virtual import VirtualBoard
from fmlogic import link as frames

from ..conftest import BIN, logbook_rows, run_cli

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
    vs = VirtualBoard(load_station(), tmp_path / "flash")
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


def test_commands_attach_to_the_logger_that_owns_the_port(tmp_path):
    # One owner of the serial port: while `log` runs, status, tune and memory reach the
    # board through its hub with their usual output, and every record lands once.
    p = subprocess.Popen([str(BIN / "feedmatch"), "virtual-board", "--carrier", "10@14.2e6",
                          "--dir", str(tmp_path / "flash")], stdout=subprocess.PIPE,
                         stderr=subprocess.DEVNULL, text=True)
    lg = None
    db = tmp_path / "station.sqlite"
    try:
        pty = p.stdout.readline().strip()
        lg = subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", str(db), "--json"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        from feedmatch.board.hub import hub_alive, hub_path

        assert _wait(lambda: hub_alive(hub_path(pty)), 10), "the logger owns the port through a hub"
        r = run_cli("status", "--port", pty)
        assert r.returncode == 0 and "board hollow-oak-1" in r.stdout, r.stderr
        r = run_cli("tune", "--port", pty, "--freq", "14.2e6", "--json", timeout=60)
        assert r.returncode == 0 and json.loads(r.stdout)["outcome"] == "locked", r.stderr
        r = run_cli("memory", "--port", pty, "--json")
        assert r.returncode == 0 and json.loads(r.stdout)["entries"]
        r = run_cli("deploy", "--port", pty)  # mpremote needs the port to itself: said, not hung
        assert r.returncode == 2 and "in use by a running feedmatch log" in r.stderr
        time.sleep(4.0)  # the logger's next status poll
        lg.send_signal(signal.SIGTERM)
        out, _err = lg.communicate(timeout=20)
    finally:
        if lg is not None and lg.poll() is None:
            lg.kill()
        p.send_signal(signal.SIGINT)
        p.wait(10)
    seqs = [r["seq"] for r in logbook_rows(str(db))]
    assert seqs == sorted(set(seqs)) and len(seqs) >= 2  # the boot tune and the asked one, once each
    assert json.loads(out)["added"] == len(seqs)


def test_a_killed_owner_leaves_no_one_locked_out(tmp_path):
    # SIGKILL gives the owner no chance to remove its socket: the next commands see a
    # dead hub, open the port themselves, and a new logger takes over.
    from feedmatch.board.hub import hub_alive, hub_path

    p = subprocess.Popen([str(BIN / "feedmatch"), "virtual-board", "--dir", str(tmp_path / "flash")],
                         stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    procs = []
    try:
        pty = p.stdout.readline().strip()
        for _ in range(2):
            lg = subprocess.Popen([str(BIN / "feedmatch"), "log", "--port", pty, "--db", str(tmp_path / "s.sqlite")],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            procs.append(lg)
            assert _wait(lambda: hub_alive(hub_path(pty)), 15)
            lg.send_signal(signal.SIGKILL)
            lg.wait(10)
            assert hub_path(pty).exists() and not hub_alive(hub_path(pty))  # stale
            r = run_cli("status", "--port", pty)
            assert r.returncode == 0 and "board hollow-oak-1" in r.stdout, r.stderr
    finally:
        for q in procs:
            if q.poll() is None:
                q.kill()
        p.send_signal(signal.SIGINT)
        p.wait(10)


def test_the_hub_says_busy_and_owned_by_type(board):
    """The errors a hub's start gives are typed where they arise: PortBusy while another
    program holds the port open, PortOwned where another feedmatch process's hub runs
    (then ensure_hub attaches instead of failing)."""
    from feedmatch.board.hub import ensure_hub
    from feedmatch.errors import PortBusy, PortOwned

    _vs, pty = board
    with serial.Serial(pty, 115200, timeout=0.1, exclusive=True):
        with pytest.raises(PortBusy, match="busy"):
            LinkHub(pty).start()
    path = hub_path(pty)
    if path.exists():  # left by an earlier test's killed owner on a pty of the same name
        assert not hubmod.hub_alive(path)
        path.unlink()
    other = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)  # another process's hub, listening
    other.bind(str(path))
    other.listen(4)
    try:
        with pytest.raises(PortOwned, match="already owns"):
            LinkHub(pty).start()
        assert ensure_hub(pty) is None  # attach to the owner, never a second owner
        with serial.Serial(pty, 115200, timeout=0.1, exclusive=True):
            pass  # the refused start let the port go again
    finally:
        other.close()
        path.unlink()
