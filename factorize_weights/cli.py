"""Command line: ``factorize-weights inspect | compress | evaluate``.

Exit codes: 0 success; 1 internal error (a bug: please report it); 2 bad input or usage (one line
on stderr naming the file or flag and what is wrong; ``--debug`` adds the traceback).
"""

from __future__ import annotations

import argparse
import json
import sys
import traceback

from ._version import __version__
from .config import METHODS, CompressConfig
from .errors import InputError
from .factors import SPLITS
from .metrics import METRICS
from .spectra import SVD_METHODS

PROG = "factorize-weights"

EPILOG = """\
exit codes: 0 success, 1 internal error, 2 bad input or usage
budgets:    params=0.3 (fraction of the selected layers' parameters), params=1.2M (absolute),
            flops=0.5 (needs --heldout), energy=0.9 (per layer), error=0.1 (per layer)
model:      MODEL.onnx, or --model FILE.py:FACTORY or package.module:FACTORY (a callable
            returning the nn.Module) with --weights CHECKPOINT (.safetensors; .pt/.pth read
            with weights_only=True), or --demo [torch|onnx] for the embedded bay-digit reader
"""


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as one line and exit code 2."""

    def error(self, message: str):  # noqa: D102 - argparse API
        self.exit(2, f"{self.prog}: error: {message} (see --help)\n")


def _common(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("model")
    g.add_argument("model_path", nargs="?", metavar="MODEL",
                   help="MODEL.onnx, or a PyTorch factory (same as --model)")
    g.add_argument("--model", metavar="SPEC", help="FILE.py:FACTORY, package.module:FACTORY, or MODEL.onnx")
    g.add_argument("--weights", metavar="FILE", help="checkpoint of a PyTorch model (.safetensors, .pt, .pth)")
    g.add_argument("--demo", nargs="?", const="torch", choices=("torch", "onnx"),
                   help="use the embedded demo model (PyTorch, or its ONNX export) and its held-out set")
    p.add_argument("--debug", action="store_true", help="show tracebacks")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bars")
    p.add_argument("--json", action="store_true", help="print the report as JSON on stdout (nothing else)")


def _selection(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("layers and spectra")
    g.add_argument("--only", action="append", default=[], metavar="GLOB", help="consider only layers matching (repeatable)")
    g.add_argument("--skip", action="append", default=[], metavar="GLOB", help="leave layers matching dense (repeatable)")
    g.add_argument("--svd", choices=SVD_METHODS, default="auto", help="exact, randomized, or auto (randomized when min side >= 1024)")
    g.add_argument("--seed", type=int, default=0, help="seed of the randomized SVD (default 0)")
    g.add_argument("--oversampling", type=int, default=10, help="randomized SVD oversampling p (default 10)")
    g.add_argument("--power-iterations", type=int, default=2, help="randomized SVD power iterations q (default 2)")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Split a trained model's dense layers into two thin low-rank factors.",
                     epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("inspect", help="spectra and break-even ranks per layer; no rewrite", epilog=EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    _common(p)
    _selection(p)
    p.set_defaults(func=cmd_inspect)

    p = sub.add_parser("compress", help="plan ranks, rewrite, save, evaluate, report", epilog=EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    _common(p)
    _selection(p)
    g = p.add_argument_group("plan")
    g.add_argument("--budget", required=True, metavar="KIND=VALUE", help="params=F|N, flops=F|N, energy=F or error=F")
    g.add_argument("--method", choices=METHODS, default="auto",
                   help="svd (weights only), whitened (calibrated on real inputs), columns (pivoted-QR columns); "
                        "auto: whitened with --calibration, else svd")
    g.add_argument("--split", choices=SPLITS, default="balanced", help="how singular values are shared by the factors")
    g.add_argument("--rank-multiple", type=int, default=1, metavar="N", help="round ranks to multiples of N (e.g. 8)")
    g.add_argument("--min-rank", type=int, default=1, metavar="N", help="lowest rank of a factorized layer")
    g = p.add_argument_group("calibration (data-aware factors; never the held-out set)")
    g.add_argument("--calibration", metavar="DATA", help="calibration .npz (inputs[, labels]) or FILE.py:FUNCTION")
    g.add_argument("--allow-overlap", action="store_true", help="allow the same data for --calibration and --heldout")
    g.add_argument("--sequential", action=argparse.BooleanOptionalAction, default=None,
                   help="refit layers in forward order to the original outputs (reduced-rank regression); "
                        "on by default with whitened factors")
    g.add_argument("--recover", type=int, default=0, metavar="STEPS",
                   help="PyTorch: fine-tune only the factors for up to STEPS steps on the calibration inputs")
    g.add_argument("--recover-lr", type=float, default=1e-4, metavar="LR", help="recovery learning rate (default 1e-4)")
    g = p.add_argument_group("evaluation and output")
    g.add_argument("--heldout", metavar="DATA", help="held-out .npz (inputs[, labels]) or FILE.py:FUNCTION")
    g.add_argument("--metric", choices=METRICS, help="default: top1 with class labels, mse with float targets, else cosine")
    g.add_argument("--batch-size", type=int, default=256, help="held-out batch size (default 256)")
    g.add_argument("--error-samples", type=int, default=256, help="held-out samples for per-layer output error")
    g.add_argument("--out", metavar="DIR", help="write the model, plan.json, report.json, report.md here")
    g.add_argument("--force", action="store_true", help="replace a non-empty --out folder")
    g.add_argument("--export-onnx", action="store_true",
                   help="PyTorch models: also write model.onnx, checked against torch in onnxruntime")
    g.add_argument("--int8", action="store_true",
                   help="ONNX: also quantize to int8 (onnxruntime dynamic) and compare original, factorized, "
                        "int8-only and factorized+int8 (size, metric, latency)")
    g = p.add_argument_group("latency (measured on the CPU when --heldout is given)")
    g.add_argument("--latency-batch", type=int, default=1, metavar="N", help="batch size of the timed runs (default 1)")
    g.add_argument("--latency-threads", type=int, default=1, metavar="N", help="CPU threads (default 1)")
    g.add_argument("--latency-repeats", type=int, default=30, metavar="N", help="timed runs per model (default 30; 0: off)")
    g.add_argument("--latency-warmup", type=int, default=5, metavar="N", help="untimed runs first (default 5)")
    p.set_defaults(func=cmd_compress)

    p = sub.add_parser("evaluate", help="compare an original and a factorized model on a held-out set",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    _common(p)
    p.add_argument("--factorized", required=True, metavar="DIR", help="an output folder of compress")
    p.add_argument("--heldout", metavar="DATA", help="held-out .npz or FILE.py:FUNCTION")
    p.add_argument("--metric", choices=METRICS)
    p.add_argument("--batch-size", type=int, default=256)
    p.set_defaults(func=cmd_evaluate)
    return parser


# ---------------------------------------------------------------- commands


def _load_model(args):
    from .backends import onnx_backend, torch_backend
    from .data import file_sha256

    if args.model_path and args.model:
        raise InputError(f"give the model once: positional {args.model_path!r} and --model {args.model!r}")
    spec = args.model_path or args.model
    if args.demo:
        if spec or args.weights:
            raise InputError("--demo cannot be combined with a model or --weights")
        from . import demo

        spec = str(demo.ONNX) if args.demo == "onnx" else demo.MODEL_SPEC
        args.weights = None if args.demo == "onnx" else str(demo.WEIGHTS)
        if getattr(args, "heldout", None) is None and hasattr(args, "heldout"):
            args.heldout = str(demo.HELDOUT)
    if not spec:
        raise InputError("no model given: MODEL.onnx, --model FILE.py:FACTORY (with --weights), or --demo")
    if spec.lower().endswith(".onnx") or onnx_backend.looks_like_onnx(spec):
        if args.weights:
            raise InputError(f"--weights is for PyTorch models; the ONNX file {spec} holds its own weights")
        return onnx_backend.load(spec), {"model": spec, "format": "onnx", "model_sha256": file_sha256(spec)}
    if ":" not in spec:
        raise InputError(f"--model {spec!r}: not an ONNX file and not FILE.py:FACTORY or package.module:FACTORY")
    model = torch_backend.build_model(spec, args.weights)
    sources = {"model": spec, "format": "torch", "weights": args.weights,
               "weights_sha256": file_sha256(args.weights) if args.weights else None}
    return model, sources


def _heldout(args):
    from .data import load_heldout

    return load_heldout(args.heldout) if getattr(args, "heldout", None) else None


def _config(args, **extra) -> CompressConfig:
    return CompressConfig(
        only=tuple(args.only), skip=tuple(args.skip), svd=args.svd, seed=args.seed,
        oversampling=args.oversampling, power_iterations=args.power_iterations, quiet=args.quiet, **extra,
    )


def _print_json(obj) -> None:
    print(json.dumps(obj, indent=2, allow_nan=False))


def cmd_inspect(args) -> int:
    from .pipeline import inspect_model
    from .report import render_inspect

    model, _ = _load_model(args)
    report = inspect_model(model, _config(args))
    if args.json:
        _print_json(report)
    else:
        print(render_inspect(report))
    return 0


def cmd_compress(args) -> int:
    from .pipeline import compress
    from .report import layer_table, summary_line

    config = _config(args, budget=args.budget, method=args.method, split=args.split,
                     rank_multiple=args.rank_multiple, min_rank=args.min_rank, metric=args.metric,
                     batch_size=args.batch_size, error_samples=args.error_samples,
                     latency_batch=args.latency_batch, latency_threads=args.latency_threads,
                     latency_repeats=args.latency_repeats, latency_warmup=args.latency_warmup,
                     export_onnx=args.export_onnx, int8=args.int8, sequential=args.sequential,
                     recover=args.recover, recover_lr=args.recover_lr, allow_overlap=args.allow_overlap)
    model, sources = _load_model(args)
    heldout = _heldout(args)
    calibration = None
    if args.calibration:
        from .data import load_heldout

        calibration = load_heldout(args.calibration, flag="--calibration")
    result = compress(model, config, heldout=heldout, out=args.out, force=args.force, sources=sources,
                      calibration=calibration)
    for warning in (result.report.get("calibration") or {}).get("warnings", []):
        print(f"{PROG}: warning: {warning}", file=sys.stderr)
    if args.json:
        _print_json(result.report)
        return 0
    print("\n".join(layer_table(result.report)))
    if result.report["skipped"]:
        print("skipped: " + "; ".join(f"{s['name']} ({s['reason']})" for s in result.report["skipped"]))
    print(summary_line(result.report))
    if args.out:
        from pathlib import Path

        print(f"wrote {args.out}/ ({', '.join(sorted(p.name for p in Path(args.out).iterdir()))})")
    return 0


def cmd_evaluate(args) -> int:
    from .pipeline import CompressConfig as _C, evaluate
    from .store import load_factorized

    model, _ = _load_model(args)
    if not args.heldout:
        raise InputError("--heldout is required for evaluate")
    heldout = _heldout(args)
    factorized = load_factorized(model, args.factorized)
    result = evaluate(model, factorized, heldout, args.metric, _C(quiet=args.quiet, batch_size=args.batch_size))
    if args.json:
        _print_json({"metric": result.to_dict(), "factorized": args.factorized, "heldout": heldout.source})
    else:
        unit = " points" if result.name in ("top1", "top5", "agreement") else ""
        print(f"{result.name}: original {result.before:.4f}, factorized {result.after:.4f}, "
              f"delta {result.delta:+.4f}{unit} on {result.samples} samples")
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except InputError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # stdout closed early (| head): not an error of ours
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except Exception as exc:  # a bug in this tool
        if args.debug:
            traceback.print_exc()
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        print(f"{PROG}: internal error: {type(exc).__name__}: {first} (rerun with --debug for a traceback)",
              file=sys.stderr)
        return 1
