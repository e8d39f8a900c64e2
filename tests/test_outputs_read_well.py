"""What a new user reads: one number formatter (MB, ms, points, "dense" / "—"), the same aligned
table for every command, the int8 table first, a "what next" block whose Python line really
rebuilds the result, and results slower than the original flagged.

Sources: the size units are the SI megabyte (10^6 bytes, IEC 80000-13); everything else here is
the project's own output contract checked against the files the run wrote (common practice: a
report states sizes in one unit and a layer that was not approximated has no approximation error).
"""

from __future__ import annotations

import json

import numpy as np
import torch

from conftest import run_cli
from factorize_weights import formatting, report as report_mod, terminal
from factorize_weights.cli import main


def test_one_formatter_for_sizes_times_and_drops():
    assert formatting.fmt_mb(1_956_904) == "1.96 MB" and formatting.fmt_mb(587_048) == "0.59 MB"
    assert formatting.fmt_mb(89_000_000) == "89.0 MB" and formatting.fmt_mb(436_000_000) == "436 MB"
    assert formatting.fmt_ms(0.42505) == "0.425 ms" and formatting.fmt_ms(12.34) == "12.3 ms"
    # a drop in percentage points reads the same wherever it is said (it was "0.9259 points" in one
    # place and "10 points" in another)
    assert formatting.fmt_points("top1", 0.9259) == "0.93 points" and formatting.fmt_points("top1", 10) == "10.00 points"
    assert formatting.fmt_change("top1", 99.26, 98.33, True) == "drop 0.93 points"
    assert formatting.fmt_points("cosine", 0.012345) == "0.01235"
    assert formatting.fmt_error(0.0, None) == "—" and formatting.fmt_error(0.3384, 71) == "0.3384"


def test_dense_layers_show_dense_not_zero_and_sizes_are_in_mb(tmp_path, capsys):
    out = tmp_path / "r"
    code, stdout, _ = run_cli(capsys, "compress", "--demo", "--budget", "params=0.3", "--out", out, "--force",
                              "--latency-repeats", "0")
    assert code == 0
    rep = json.loads((out / "report.json").read_text())
    dense = [e["name"] for e in rep["layers"] if e["rank"] is None]
    assert dense, "the demo at params=0.3 leaves its first convolutions dense"
    for name in dense:
        row = next(line for line in stdout.splitlines() if line.split()[:1] == [name])
        cells = row.split()
        assert cells[3] == "dense" and cells[-3:] == ["—", "—", "—"], row  # energy kept, weight and output error
        md = next(line for line in (out / "report.md").read_text().splitlines() if line.startswith(f"| `{name}` |"))
        assert "0.0000" not in md and md.count("—") == 3, md
    size = (out / "model.safetensors").stat().st_size
    assert rep["files"] == {"model.safetensors": size}
    assert f"model.safetensors {formatting.fmt_mb(size)}" in stdout
    assert f"model.safetensors {formatting.fmt_mb(size)}" in (out / "report.md").read_text()
    assert " MiB" not in (out / "report.md").read_text()


def test_the_what_next_python_line_rebuilds_the_saved_result(tmp_path, capsys):
    out = tmp_path / "r"
    code, stdout, _ = run_cli(capsys, "compress", "--demo", "--budget", "params=0.3", "--out", out, "--force",
                              "--latency-repeats", "0")
    assert code == 0
    lines = stdout.splitlines()
    steps = lines[lines.index("next:") + 1:]
    python = next(s.strip() for s in steps if s.strip().startswith("Python: "))[len("Python: "):]
    # the demo's own calibration split is offered (it was shipped and never used)
    assert any("--calibration" in s and "calibration.npz" in s for s in steps)
    import factorize_weights

    scope = {"factorize_weights": factorize_weights}
    exec(python, scope)  # noqa: S102 - the line the tool printed, run as a user would paste it
    small = scope["small"]
    reference = factorize_weights.load_factorized(factorize_weights.open_model(
        "factorize_weights.demo:build_model", weights=str(factorize_weights.demo.WEIGHTS)), out)
    x = torch.from_numpy(np.load(factorize_weights.demo.HELDOUT)["inputs"][:16])
    with torch.no_grad():
        assert torch.equal(small(x), reference(x))


