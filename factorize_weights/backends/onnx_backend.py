"""ONNX backend: find Gemm/MatMul/Conv nodes with constant weights, split them, run with onnxruntime.

Semantics follow the ONNX operator specification (onnx.ai, Operators.md):

- ``Gemm``: ``Y = alpha * A' @ B' + beta * C`` with ``A' = A^T`` if ``transA``, ``B' = B^T`` if
  ``transB``. With a constant ``B`` the layer's matrix view (out x in) is ``alpha * B`` when
  ``transB = 1`` and ``alpha * B^T`` when ``transB = 0``.
- ``MatMul`` with a constant 2-D weight on the right, ``Y = X @ W`` (W: in x out): the matrix view is
  ``W^T``. On the left, ``Y = W @ X`` (W: out x in): the matrix view is ``W``.
- ``Conv`` with ``group = 1``: weight (M, C, k...) viewed as (M, C * prod(k)).

A chosen node becomes two nodes with fresh names: the first holds X (k x n) and does all the
spatial work (same pads/strides/dilations/auto_pad), the second holds A (m x k) and the bias.
"""

from __future__ import annotations

import contextlib
import copy
import fnmatch
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Sequence

import numpy as np

from ..errors import InputError, readable_file
from ..records import LayerRecord, max_saving_rank

FORMAT = "onnx"
RUNTIME = "onnxruntime"

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


# ---------------------------------------------------------------- discovery


def _attrs(node) -> dict:
    import onnx

    return {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}


def _node_names(graph) -> list[str]:
    """A unique, stable name per node: its own name when set and unique, else op_index."""
    counts = Counter(n.name for n in graph.node if n.name)
    return [n.name if n.name and counts[n.name] == 1 else f"{n.op_type}_{i}" for i, n in enumerate(graph.node)]


def _uses(graph) -> Counter:
    """How many node inputs (in the graph and its subgraphs) and graph outputs read each name."""
    uses: Counter = Counter()

    def walk(g):
        for node in g.node:
            uses.update(i for i in node.input if i)
            for attr in node.attribute:
                for sub in ([attr.g] if attr.HasField("g") else []) + list(attr.graphs):
                    walk(sub)

    walk(graph)
    uses.update(o.name for o in graph.output)
    return uses


def discover(model: OnnxModel, *, only: Sequence[str] = (), skip: Sequence[str] = ()) -> list[LayerRecord]:
    """A record for every Gemm, MatMul and Conv node; the ones that cannot be split with a reason."""
    graph = model.graph
    inits = {t.name: t for t in graph.initializer}
    graph_inputs = {i.name for i in graph.input}
    producers = {o: n for n in graph.node for o in n.output}
    uses = _uses(graph)
    records = []
    memo: dict[str, bool] = {}
    for name, node in zip(_node_names(graph), graph.node):
        if node.op_type not in ("Gemm", "MatMul", "Conv"):
            continue
        if node.op_type == "MatMul" and not any(i in graph_inputs or _constant(i, inits, producers, memo)
                                                for i in node.input[:2]):
            continue  # a product of two computed activations (attention scores): no weight, not a layer
        records.append(_record(name, node, inits, graph_inputs, producers, uses, only, skip))
    return records


def _constant(name: str, inits, producers, memo: dict) -> bool:
    """Whether a value is a constant: an initializer, or computed from constants only."""
    if name in memo:
        return memo[name]
    memo[name] = False  # cycles cannot occur in a valid graph; this also stops deep recursion
    node = producers.get(name)
    if name in inits:
        memo[name] = True
    elif node is not None:
        memo[name] = node.op_type == "Constant" or (
            bool([i for i in node.input if i]) and all(_constant(i, inits, producers, memo) for i in node.input if i))
    return memo[name]


def _weight_problem(wname, inits, graph_inputs, producers) -> str | None:
    if wname in graph_inputs:
        if wname in inits:
            return (f"weight {wname!r} is also listed as a graph input, so it can be replaced at run time "
                    "(re-export without keep_initializers_as_inputs to compress it)")
        return f"weight {wname!r} is a graph input (it can change at run time)"
    if wname in inits:
        return None
    if wname in producers:
        return f"weight {wname!r} is computed by a {producers[wname].op_type} node, not a constant"
    return f"weight {wname!r} is not a constant initializer"


