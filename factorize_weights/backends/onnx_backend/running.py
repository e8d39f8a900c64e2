"""Running with onnxruntime: sessions, feeds (one array or named arrays), predictions, timing,
dynamic int8 quantization."""

from __future__ import annotations

import contextlib
from pathlib import Path

import numpy as np

from ...errors import InputError
from ...records import LayerRecord
from .layers import save
from .model import _NP_OF, TWO_GB, OnnxModel, load

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
    """Weights as initializers wherever they are constant: ``Constant`` nodes and constant-only
    chains in front of them folded (folding.py), in a copy; in an ONNX graph every projection is
    already its own MatMul or Gemm."""
    from .folding import fold_constants

    return fold_constants(model)[0]


def replacement_errors(model: OnnxModel, records: dict, trials, batches: list, output: str | None = None):
    """For each ``(name, A, X)`` in ``trials``: the squared error of the model's output with layer
    ``name``'s weight alone replaced by the rank-k product A @ X (in the weight's own layout and
    dtype), everything else exact, and the squared norm of the original output, over ``batches``.

    No graph surgery per probe: one probe session lists every candidate weight as a graph input
    as well as an initializer, so a run uses the stored weight unless a feed overrides it (ONNX
    IR: an initializer that is also an input is its default value), and each trial feeds one."""
    session = _override_session(model, [r.options["weight"] for r in records.values()])
    names = [o.name for o in session.get_outputs()]
    pick = names.index(output) if output in names else (int(output) if output and output.isdigit() else 0)
    feeds = [feed(model, b, source="--calibration") for b in batches]
    reference = [np.asarray(session.run([names[pick]], f)[0], dtype=np.float64) for f in feeds]
    energy = float(sum(float(np.sum(r * r)) for r in reference))
    for name, a, x in trials:
        record = records[name]
        weight = {record.options["weight"]: _weight_layout(record, a @ x)}
        err = 0.0
        for f, ref in zip(feeds, reference):
            diff = np.asarray(session.run([names[pick]], {**f, **weight})[0], dtype=np.float64) - ref
            err += float(np.sum(diff * diff))
        yield err, energy


def _weight_layout(record: LayerRecord, matrix: np.ndarray) -> np.ndarray:
    """A matrix view (out x in) back in the weight tensor's layout and dtype: the inverse of
    ``layers.weight_matrix`` (Conv reshaped to its kernel; Gemm's alpha and transB undone; MatMul
    transposed for a right-hand weight)."""
    from onnx import numpy_helper

    _, tensor = record.handle
    dtype = numpy_helper.to_array(tensor).dtype
    o = record.options
    if o["op"] == "Conv":
        w = matrix.reshape(tuple(int(d) for d in tensor.dims))
    elif o["op"] == "Gemm":
        w = matrix / o["alpha"] if o["transB"] else (matrix / o["alpha"]).T
    else:
        w = matrix.T if o["side"] == "right" else matrix
    return np.ascontiguousarray(w, dtype=dtype)


def _override_session(model: OnnxModel, weights: list[str]):
    """A session in which each named initializer is also a graph input (cached per set of names)."""
    import onnx
    import onnxruntime as ort

    key = ("override", tuple(sorted(weights)))
    if key not in model._sessions:
        proto = model.proto
        inits = {t.name: t for t in proto.graph.initializer}
        listed = {i.name for i in proto.graph.input}
        n_in = len(proto.graph.input)
        for name in weights:
            if name in inits and name not in listed:
                t = inits[name]
                proto.graph.input.append(onnx.helper.make_tensor_value_info(name, t.data_type, list(t.dims)))
        try:
            if proto.ByteSize() >= TWO_GB:
                raise InputError("--allocation output: the ONNX model is 2 GB or more; probe it with "
                                 "--allocation energy-product or error-sum")
            options = ort.SessionOptions()
            options.log_severity_level = 3
            source = proto.SerializeToString()
        finally:
            del proto.graph.input[n_in:]
        model._sessions[key] = ort.InferenceSession(source, options, providers=["CPUExecutionProvider"])
    return model._sessions[key]


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

def _activations(model: OnnxModel, batch) -> dict[str, np.ndarray]:
    """Graph inputs, outputs and every probed activation for one batch (one probe session)."""
    session = _session(model, probe=True)
    fed = feed(model, batch)
    values = dict(zip([o.name for o in session.get_outputs()], session.run(None, fed)))
    values.update(fed)
    return values