def test_a_result_slower_than_the_original_is_flagged_and_int8_too():
    rep = {"latency": {"runtime": "torch", "batch": 1, "threads": 1, "speedup": 0.97}}
    assert report_mod.speed_verdict(rep).startswith("SLOWER than the original on this CPU (x0.97")
    rep = {"latency": {"runtime": "torch", "batch": 1, "threads": 2, "speedup": 1.3}}
    assert report_mod.speed_verdict(rep) == "x1.30 the original's speed on this CPU (torch, batch 1, 2 threads)"
    rep["int8"] = {"runtime": "onnxruntime", "variants": [{"name": "factorized", "latency_ms": 1.0},
                                                          {"name": "factorized+int8", "latency_ms": 2.1}]}
    assert "factorized+int8 is SLOWER than the float32 factorized model" in report_mod.speed_verdict(rep)


def test_int8_table_comes_first_with_sizes_in_mb(tmp_path, capsys):
    out = tmp_path / "r"
    code = main(["compress", "--demo", "onnx", "--budget", "params=0.3", "--int8", "--out", str(out), "-q",
                 "--latency-repeats", "3"])
    stdout = capsys.readouterr().out
    assert code == 0
    md = (out / "report.md").read_text()
    sections = [line for line in md.splitlines() if line.startswith("## ")]
    assert sections[:2] == ["## What next", "## int8 on top"], sections
    rep = json.loads((out / "report.json").read_text())
    for v in rep["int8"]["variants"]:
        assert f"| {v['name']} | {formatting.fmt_mb(v['size_bytes'])} |" in md
    # the terminal shows the int8 comparison too, and how to run the files in onnxruntime
    assert "int8 (dynamic" in stdout and f"onnxruntime.InferenceSession('{out}/model.int8.onnx')" in stdout


def test_inspect_and_sweep_print_aligned_tables_not_markdown(capsys):
    for argv in (["inspect", "--demo", "-q"],
                 ["sweep", "--demo", "--budgets", "params=0.5,0.3", "-q", "--latency-repeats", "0"]):
        code, stdout, _ = run_cli(capsys, *argv)
        assert code == 0 and "|" not in stdout and "`" not in stdout, argv
        head = next(line for line in stdout.splitlines() if line.startswith(("layer ", "budget ")))
        rule = stdout.splitlines()[stdout.splitlines().index(head) + 1]
        assert set(rule) <= {"-", " "}  # the same renderer as compress: a header and a rule
    rows = [line for line in stdout.splitlines() if line.startswith(("original", "params="))]
    assert [r.split()[0] for r in rows] == ["original", "params=0.5", "params=0.3"]


def test_the_no_calibration_warning_names_calibration_data():
    layers = [{"name": "9", "rank": 3, "energy_kept": 0.2}]
    (text,) = report_mod.plan_warnings(layers, "error-sum")
    assert "without calibration data the plan cannot see" in text


def test_terminal_and_report_share_the_formatter():
    # one source: the terminal re-exports the formatter's functions rather than its own copies
    assert terminal.fmt_change is formatting.fmt_change and terminal.fmt_value is formatting.fmt_value
    assert report_mod.fmt_metric is formatting.fmt_value


def test_every_command_help_starts_with_examples(capsys):
    # the one-line usage keeps the examples on the first screen (they came after 25 lines of flags)
    for command in ("inspect", "compress", "sweep", "evaluate"):
        try:
            main([command, "--help"])
        except SystemExit:
            pass
        lines = capsys.readouterr().out.splitlines()
        assert lines[0].startswith(f"usage: factorize-weights {command} ")
        start = lines.index("examples:")
        assert start < 6 and lines[start + 1].strip().startswith(f"factorize-weights {command} "), command


def test_the_readme_gives_a_cpu_install_command_for_other_machines():
    # PyTorch's own CPU wheel index is how a CPU build is installed elsewhere (pytorch.org's
    # install selector; common practice); the README must say it as a command to copy
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    blocks = text.split("```sh")[1:]
    commands = [line.strip() for b in blocks for line in b.split("```")[0].splitlines()]
    assert any(c.endswith("pip install torch --index-url https://download.pytorch.org/whl/cpu") for c in commands)