def _record(name, node, inits, graph_inputs, producers, uses, only, skip) -> LayerRecord:
    attrs = _attrs(node)
    op = node.op_type
    options: dict = {"op": op, "node_outputs": list(node.output)}
    reason = None
    side = "right"
    if op == "MatMul":
        left, right = node.input[0], node.input[1]
        if left in inits and right not in inits:
            wname, side = left, "left"
        else:
            wname = right
            if left in inits and right in inits:
                reason = "both operands are constants (fold them instead)"
    elif op == "Gemm":
        wname = node.input[1]
        if node.input[0] in inits and wname not in inits:
            reason = "the constant is Gemm's input A; only a constant B is supported"
    else:
        wname = node.input[1]
    options.update({"weight": wname, "side": side, "activation": node.input[0] if side == "right" else node.input[1]})
    reason = reason or _weight_problem(wname, inits, graph_inputs, producers)
    tensor = inits.get(wname)
    if tensor is None:
        return LayerRecord(name, op.lower(), (), (1, 1), False, "unknown", options, reason, node, backend="onnx")
    dims = tuple(int(d) for d in tensor.dims)
    dtype = np.dtype(_NP_OF[tensor.data_type]).name if tensor.data_type in _NP_OF else "unknown"
    kind = "linear"
    if op == "Conv":
        kind = {3: "conv1d", 4: "conv2d"}.get(len(dims), f"conv{len(dims) - 2}d")
        m, n = dims[0], int(np.prod(dims[1:]))
        options.update({k: attrs[k] for k in ("pads", "strides", "dilations", "kernel_shape", "auto_pad") if k in attrs})
        if len(dims) not in (3, 4):
            reason = reason or f"{len(dims) - 2}-D convolution is not supported yet"
        group = attrs.get("group", 1)
        if group != 1 and reason is None:
            reason = (f"depthwise convolution (group = {group} = channels)" if dims[1] == 1
                      else f"grouped convolution (group={group}) is not one matrix")
    elif len(dims) != 2:
        m, n = (dims[-1], int(np.prod(dims[:-1]))) if dims else (1, 1)
        reason = reason or f"batched MatMul: the weight is {len(dims)}-D, not a matrix"
    elif op == "Gemm":
        options.update({"alpha": float(attrs.get("alpha", 1.0)), "beta": float(attrs.get("beta", 1.0)),
                        "transA": int(attrs.get("transA", 0)), "transB": int(attrs.get("transB", 0))})
        m, n = (dims[0], dims[1]) if options["transB"] else (dims[1], dims[0])
    else:
        m, n = (dims[1], dims[0]) if side == "right" else (dims[0], dims[1])
    bias = None
    if op in ("Gemm", "Conv") and len(node.input) > 2 and node.input[2]:
        bias = node.input[2]
    options["bias"] = bias
    has_bias = bias is not None and bias in inits and int(np.prod(inits[bias].dims)) == m
    if reason is None and uses[wname] > 1:
        reason = f"weight initializer {wname!r} is shared by {uses[wname]} nodes"
    if reason is None and tensor.data_type not in _FLOAT_TYPES:
        reason = f"weight dtype {dtype} is not float16/float32/float64"
    if reason is None:
        if only and not any(fnmatch.fnmatchcase(name, p) for p in only):
            reason = f"not matched by --only {' '.join(repr(p) for p in only)}"
        elif skip and any(fnmatch.fnmatchcase(name, p) for p in skip):
            reason = f"excluded by --skip {' '.join(repr(p) for p in skip if fnmatch.fnmatchcase(name, p))}"
        elif max_saving_rank(m, n) < 1:
            reason = f"matrix {m}x{n} has break-even rank {m * n // (m + n)}: no rank would save parameters"
    record = LayerRecord(name, kind, dims, (int(m), int(n)), has_bias, dtype, options, reason, node, backend="onnx")
    record.handle = (node, tensor)
    return record


