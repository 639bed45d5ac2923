"""Errors the command line turns into one clear line and exit status 2."""


class InputError(Exception):
    """Bad user input: a file, an option or a value. The message names the field."""


class LinkError(Exception):
    """The serial link failed: port missing, busy, or the board not answering."""
