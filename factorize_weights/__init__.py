"""factorize-weights: split a trained model's dense layers into two thin low-rank factors.

The stages, each importable from here::

    discover -> compute_spectra -> allocate -> factorize -> evaluate      (or: compress)

Names are imported on first use, so ``import factorize_weights.spectra`` (the numeric core) does
not import torch. See the README for the CLI and the report fields.
"""

from __future__ import annotations

import importlib

from ._version import __version__

# names that are also submodules are bound now (numpy only, no torch): importing the submodule later
# would otherwise leave the module object where the function belongs
from .allocate import Plan, allocate  # noqa: E402

_EXPORTS = {
    "FactorPair": "backends.torch_backend", "build_model": "backends.torch_backend",
    "discover": "backends.torch_backend",
    "Budget": "budget", "parse_budget": "budget",
    "CompressConfig": "config",
    "HeldOut": "data", "load_heldout": "data",
    "InputError": "errors",
    "svd_factors": "factors",
    "MetricResult": "metrics",
    "CompressResult": "pipeline", "Prepared": "pipeline", "compress": "run", "compute_factors": "pipeline",
    "compute_spectra": "pipeline", "evaluate": "evaluation", "factorize": "pipeline", "inspect_model": "pipeline",
    "prepare": "pipeline", "realize": "pipeline", "selected": "pipeline",
    "LayerRecord": "records", "break_even_rank": "records",
    "Spectrum": "spectra", "compute_spectrum": "spectra", "randomized_svd": "spectra",
    "load_factorized": "store", "open_model": "store",
    "search_budget": "sweep",
}

__all__ = ["__version__", "Plan", "allocate", *sorted(_EXPORTS)]


def __getattr__(name: str):
    if name in _EXPORTS:
        value = getattr(importlib.import_module(f".{_EXPORTS[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return __all__
