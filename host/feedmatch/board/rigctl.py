"""A client for Hamlib's rigctld network protocol (the plain form).

One command per line; a "get" answers with its values, one per line, or with
"RPRT n" (n < 0) on failure; a "set" answers "RPRT 0" or "RPRT n".  Only the
few commands feedmatch needs: frequency (f/F), mode (m/M), PTT (t/T) and the
RF power level (l/L RFPOWER, a fraction of the radio's full power).
"""

from __future__ import annotations

import socket
import time

from feedmatch.errors import InputError, LinkError


class RigError(LinkError):
    """rigctld is unreachable, went away, or refused a command (code: its RPRT number)."""

    def __init__(self, msg: str, code: int | None = None, cmd: str = ""):
        super().__init__(msg)
        self.code, self.cmd = code, cmd


# Hamlib's error codes as rigctld reports them ("RPRT -n"): enum rig_errcode_e in
# hamlib/rig.h and the rigerror() texts (Hamlib 4.5; from memory, -11's text checked
# against Debian's rigctl 4.5.4: "Feature not available").
HAMLIB_ERRORS = {
    1: "invalid parameter", 2: "invalid configuration", 3: "memory shortage",
    4: "function not implemented", 5: "communication timed out", 6: "IO error",
    7: "internal Hamlib error", 8: "protocol error", 9: "command rejected by the rig",
    10: "command performed, but arg truncated", 11: "feature not available",
    12: "target VFO unaccessible", 13: "communication bus error", 14: "communication bus collision",
    15: "NULL RIG handle or invalid pointer parameter", 16: "invalid VFO", 17: "argument out of domain of func",
}


def explain(cmd: str, code: int | None, where: str) -> str:
    """A refused command in words: what is wrong and what to do."""
    name = HAMLIB_ERRORS.get(abs(code), "unknown error") if code is not None else "no code"
    word = cmd.split()[0] if cmd else "?"
    base = f"rigctld at {where} refused '{cmd}' (RPRT {code}: {name})"
    if word in ("t", "T") and code in (-11, -4):
        return (f"{base}: the radio has no PTT rigctld can use. Start rigctld with a PTT type: -P RIG "
                "(PTT by CAT command; the dummy radio -m 1 needs it) or -P RTS/-P DTR with -p DEVICE for a "
                "PTT line; or follow without --tune-carrier")
    if word == "T" and code == -9:
        return (f"{base}: the radio would not transmit. Check that it may transmit on this frequency "
                "(its own band limits, TX inhibit, a locked front panel)")
    if word in ("l", "L") and "RFPOWER" in cmd:
        return (f"{base}: the radio's RF power cannot be read or set through rigctld, so the tune power "
                "cannot be checked; set it up in rigctld (model and port) or follow without --tune-carrier")
    if word in ("m", "M"):
        return (f"{base}: the radio does not take this mode through rigctld; choose a --carrier-mode it has "
                "(`rigctl -m MODEL M ?` lists them)")
    return f"{base}: check the radio and rigctld's model (-m) and port (-r)"


def parse_hostport(text: str, default_port: int = 4532) -> tuple[str, int]:
    """'host:port', 'host' or ':port' -> (host, port); rigctld's default port is 4532."""
    host, _, port = text.rpartition(":") if ":" in text else (text, "", "")
    host = host or "127.0.0.1"
    try:
        p = int(port) if port else default_port
    except ValueError:
        raise InputError(f"--rig must be HOST:PORT, got '{text}'") from None
    if not 1 <= p <= 65535:
        raise InputError(f"--rig port must be 1 to 65535, got {p}")
    return host, p


class RigClient:
    """One connection to rigctld.  Every failure is a RigError naming what failed."""

    def __init__(self, host: str, port: int, timeout: float = 3.0):
        self.host, self.port, self.timeout = host, port, timeout
        self.sock: socket.socket | None = None
        self._buf = b""

    def open(self) -> RigClient:
        try:
            self.sock = socket.create_connection((self.host, self.port), timeout=self.timeout)
        except OSError as e:
            raise RigError(f"cannot reach rigctld at {self.host}:{self.port} ({e.strerror or e})") from None
        self._buf = b""
        return self

    def close(self) -> None:
        if self.sock is not None:
            try:
                self.sock.close()
            except OSError:
                pass
        self.sock = None

    def __enter__(self) -> RigClient:
        return self.open()

    def __exit__(self, *exc) -> None:
        self.close()

    def _line(self, deadline: float) -> str:
        assert self.sock is not None
        while b"\n" not in self._buf:
            left = deadline - time.monotonic()
            if left <= 0:
                raise RigError(f"rigctld at {self.host}:{self.port} did not answer within {self.timeout:g} s")
            self.sock.settimeout(left)
            try:
                chunk = self.sock.recv(4096)
            except TimeoutError:
                continue
            except OSError as e:
                self.close()
                raise RigError(f"lost rigctld at {self.host}:{self.port} ({e.strerror or e})") from None
            if not chunk:
                self.close()
                raise RigError(f"rigctld at {self.host}:{self.port} closed the connection")
            self._buf += chunk
        line, _, self._buf = self._buf.partition(b"\n")
        return line.decode("ascii", "replace").strip()

    def command(self, cmd: str, values: int) -> list[str]:
        """Send cmd; return its `values` answer lines (0 for a set, which must say RPRT 0)."""
        if self.sock is None:
            self.open()
        assert self.sock is not None
        try:
            self.sock.sendall((cmd + "\n").encode("ascii"))
        except OSError as e:
            self.close()
            raise RigError(f"lost rigctld at {self.host}:{self.port} ({e.strerror or e})") from None
        deadline = time.monotonic() + self.timeout
        first = self._line(deadline)
        if first.startswith("RPRT"):
            code = first.split()[1] if len(first.split()) > 1 else "?"
            if values == 0 and code == "0":
                return []
            try:
                n: int | None = int(code)
            except ValueError:
                n = None
            raise RigError(explain(cmd, n, f"{self.host}:{self.port}"), n, cmd)
        out = [first] + [self._line(deadline) for _ in range(values - 1)]
        return out

    # -- the commands --------------------------------------------------------------
    def _number(self, cmd: str, what: str) -> float:
        v = self.command(cmd, 1)[0]
        try:
            return float(v)
        except ValueError:
            raise RigError(f"rigctld gave '{v}' for the {what}") from None

    def freq(self) -> float:
        return self._number("f", "frequency")

    def mode(self) -> tuple[str, int]:
        m, pb = self.command("m", 2)
        try:
            return m, int(float(pb))
        except ValueError:
            return m, 0

    def ptt(self) -> bool:
        return self.command("t", 1)[0].strip() not in ("0", "")

    def power(self) -> float:
        return self._number("l RFPOWER", "RF power level")

    def set_freq(self, hz: float) -> None:
        self.command(f"F {hz:.0f}", 0)

    def set_mode(self, mode: str, passband: int = 0) -> None:
        self.command(f"M {mode} {passband}", 0)

    def set_ptt(self, on: bool) -> None:
        self.command(f"T {1 if on else 0}", 0)

    def set_power(self, fraction: float) -> None:
        self.command(f"L RFPOWER {fraction:.6f}", 0)
