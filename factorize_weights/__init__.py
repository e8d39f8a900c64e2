"""factorize-weights: split a trained model's dense layers into two thin low-rank factors.

The stages, each importable from here::

    discover -> compute_spectra -> allocate -> factorize -> evaluate      (or: compress)

See the README for the CLI and the report fields.
"""

from ._version import __version__
from .allocate import Plan, allocate
from .backends.torch_backend import FactorPair, build_model, discover
from .budget import Budget, parse_budget
from .config import CompressConfig
from .data import HeldOut, load_heldout
from .errors import InputError
from .factors import svd_factors
from .metrics import MetricResult
from .pipeline import (
    CompressResult, compress, compute_factors, compute_spectra, evaluate, factorize, inspect_model, selected,
)
from .records import LayerRecord, break_even_rank
from .spectra import Spectrum, compute_spectrum, randomized_svd
from .store import load_factorized

__all__ = [
    "__version__", "Budget", "CompressConfig", "CompressResult", "FactorPair", "HeldOut", "InputError",
    "LayerRecord", "MetricResult", "Plan", "Spectrum", "allocate", "break_even_rank", "build_model",
    "compress", "compute_factors", "compute_spectra", "compute_spectrum", "discover", "evaluate", "factorize",
    "inspect_model", "load_factorized", "load_heldout", "parse_budget", "randomized_svd", "selected",
    "svd_factors",
]
