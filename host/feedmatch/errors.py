"""Errors the command line turns into one clear line and exit status 2.

One tree, as pyserial's: every failure of the link is a LinkError, and each
kind a caller acts on is a subclass chosen where the failure arises, so no
caller tells them apart by their words:

    LinkError
      PortError         the port could not be opened (the generic case)
        PortMissing     no such device, or no USB serial port to pick
        PortBusy        another program holds the port open (its lock)
        PortOwned       another feedmatch process owns it (its hub is running)
      LinkTimeout       the board gave no (undamaged) answer in time
      BoardRefused      the board answered "no"; its reason kept as data
"""

from __future__ import annotations


class InputError(Exception):
    """Bad user input: a file, an option or a value. The message names the field."""


class LinkError(Exception):
    """The serial link failed: port missing, busy, or the board not answering."""


class PortError(LinkError):
    """The port could not be opened (the subclasses say why, where it is known)."""


class PortMissing(PortError):
    """There is no such device (or no USB serial port to pick for "auto")."""


class PortBusy(PortError):
    """Another program holds the port open (its exclusive lock)."""


class PortOwned(PortError):
    """Another feedmatch process owns the port: its hub is running (attach to it)."""


class LinkTimeout(LinkError):
    """No answer to a request within its time, or only damaged ones."""


# The firmware's refusal codes (fmlogic/controller.py) in an operator's words.
REFUSALS = {
    "busy": "it is busy with a tune or a relay change of its own",
    "fault": "it is in a fault state",
    "rf-present": "RF is already on the line (the box tunes on that carrier itself)",
    "hot": "the power on the line is above its hot-switch limit: relays never move under power",
    "no-carrier": "there is no carrier to tune on",
    "invalid": "the configuration is not valid",
    "unknown-request": "its firmware does not know this request (older firmware?)",
    "not-a-request": "the frame was not a request",
    "reply-too-long": "its answer would be too long for the link",
    "button": "the button on the box was pressed",
    "other-bins": "its memory bins are another width than the states sent",
    "other-board": "the states sent were stored on another box",
    "bad-entry": "a stored state sent is out of its range",
}


def refusal_words(why: str, msg: str = "") -> str:
    """A refusal code and its detail as a sentence ("bad-args", "freq_hz" ->
    "it did not accept the value of freq_hz")."""
    if why == "bad-args":
        text = f"it did not accept the value of {msg}" if msg and " " not in msg else \
            "it did not accept the request's values" + (f" ({msg})" if msg else "")
        return text
    text = REFUSALS.get(why, f"reason '{why}'")
    return text + (f" ({msg})" if msg and msg not in text else "")


class BoardRefused(LinkError):
    """The board answered a request with a refusal.

    request: the request word ("tune", "preset", ...); why: the board's reason
    code ("busy", "rf-present", ...); detail: the rest of its answer."""

    def __init__(self, request: str, why: str, detail: dict | None = None):
        self.request = request
        self.why = why
        self.detail = dict(detail or {})
        msg = str(self.detail.get("msg", ""))
        self.words = refusal_words(why, msg)
        super().__init__(f"the board refused {request}: {self.words}")