def weight_matrix(record: LayerRecord) -> np.ndarray:
    """The matrix view (out x in) in float64, alpha folded in for Gemm."""
    from onnx import numpy_helper

    _, tensor = record.handle
    w = numpy_helper.to_array(tensor).astype(np.float64)
    o = record.options
    if o["op"] == "Conv":
        return w.reshape(w.shape[0], -1)
    if o["op"] == "Gemm":
        return o["alpha"] * (w if o["transB"] else w.T)
    return w.T if o["side"] == "right" else w


# ---------------------------------------------------------------- rewriting


class _Names:
    """Fresh names that collide with nothing in the graph."""

    def __init__(self, graph):
        self.taken = {t.name for t in graph.initializer} | {i.name for i in graph.input}
        self.taken |= {o.name for o in graph.output} | {v.name for v in graph.value_info}
        for n in graph.node:
            self.taken |= set(n.input) | set(n.output) | {n.name}

    def __call__(self, base: str) -> str:
        name, i = base, 1
        while name in self.taken:
            i += 1
            name = f"{base}_{i}"
        self.taken.add(name)
        return name


def _pair_nodes(record: LayerRecord, node, a: np.ndarray, x: np.ndarray, dtype, names: _Names, opset: int):
    """(nodes, initializers) replacing ``node``: reduce holds X (k x n), expand holds A (m x k)."""
    from onnx import helper, numpy_helper

    o = record.options
    k = a.shape[1]
    base = record.name.replace("/", "_").strip("_") or record.name
    hidden = names(f"{base}/reduce_output")
    r_w, e_w = names(f"{base}.reduce.weight"), names(f"{base}.expand.weight")
    out = node.output[0]
    inits = []
    if o["op"] == "Conv":
        spatial = record.weight_shape[2:]
        inits.append(numpy_helper.from_array(x.reshape((k, record.weight_shape[1], *spatial)).astype(dtype), r_w))
        inits.append(numpy_helper.from_array(a.reshape((a.shape[0], k) + (1,) * len(spatial)).astype(dtype), e_w))
        keep = {key: o[key] for key in ("pads", "strides", "dilations", "kernel_shape", "auto_pad") if key in o}
        reduce = helper.make_node("Conv", [node.input[0], r_w], [hidden], name=names(f"{base}/reduce"), **keep)
        expand_inputs = [hidden, e_w] + ([o["bias"]] if o["bias"] else [])
        expand = helper.make_node("Conv", expand_inputs, [out], name=names(f"{base}/expand"),
                                  kernel_shape=[1] * len(spatial))
        return [reduce, expand], inits
    if o["op"] == "MatMul" and o["side"] == "left":  # Y = W @ X  ->  A @ (X_f @ X)
        inits.append(numpy_helper.from_array(x.astype(dtype), r_w))
        inits.append(numpy_helper.from_array(a.astype(dtype), e_w))
        reduce = helper.make_node("MatMul", [r_w, node.input[1]], [hidden], name=names(f"{base}/reduce"))
        expand = helper.make_node("MatMul", [e_w, hidden], [out], name=names(f"{base}/expand"))
        return [reduce, expand], inits
    # right-hand weight: Y = X @ W^T (Gemm or MatMul)  ->  (X @ X_f^T) @ A^T
    if o["op"] == "Gemm" and o["transA"]:
        inits.append(numpy_helper.from_array(x.astype(dtype), r_w))  # (k, n), used with transB=1
        extra = []
        if opset < 11:  # C became optional in opset 11
            zeros = names(f"{base}.reduce.zero")
            inits.append(numpy_helper.from_array(np.zeros(k, dtype=dtype), zeros))
            extra = [zeros]
        reduce = helper.make_node("Gemm", [node.input[0], r_w] + extra, [hidden], name=names(f"{base}/reduce"),
                                  transA=1, transB=1)
    else:
        inits.append(numpy_helper.from_array(np.ascontiguousarray(x.T).astype(dtype), r_w))  # (n, k)
        reduce = helper.make_node("MatMul", [node.input[0], r_w], [hidden], name=names(f"{base}/reduce"))
    if o["op"] == "Gemm" and o["bias"]:
        inits.append(numpy_helper.from_array(a.astype(dtype), e_w))  # (m, k), used with transB=1
        expand = helper.make_node("Gemm", [hidden, e_w, o["bias"]], [out], name=names(f"{base}/expand"),
                                  transB=1, beta=o["beta"])
    else:
        inits.append(numpy_helper.from_array(np.ascontiguousarray(a.T).astype(dtype), e_w))  # (k, m)
        expand = helper.make_node("MatMul", [hidden, e_w], [out], name=names(f"{base}/expand"))
    return [reduce, expand], inits


