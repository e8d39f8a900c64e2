"""The one error type that means "the user gave us something wrong".

The CLI turns an :class:`InputError` into one line on stderr and exit code 2; any other exception
is an internal error (exit code 1). Library callers can catch it like any ``ValueError``.
"""

from __future__ import annotations


class InputError(ValueError):
    """Bad input: a file, flag, budget or model that cannot be used as given.

    The message is one line that names the offending file, flag or layer and what is wrong.
    """
