"""Held-out data: an ``.npz`` file or a Python import spec yielding ``(inputs, labels)`` batches.

``.npz`` layout
---------------
``inputs``  array (N, ...) — one row per sample, in the shape the model's forward takes.
``labels``  optional array (N,) of integer class ids (for top1/top5) or (N, ...) float targets
            (for mse). Any other arrays are ignored.

Several inputs
--------------
Without ``inputs``, every array but ``labels`` is an input named after a parameter of the model's
``forward`` (``input_ids``, ``attention_mask``, ...; for ONNX, a graph input name) and passed by
name. Integer arrays (token ids, masks) stay integers; floating arrays take the model's dtype.

Import spec
-----------
``path/to/file.py:function`` or ``package.module:function``: a callable taking no arguments that
returns an iterable of ``(inputs, labels)`` pairs (``labels`` may be ``None``); each pair is one
batch of numpy arrays or tensors. ``inputs`` may be one array, a dict of named arrays (passed by
name) or a tuple of arrays (passed by position).
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np

from .errors import InputError, readable_file


@dataclass
class HeldOut:
    """Samples held out from training, materialized as arrays.

    Attributes
    ----------
    inputs : ndarray (N, ...)
    labels : ndarray (N, ...) or None
    source : str
        Where they came from (file path or import spec).
    sha256 : str or None
        Hash of the file, for the report (``None`` for an import spec).
    """

    inputs: np.ndarray | dict[str, np.ndarray]
    labels: np.ndarray | None
    source: str
    sha256: str | None = None

    def __len__(self) -> int:
        first = next(iter(self.inputs.values())) if isinstance(self.inputs, dict) else self.inputs
        return int(first.shape[0])

    @property
    def sample_shape(self):
        """Per-sample shape: a tuple, or a dict of tuples for named inputs."""
        if isinstance(self.inputs, dict):
            return {k: tuple(v.shape[1:]) for k, v in self.inputs.items()}
        return tuple(self.inputs.shape[1:])

    def batches(self, batch_size: int = 256, limit: int | None = None) -> Iterator[tuple]:
        """Consecutive ``(inputs, labels)`` batches; ``limit`` caps the total number of samples."""
        n = len(self) if limit is None else min(limit, len(self))
        for start in range(0, n, batch_size):
            stop = min(start + batch_size, n)
            labels = None if self.labels is None else self.labels[start:stop]
            if isinstance(self.inputs, dict):
                yield {k: v[start:stop] for k, v in self.inputs.items()}, labels
            else:
                yield self.inputs[start:stop], labels


def file_sha256(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _as_array(value) -> np.ndarray:
    if hasattr(value, "detach"):  # a torch tensor
        value = value.detach().cpu().numpy()
    return np.asarray(value)


def load_heldout(spec: str | Path, *, flag: str = "--heldout") -> HeldOut:
    """Read a held-out set from an ``.npz`` file or an import spec (see the module docstring)."""
    text = str(spec)
    path = Path(text)
    if path.suffix.lower() == ".npz" or path.is_file():
        return _load_npz(path, flag)
    if ":" in text:
        return _load_spec(text, flag)
    raise InputError(f"{flag} {text}: no such file (expected an .npz file or FILE.py:FUNCTION)")


#: The most an .npz may inflate to in memory, as a share of the memory available when it is read.
NPZ_MEMORY_SHARE = 0.5


def _available_memory() -> int:
    import os

    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):  # not on Linux: no limit from here
        return 1 << 62


def npz_sizes(path: Path, flag: str) -> dict[str, tuple[tuple, np.dtype]]:
    """Shape and dtype of every array of an .npz from the .npy headers in the zip, reading no data;
    refuses what is not an .npz, holds pickled (object) arrays, or would not fit in memory."""
    import zipfile

    if not zipfile.is_zipfile(path):
        raise InputError(f"{flag} {path}: not an .npz file (it is not a zip archive of .npy arrays; "
                         "write it with numpy.savez)")
    out, total = {}, 0
    try:
        with zipfile.ZipFile(path) as zf:
            for info in zf.infolist():
                if not info.filename.endswith(".npy"):
                    continue
                with zf.open(info) as fh:
                    version = np.lib.format.read_magic(fh)
                    reader = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                              else np.lib.format.read_array_header_2_0)
                    shape, _, dtype = reader(fh)
                if dtype.hasobject:
                    raise InputError(f"{flag} {path}: array {info.filename[:-4]!r} holds Python objects "
                                     "(pickled data is never loaded); store numbers")
                out[info.filename[:-4]] = (tuple(shape), dtype)
                total += int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{flag} {path}: not a readable .npz file ({type(exc).__name__}: {exc})") from exc
    if total > NPZ_MEMORY_SHARE * _available_memory():
        raise InputError(f"{flag} {path}: its arrays take {total / 2**30:.2f} GiB once inflated, more than half the "
                         f"{_available_memory() / 2**30:.2f} GiB of memory available; give fewer samples")
    return out


def _load_npz(path: Path, flag: str) -> HeldOut:
    path = readable_file(path, flag, ".npz file")
    npz_sizes(path, flag)  # headers first: nothing is inflated that cannot fit
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except Exception as exc:
        raise InputError(f"{flag} {path}: not a readable .npz file ({type(exc).__name__}: {exc})") from exc
    labels = arrays.pop("labels", None)
    if "inputs" in arrays:
        inputs = arrays["inputs"]
    elif arrays:  # arrays keyed by graph input names (multi-input ONNX graphs)
        inputs = arrays
    else:
        raise InputError(f"{flag} {path}: missing array 'inputs' (the file holds no arrays besides labels)")
    return _checked(inputs, labels, str(path), flag, file_sha256(path))


def _load_spec(spec: str, flag: str) -> HeldOut:
    target, _, attr = spec.rpartition(":")
    try:
        if target.endswith(".py"):
            if not Path(target).is_file():
                raise InputError(f"{flag} {spec!r}: file {target} does not exist")
            name = f"_factorize_weights_data_{abs(hash(target))}"
            module_spec = importlib.util.spec_from_file_location(name, target)
            module = importlib.util.module_from_spec(module_spec)
            sys.modules[name] = module
            module_spec.loader.exec_module(module)
        else:
            module = importlib.import_module(target)
        fn = getattr(module, attr)
        inputs, labels = [], []
        for item in fn():
            x, y = item if isinstance(item, (tuple, list)) and len(item) == 2 else (item, None)
            if isinstance(x, dict):  # named inputs, passed by name
                inputs.append({str(k): _as_array(v) for k, v in x.items()})
            elif isinstance(x, (tuple, list)):  # several positional inputs
                inputs.append({str(i): _as_array(v) for i, v in enumerate(x)})
            else:
                inputs.append(_as_array(x))
            if y is not None:
                labels.append(_as_array(y))
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{flag} {spec!r}: {type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}") from exc
    if not inputs:
        raise InputError(f"{flag} {spec!r}: yielded no batches")
    if labels and len(labels) != len(inputs):
        raise InputError(f"{flag} {spec!r}: some batches have labels and some do not")
    try:
        if any(isinstance(b, dict) for b in inputs):
            if not all(isinstance(b, dict) and b.keys() == inputs[0].keys() for b in inputs):
                raise InputError(f"{flag} {spec!r}: every batch must hold the same named inputs")
            x = {k: np.concatenate([b[k] for b in inputs]) for k in inputs[0]}
        else:
            x = np.concatenate(inputs)
        y = np.concatenate(labels) if labels else None
    except ValueError as exc:
        raise InputError(f"{flag} {spec!r}: batches do not share a shape ({exc})") from exc
    return _checked(x, y, spec, flag, None)


def _checked(inputs, labels, source: str, flag: str, sha: str | None) -> HeldOut:
    named = inputs if isinstance(inputs, dict) else {"inputs": inputs}
    rows = None
    for key, arr in named.items():
        if arr.ndim < 1 or arr.shape[0] == 0:
            raise InputError(f"{flag} {source}: {key!r} is empty (shape {arr.shape})")
        if arr.dtype.kind not in "fiub":
            raise InputError(f"{flag} {source}: {key!r} has dtype {arr.dtype}; expected numbers")
        if arr.dtype.kind == "f" and not np.all(np.isfinite(arr)):
            raise InputError(f"{flag} {source}: {key!r} contains NaN or Inf")
        if rows is not None and arr.shape[0] != rows[1]:
            raise InputError(f"{flag} {source}: {key!r} has {arr.shape[0]} rows but {rows[0]!r} has {rows[1]}")
        rows = rows or (key, arr.shape[0])
    for key in ("attention_mask", "token_type_ids"):  # one entry per token (the convention of token inputs)
        if key in named and "input_ids" in named and named[key].shape != named["input_ids"].shape:
            raise InputError(f"{flag} {source}: {key!r} has shape {named[key].shape} but 'input_ids' has "
                             f"{named['input_ids'].shape}; they need one entry per token")
    if labels is not None:
        labels = np.asarray(labels)
        if labels.shape[0] != rows[1]:
            raise InputError(
                f"{flag} {source}: 'labels' has {labels.shape[0]} rows but {rows[0]!r} has {rows[1]}"
            )
        if labels.dtype.kind not in "fiub":
            raise InputError(f"{flag} {source}: 'labels' has dtype {labels.dtype}; expected numbers")
    return HeldOut(inputs, labels, source, sha)


def token_mask(batch) -> np.ndarray | None:
    """Which positions of a batch of token sequences are real tokens: its ``attention_mask``
    (N, T) as booleans, or None when the batch has none or every position is real. Calibration
    statistics count only these (padding is not what the model sees in use)."""
    mask = batch.get("attention_mask") if isinstance(batch, dict) else None
    if mask is None or np.ndim(mask) != 2:
        return None
    real = np.asarray(mask) != 0
    return None if real.all() else real


def real_rows(x, mask):
    """``x`` (N, T, features) at the real tokens only, as (tokens, features); ``x`` itself when
    there is no mask or its leading shape is not the mask's (a layer that does not run per token)."""
    if mask is None or x.ndim != 3 or tuple(x.shape[:2]) != tuple(mask.shape):
        return x
    return x[mask]
