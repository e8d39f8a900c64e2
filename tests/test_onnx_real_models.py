"""ONNX models as they come: weights in Constant nodes and constant-only chains (Cast, Transpose,
Reshape, Squeeze/Unsqueeze, DequantizeLinear) in front of a weight, as converters write them; and
output-effect probes on ONNX models (a rank-k weight fed in place of the stored one).

Oracle: onnxruntime running the original graph (the chains' meaning is the ONNX operator
specification's, which onnxruntime implements), and onnx.checker for validity."""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper

from factorize_weights.backends import onnx_backend as ob
from factorize_weights.cli import main

RNG = np.random.default_rng(7)


def _const(name: str, array: np.ndarray):
    return helper.make_node("Constant", [], [name], value=numpy_helper.from_array(array, name + "_value"))


def converter_style(tmp_path, opset: int = 17):
    """x (N, 8) -> MatMul(W1: Constant) -> Add(b: Constant) -> Relu -> MatMul(DequantizeLinear(int8
    Constant)) -> Relu -> Gemm(transB=1, B = Transpose(Cast(float64 Constant))) -> MatMul(Reshape(flat
    Constant, Constant shape)) -> MatMul(Unsqueeze/Squeeze of a Constant) -> y (N, 5)."""
    w1 = RNG.standard_normal((8, 16)).astype(np.float32)
    b1 = RNG.standard_normal(16).astype(np.float32)
    q2 = RNG.integers(-100, 100, (16, 12)).astype(np.int8)
    s2, z2 = np.float32(0.02), np.int8(3)
    w3 = RNG.standard_normal((12, 10)).astype(np.float64)  # Transpose -> (10, 12), Gemm transB=1
    w4 = RNG.standard_normal(10 * 6).astype(np.float32)
    w5 = RNG.standard_normal((6, 5)).astype(np.float32)
    axes = np.array([0], dtype=np.int64)
    nodes = [
        _const("w1", w1), _const("b1", b1),
        helper.make_node("MatMul", ["x", "w1"], ["h1"]), helper.make_node("Add", ["h1", "b1"], ["h1b"]),
        helper.make_node("Relu", ["h1b"], ["a1"]),
        _const("q2", q2), _const("s2", np.array(s2)), _const("z2", np.array(z2)),
        helper.make_node("DequantizeLinear", ["q2", "s2", "z2"], ["w2"]),
        helper.make_node("MatMul", ["a1", "w2"], ["h2"]), helper.make_node("Relu", ["h2"], ["a2"]),
        _const("w3d", w3), helper.make_node("Cast", ["w3d"], ["w3f"], to=TensorProto.FLOAT),
        helper.make_node("Transpose", ["w3f"], ["w3t"], perm=[1, 0]),
        helper.make_node("Gemm", ["a2", "w3t"], ["h3"], transB=1),
        _const("w4flat", w4), _const("w4shape", np.array([10, 6], dtype=np.int64)),
        helper.make_node("Reshape", ["w4flat", "w4shape"], ["w4"]),
        helper.make_node("MatMul", ["h3", "w4"], ["h4"]),
        _const("w5", w5), _const("axes", axes),
        helper.make_node("Unsqueeze", ["w5", "axes"], ["w5u"]), helper.make_node("Squeeze", ["w5u", "axes"], ["w5s"]),
        helper.make_node("MatMul", ["h4", "w5s"], ["y"]),
    ]
    graph = helper.make_graph(nodes, "converted", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 8])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 5])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    onnx.checker.check_model(model, full_check=True)
    path = tmp_path / "converted.onnx"
    onnx.save(model, str(path))
    return path


def _run(path_or_proto, x):
    source = path_or_proto if isinstance(path_or_proto, str) else path_or_proto.SerializeToString()
    return ort.InferenceSession(source, providers=["CPUExecutionProvider"]).run(None, {"x": x})[0]


def test_constant_weights_are_found_and_fold_to_the_same_outputs(tmp_path):
    path = converter_style(tmp_path)
    model = ob.load(path)
    assert ob.count_params(model) == 0  # every weight sits in a node: no initializer at all
    folded = ob.normalize(model)
    records = ob.discover(folded)
    assert [r.skip_reason for r in records] == [None] * 5
    assert [r.matrix_shape for r in records] == [(16, 8), (12, 16), (10, 12), (6, 10), (5, 6)]
    x = RNG.standard_normal((7, 8)).astype(np.float32)
    np.testing.assert_allclose(_run(folded.proto, x), _run(str(path), x), rtol=1e-6, atol=1e-6)
    onnx.checker.check_model(folded.proto, full_check=True)
    # the dequantized weight is (q - z) * s (ONNX Operators.md, DequantizeLinear), from the folded initializer
    w2 = next(numpy_helper.to_array(t) for t in folded.graph.initializer if t.name == "w2")
    q2 = numpy_helper.to_array(next(n for n in model.graph.node if n.output[0] == "q2").attribute[0].t)
    np.testing.assert_allclose(w2, (q2.astype(np.float32) - 3) * np.float32(0.02), rtol=1e-6)


