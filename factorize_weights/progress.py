"""Progress bars on stderr (tqdm), shown only on a terminal and never with ``quiet``."""

from __future__ import annotations

import sys

from tqdm.auto import tqdm


def bar(iterable, config, desc: str, total=None, unit="layer"):
    """``iterable`` wrapped in a bar that stays away when quiet or when stderr is not a terminal."""
    disable = config.quiet or not sys.stderr.isatty()
    return tqdm(iterable, desc=desc, total=total, disable=disable, leave=False, unit=unit)
