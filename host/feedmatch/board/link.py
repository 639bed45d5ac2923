"""The host end of the serial link (pyserial), using the firmware's own frame code.

Opens a device path, a pyserial URL (socket://, loop://, rfc2217://) or, with
"auto", the one serial port that has USB ids.  Every frame is verified;
corrupted ones are counted and what they carried is asked for again.  On a
disconnect the link closes, waits, reopens and carries on.
"""

from __future__ import annotations

import collections
import errno
import time
from collections.abc import Callable
from typing import Any

import serial
import serial.tools.list_ports

from feedmatch.errors import BoardRefused, LinkError, LinkTimeout, PortBusy, PortError, PortMissing
from feedmatch.seam import frames

# Events kept for a reader that has no handler (wait_event, serve's watcher): the
# oldest go first, so a tool that never reads them holds at most this many.
EVENT_QUEUE = 1000

# fmhub:// is feedmatch's own pyserial URL backend (board/protocol_fmhub.py).
if "feedmatch.board" not in serial.protocol_handler_packages:
    serial.protocol_handler_packages.append("feedmatch.board")


def resolve_port(port: str) -> str:
    if port != "auto":
        return port
    usb = [p for p in serial.tools.list_ports.comports() if p.vid is not None]
    if not usb:
        raise PortMissing("no serial port with USB ids found; give --port")
    if len(usb) > 1:
        names = ", ".join(p.device for p in usb)
        raise PortError(f"several USB serial ports ({names}); give --port")
    return usb[0].device


# pyserial raises SerialException(errno, text) when the system refuses the open or
# the exclusive lock (serialposix.py): the number says why, never the words.
_BUSY = (errno.EBUSY, errno.EAGAIN, errno.EWOULDBLOCK)


def open_serial(dev: str, baud: int) -> serial.SerialBase:
    """The serial port dev (a device path, held exclusively, or a pyserial URL) open,
    or the LinkError subclass that says why not (PortMissing, PortBusy, PortError)."""
    try:
        if "://" in dev:
            return serial.serial_for_url(dev, baudrate=baud, timeout=0.05, write_timeout=2.0)
        return serial.Serial(dev, baud, timeout=0.05, write_timeout=2.0, exclusive=True)
    except (serial.SerialException, OSError, ValueError) as e:
        code = getattr(e, "errno", None)
        if code in _BUSY:
            raise PortBusy(f"port {dev} is busy (another program has it open)") from None
        kind = PortMissing if code == errno.ENOENT else PortError
        raise kind(f"cannot open port {dev}: {e}") from None


