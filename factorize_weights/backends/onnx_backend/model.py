"""The ONNX model in memory (external data loaded) and how it is loaded."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ...errors import InputError, readable_file

_FLOAT_TYPES = {1: np.float32, 10: np.float16, 11: np.float64}  # TensorProto.FLOAT/FLOAT16/DOUBLE
_NP_OF = {1: np.float32, 10: np.float16, 11: np.float64, 6: np.int32, 7: np.int64, 9: np.bool_,
          2: np.uint8, 3: np.int8}
TWO_GB = 2**31


@dataclass
class OnnxModel:
    """An ONNX model in memory (external data loaded) plus where it came from."""

    proto: Any
    path: Path | None = None
    external_data: bool = False
    pairs: dict = field(default_factory=dict)  # layer name -> (reduce node, expand node)
    _sessions: dict = field(default_factory=dict, repr=False)

    @property
    def graph(self):
        return self.proto.graph


# ---------------------------------------------------------------- loading


def looks_like_onnx(path: str | Path) -> bool:
    """True for an ``.onnx`` file, or any file that parses as an ONNX model with a graph."""
    path = Path(path)
    if not path.is_file():
        return False
    if path.suffix.lower() == ".onnx":
        return True
    if path.suffix.lower() in (".py", ".safetensors", ".pt", ".pth", ".npz"):
        return False
    try:
        import onnx

        proto = onnx.load(str(path), load_external_data=False)
        return len(proto.graph.node) > 0
    except Exception:
        return False


def load(path: str | Path) -> OnnxModel:
    """Read an ONNX file (and its external-data files next to it); refuse what is not ONNX."""
    import onnx
    from onnx.external_data_helper import uses_external_data

    path = readable_file(path, "--model", "ONNX file")
    try:
        proto = onnx.load(str(path), load_external_data=False)
    except Exception as exc:
        raise InputError(f"--model {path}: not an ONNX model (it does not parse: {type(exc).__name__})") from exc
    if not proto.graph.node:
        raise InputError(f"--model {path}: not an ONNX model (no graph nodes; truncated or another format?)")
    external = [t for t in proto.graph.initializer if uses_external_data(t)]
    for tensor in external:
        location = next((e.value for e in tensor.external_data if e.key == "location"), None)
        if location is None or not (path.parent / location).is_file():
            raise InputError(f"--model {path}: external-data file {location!r} for tensor {tensor.name!r} is missing")
    if external:
        try:
            onnx.load_external_data_for_model(proto, str(path.parent))
        except Exception as exc:
            raise InputError(f"--model {path}: cannot read its external data ({type(exc).__name__}: {exc})") from exc
    try:
        # protobuf cannot serialize 2 GB or more: the checker then reads the file itself
        onnx.checker.check_model(proto if proto.ByteSize() < TWO_GB else str(path))
    except Exception as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        raise InputError(f"--model {path}: not a valid ONNX model ({first})") from exc
    return OnnxModel(proto, path, bool(external))


