"""Budget strings: what the whole model must meet after factorization.

Syntax (one budget per run)::

    params=0.3       keep at most 30% of the selected layers' parameters (fraction in (0, 1])
    params=1.2M      keep at most 1,200,000 parameters in the selected layers (K, M, G suffixes,
                     or a plain integer greater than 1)
    flops=0.5        keep at most 50% of the selected layers' multiply-adds per sample
    energy=0.9       every layer keeps at least 90% of its squared singular-value energy
    error=0.1        every layer's relative Frobenius error ||W - W_k||_F / ||W||_F is at most 0.1
    latency=0.7      the whole model runs in at most 70% of the original's measured time, in its
                     runtime, at the timed batch and thread count (needs --heldout or a profile)
    latency=12ms     ... in at most 12 milliseconds per batch (also 1.5s, 800us)
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from .errors import InputError

KINDS = ("params", "flops", "energy", "error", "latency")
_TIME = {"us": 1e-3, "ms": 1.0, "s": 1e3}
_SUFFIX = {"k": 1e3, "m": 1e6, "g": 1e9}


@dataclass(frozen=True)
class Budget:
    """A parsed budget.

    Attributes
    ----------
    kind : {"params", "flops", "energy", "error", "latency"}
    value : float
        The fraction (or, with ``absolute=True``, the count, or for latency the milliseconds) the
        user gave.
    absolute : bool
        ``True`` for an absolute parameter or FLOP count such as ``params=1.2M``, or a time such
        as ``latency=12ms``.
    text : str
        The budget exactly as given.
    """

    kind: str
    value: float
    absolute: bool = False
    text: str = ""

    @property
    def is_global(self) -> bool:
        """Params, FLOP and latency budgets are shared by all layers; energy and error are per layer."""
        return self.kind in ("params", "flops", "latency")

    def to_dict(self) -> dict:
        return {"given": self.text, "kind": self.kind, "value": self.value, "absolute": self.absolute}


def parse_budget(text: str) -> Budget:
    """Parse ``KIND=VALUE``; raise :class:`InputError` naming the rule that is broken."""
    raw = text
    text = text.strip()
    if "=" not in text:
        raise InputError(
            f"--budget {raw!r}: expected KIND=VALUE with KIND one of {', '.join(KINDS)} "
            "(e.g. params=0.3, params=1.2M, energy=0.9, error=0.1, latency=0.7)"
        )
    kind, _, value_text = (part.strip() for part in text.partition("="))
    kind = kind.lower()
    if kind not in KINDS:
        raise InputError(f"--budget {raw!r}: unknown kind {kind!r}; expected one of {', '.join(KINDS)}")
    if value_text.endswith("%"):  # params=30% is params=0.3
        number_text = value_text[:-1].strip()
        try:
            value_text = repr(float(number_text) / 100.0) if number_text else value_text
        except ValueError:
            pass
    if kind == "latency":
        return _latency(raw, text, value_text)
    if value_text.startswith("-"):
        raise InputError(f"--budget {raw!r}: {kind} must be positive; got {value_text}")
    match = re.fullmatch(r"([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*([kKmMgG]?)", value_text)
    if match is None:
        raise InputError(f"--budget {raw!r}: {value_text!r} is not a number")
    number = float(match.group(1))
    suffix = match.group(2).lower()
    if not math.isfinite(number):
        raise InputError(f"--budget {raw!r}: value must be finite")
    if kind in ("params", "flops"):
        if suffix or (number > 1 and number.is_integer() and "." not in match.group(1)):
            count = number * _SUFFIX.get(suffix, 1.0)
            if count < 1:
                raise InputError(f"--budget {raw!r}: an absolute {kind} count must be at least 1")
            return Budget(kind, float(round(count)), True, text)
        if not 0.0 < number <= 1.0:
            raise InputError(
                f"--budget {raw!r}: a {kind} fraction must be in (0, 1], or an absolute count "
                f"such as {kind}=1.2M; got {value_text}"
            )
        return Budget(kind, number, False, text)
    if suffix:
        raise InputError(f"--budget {raw!r}: {kind} takes a plain fraction, not a count")
    if kind == "energy" and not 0.0 < number <= 1.0:
        raise InputError(f"--budget {raw!r}: an energy fraction must be in (0, 1]; got {value_text}")
    if kind == "error" and not 0.0 <= number < 1.0:
        raise InputError(f"--budget {raw!r}: a relative error must be in [0, 1); got {value_text}")
    return Budget(kind, number, False, text)


def _latency(raw: str, text: str, value_text: str) -> Budget:
    """``latency=F`` (a fraction of the original's measured time) or ``latency=12ms`` (us, ms, s)."""
    match = re.fullmatch(r"([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(us|ms|s)?", value_text.strip().lower())
    if match is None:
        raise InputError(f"--budget {raw!r}: latency takes a fraction of the original's time (latency=0.7) or a "
                         f"time with its unit (latency=12ms, 800us, 1.5s); got {value_text!r}")
    number, unit = float(match.group(1)), match.group(2)
    if not math.isfinite(number) or number <= 0:
        raise InputError(f"--budget {raw!r}: latency must be a positive number")
    if unit:
        return Budget("latency", number * _TIME[unit], True, text)
    if number > 1.0:
        raise InputError(f"--budget {raw!r}: a latency fraction must be in (0, 1]; for a time give its unit "
                         f"(latency={value_text}ms)")
    return Budget("latency", number, False, text)