class BoardLink:
    def __init__(self, port: str, baud: int = 115200, timeout: float = 2.0, stop_event=None):
        self.port = port
        self.baud = baud
        self.timeout = timeout
        self.ser: serial.SerialBase | None = None
        self.reader = frames.LineReader()
        self.seq = 0
        self.events: collections.deque = collections.deque(maxlen=EVENT_QUEUE)
        self.bad_frames = 0
        self.reconnects = 0
        self.on_event: Callable[[str, dict], None] | None = None
        # Only the answer to the request being awaited is kept; a late answer to
        # one that timed out is dropped (counted), never handed to a later one.
        self._awaited: int | None = None
        self._answer: tuple[str, dict] | None = None
        self.stale_answers = 0
        self.stop_event = stop_event  # set by an owner that must be able to stop us mid-retry

    # -- open / close -----------------------------------------------------------
    def open(self) -> BoardLink:
        dev = resolve_port(self.port)
        if "://" not in dev:
            from feedmatch.board.hub import hub_alive, hub_path

            hp = hub_path(dev)
            if hub_alive(hp):
                dev = f"fmhub://{hp}"  # another feedmatch process owns the port: attach to it
        self.ser = open_serial(dev, self.baud)
        self.reader = frames.LineReader()
        return self

    def close(self) -> None:
        if self.ser is not None:
            try:
                self.ser.close()
            except (serial.SerialException, OSError):
                pass
        self.ser = None

    def __enter__(self) -> BoardLink:
        return self if self.ser is not None else self.open()

    def __exit__(self, *exc) -> None:
        self.close()

    def reconnect(self, give_up_s: float = 30.0) -> None:
        """Close, wait and reopen until the port is back (cable, USB reset, reboot)."""
        self.close()
        deadline = time.monotonic() + give_up_s
        delay = 0.2
        while True:
            try:
                self.open()
                self.reconnects += 1
                return
            except LinkError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(delay)
                delay = min(delay * 2, 2.0)

    # -- frames -------------------------------------------------------------------
    def _write(self, data: bytes) -> None:
        if self.ser is None:
            raise LinkError("link is closed")
        try:
            self.ser.write(data)
            self.ser.flush()
        except (serial.SerialException, OSError) as e:
            raise LinkError(f"write failed: {e}") from None

    def pump(self) -> int:
        """Read what has arrived; events go to on_event/the queue. Returns frames read."""
        if self.ser is None:
            raise LinkError("link is closed")
        try:
            data = self.ser.read(max(1, self.ser.in_waiting or 1))
            if self.ser.in_waiting:
                data += self.ser.read(self.ser.in_waiting)
        except (serial.SerialException, OSError, TypeError) as e:
            raise LinkError(f"read failed: {e}") from None
        n = 0
        for line in self.reader.feed(data):
            if not line:
                self.bad_frames += 1
                continue
            if not line.strip():
                continue
            d = frames.decode(line)
            if d[0] is None:
                self.bad_frames += 1
                continue
            kind, seq, word, obj = d
            n += 1
            if kind == "A":
                if seq == self._awaited and self._answer is None:
                    self._answer = (word, obj)
                else:
                    self.stale_answers += 1
            elif kind == "E":
                # An owner with a handler gets each event there and nowhere else: a
                # queue nobody reads would hold every record of a logger's lifetime.
                if self.on_event:
                    self.on_event(word, obj)
                else:
                    self.events.append((word, obj))
        return n

    def request(self, word: str, args: dict[str, Any] | None = None, timeout: float | None = None,
                retries: int = 2) -> dict[str, Any]:
        """Send a request and wait for its answer; a lost or corrupted answer is asked again."""
        timeout = timeout or self.timeout
        last_err = "no answer"
        for _ in range(retries + 1):
            if self.stop_event is not None and self.stop_event.is_set():
                raise LinkError("stopped")
            self.seq = (self.seq % 65535) + 1
            seq = self.seq
            self._awaited, self._answer = seq, None
            try:
                # A newline first ends whatever garbage came before on the line, so the
                # board reads this request even after noise with no newline in it.
                self._write(b"\n" + frames.encode("Q", seq, word, args or {}))
                deadline = time.monotonic() + timeout
                bad0 = self.bad_frames
                while time.monotonic() < deadline:
                    self.pump()
                    if self.bad_frames != bad0 and self._answer is None:
                        # A frame arrived damaged: likely our answer; ask again now rather
                        # than at the timeout (a late good answer to the old seq is dropped).
                        self.pump()
                        if self._answer is None:
                            last_err = f"answer to {word} arrived damaged"
                            break
                    if self._answer is not None:
                        status, obj = self._answer
                        if status == "ok":
                            return obj
                        raise BoardRefused(word, str(obj.get("why", "refused")), obj)
                else:
                    last_err = f"no answer to {word} within {timeout:g} s"
            finally:
                self._awaited, self._answer = None, None
        raise LinkTimeout(last_err)

    def records_since(self, seq: int, each: Callable[[dict], None] | None = None) -> list[dict[str, Any]]:
        """Every record the board still holds after seq (several requests if needed);
        each(record) is called as soon as a record arrives."""
        out: list[dict[str, Any]] = []
        since = seq
        for _ in range(10000):
            ans = self.request("records", {"since": since}, retries=8)
            recs = ans.get("records", [])
            out += recs
            if each is not None:
                for r in recs:
                    each(r)
            if recs:
                since = recs[-1]["seq"]
            if not ans.get("more") or not recs:
                break
        return out

    def element_sections(self) -> dict[str, Any] | None:
        """The board's element values as its config holds them: {"network": ...,
        and "correction": ... when it has learned one}; None when it does not say."""
        try:
            m = {"network": self.request("cfg-get", {"section": "network"})["value"]}
        except (BoardRefused, KeyError, TypeError):
            return None
        try:
            m["correction"] = self.request("cfg-get", {"section": "correction"})["value"]
        except (BoardRefused, KeyError, TypeError):
            pass  # no learned values: the nominal ones
        return m

    def bank(self):
        """The board's element values as a firmware Bank (learned ones where it has
        them), or None when it does not say: callers then show codes alone."""
        from feedmatch.seam.bank import bank_or_none

        return bank_or_none(self.element_sections())

    def wait_event(self, word: str, pred: Callable[[dict], bool] = lambda o: True,
                   timeout: float = 10.0) -> dict[str, Any] | None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            while self.events:
                w, o = self.events.popleft()
                if w == word and pred(o):
                    return o
            self.pump()
        return None
