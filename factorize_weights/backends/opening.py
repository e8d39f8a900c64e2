"""Opening the model a user names: an ONNX file, a Hugging Face-style model folder, or a PyTorch
factory with a checkpoint. Which format a name is decided here, among the backends, and nowhere
else; the result is the model plus its provenance for the report."""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Callable

from ..data import file_sha256
from ..errors import InputError


def open_model(spec: str, *, weights: str | None = None, weights_key: str | None = None,
               factory_weights: bool = False, warn: Callable[[str], None] = lambda text: None):
    """``(model, sources)`` for ``spec``. A factory without ``weights`` is refused unless
    ``factory_weights`` says its own initial weights are meant (a forgotten checkpoint would
    otherwise compress random weights and report "no change")."""
    from . import onnx_backend

    if spec.lower().endswith(".onnx") or onnx_backend.looks_like_onnx(spec):
        for flag, given in (("--weights", weights), ("--weights-key", weights_key), ("--factory-weights", factory_weights)):
            if given:
                raise InputError(f"{flag} is for PyTorch factories; the ONNX file {spec} holds its own weights")
        return onnx_backend.load(spec), {"model": spec, "format": onnx_backend.FORMAT, "model_sha256": file_sha256(spec),
                                         "open_args": {}}
    from . import torch_backend

    folder = Path(spec)
    if folder.is_dir() and not (folder / "config.json").is_file():
        raise InputError(f"--model {spec}: a folder without config.json; a model folder holds the config.json and "
                         "weights save_pretrained writes (give that folder, or FILE.py:FACTORY with --weights)")
    if folder.is_dir():  # a Hugging Face-style model folder
        for flag, given in (("--weights", weights), ("--weights-key", weights_key), ("--factory-weights", factory_weights)):
            if given:
                raise InputError(f"{flag} is for a factory; the model folder {spec} holds its own weights")
        found = next((str(p) for p in sorted(folder.glob("*.safetensors"))), None)
        sources = {"model": spec, "format": torch_backend.FORMAT, "model_sha256": file_sha256(folder / "config.json"),
                   "weights": found, "weights_sha256": file_sha256(found) if found else None,
                   "layout": "model-folder", "open_args": {}}
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", torch_backend.CheckpointNotice)
            model = torch_backend.load_pretrained(spec)
        for w in caught:
            if issubclass(w.category, torch_backend.CheckpointNotice):
                warn(str(w.message))
        return model, sources
    if ":" not in spec:
        raise InputError(f"--model {spec!r}: not an ONNX file, a model folder (config.json), or "
                         "FILE.py:FACTORY or package.module:FACTORY")
    if weights_key and not weights:
        raise InputError("--weights-key picks a key inside --weights; give --weights too")
    if weights and factory_weights:
        raise InputError("--factory-weights uses the weights the factory creates; it cannot be combined with --weights")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", torch_backend.CheckpointNotice)
        model = torch_backend.build_model(spec, weights, weights_key=weights_key)
    for w in caught:
        if issubclass(w.category, torch_backend.CheckpointNotice):
            warn(str(w.message))
    if not weights and not factory_weights:  # after the factory ran: its own errors come first
        raise InputError(f"--model {spec}: no --weights given, so the factory's initial weights would be compressed "
                         "and evaluated; give --weights CHECKPOINT, or --factory-weights if the factory loads its own")
    target = spec.rpartition(":")[0]
    sources = {"model": spec, "format": torch_backend.FORMAT,
               "model_sha256": file_sha256(target) if Path(target).is_file() else None,
               "weights": weights, "weights_sha256": file_sha256(weights) if weights else None,
               # what factorize_weights.open_model needs besides the spec to open the same model again
               "open_args": {k: v for k, v in (("weights", weights), ("weights_key", weights_key),
                                               ("factory_weights", factory_weights)) if v}}
    return model, sources
