"""pyserial URL backend "fmhub://PATH": a board's link through a local hub socket.

The hub (feedmatch.board.hub) owns the serial port; every other feedmatch
process reaches the board through its Unix socket with the same frames, so
BoardLink works unchanged over "fmhub:///run/user/1000/feedmatch-hub-....sock".
Everything but opening is pyserial's own socket:// backend.
"""

from __future__ import annotations

from serial.serialutil import SerialException
from serial.urlhandler.protocol_socket import Serial as _SocketSerial

PREFIX = "fmhub://"


class Serial(_SocketSerial):
    def open(self) -> None:
        self.logger = None
        if self._port is None:
            raise SerialException("Port must be configured before it can be used.")
        if self.is_open:
            raise SerialException("Port is already open.")
        from feedmatch.board.hub import check_peer, connect_unix
        from feedmatch.errors import LinkError

        path = str(self.portstr)[len(PREFIX):]
        try:
            s = connect_unix(path)
        except OSError as e:
            raise SerialException(f"cannot reach the station hub at {path}: {e}") from None
        try:
            check_peer(s, path)  # a socket another user put there is never written to
        except LinkError as e:
            s.close()
            raise SerialException(str(e)) from None
        s.setblocking(False)
        self._socket = s
        self._reconfigure_port()
        self.is_open = True
        self.reset_input_buffer()
        self.reset_output_buffer()