def _opset(proto) -> int:
    return next((o.version for o in proto.opset_import if o.domain in ("", "ai.onnx")), 1)


def rewrite(model: OnnxModel, records, factors: dict[str, tuple[np.ndarray, np.ndarray]], *,
            in_place: bool = False) -> OnnxModel:
    """A copy of ``model`` with each node in ``factors`` replaced by its two factor nodes.

    Graph inputs, outputs and opset are kept; the replaced weights' initializers are removed.
    With ``in_place`` (a working copy whose nodes are already split at these ranks, as in a
    sequential refit) the pairs' initializers are overwritten and ``model`` is returned.
    """
    if in_place:
        return _refill(model, records, factors)
    proto = copy.deepcopy(model.proto)
    pairs = _split_into(proto, records, factors)
    return OnnxModel(proto, None, model.external_data, pairs)


def _split_into(proto, records, factors) -> dict:
    """Replace, in ``proto`` itself, each node in ``factors`` by its two factor nodes; the pairs made."""
    graph = proto.graph
    by_name = {r.name: r for r in records}
    names = _Names(graph)
    opset = _opset(proto)
    node_names = _node_names(graph)
    new_nodes, new_inits, dropped, pairs = [], [], set(), {}
    for name, node in zip(node_names, graph.node):
        if name not in factors:
            new_nodes.append(node)
            continue
        record = by_name[name]
        a, x = factors[name]
        m, n = record.matrix_shape
        if a.shape[0] != m or x.shape[1] != n or a.shape[1] != x.shape[0]:
            raise ValueError(f"layer {name!r}: factors {a.shape} @ {x.shape} do not make its {m}x{n} matrix")
        dtype = _FLOAT_TYPES[record.handle[1].data_type]
        nodes, inits = _pair_nodes(record, node, a, x, dtype, names, opset)
        new_nodes += nodes
        new_inits += inits
        dropped.add(record.options["weight"])
        pairs[name] = (nodes, [t.name for t in inits])
    del graph.node[:]
    graph.node.extend(new_nodes)
    kept = [t for t in graph.initializer if t.name not in dropped]
    del graph.initializer[:]
    graph.initializer.extend(kept + new_inits)
    return pairs


def _refill(model: OnnxModel, records, factors) -> OnnxModel:
    """In place: nodes not split yet are split (the graph is rebuilt into ``model``); pairs
    already split get their initializers overwritten with new factors of the same ranks."""
    new = {n: f for n, f in factors.items() if n not in model.pairs}
    if new:  # split in the working copy itself: no copy of the whole graph per group
        model.pairs.update(_split_into(model.proto, records, new))
        factors = {n: f for n, f in factors.items() if n not in new}
    by_name = {r.name: r for r in records}
    inits = {t.name: t for t in model.graph.initializer}
    opset = _opset(model.proto)
    fresh_names = _Names(model.graph)  # the fresh tensors are renamed to the old ones below
    for name, (a, x) in factors.items():
        if name not in model.pairs:
            raise ValueError(f"layer {name!r} is not split in this working copy")
        record = by_name[name]
        _, names = model.pairs[name]
        dtype = _FLOAT_TYPES[record.handle[1].data_type]
        _, fresh = _pair_nodes(record, record.handle[0], a, x, dtype, fresh_names, opset)
        for old, new in zip(names, fresh):
            if tuple(inits[old].dims) != tuple(new.dims):
                raise ValueError(f"layer {name!r}: new factors {tuple(new.dims)} do not fit {tuple(inits[old].dims)}")
            new.name = old
            inits[old].CopyFrom(new)
    model._sessions.clear()
    return model


def count_params(model: OnnxModel) -> int:
    """Numbers stored in the floating-point initializers."""
    return int(sum(int(np.prod(t.dims)) for t in model.graph.initializer if t.data_type in _FLOAT_TYPES))


def size_bytes(model: OnnxModel) -> int:
    return int(model.proto.ByteSize())


