"""One owner of the board's serial port; every other feedmatch process attaches.

The owner (`log`, `follow` or `serve`, whichever starts first) opens the port
and listens on a Unix socket named after it (mode 0600, in $XDG_RUNTIME_DIR or
a 0700 directory of the user's own; both ends check the other's user id with
SO_PEERCRED: the user's own processes only).  Requests from each attached process are forwarded to the
board under the hub's own sequence numbers, and each answer goes back to the
process that asked, with its own number restored; events (records, state
changes) go to everyone.  The board sees one host; records are still
committed once, by the logger alone.  BoardLink finds the hub by the port's
name and uses it through the fmhub:// pyserial backend, so `status`, `tune`
and the rest work the same while `log` runs.
"""

from __future__ import annotations

import hashlib
import os
import socket
import stat
import struct
import tempfile
import threading
import time
from pathlib import Path

import serial

from feedmatch.errors import LinkError, PortBusy, PortOwned
from feedmatch.seam import frames

BACKLOG = 128  # connections waiting to be accepted: many tools started at once all get in
_CRED = struct.Struct("3i")  # struct ucred: pid, uid, gid (Linux, socket(7) SO_PEERCRED)


def private_dir() -> Path:
    """Where the hub sockets live: $XDG_RUNTIME_DIR (the user's own, made by the
    login manager), else a directory of the user's own under the temporary
    directory, 0700.  One that exists with another owner, other rights or as a
    symbolic link is refused: another user could otherwise put a socket where the
    tools look for the hub and read their requests."""
    xdg = os.environ.get("XDG_RUNTIME_DIR")
    if xdg:
        return Path(xdg)
    d = Path(tempfile.gettempdir()) / f"feedmatch-{os.getuid()}"
    try:
        os.mkdir(d, 0o700)
    except FileExistsError:
        pass
    except OSError as e:
        raise LinkError(f"cannot make the hub directory {d}: {e.strerror or e}") from None
    st = os.lstat(d)
    if not stat.S_ISDIR(st.st_mode) or st.st_uid != os.getuid() or st.st_mode & 0o077:
        raise LinkError(f"the hub directory {d} is not private to you (owner uid {st.st_uid}, mode "
                        f"{stat.S_IMODE(st.st_mode):o}{', a symbolic link' if stat.S_ISLNK(st.st_mode) else ''}): "
                        "remove it, or set XDG_RUNTIME_DIR")
    return d


def hub_path(device: str) -> Path:
    """The hub socket for a serial device (the same for every name of it)."""
    real = os.path.realpath(device)
    h = hashlib.sha1(real.encode()).hexdigest()[:16]
    return private_dir() / f"feedmatch-hub-{os.getuid()}-{h}.sock"


def peer_uid(s: socket.socket) -> int | None:
    """The user id of the process at the other end of a Unix socket (None where
    the system does not say)."""
    opt = getattr(socket, "SO_PEERCRED", None)
    if opt is None:
        return None
    try:
        return _CRED.unpack(s.getsockopt(socket.SOL_SOCKET, opt, _CRED.size))[1]
    except OSError:
        return None


def check_peer(s: socket.socket, path: str | Path) -> None:
    """Refuse a hub socket run by another user (LinkError)."""
    uid = peer_uid(s)
    if uid is not None and uid != os.getuid():
        raise LinkError(f"the hub socket {path} is run by user id {uid}, not by you: not talking to it "
                        "(remove it if it is not yours)")


def connect_unix(path: str | Path, timeout_s: float = 5.0) -> socket.socket:
    """A connected Unix socket to path.  A hub whose queue of new connections is
    full answers EAGAIN at once; that is a busy hub, so wait and try again."""
    deadline = time.monotonic() + timeout_s
    while True:
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        try:
            s.settimeout(max(0.1, deadline - time.monotonic()))
            s.connect(str(path))
            return s
        except BlockingIOError:
            s.close()
            if time.monotonic() > deadline:
                raise
            time.sleep(0.01)
        except OSError:
            s.close()
            raise


def hub_alive(path: Path) -> bool:
    if not path.exists():
        return False
    try:
        s = connect_unix(path, 2.0)
    except OSError:
        return False
    try:
        check_peer(s, path)
        return True
    finally:
        s.close()


class _Client:
    def __init__(self, conn: socket.socket):
        self.conn = conn
        self.reader = frames.LineReader()
        self.lock = threading.Lock()
        self.alive = True

    def send(self, data: bytes) -> None:
        if not self.alive:
            return
        with self.lock:
            try:
                self.conn.sendall(data)
            except OSError:
                self.alive = False


