"""Constant weights wherever a converter put them: ``Constant`` nodes, and constant-only chains in
front of a weight input (Identity, Cast, Transpose, Reshape, Squeeze, Unsqueeze, Flatten,
DequantizeLinear). Each is evaluated once, with the ONNX reference evaluator (``onnx.reference``,
the operator specification's own implementation), and becomes an initializer of the same name, so
discovery, the rewrite and the checker see an ordinary constant weight.

A chain is folded only where that adds no copy of a tensor: a node is folded when every input is a
constant and each large input is read by that node alone (a shared embedding transposed for an
output head stays as it is, and is reported as computed by a node).
"""

from __future__ import annotations

from collections import Counter

import numpy as np

from .layers import _uses
from .model import OnnxModel

#: Ops that only reshape, retype or dequantize a tensor (ONNX Operators.md): folding them changes no value
FOLDABLE = {"Identity", "Cast", "Transpose", "Reshape", "Squeeze", "Unsqueeze", "Flatten", "DequantizeLinear"}
#: Inputs this small (shapes, axes, scales, zero points) may be read by several nodes and still fold
SMALL = 64


def fold_constants(model: OnnxModel) -> tuple[OnnxModel, int]:
    """``model`` with its Constant nodes and constant chains as initializers (a copy), and the number
    of nodes folded; ``model`` itself, and 0, when there is nothing to fold."""
    import copy

    from onnx import numpy_helper

    if not _would_fold(model.graph):  # most graphs: no copy of the model at all
        return model, 0
    proto = copy.deepcopy(model.proto)
    graph = proto.graph
    consts = {t.name: t for t in graph.initializer}
    inputs = {i.name for i in graph.input}
    uses = _uses(graph)
    keep, folded = [], 0
    values: dict[str, np.ndarray] = {}  # folded outputs, as arrays, while the pass runs

    def value(name: str) -> np.ndarray:
        if name not in values:
            values[name] = numpy_helper.to_array(consts[name])
        return values[name]

    outputs = {o.name for o in graph.output}
    opsets = list(proto.opset_import)
    for node in graph.node:  # nodes are in topological order (ONNX IR): a chain folds front to back
        outs = [o for o in node.output if o]
        if len(outs) != 1 or outs[0] in outputs or node.domain not in ("", "ai.onnx"):
            keep.append(node)
            continue
        if node.op_type == "Constant" and not _subgraphs(node):
            result = [_run(node, [], opsets)]
        elif node.op_type in FOLDABLE and _foldable_inputs(node, consts, inputs, uses):
            result = [_run(node, [value(i) if i else None for i in node.input], opsets)]
        else:
            keep.append(node)
            continue
        if result[0] is None:
            keep.append(node)
            continue
        for name, array in zip(outs, result):
            values[name] = array
            consts[name] = numpy_helper.from_array(np.asarray(array), name)
            graph.initializer.append(consts[name])
        folded += 1
    if not folded:
        return model, 0
    del graph.node[:]
    graph.node.extend(keep)
    still = _uses(graph)
    live = [t for t in graph.initializer if still[t.name] or t.name in inputs]
    del graph.initializer[:]
    graph.initializer.extend(live)
    return OnnxModel(proto, model.path, model.external_data), folded


def _would_fold(graph) -> bool:
    """Whether :func:`fold_constants` would fold any node, decided on names alone (no copy, no
    evaluation): a Constant node, or a foldable op whose inputs are all constants read once."""
    consts = {t.name: t for t in graph.initializer}
    inputs = {i.name for i in graph.input}
    uses = _uses(graph)
    for node in graph.node:
        if node.op_type == "Constant" and not _subgraphs(node):
            return True
        if node.op_type in FOLDABLE and _foldable_inputs(node, consts, inputs, uses):
            return True
    return False


def _foldable_inputs(node, consts: dict, inputs: set, uses: Counter) -> bool:
    present = [i for i in node.input if i]
    if not present or any(i not in consts or i in inputs for i in present):
        return False
    return all(uses[i] == 1 or int(np.prod(consts[i].dims)) <= SMALL for i in present)


def _run(node, feeds: list, opsets: list):
    """The node's one output on constant inputs, by the reference evaluator at the model's own opset
    (an op's meaning can change between opsets: Squeeze's axes moved from an attribute to an input);
    None if it cannot be evaluated."""
    from onnx import TensorProto, helper
    from onnx.reference import ReferenceEvaluator

    names = [f"in{i}" if x is not None else "" for i, x in enumerate(feeds)]
    clone = helper.make_node(node.op_type, names, ["out"])
    clone.attribute.extend(node.attribute)
    graph_inputs = [helper.make_tensor_value_info(n, helper.np_dtype_to_tensor_dtype(x.dtype), x.shape)
                    for n, x in zip(names, feeds) if n]
    out_info = helper.make_tensor_value_info("out", TensorProto.UNDEFINED, None)
    tiny = helper.make_model(helper.make_graph([clone], "fold", graph_inputs, [out_info]), opset_imports=opsets)
    try:
        out = ReferenceEvaluator(tiny).run(None, {n: x for n, x in zip(names, feeds) if n})
    except Exception:  # an op version the evaluator lacks (it has DequantizeLinear from opset 19 only)
        return _dequantize(node, feeds) if node.op_type == "DequantizeLinear" else None
    return np.asarray(out[0])


def _dequantize(node, feeds: list) -> np.ndarray | None:
    """DequantizeLinear as the specification writes it, y = (x - zero_point) * scale, per tensor or
    along ``axis`` (default 1) for a 1-D scale (ONNX Operators.md, opsets 10 to 13)."""
    from onnx import helper

    x, scale = feeds[0], feeds[1]
    zero = feeds[2] if len(feeds) > 2 and feeds[2] is not None else np.zeros((), dtype=x.dtype)
    if scale.ndim > 1:
        return None  # block quantization (opset 21): left to the graph
    if scale.ndim == 1:
        axis = next((helper.get_attribute_value(a) for a in node.attribute if a.name == "axis"), 1) % x.ndim
        shape = [1] * x.ndim
        shape[axis] = -1
        scale, zero = scale.reshape(shape), zero.reshape(shape)
    return ((x.astype(np.float32) - zero.astype(np.float32)) * scale).astype(scale.dtype)


def _subgraphs(node) -> bool:
    return any(a.HasField("g") or len(a.graphs) for a in node.attribute)