def check(model: OnnxModel) -> None:
    """onnx.checker with full_check (runs shape inference too); raises on an invalid graph."""
    import onnx

    if model.proto.ByteSize() < TWO_GB:
        onnx.checker.check_model(model.proto, full_check=True)


def save(model: OnnxModel, path: str | Path, *, external: bool | None = None) -> None:
    """Write ``model`` to ``path``; weights go to ``<name>.data`` when the input had external data
    or the model is 2 GB or more (protobuf's limit)."""
    import onnx

    path = Path(path)
    if external is None:
        external = model.external_data or model.proto.ByteSize() >= TWO_GB
    proto = copy.deepcopy(model.proto)
    if external:
        onnx.save_model(proto, str(path), save_as_external_data=True, all_tensors_to_one_file=True,
                        location=path.name + ".data", size_threshold=1024)
    else:
        onnx.save_model(proto, str(path))


# ---------------------------------------------------------------- running


def _probed(model: OnnxModel) -> list[str]:
    """Names a probe session exposes besides the graph outputs: the activation input and the
    output of every Gemm, MatMul and Conv node (what calibration and per-layer errors read)."""
    inits = {t.name for t in model.graph.initializer}
    have = {o.name for o in model.graph.output}
    names = []
    for node in model.graph.node:
        if node.op_type in ("Gemm", "MatMul", "Conv"):
            names += [i for i in node.input[:2] if i and i not in inits] + [node.output[0]]
    return [n for n in dict.fromkeys(names) if n not in have]


def _session(model: OnnxModel, threads: int | None = None, *, probe: bool = False):
    """One onnxruntime session per model and purpose, cached on the model: the probe session
    (graph outputs first, then the :func:`_probed` names) for calibration and per-layer errors;
    a plain one for predictions; with ``threads``, a plain one with that many intra-op threads
    for timing."""
    import onnx
    import onnxruntime as ort

    key = "probe" if probe else threads
    if key not in model._sessions:
        proto = model.proto
        extra = _probed(model) if probe else []
        n_out = len(proto.graph.output)
        proto.graph.output.extend(onnx.ValueInfoProto(name=n) for n in extra)  # removed again below
        try:
            options = ort.SessionOptions()
            options.log_severity_level = 3
            if threads is not None:
                options.intra_op_num_threads = threads
                options.inter_op_num_threads = 1
            if proto.ByteSize() < TWO_GB:
                source = proto.SerializeToString()
            else:  # too large for one protobuf: hand onnxruntime a file with external data
                import atexit
                import shutil
                import tempfile

                folder = tempfile.mkdtemp(prefix="factorize-weights-ort-")
                atexit.register(shutil.rmtree, folder, True)  # the session reads it lazily: remove at exit
                source = str(Path(folder) / "model.onnx")
                save(OnnxModel(proto), source, external=True)
        finally:
            del proto.graph.output[n_out:]
        model._sessions[key] = ort.InferenceSession(source, options, providers=["CPUExecutionProvider"])
    return model._sessions[key]


def graph_inputs(model: OnnxModel) -> list:
    """The graph's real inputs (initializers that are also listed as inputs excluded)."""
    inits = {t.name for t in model.graph.initializer}
    return [i for i in model.graph.input if i.name not in inits]


def feed(model: OnnxModel, inputs, *, source: str = "--heldout") -> dict[str, np.ndarray]:
    """Map held-out arrays onto the graph inputs, casting to the declared element types.

    ``inputs`` is one array (for a single-input graph) or a dict keyed by graph input names.
    Names, ranks and fixed dimensions must match; a mismatch is refused naming both.
    """
    specs = graph_inputs(model)
    if not isinstance(inputs, dict):
        if len(specs) != 1:
            raise InputError(
                f"{source}: the graph has {len(specs)} inputs ({', '.join(s.name for s in specs)}); "
                "give one array per input name instead of 'inputs'"
            )
        inputs = {specs[0].name: inputs}
    missing = [s.name for s in specs if s.name not in inputs]
    if missing:
        raise InputError(f"{source}: no array for graph input(s) {', '.join(missing)} (arrays: {', '.join(inputs)})")
    out = {}
    for spec in specs:
        arr = np.asarray(inputs[spec.name])
        ttype = spec.type.tensor_type
        dims = [d.dim_value if d.HasField("dim_value") else None for d in ttype.shape.dim]
        if ttype.HasField("shape") and len(dims) != arr.ndim:
            raise InputError(f"{source}: array {spec.name!r} has shape {arr.shape[1:]} per sample but the graph "
                             f"input takes {len(dims)}-D {tuple(d or '?' for d in dims)}")
        for axis, (want, got) in enumerate(zip(dims, arr.shape)):
            if want is not None and axis > 0 and want != got:
                raise InputError(f"{source}: array {spec.name!r} has shape {arr.shape} but the graph input "
                                 f"takes {tuple(d or '?' for d in dims)} (axis {axis})")
        out[spec.name] = arr.astype(_NP_OF.get(ttype.elem_type, arr.dtype), copy=False)
    return out


