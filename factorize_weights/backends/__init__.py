"""Model-format backends. Each knows one format and nothing else (see DESIGN.md); the pipeline calls
them only through :class:`Backend` and picks one with :func:`backend_for`.

A backend finds the layers, hands out their weights as matrix views, runs the model, yields the
inputs (or outputs) its layers see, batch by batch, writes factors back and saves the result.
What is done with the rows it yields (moments, errors) lives in the numeric core (``stats.py``).
"""

from __future__ import annotations

import importlib
from pathlib import Path
from typing import Callable, ContextManager, Iterable, Protocol, Sequence

import numpy as np

from ..records import LayerRecord

#: ``sink(layer name, rows)``: a block of a layer's input rows, (r, n) numpy.
RowSink = Callable[[str, np.ndarray], None]
#: ``sink(layer name, x, x_new)``: paired row blocks from the original and a rewritten model.
PairSink = Callable[[str, np.ndarray, np.ndarray], None]
#: ``sink(layer name, exact, approx)``: a layer's output and its factor pair's, same inputs.
OutputSink = Callable[[str, np.ndarray, np.ndarray], None]


class Backend(Protocol):
    """What the pipeline needs from a model format (a backend module satisfies it structurally)."""

    FORMAT: str  # "torch" or "onnx": recorded in reports, never tested outside this package
    RUNTIME: str  # what latency is measured in
    CAPABILITIES: frozenset  # optional operations it has: "output_effects", "recovery", ...

    def discover(self, model, *, only: Sequence[str] = (), skip: Sequence[str] = ()) -> list[LayerRecord]:
        """Every linear/conv layer as a record; the ones left alone with a reason."""

    def weight_matrix(self, record: LayerRecord) -> np.ndarray:
        """The layer's matrix view (out x in), float64."""

    def predict(self, model, inputs, *, source: str = "--heldout") -> np.ndarray:
        """The model's (first) output on one batch, float64."""

    def measure_positions(self, model, records: list[LayerRecord], sample) -> int:
        """Set each record's output positions per sample; return activation bytes per sample."""

    def call_stages(self, model, records: list[LayerRecord], sample) -> list[list[str]]:
        """Record names in forward order, grouped in stages of layers that read the same input."""

    def stream_inputs(self, model, records: list[LayerRecord], batches: Iterable, sink: RowSink) -> int:
        """Run the batches; hand every block of each layer's input rows to ``sink``; sample count."""

    def stream_paired_inputs(self, original, current, records: list[LayerRecord], batches: Iterable,
                             sink: PairSink) -> int:
        """The same for two models on the same samples, paired row blocks; sample count."""

    def paired_runs(self, original, current, records: list[LayerRecord], batches: list):
        """A runner whose ``stream(records, sink)`` makes one group's paired passes; ``current``
        is patched in place between groups (a backend may cache block inputs across them)."""

    def normalize(self, model):
        """``model`` in the form the tool works on, computing the same function: PyTorch converts
        ``nn.MultiheadAttention`` into four splittable linear projections (a copy; the user's model
        is not modified); ONNX returns the model itself."""

    def replacement_errors(self, model, records: dict, trials: Iterable, batches: list, output: str | None = None):
        """For each ``(name, A, X)``: (squared output error, squared output norm) of ``model`` with only
        that layer replaced by the factor pair, on ``batches`` (PyTorch only; ONNX raises)."""

    def stream_layer_outputs(self, original, factorized, names: list[str], batches: Iterable,
                             sink: OutputSink) -> None:
        """Each named layer's output and its factor pair's output on the original's inputs."""

    def rewrite(self, model, records: Iterable[LayerRecord], factors: dict, *, in_place: bool = False):
        """``model`` (a copy unless ``in_place``) with each layer in ``factors`` split."""

    def read_factors(self, model, names: list[str]) -> dict:
        """(A, X) of each named factor pair, float64."""

    def count_params(self, model) -> int: ...

    def weight_dtype(self, model) -> str:
        """The floating dtype most weights are stored in (numpy/torch name: float32, bfloat16, ...)."""

    def check(self, model) -> None:
        """Raise if the rewritten model is invalid in its format (a bug, not bad input)."""

    def timing(self, models: Sequence, threads: int) -> ContextManager:
        """Context in which :meth:`timer` callables run (threads, eval mode set once)."""

    def timer(self, model, inputs, threads: int) -> Callable[[], object]:
        """A callable that runs one forward pass and nothing else."""

    def layer_timers(self, model, records: list[LayerRecord], inputs, threads: int) -> dict:
        """``{name: {"shape", "make", "calls", "baseline"}}`` for each layer ``inputs`` reach: the
        input shape it sees, ``make(None)`` running the dense layer alone once and ``make(k)`` its
        factor pair of rank k, how often a forward pass calls it, and optionally a callable with the
        same call overhead and no work (subtracted; costs.measure_table)."""

    def save_model(self, model, folder: Path) -> list[str]:
        """Write the model into ``folder``; the file names written."""

    def rebuild(self, model, folder: Path, layers: list[dict]):
        """The factorized model a result folder holds, from the original ``model`` and the validated
        ``plan.json`` layer entries."""

    def recover(self, original, factorized, inputs, *, metric: str | None, steps: int, output: str | None = None,
                lr: float | None = None, seed: int = 0, quiet: bool = False) -> dict:
        """Fine-tune the factor pairs in place (capability ``recovery``); what happened."""


def get(name: str) -> Backend:
    """The backend module called ``name`` (``"torch"`` or ``"onnx"``), imported on first use."""
    if name not in ("torch", "onnx"):
        raise ValueError(f"unknown backend {name!r}")
    return importlib.import_module(f".{name}_backend", __name__)


def backend_for(model) -> Backend:
    """The backend that handles ``model``: ONNX for an :class:`OnnxModel`, else PyTorch."""
    from .onnx_backend import OnnxModel  # light: onnx itself is imported where it is used

    return get("onnx") if isinstance(model, OnnxModel) else get("torch")


def backend_of(record: LayerRecord) -> Backend:
    return get(record.backend)


def can(backend: Backend, capability: str) -> bool:
    """Whether ``backend`` declares ``capability`` (see each backend's ``CAPABILITIES``)."""
    return capability in getattr(backend, "CAPABILITIES", ())


def rebuild(model, folder: Path, layers: list[dict]):
    """The factorized model of a result folder: by the backend of ``model``, or ONNX when the folder
    holds only ``model.onnx`` (an ONNX run's output)."""
    folder = Path(folder)
    onnx_only = (folder / "model.onnx").is_file() and not (folder / "model.safetensors").is_file()
    backend = get("onnx") if onnx_only else backend_for(model)
    return backend.rebuild(model, folder, layers)
