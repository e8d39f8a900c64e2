"""ONNX backend against onnxruntime (the reference executor) and the ONNX operator specification
(onnx.ai, Operators.md) for Gemm/MatMul/Conv semantics; onnx.checker (full check) on every result."""

from __future__ import annotations

import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper

from factorize_weights import demo
from factorize_weights.backends import onnx_backend as ob
from factorize_weights.cli import main
from factorize_weights.errors import InputError
from factorize_weights.factors import svd_factors

RNG = np.random.default_rng(0)


def f32(*shape):
    return RNG.standard_normal(shape).astype(np.float32)


def graph_model(nodes, inputs, output, inits, opset=17):
    graph = helper.make_graph(
        nodes, "g",
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, s) for n, s in inputs],
        # every graph here keeps its input's rank; symbolic dims for all of them
        [helper.make_tensor_value_info(output, TensorProto.FLOAT, [f"d{i}" for i in range(len(inputs[0][1]))])],
        [numpy_helper.from_array(v, k) for k, v in inits.items()],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    onnx.checker.check_model(model)
    return ob.OnnxModel(model)


def run(model: ob.OnnxModel, feeds):
    sess = ort.InferenceSession(model.proto.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(None, feeds)[0]


# (id, nodes, inputs, weight name, weight array, other initializers, feed, layout of W in the matrix view)
def cases():
    out = []
    w = f32(24, 40)
    out.append(("gemm-transB1-bias", [helper.make_node("Gemm", ["x", "W", "C"], ["y"], transB=1)],
                [("x", ["N", 40])], "W", w, {"C": f32(24)}, {"x": f32(5, 40)}, "gemm"))
    w = f32(40, 24)
    out.append(("gemm-transB0-alpha-beta-broadcast",
                [helper.make_node("Gemm", ["x", "W", "C"], ["y"], alpha=0.5, beta=2.0)],
                [("x", ["N", 40])], "W", w, {"C": f32(1, 24)}, {"x": f32(5, 40)}, "gemm"))
    w = f32(24, 40)
    out.append(("gemm-transA1", [helper.make_node("Gemm", ["x", "W", "C"], ["y"], transA=1, transB=1, alpha=1.5)],
                [("x", [40, "N"])], "W", w, {"C": f32(24)}, {"x": f32(40, 5)}, "gemm"))
    w = f32(40, 24)
    out.append(("gemm-no-bias", [helper.make_node("Gemm", ["x", "W"], ["y"])],
                [("x", ["N", 40])], "W", w, {}, {"x": f32(5, 40)}, "gemm"))
    w = f32(40, 24)
    out.append(("matmul-right-3d-activation", [helper.make_node("MatMul", ["x", "W"], ["y"])],
                [("x", ["B", "T", 40])], "W", w, {}, {"x": f32(2, 7, 40)}, "right"))
    w = f32(24, 40)
    out.append(("matmul-weight-on-left", [helper.make_node("MatMul", ["W", "x"], ["y"])],
                [("x", ["B", 40, 9])], "W", w, {}, {"x": f32(2, 40, 9)}, "left"))
    w = f32(16, 6, 3, 3)
    out.append(("conv2d-pads-strides-dilations",
                [helper.make_node("Conv", ["x", "W", "B"], ["y"], pads=[1, 2, 2, 1], strides=[2, 1], dilations=[1, 2])],
                [("x", ["N", 6, 11, 10])], "W", w, {"B": f32(16)}, {"x": f32(2, 6, 11, 10)}, "conv"))
    w = f32(16, 6, 3, 3)
    out.append(("conv2d-auto-pad-same", [helper.make_node("Conv", ["x", "W"], ["y"], auto_pad="SAME_UPPER", strides=[2, 2])],
                [("x", ["N", 6, 9, 9])], "W", w, {}, {"x": f32(2, 6, 9, 9)}, "conv"))
    w = f32(20, 8, 5)
    out.append(("conv1d", [helper.make_node("Conv", ["x", "W", "B"], ["y"], pads=[2, 2], strides=[2])],
                [("x", ["N", 8, 30])], "W", w, {"B": f32(20)}, {"x": f32(3, 8, 30)}, "conv"))
    return out


CASES = cases()


def _from_matrix(matrix, weight, layout, node):
    """The weight tensor whose matrix view is ``matrix`` (inverse of the spec's semantics)."""
    if layout == "conv":
        return matrix.reshape(weight.shape)
    if layout == "gemm":
        attrs = {a.name: helper.get_attribute_value(a) for a in node.attribute}
        m = matrix / attrs.get("alpha", 1.0)
        return m if attrs.get("transB", 0) else m.T
    return matrix.T if layout == "right" else matrix


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_rewrite_full_rank_equals_original_and_rank_k_equals_numpy(case):
    _, nodes, inputs, wname, w, others, feeds, layout = case
    model = graph_model(nodes, inputs, "y", {wname: w, **others})
    rec = ob.discover(model)[0]
    assert rec.skip_reason is None, rec.skip_reason
    matrix = ob.weight_matrix(rec)
    expected = run(model, feeds)
    for k in (min(matrix.shape), 3):
        new = ob.rewrite(model, [rec], {rec.name: svd_factors(matrix, k)})
        onnx.checker.check_model(new.proto, full_check=True)
        onnx.shape_inference.infer_shapes(new.proto, strict_mode=True)
        assert [i.name for i in new.graph.input] == [i.name for i in model.graph.input]
        assert [o.name for o in new.graph.output] == ["y"] and new.proto.opset_import == model.proto.opset_import
        assert wname not in {t.name for t in new.graph.initializer}  # the dense weight is gone
        assert len(new.graph.node) == 2 and len({n.name for n in new.graph.node}) == 2
        got = run(new, feeds)
        if k == min(matrix.shape):
            reference = expected
        else:
            u, s, vt = np.linalg.svd(matrix, full_matrices=False)  # numpy's rank-k reconstruction
            w_k = _from_matrix((u[:, :k] * s[:k]) @ vt[:k], w, layout, nodes[0]).astype(np.float32)
            reference = run(graph_model(nodes, inputs, "y", {wname: w_k, **others}), feeds)
        # float32 kernels, different summation order: tolerance relative to the output scale
        np.testing.assert_allclose(got, reference, rtol=1e-4, atol=1e-4 * np.abs(reference).max())


def test_unsplittable_nodes_are_listed_with_reasons():
    x = [("x", ["N", 8, 6, 6])]
    nodes = [
        helper.make_node("Conv", ["x", "Wg"], ["g"], group=2, name="grouped"),
        helper.make_node("Conv", ["g", "Wd"], ["d"], group=8, name="depthwise"),
        helper.make_node("Flatten", ["d"], ["f"]),
        helper.make_node("MatMul", ["f", "S"], ["s1"], name="shared_a"),
        helper.make_node("MatMul", ["f", "S"], ["s2"], name="shared_b"),
        helper.make_node("Add", ["s1", "s2"], ["s"]),
        helper.make_node("Transpose", ["T0"], ["Tt"], perm=[1, 0]),
        helper.make_node("MatMul", ["s", "Tt"], ["t"], name="computed"),
        helper.make_node("MatMul", ["t", "winput"], ["u"], name="from_input"),
        helper.make_node("Unsqueeze", ["u", "ax"], ["u3"]),
        helper.make_node("MatMul", ["u3", "W3"], ["y"], name="batched"),
    ]
    model = graph_model(nodes, x + [("winput", [32, 32])], "y",
                        {"Wg": f32(8, 4, 3, 3), "Wd": f32(8, 1, 3, 3), "S": f32(128, 32), "T0": f32(32, 32),
                         "ax": np.array([0], np.int64), "W3": f32(2, 32, 32)})
    reasons = {r.name: r.skip_reason for r in ob.discover(model)}
    assert "grouped convolution (group=2)" in reasons["grouped"]
    assert "depthwise" in reasons["depthwise"]
    assert "shared by 2 nodes" in reasons["shared_a"] and "shared by 2 nodes" in reasons["shared_b"]
    assert "computed by a Transpose node" in reasons["computed"]
    assert "is a graph input" in reasons["from_input"]
    assert "batched MatMul: the weight is 3-D" in reasons["batched"]


def test_demo_onnx_end_to_end_checked_independently(tmp_path, capsys):
    # Done means: compress demo.onnx --budget params=0.3 --heldout held.npz --out DIR with no
    # Python model code; DIR's model, run independently in onnxruntime, keeps top-1 within 1 point
    out = tmp_path / "run"
    code = main(["compress", str(demo.ONNX), "--budget", "params=0.3", "--heldout", str(demo.HELDOUT),
                 "--out", str(out), "-q"])
    assert code == 0, capsys.readouterr().err
    report = json.loads((out / "report.json").read_text())
    data = np.load(demo.HELDOUT)
    acc = {}
    for name, path in (("before", demo.ONNX), ("after", out / "model.onnx")):
        onnx.checker.check_model(onnx.load(str(path)), full_check=True)
        sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
        acc[name] = 100 * np.mean(sess.run(None, {"image": data["inputs"]})[0].argmax(1) == data["labels"])
    assert acc["before"] > 95 and acc["after"] >= acc["before"] - 1.0
    assert report["metric"]["after"] == pytest.approx(acc["after"])
    assert report["totals"]["params_after"] <= 0.3 * report["totals"]["params_before"]
    lat = report["latency"]
    assert lat["runtime"] == "onnxruntime" and lat["batch"] == 1 and lat["threads"] == 1
    assert lat["before_ms"] > 0 and lat["after_ms"] > 0 and 0 < lat["flop_ratio"] < 1


def test_external_data_round_trip(tmp_path, capsys):
    w = f32(64, 96)
    model = graph_model([helper.make_node("Gemm", ["x", "W", "C"], ["y"], transB=1)], [("x", ["N", 96])], "y",
                        {"W": w, "C": f32(64)})
    src = tmp_path / "ext.onnx"
    onnx.save_model(model.proto, str(src), save_as_external_data=True, location="ext.onnx.data", size_threshold=0)
    x = f32(10, 96)
    np.savez(tmp_path / "held.npz", inputs=x)
    code = main(["compress", str(src), "--budget", "params=0.5", "--heldout", str(tmp_path / "held.npz"),
                 "--out", str(tmp_path / "out"), "-q", "--latency-repeats", "0"])
    assert code == 0, capsys.readouterr().err
    assert (tmp_path / "out" / "model.onnx.data").is_file()
    loaded = ob.load(tmp_path / "out" / "model.onnx")
    assert loaded.external_data
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert report["latency"] is None and report["metric"]["name"] == "cosine" and report["metric"]["after"] > 0.5
    (tmp_path / "ext.onnx.data").unlink()
    code = main(["inspect", str(src), "-q"])
    err = capsys.readouterr().err
    assert code == 2 and "external-data file 'ext.onnx.data' for tensor 'W' is missing" in err


def _bad(tmp_path, kind):
    if kind == "truncated":
        (tmp_path / "m.onnx").write_bytes(demo.ONNX.read_bytes()[:5000])
        return ["compress", str(tmp_path / "m.onnx"), "--budget", "params=0.5"], "not an ONNX model"
    if kind == "not onnx":
        (tmp_path / "m.onnx").write_text("hello, I am a text file\n")
        return ["compress", str(tmp_path / "m.onnx"), "--budget", "params=0.5"], "not an ONNX model"
    if kind == "nothing to split":
        m = graph_model([helper.make_node("Relu", ["x"], ["y"])], [("x", ["N", 4])], "y", {})
        onnx.save_model(m.proto, str(tmp_path / "m.onnx"))
        return ["compress", str(tmp_path / "m.onnx"), "--budget", "params=0.5"], "nothing to factorize"
    two = graph_model([helper.make_node("Gemm", ["a", "W"], ["h"], transB=1), helper.make_node("Add", ["h", "b"], ["y"])],
                      [("a", ["N", 32]), ("b", ["N", 32])], "y", {"W": f32(32, 32)})
    onnx.save_model(two.proto, str(tmp_path / "m.onnx"))
    if kind == "wrong names":
        np.savez(tmp_path / "h.npz", a=f32(4, 32), c=f32(4, 32))
        return ["compress", str(tmp_path / "m.onnx"), "--budget", "params=0.5", "--heldout", str(tmp_path / "h.npz")], \
            "no array for graph input(s) b (arrays: a, c)"
    if kind == "wrong shape":
        np.savez(tmp_path / "h.npz", a=f32(4, 32), b=f32(4, 31))
        return ["compress", str(tmp_path / "m.onnx"), "--budget", "params=0.5", "--heldout", str(tmp_path / "h.npz")], \
            "array 'b' has shape (4, 31) but the graph input takes ('?', 32)"
    if kind == "single array for two inputs":
        np.savez(tmp_path / "h.npz", inputs=f32(4, 32))
        return ["compress", str(tmp_path / "m.onnx"), "--budget", "params=0.5", "--heldout", str(tmp_path / "h.npz")], \
            "the graph has 2 inputs (a, b)"
    if kind == "weights with onnx":
        return ["compress", str(tmp_path / "m.onnx"), "--weights", "w.pt", "--budget", "params=0.5"], \
            "--weights is for PyTorch factories"
    raise AssertionError(kind)


@pytest.mark.parametrize("kind", ["truncated", "not onnx", "nothing to split", "wrong names", "wrong shape",
                                  "single array for two inputs", "weights with onnx"])
def test_bad_onnx_input_gets_one_line_and_exit_2(tmp_path, capsys, kind):
    argv, message = _bad(tmp_path, kind)
    code = main(argv + ["--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2 and message in err, err
    assert len(err.strip().splitlines()) == 1 and not (tmp_path / "out").exists()


def test_multi_input_graph_with_named_arrays(tmp_path, capsys):
    argv, _ = _bad(tmp_path, "wrong names")
    np.savez(tmp_path / "h.npz", a=f32(6, 32), b=f32(6, 32))
    code = main(argv[:-1] + [str(tmp_path / "h.npz"), "--json", "-q", "--latency-repeats", "3"])
    out, err = capsys.readouterr()
    assert code == 0, err
    report = json.loads(out)
    assert report["heldout"]["samples"] == 6 and report["latency"]["repeats"] == 3


def test_loader_refuses_a_missing_file():
    with pytest.raises(InputError, match="file does not exist"):
        ob.load("/nonexistent/model.onnx")


def test_export_onnx_matches_torch_in_onnxruntime(tmp_path, capsys):
    import torch

    from factorize_weights import build_model, load_factorized

    out = tmp_path / "run"
    code = main(["compress", "--demo", "--budget", "params=0.3", "--export-onnx", "--out", str(out), "-q",
                 "--latency-repeats", "2"])
    assert code == 0, capsys.readouterr().err
    report = json.loads((out / "report.json").read_text())
    assert report["export"]["max_abs_diff"] <= report["export"]["tolerance"]
    assert report["latency"]["runtime"] == "torch"
    # independently: onnxruntime on the exported file against torch on the rebuilt model
    x = np.load(demo.HELDOUT)["inputs"][:100]
    small = load_factorized(build_model(demo.MODEL_SPEC, demo.WEIGHTS), out)
    with torch.no_grad():
        expected = small(torch.from_numpy(x)).numpy()
    sess = ort.InferenceSession(str(out / "model.onnx"), providers=["CPUExecutionProvider"])
    got = sess.run(None, {sess.get_inputs()[0].name: x})[0]
    np.testing.assert_allclose(got, expected, rtol=1e-4, atol=1e-4 * np.abs(expected).max())


def test_int8_compares_four_variants(tmp_path, capsys):
    out = tmp_path / "run"
    code = main(["compress", "--demo", "onnx", "--budget", "params=0.3", "--int8", "--out", str(out), "-q",
                 "--latency-repeats", "3"])
    assert code == 0, capsys.readouterr().err
    q = json.loads((out / "report.json").read_text())["int8"]
    v = {row["name"]: row for row in q["variants"]}
    assert list(v) == ["original", "factorized", "int8", "factorized+int8"]
    # int8 stores a byte per weight instead of four (float32): about a quarter of the size
    assert v["factorized+int8"]["size_bytes"] < v["factorized"]["size_bytes"] < v["original"]["size_bytes"]
    assert v["int8"]["size_bytes"] < 0.35 * v["original"]["size_bytes"]
    assert v["original"]["delta"] == 0.0 and all(row["latency_ms"] > 0 for row in v.values())
    onnx.checker.check_model(onnx.load(str(out / "model.int8.onnx")), full_check=True)
    assert v["factorized+int8"]["metric"] >= v["original"]["metric"] - 2.0


def test_int8_on_a_torch_model_needs_export(tmp_path, capsys):
    code = main(["compress", "--demo", "--budget", "params=0.3", "--int8", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2 and "--int8 quantizes ONNX models" in err and not (tmp_path / "o").exists()


def test_products_of_two_activations_are_not_listed():
    # attention scores Q K^T: neither operand is a weight, so the node is no layer at all
    from onnx import TensorProto, helper, numpy_helper

    w = numpy_helper.from_array(np.ones((4, 4), np.float32), "W")
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["x", "W"], ["q"], name="proj"),
         helper.make_node("Transpose", ["q"], ["qt"], perm=[1, 0]),
         helper.make_node("MatMul", ["q", "qt"], ["scores"], name="scores")],
        "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [3, 4])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, [3, 3])], [w])
    model = ob.OnnxModel(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]))
    assert [r.name for r in ob.discover(model)] == ["proj"]
