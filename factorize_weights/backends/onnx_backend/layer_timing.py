"""Per-layer timing for latency budgets: the input shape each node sees (one run of the probe
session) and callables that run the node, or the two nodes the rewrite would put in its place at
a rank, once in onnxruntime (a one-node session with the run's thread count)."""

from __future__ import annotations

import numpy as np

from ...records import LayerRecord
from .layers import _Names, _opset, _pair_nodes
from .model import _FLOAT_TYPES, OnnxModel
from .running import _session, feed


def input_shapes(model: OnnxModel, records: list[LayerRecord], batch) -> dict[str, list[int]]:
    """The shape of the activation input of each record's node on ``batch``: one run of the probe
    session returning those inputs alone (not every probed activation), of which only the shapes
    are kept."""
    session = _session(model, probe=True)
    fed = feed(model, batch)
    listed = {o.name for o in session.get_outputs()}
    wanted = [a for a in dict.fromkeys(r.options["activation"] for r in records) if a in listed]
    shapes = {a: list(v.shape) for a, v in fed.items()}
    shapes.update({a: list(np.asarray(v).shape) for a, v in zip(wanted, session.run(wanted, fed))} if wanted else {})
    return {r.name: shapes[r.options["activation"]] for r in records if r.options["activation"] in shapes}


def layer_timers(model: OnnxModel, records: list[LayerRecord], batch, threads: int) -> dict:
    """``{name: {"shape", "make", "baseline"}}``: ``make(None)`` runs the node alone, ``make(k)``
    its factor pair of rank k (random factors, the rewrite's own nodes), each in a session holding
    only that node's weights, on a random input of the traced shape; ``baseline`` runs an Identity
    session on the same input (a session run's own overhead, which a node inside the model does
    not pay, is subtracted)."""
    shapes = input_shapes(model, records, batch)
    inits = {t.name: t for t in model.graph.initializer}
    out = {}
    for r in records:
        if r.name in shapes:
            make, baseline = _maker(model, r, shapes[r.name], inits, threads)
            out[r.name] = {"shape": shapes[r.name], "make": make, "baseline": baseline}
    return out


def _maker(model: OnnxModel, record: LayerRecord, shape: list[int], inits: dict, threads: int):
    from onnx import helper, numpy_helper

    node, tensor = record.handle
    dtype = _FLOAT_TYPES[tensor.data_type]
    act = record.options["activation"]
    held: list = []  # the random input, made on first use (not every layer's at once)

    def fed():
        if not held:
            held.append({act: np.random.default_rng(0).standard_normal(shape).astype(dtype)})
        return held[0]

    bias = record.options.get("bias")
    m, n = record.matrix_shape

    def session(nodes, weights, with_bias=True):
        consts = list(weights)
        if with_bias and bias and bias not in {t.name for t in consts}:
            consts.append(inits[bias] if bias in inits else numpy_helper.from_array(np.zeros(m, dtype), bias))
        graph = helper.make_graph(
            nodes, "layer", [helper.make_tensor_value_info(act, tensor.data_type, list(shape))],
            [helper.make_tensor_value_info(nodes[-1].output[0], tensor.data_type, None)], consts)
        mini = helper.make_model(graph, opset_imports=list(model.proto.opset_import))
        mini.ir_version = model.proto.ir_version
        import onnxruntime as ort

        options = ort.SessionOptions()
        options.log_severity_level = 3
        options.intra_op_num_threads = threads
        options.inter_op_num_threads = 1
        return ort.InferenceSession(mini.SerializeToString(), options, providers=["CPUExecutionProvider"])

    def make(rank):
        if rank is None:
            sess = session([node], [tensor])
        else:
            rng = np.random.default_rng(rank)
            a = rng.standard_normal((m, rank)) / np.sqrt(rank)
            xf = rng.standard_normal((rank, n)) / np.sqrt(n)
            graph = helper.make_graph([node], "names", [], [])
            nodes, weights = _pair_nodes(record, node, a, xf, dtype, _Names(graph), _opset(model.proto))
            sess = session(nodes, weights)
        fed()
        return lambda: sess.run(None, held[0])

    identity = session([helper.make_node("Identity", [act], ["identity_output"])], [], with_bias=False)

    def baseline():  # the same call path as the layer's callables, with no work
        return identity.run(None, held[0])

    return make, baseline
