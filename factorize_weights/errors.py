"""The one error type that means "the user gave us something wrong".

The CLI turns an :class:`InputError` into one line on stderr and exit code 2; any other exception
is an internal error (exit code 1). Library callers can catch it like any ``ValueError``.
"""

from __future__ import annotations


class InputError(ValueError):
    """Bad input: a file, flag, budget or model that cannot be used as given.

    The message is one line that names the offending file, flag or layer and what is wrong.
    """


def readable_file(path, flag: str, what: str = "file"):
    """``path`` as a Path if it is a readable regular file; else an :class:`InputError` that says
    which of the usual mistakes it is (missing, a folder, unreadable)."""
    import os
    from pathlib import Path

    path = Path(path)
    if path.is_dir():
        raise InputError(f"{flag} {path}: is a folder, not a {what}")
    if not path.exists():
        raise InputError(f"{flag} {path}: {what} does not exist")
    if not path.is_file():
        raise InputError(f"{flag} {path}: not a regular {what}")
    if not os.access(path, os.R_OK):
        raise InputError(f"{flag} {path}: cannot be read (permission denied)")
    return path
