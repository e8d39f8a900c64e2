"""Discovery (Gemm/MatMul/Conv nodes with constant weights), matrix views, and the rewrite of a
node into two; counting, checking and saving the graph."""

from __future__ import annotations

import copy
import fnmatch
from collections import Counter
from pathlib import Path
from typing import Sequence

import numpy as np

from ...records import LayerRecord, max_saving_rank
from .model import _FLOAT_TYPES, _NP_OF, TWO_GB, OnnxModel

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


def weight_dtype(model: OnnxModel) -> str:
    """The floating dtype most of the initializers' numbers are stored in."""
    counts: dict[str, int] = {}
    for t in model.graph.initializer:
        if t.data_type in _FLOAT_TYPES:
            name = np.dtype(_FLOAT_TYPES[t.data_type]).name
            counts[name] = counts.get(name, 0) + int(np.prod(t.dims))
    return max(counts, key=counts.get) if counts else "float32"


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


