"""The box's readings on Hamlib's network amplifier protocol, read-only.

Logging and station programs already talk to Hamlib; its amplifier daemon
(`ampctld`) serves a plain line protocol that carries SWR, forward and
reflected power and frequency.  This server answers the same request lines
with the box's latest status, so such a program sees the box as an amplifier
that reports but cannot be set.

The protocol as Debian's Hamlib 4.5.4 `ampctld` speaks it (request -> answer,
seen on the wire from `ampctld -m 1`, Hamlib's dummy amplifier):
    \\dump_state      -> "0"              protocol version
    l SWR            -> "1.500000"       float levels "%f"
    l PWRFORWARD     -> "10"             integer levels (W) "%d"
    l PWRREFLECTED   -> "0"
    f                -> "7100000"        Hz, integer
    _                -> one line of information
    l ?              -> the level names, space-separated
    +l SWR           -> "get_level: SWR" / "1.500000" / "RPRT 0"   (extended form)
    any set          -> "RPRT -11"       (feature not available: read-only)
    unknown          -> "RPRT -1"        (invalid parameter)
Hamlib's error numbers: hamlib/rig.h (RIG_EINVAL 1, RIG_EIO 6, RIG_ENAVAIL 11).
With no carrier there is no SWR: SWR answers RPRT -11 and the powers 0; with
the board lost every reading answers RPRT -6 (IO error).
"""

from __future__ import annotations

import socket
import socketserver
import threading
from collections.abc import Callable
from typing import Any

PROTOCOL_VERSION = 0
LEVELS = ("SWR", "PWRFORWARD", "PWRREFLECTED")
MAX_LINE = 256          # a request line longer than this ends the connection
IDLE_S = 600.0          # a client silent this long is dropped
MAX_CLIENTS = 16

EINVAL, EIO, ENAVAIL = 1, 6, 11

Status = Callable[[], tuple[dict[str, Any] | None, str]]  # (latest status or None, error text)


def _rprt(n: int) -> str:
    return f"RPRT {-n if n else 0}\n"


def _value(word: str, arg: str, st: dict[str, Any] | None, err: str) -> tuple[str, str] | int:
    """(label, value) for a get, or a Hamlib error number."""
    if word == "l":
        if arg not in LEVELS:
            return EINVAL
        if st is None:
            return EIO
        if arg == "SWR":
            swr = st.get("swr")
            if not isinstance(swr, (int, float)) or swr < 1.0:
                return ENAVAIL  # no carrier, no SWR
            return arg, f"{float(swr):f}"
        w = st.get("fwd_w" if arg == "PWRFORWARD" else "ref_w") or 0.0
        return arg, f"{int(round(float(w)))}"
    if word == "f":
        if st is None:
            return EIO
        return "Frequency(Hz)", f"{int(round(float(st.get('freq_hz') or 0.0)))}"
    return EINVAL


def answer(line: str, status: Status, info: str = "feedmatch") -> str | None:
    """The reply to one request line (with its newline), or None to close the connection."""
    text = line.strip()
    ext = text.startswith("+")
    if ext:
        text = text[1:].strip()
    if not text:
        return ""
    parts = text.split()
    word, args = parts[0], parts[1:]
    if word in ("q", "Q", "\\quit"):
        return None
    if word == "\\dump_state":
        if ext:
            return f"dump_state:\nampctld Protocol Ver: {PROTOCOL_VERSION}\nAmplifier Model: {info}\nRPRT 0\n"
        return f"{PROTOCOL_VERSION}\n"
    if word in ("_", "\\get_info"):
        return f"get_info:\nInfo: {info}\nRPRT 0\n" if ext else f"{info}\n"
    if word == "\\get_powerstat":
        st, _err = status()
        if st is None:
            return _rprt(EIO)
        return "get_powerstat:\nPower Status: 1\nRPRT 0\n" if ext else "1\n"
    if word in ("l", "\\get_level") and args[:1] == ["?"]:
        return " ".join(LEVELS) + " \n"
    if word in ("l", "\\get_level", "f", "\\get_freq"):
        w = "l" if word in ("l", "\\get_level") else "f"
        if w == "l" and not args:
            return _rprt(EINVAL)
        st, err = status()
        got = _value(w, args[0] if args else "", st, err)
        if isinstance(got, int):
            return _rprt(got)
        label, val = got
        if ext:
            head = f"get_level: {label}\n" if w == "l" else "get_freq:\n"
            body = f"{val}\n" if w == "l" else f"{label}: {val}\n"
            return head + body + "RPRT 0\n"
        return f"{val}\n"
    if word in ("L", "F", "R", "\\set_level", "\\set_freq", "\\reset", "\\set_powerstat", "\\set_conf"):
        return _rprt(ENAVAIL)  # read-only: the box is set by its own search, not over this port
    return _rprt(EINVAL)


class _Handler(socketserver.StreamRequestHandler):
    timeout = IDLE_S

    def handle(self) -> None:
        srv: _Server = self.server  # type: ignore[assignment]
        try:
            while True:
                raw = self.rfile.readline(MAX_LINE + 1)
                if not raw or len(raw) > MAX_LINE:
                    return
                out = answer(raw.decode("ascii", "replace"), srv.status, srv.info)
                if out is None:
                    return
                if out:
                    self.wfile.write(out.encode("ascii", "replace"))
        except (OSError, TimeoutError):
            return


class _Server(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True

    def __init__(self, addr, status: Status, info: str):
        self.status, self.info = status, info
        self._open: set[int] = set()
        self._lock = threading.Lock()
        super().__init__(addr, _Handler)

    def verify_request(self, request, client_address) -> bool:
        with self._lock:  # more clients than MAX_CLIENTS: refused at once
            if len(self._open) >= MAX_CLIENTS:
                return False
            self._open.add(id(request))
            return True

    def shutdown_request(self, request) -> None:
        with self._lock:
            self._open.discard(id(request))
        super().shutdown_request(request)


class _Server6(_Server):
    address_family = socket.AF_INET6


class AmpServer:
    """Serves status() on host:port in a thread until close()."""

    def __init__(self, status: Status, host: str = "127.0.0.1", port: int = 4531, info: str = "feedmatch"):
        self.host, self.port = host, port
        self._srv = (_Server6 if ":" in host else _Server)((host, port), status, info)
        self.port = self._srv.server_address[1]
        self._th = threading.Thread(target=self._srv.serve_forever, kwargs={"poll_interval": 0.2}, daemon=True)

    def start(self) -> AmpServer:
        self._th.start()
        return self

    def close(self) -> None:
        self._srv.shutdown()
        self._srv.server_close()
        self._th.join(3.0)


def serve_board(board_port: str, baud: int, host: str, port: int) -> tuple[AmpServer, Any]:
    """An AmpServer fed by its own watch of the board (through the hub, beside any other
    owner of the port).  Returns (server, watch); close both."""
    from feedmatch.errors import InputError
    from feedmatch.web.server import BoardWatch

    watch = BoardWatch(board_port, baud, lambda _kind, _data: None)

    def status() -> tuple[dict[str, Any] | None, str]:
        return (None if watch.error or watch.status is None else watch.status), watch.error

    try:
        srv = AmpServer(status, host, port, info=f"feedmatch box on {board_port}")
    except OSError as e:
        raise InputError(f"cannot listen on {host}:{port} for Hamlib amplifier clients: {e.strerror or e}") \
            from None
    watch.start()
    return srv.start(), watch