def predict(model: OnnxModel, inputs, *, source: str = "--heldout", output: str | None = None) -> np.ndarray:
    """Run the graph on one batch with onnxruntime; the first graph output (or the one named
    ``output``, or at index ``output``) as float64. ``source`` names the data in errors."""
    session = _session(model)
    names = [o.name for o in session.get_outputs()]
    pick = 0
    if output is not None:
        if output in names:
            pick = names.index(output)
        elif output.isdigit() and int(output) < len(names):
            pick = int(output)
        else:
            raise InputError(f"--output {output!r}: the graph has no such output (outputs: {', '.join(names)})")
    result = session.run([names[pick]], feed(model, inputs, source=source))
    return np.asarray(result[0], dtype=np.float64)


def measure_positions(model: OnnxModel, records: list[LayerRecord], sample) -> int:
    """Output positions per sample of each selected node, from one run on one sample. Returns
    the bytes of the selected nodes' inputs and outputs for that sample (an estimate of the
    activation memory one sample needs)."""
    chosen = [r for r in records if r.skip_reason is None]
    inits = {t.name for t in model.graph.initializer}
    outs = [r.options["node_outputs"][0] for r in chosen]
    acts = [r.options["activation"] for r in chosen if r.options["activation"] not in inits]
    names = tuple(dict.fromkeys(outs + acts))
    one = {k: v[:1] for k, v in sample.items()} if isinstance(sample, dict) else sample[:1]
    outputs = _activations(model, one)
    for r in chosen:
        r.positions = int(np.asarray(outputs[r.options["node_outputs"][0]]).size // r.matrix_shape[0])
    return int(sum(np.asarray(outputs[n]).nbytes for n in names if n in outputs))


def normalize(model: OnnxModel) -> OnnxModel:
    """Nothing to convert: in an ONNX graph every projection is already its own MatMul or Gemm."""
    return model


def replacement_errors(model: OnnxModel, records: dict, trials, batches: list, output: str | None = None):
    """Not available for ONNX models (the pipeline refuses ``--allocation output`` for them before
    calling this, and ``auto`` allocates by each layer's own error)."""
    raise NotImplementedError("output-effect probes run on PyTorch models only")


def stream_layer_outputs(original: OnnxModel, factorized: OnnxModel, names: list[str], batches, sink) -> None:
    """For each batch and each node in ``names``: ``sink(name, exact, approx)``, the original
    node's output and its factor pair's output on the same inputs (each pair run alone in a small
    onnxruntime session holding only the pair's two weights)."""
    import onnx
    import onnxruntime as ort
    from onnx import helper

    f_inits = {t.name: t for t in factorized.graph.initializer}
    minis = {}
    for batch in batches:
        values = _activations(original, batch)
        for name in names:
            nodes, _ = factorized.pairs[name]
            if name not in minis:
                needed = [i for n in nodes for i in n.input if i]
                acts = [i for i in dict.fromkeys(needed) if i not in f_inits and i not in {n.output[0] for n in nodes}]
                graph = helper.make_graph(
                    nodes, "pair",
                    [helper.make_tensor_value_info(i, helper.np_dtype_to_tensor_dtype(values[i].dtype), None) for i in acts],
                    [onnx.ValueInfoProto(name=nodes[-1].output[0])],
                    [f_inits[i] for i in dict.fromkeys(needed) if i in f_inits],
                )
                mini = helper.make_model(graph, opset_imports=list(original.proto.opset_import))
                mini.ir_version = original.proto.ir_version
                minis[name] = (ort.InferenceSession(mini.SerializeToString(), providers=["CPUExecutionProvider"]), acts)
            sess, acts = minis[name]
            approx = sess.run(None, {i: values[i] for i in acts})[0]
            sink(name, np.asarray(values[nodes[-1].output[0]]), approx)


@contextlib.contextmanager
def timing(models, threads: int):
    """Nothing to set around a latency measurement: threads are a session option (see :func:`timer`)."""
    yield


def timer(model: OnnxModel, inputs, threads: int):
    """A zero-argument callable running one batch in a session with ``threads`` intra-op threads."""
    session = _session(model, threads)
    fed = feed(model, inputs)
    return lambda: session.run(None, fed)


def quantize_int8(model: OnnxModel) -> OnnxModel:
    """onnxruntime's dynamic int8 weight quantization (weights int8, activations quantized on the
    fly); returns the quantized model loaded back into memory."""
    import logging
    import shutil
    import tempfile

    from onnxruntime.quantization import QuantType, quantize_dynamic

    folder = Path(tempfile.mkdtemp(prefix="factorize-weights-int8-"))
    try:
        save(model, folder / "in.onnx", external=False)
        level = logging.getLogger().level
        logging.getLogger().setLevel(logging.ERROR)  # the quantizer logs advice at WARNING
        try:
            quantize_dynamic(str(folder / "in.onnx"), str(folder / "out.onnx"), weight_type=QuantType.QInt8)
        finally:
            logging.getLogger().setLevel(level)
        return load(folder / "out.onnx")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


# ---------------------------------------------------------------- calibration statistics

UNFOLD_CHUNK_BYTES = 64 * 2**20


def _conv_pads(record: LayerRecord, spatial_in: tuple[int, ...]) -> list[tuple[int, int]]:
    """(begin, end) padding per spatial axis, resolving auto_pad as the ONNX spec defines it."""
    o = record.options
    kernel = record.weight_shape[2:]
    nd = len(kernel)
    strides = list(o.get("strides", [1] * nd))
    dil = list(o.get("dilations", [1] * nd))
    auto = o.get("auto_pad", b"NOTSET")
    auto = auto.decode() if isinstance(auto, bytes) else auto
    if auto in ("SAME_UPPER", "SAME_LOWER"):
        pads = []
        for size, k, s, d in zip(spatial_in, kernel, strides, dil):
            out = -(-size // s)
            total = max((out - 1) * s + (k - 1) * d + 1 - size, 0)
            small = total // 2
            pads.append((small, total - small) if auto == "SAME_UPPER" else (total - small, small))
        return pads
    if auto == "VALID":
        return [(0, 0)] * nd
    p = list(o.get("pads", [0] * (2 * nd)))
    return list(zip(p[:nd], p[nd:]))


def _conv_rows(record: LayerRecord, x: np.ndarray) -> Iterator[np.ndarray]:
    """Unfolded patches (rows, C*prod(kernel)), ordered like ``weight.reshape(M, -1)``, chunked."""
    kernel = record.weight_shape[2:]
    nd = len(kernel)
    o = record.options
    strides = list(o.get("strides", [1] * nd))
    dil = list(o.get("dilations", [1] * nd))
    pads = _conv_pads(record, x.shape[2:])
    n = record.matrix_shape[1]
    per_sample = max(n * 8 * int(np.prod(x.shape[2:])), 1)
    step = max(1, UNFOLD_CHUNK_BYTES // per_sample)
    for start in range(0, x.shape[0], step):
        chunk = np.pad(x[start : start + step].astype(np.float64), [(0, 0), (0, 0)] + pads)
        span = [(k - 1) * d + 1 for k, d in zip(kernel, dil)]
        win = np.lib.stride_tricks.sliding_window_view(chunk, span, axis=tuple(range(2, 2 + nd)))
        # win: (N, C, out..., span...) -> take dilated taps, then stride the output positions
        taps = win[(...,) + tuple(slice(None, None, d) for d in dil)]
        taps = taps[(slice(None), slice(None)) + tuple(slice(None, None, s) for s in strides)]
        # (N, C, out..., k...) -> (N, out..., C, k...) -> (rows, C*prod(k))
        order = [0] + list(range(2, 2 + nd)) + [1] + list(range(2 + nd, 2 + 2 * nd))
        yield np.ascontiguousarray(taps.transpose(order)).reshape(-1, n)


def layer_rows(record: LayerRecord, x: np.ndarray) -> Iterator[np.ndarray]:
    """The node's activation input as rows of the matrix view's input space (float64)."""
    o = record.options
    x = np.asarray(x)
    if o["op"] == "Conv":
        yield from _conv_rows(record, x)
    elif o["op"] == "Gemm":
        yield (x.T if o["transA"] else x).astype(np.float64)
    elif o["side"] == "left":  # W @ X: X (..., in, cols) holds one sample per column
        yield np.swapaxes(x, -1, -2).reshape(-1, x.shape[-2]).astype(np.float64)
    else:
        yield x.reshape(-1, x.shape[-1]).astype(np.float64)


def _activations(model: OnnxModel, batch) -> dict[str, np.ndarray]:
    """Graph inputs, outputs and every probed activation for one batch (one probe session)."""
    session = _session(model, probe=True)
    fed = feed(model, batch)
    values = dict(zip([o.name for o in session.get_outputs()], session.run(None, fed)))
    values.update(fed)
    return values


def _count(batch) -> int:
    return len(next(iter(batch.values()))) if isinstance(batch, dict) else len(batch)


def stream_inputs(model: OnnxModel, records: list[LayerRecord], batches, sink) -> int:
    """Every selected node's activation input (exposed as extra graph outputs of one probe session
    per model), as blocks of rows: ``sink(name, rows)``. Returns the number of samples."""
    samples = 0
    for batch in batches:
        values = _activations(model, batch)
        samples += _count(batch)
        for r in records:
            for rows in layer_rows(r, values[r.options["activation"]]):
                sink(r.name, rows)
    return samples


def stream_paired_inputs(original: OnnxModel, current: OnnxModel, records: list[LayerRecord], batches, sink) -> int:
    """``sink(name, x, x_new)``: each node's activation input in ``original`` and in ``current`` (the
    same graph with nodes already split; activation names are unchanged), as paired row blocks.
    One probe session per model."""
    samples = 0
    for batch in batches:
        before, after = _activations(original, batch), _activations(current, batch)
        samples += _count(batch)
        for r in records:
            act = r.options["activation"]
            for x, y in zip(layer_rows(r, before[act]), layer_rows(r, after[act])):
                sink(r.name, x, y)
    return samples


class PairedRuns:
    """Whole-graph paired passes, group after group (ONNX graphs are not cut into blocks)."""

    def __init__(self, original: OnnxModel, current: OnnxModel, records, batches: list):
        self.original, self.current, self.batches = original, current, batches

    def stream(self, records: list[LayerRecord], sink) -> int:
        return stream_paired_inputs(self.original, self.current, records, self.batches, sink)


def paired_runs(original: OnnxModel, current: OnnxModel, records: list[LayerRecord], batches: list) -> PairedRuns:
    """The runner of a sequential refit's paired passes."""
    return PairedRuns(original, current, records, batches)


def call_stages(model: OnnxModel, records: list[LayerRecord], sample) -> list[list[str]]:
    """ONNX nodes are stored in topological order: that is the forward order. Consecutive nodes
    that read the same activation (none feeds another) share a stage."""
    stages: list[list[str]] = []
    for r in records:
        if stages and stages[-1][-1][1] == r.options["activation"]:
            stages[-1].append((r.name, r.options["activation"]))
        else:
            stages.append([(r.name, r.options["activation"])])
    return [[name for name, _ in stage] for stage in stages]


def read_factors(model: OnnxModel, names: list[str]):
    raise InputError("an ONNX model has no trainable factors to read back")


def save_model(model: OnnxModel, folder: Path) -> list[str]:
    """Write ``folder/model.onnx`` (plus ``model.onnx.data`` for external data); the file names."""
    save(model, Path(folder) / "model.onnx")
    return sorted(p.name for p in Path(folder).iterdir() if p.name.startswith("model.onnx"))