class LinkHub:
    def __init__(self, device: str, baud: int = 115200):
        self.device, self.baud = device, baud
        self.path = hub_path(device)
        self.ser: serial.Serial | None = None
        self.srv: socket.socket | None = None
        self.clients: list[_Client] = []
        self.pending: dict[int, tuple[_Client, int]] = {}
        self.seq = 0
        self.lock = threading.Lock()
        self.wlock = threading.Lock()
        self.stop = threading.Event()
        self.dropped = 0
        self.refused = 0  # connections from another user, closed unheard
        self._threads: list[threading.Thread] = []

    # -- life --------------------------------------------------------------------------
    def _open_serial(self) -> None:
        from feedmatch.board.link import open_serial

        self.ser = open_serial(self.device, self.baud)

    def start(self) -> LinkHub:
        self._open_serial()
        if self.path.exists():
            if hub_alive(self.path):
                self.ser.close()
                raise PortOwned(f"another feedmatch process already owns {self.device}")
            self.path.unlink()  # left by a process that was killed
        srv = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        old = os.umask(0o177)
        try:
            srv.bind(str(self.path))
        finally:
            os.umask(old)
        srv.listen(BACKLOG)
        srv.settimeout(0.5)
        self.srv = srv
        for fn in (self._serial_loop, self._accept_loop):
            t = threading.Thread(target=fn, daemon=True)
            t.start()
            self._threads.append(t)
        return self

    def close(self) -> None:
        self.stop.set()
        for t in self._threads:
            t.join(2.0)
        with self.lock:
            for c in self.clients:
                try:
                    c.conn.close()
                except OSError:
                    pass
            self.clients.clear()
        if self.srv is not None:
            self.srv.close()
            try:
                self.path.unlink()
            except OSError:
                pass
        if self.ser is not None:
            self.ser.close()

    # -- the board side -------------------------------------------------------------
    def _serial_loop(self) -> None:
        reader = frames.LineReader()
        while not self.stop.is_set():
            if self.ser is None:
                try:
                    self._open_serial()
                    reader = frames.LineReader()
                except LinkError:
                    self.stop.wait(0.5)
                    continue
            try:
                data = self.ser.read(max(1, self.ser.in_waiting or 1))
            except (serial.SerialException, OSError, TypeError):
                # The board went away (cable, USB reset): attached processes keep
                # their sockets and time out; the port is reopened when it is back.
                try:
                    self.ser.close()
                except (serial.SerialException, OSError):
                    pass
                self.ser = None
                continue
            for line in reader.feed(data):
                self._from_board(line)

    def _from_board(self, line: bytes) -> None:
        if not line or not line.strip():
            return
        d = frames.decode(line)
        if d[0] == "A":
            _k, seq, word, obj = d
            with self.lock:
                who = self.pending.pop(seq, None)
            if who is None:
                self.dropped += 1
                return
            client, cseq = who
            client.send(frames.encode("A", cseq, word, obj))
            return
        # Events for everyone; a corrupted line too, so each reader counts it and asks again.
        with self.lock:
            clients = list(self.clients)
        for c in clients:
            c.send(line if line.endswith(b"\n") else line + b"\n")

    def _to_board(self, data: bytes) -> bool:
        with self.wlock:
            if self.ser is None:
                return False
            try:
                self.ser.write(data)
                self.ser.flush()
                return True
            except (serial.SerialException, OSError):
                return False

    # -- the attached processes -------------------------------------------------------
    def _accept_loop(self) -> None:
        while not self.stop.is_set():
            try:
                conn, _ = self.srv.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            if peer_uid(conn) not in (None, os.getuid()):
                # The socket is 0600 in a private directory; this is the second lock.
                self.refused += 1
                conn.close()
                continue
            c = _Client(conn)
            with self.lock:
                self.clients.append(c)
            t = threading.Thread(target=self._client_loop, args=(c,), daemon=True)
            t.start()

    def _client_loop(self, c: _Client) -> None:
        c.conn.settimeout(0.5)
        while not self.stop.is_set() and c.alive:
            try:
                data = c.conn.recv(4096)
            except TimeoutError:
                continue
            except OSError:
                break
            if not data:
                break
            for line in c.reader.feed(data):
                if not line:
                    c.send(frames.encode("A", 0, "err", {"why": "oversize"}))
                    continue
                if not line.strip():
                    continue
                d = frames.decode(line)
                if d[0] is None:
                    c.send(frames.encode("A", 0, "err", {"why": d[1]}))
                    continue
                kind, cseq, word, obj = d
                if kind != "Q":
                    c.send(frames.encode("A", cseq, "err", {"why": "not-a-request"}))
                    continue
                with self.lock:
                    self.seq = self.seq % 65535 + 1
                    hseq = self.seq
                    self.pending[hseq] = (c, cseq)
                    if len(self.pending) > 4096:  # answers that never came
                        for k in list(self.pending)[:2048]:
                            del self.pending[k]
                if not self._to_board(frames.encode("Q", hseq, word, obj)):
                    with self.lock:
                        self.pending.pop(hseq, None)
        c.alive = False
        with self.lock:
            if c in self.clients:
                self.clients.remove(c)
            for k in [k for k, v in self.pending.items() if v[0] is c]:
                del self.pending[k]
        try:
            c.conn.close()
        except OSError:
            pass


def ensure_hub(port: str, baud: int = 115200, wait_s: float = 3.0) -> LinkHub | None:
    """Make sure one process owns the port (a device path, "auto" or a URL): start a
    hub here (returned: the caller closes it when it exits) unless one runs already
    (None).  Two processes starting at once: the one that opens the port owns it,
    the other attaches."""
    from feedmatch.board.link import resolve_port

    device = resolve_port(port)
    if "://" in device:
        return None  # URLs (socket://, loop://) are not serial devices to share
    deadline = time.monotonic() + wait_s
    while True:
        if hub_alive(hub_path(device)):
            return None
        try:
            return LinkHub(device, baud).start()
        except (PortBusy, PortOwned):
            # The other process that started at this instant: attach to its hub.
            if time.monotonic() > deadline:
                raise
            time.sleep(0.2)