def test_full_rank_rewrite_of_folded_weights_keeps_the_outputs(tmp_path):
    # Eckart-Young at full rank: U S V^T = W, so the rewritten graph computes the original function
    path = converter_style(tmp_path)
    folded = ob.normalize(ob.load(path))
    records = ob.discover(folded)
    factors = {}
    for r in records:
        u, s, vt = np.linalg.svd(ob.weight_matrix(r), full_matrices=False)
        factors[r.name] = (u * s, vt)
    rewritten = ob.rewrite(folded, records, factors)
    ob.check(rewritten)
    x = RNG.standard_normal((5, 8)).astype(np.float32)
    np.testing.assert_allclose(_run(rewritten.proto, x), _run(str(path), x), rtol=1e-4, atol=1e-5)


def test_an_old_opset_squeeze_with_axes_as_attribute_folds_by_its_own_opset(tmp_path):
    # Squeeze/Unsqueeze took axes as an attribute before opset 13 (ONNX Operators.md changelog)
    w = RNG.standard_normal((12, 10)).astype(np.float32)
    nodes = [_const("w", w), helper.make_node("Unsqueeze", ["w"], ["wu"], axes=[0]),
             helper.make_node("Squeeze", ["wu"], ["ws"], axes=[0]), helper.make_node("MatMul", ["x", "ws"], ["y"])]
    graph = helper.make_graph(nodes, "old", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 12])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 10])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 11)])
    model.ir_version = 6
    onnx.save(model, str(tmp_path / "old.onnx"))
    folded = ob.normalize(ob.load(tmp_path / "old.onnx"))
    (record,) = ob.discover(folded)
    assert record.skip_reason is None
    np.testing.assert_allclose(ob.weight_matrix(record), w.T.astype(np.float64), rtol=1e-7)


def test_a_shared_constant_is_not_copied_to_fold_a_chain(tmp_path):
    # an embedding table read by a Gather and, transposed, by the output MatMul (tied weights):
    # folding the Transpose would add a second copy, so it stays and the layer is skipped by name
    e = RNG.standard_normal((20, 6)).astype(np.float32)
    nodes = [helper.make_node("Gather", ["E", "ids"], ["h"]),
             helper.make_node("Transpose", ["E"], ["Et"], perm=[1, 0]),
             helper.make_node("MatMul", ["h", "Et"], ["y"])]
    graph = helper.make_graph(nodes, "tied", [helper.make_tensor_value_info("ids", TensorProto.INT64, ["N"])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 20])],
                              initializer=[numpy_helper.from_array(e, "E")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.save(model, str(tmp_path / "tied.onnx"))
    folded = ob.normalize(ob.load(tmp_path / "tied.onnx"))
    assert ob.count_params(folded) == e.size
    (record,) = ob.discover(folded)
    assert "computed by a Transpose node" in record.skip_reason


def test_compress_a_converter_style_model_with_no_manual_step(tmp_path, capsys):
    path = converter_style(tmp_path)
    x = RNG.standard_normal((64, 8)).astype(np.float32)
    np.savez(tmp_path / "held.npz", inputs=x)
    code = main(["compress", str(path), "--budget", "params=0.8", "--heldout", str(tmp_path / "held.npz"),
                 "--out", str(tmp_path / "out"), "-q", "--latency-repeats", "0", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    import json

    report = json.loads(out)
    assert report["totals"]["layers_selected"] == 5 and report["totals"]["layers_factorized"] >= 1
    onnx.checker.check_model(str(tmp_path / "out" / "model.onnx"), full_check=True)


@pytest.mark.parametrize("opset", [13, 17])
def test_inspect_counts_the_folded_parameters(tmp_path, capsys, opset):
    path = converter_style(tmp_path, opset)
    code = main(["inspect", str(path), "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    import json

    report = json.loads(out)
    assert report["model_params"] == 8 * 16 + 16 + 16 * 12 + 12 * 10 + 60 + 30


def test_an_onnx_output_probe_equals_a_direct_rewrite_and_run(tmp_path):
    # the probe feeds A @ X in place of the stored weight; the oracle rewrites that one layer into
    # its two factor nodes and runs both graphs in onnxruntime on the same inputs
    from factorize_weights import demo

    model = ob.normalize(ob.load(demo.ONNX))
    records = [r for r in ob.discover(model) if r.skip_reason is None]
    x = np.load(demo.HELDOUT)["inputs"][:32]
    session = ort.InferenceSession(model.proto.SerializeToString(), providers=["CPUExecutionProvider"])
    reference = session.run(None, {"image": x})[0].astype(np.float64)
    for record in records[2:5]:
        u, s, vt = np.linalg.svd(ob.weight_matrix(record), full_matrices=False)
        k = max(1, len(s) // 8)
        a, f = u[:, :k] * s[:k], vt[:k]
        (err, energy), = ob.replacement_errors(model, {record.name: record}, [(record.name, a, f)], [x])
        split = ob.rewrite(model, records, {record.name: (a, f)})
        direct = ort.InferenceSession(split.proto.SerializeToString(),
                                      providers=["CPUExecutionProvider"]).run(None, {"image": x})[0]
        want = float(np.sum((direct.astype(np.float64) - reference) ** 2))
        assert energy == pytest.approx(float(np.sum(reference ** 2)), rel=1e-6)
        assert err == pytest.approx(want, rel=1e-3)  # float32 kernels: one product against two factors


def test_a_calibrated_onnx_plan_allocates_by_output_effect(tmp_path, capsys):
    from factorize_weights import demo

    code = main(["compress", "--demo", "onnx", "--budget", "params=0.3", "--calibration", str(demo.CALIBRATION),
                 "-q", "--latency-repeats", "0", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    import json

    report = json.loads(out)
    assert report["allocation"]["by"] == "output" and report["allocation"]["probe_passes"] > 0
