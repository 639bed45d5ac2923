"""Errors the command line turns into one clear line and exit status 2.

One tree: every failure of the link is a LinkError; a board that answered but
said no is the subclass BoardRefused, its reason kept as data.
"""

from __future__ import annotations


class InputError(Exception):
    """Bad user input: a file, an option or a value. The message names the field."""


class LinkError(Exception):
    """The serial link failed: port missing, busy, or the board not answering."""


class BoardRefused(LinkError):
    """The board answered a request with a refusal.

    request: the request word ("tune", "preset", ...); why: the board's reason
    code ("busy", "rf-present", ...); detail: the rest of its answer."""

    def __init__(self, request: str, why: str, detail: dict | None = None):
        self.request = request
        self.why = why
        self.detail = dict(detail or {})
        msg = self.detail.get("msg", "")
        super().__init__(f"board refused {request}: {why} {msg}".strip())
