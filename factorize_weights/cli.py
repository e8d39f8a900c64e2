"""Command line: ``factorize-weights inspect | compress | evaluate``.

Exit codes: 0 success; 1 internal error (a bug: please report it); 2 bad input or usage (one line
on stderr naming the file or flag and what is wrong; ``--debug`` adds the traceback).
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import traceback

from ._version import __version__
from .config import ALLOCATIONS, METHODS, CompressConfig
from .errors import InputError
from .factors import SPLITS
from .metrics import METRICS
from .spectra import SVD_METHODS

PROG = "factorize-weights"
_DEFAULTS = CompressConfig()  # the one source of every default below

EPILOG = """\
exit codes: 0 success, 1 internal error, 2 bad input or usage, 3 gate failed (--fail-over)
budgets:    params=0.3 (fraction of the selected layers' parameters), params=1.2M (absolute),
            flops=0.5 (needs --heldout), energy=0.9 (per layer), error=0.1 (per layer)
model:      MODEL.onnx, or --model FILE.py:FACTORY or package.module:FACTORY (a callable
            returning the nn.Module) with --weights CHECKPOINT (.safetensors; .pt/.pth read
            with weights_only=True), or --demo [torch|onnx] for the embedded bay-digit reader
"""


class _Once(argparse.Action):
    """A flag that may be given once: a second value is an error, not a silent override."""

    def __call__(self, parser, namespace, values, option_string=None):
        if getattr(namespace, self.dest, None) is not None and getattr(namespace, f"_{self.dest}_seen", False):
            raise argparse.ArgumentError(self, f"given twice ({getattr(namespace, self.dest)!r} and {values!r}): "
                                               "one per run (the sweep command takes several)")
        setattr(namespace, self.dest, values)
        setattr(namespace, f"_{self.dest}_seen", True)


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as one line and exit code 2."""

    def error(self, message: str):  # noqa: D102 - argparse API
        self.exit(2, f"{self.prog}: error: {message} (see --help)\n")


def _common(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("model")
    g.add_argument("model_path", nargs="?", metavar="MODEL",
                   help="MODEL.onnx, or a PyTorch factory (same as --model)")
    g.add_argument("--model", metavar="SPEC", help="FILE.py:FACTORY, package.module:FACTORY, or MODEL.onnx")
    g.add_argument("--weights", metavar="FILE",
                   help="checkpoint of a PyTorch model (.safetensors, a sharded *.safetensors.index.json, .pt, .pth)")
    g.add_argument("--weights-key", metavar="KEY",
                   help="the key of a .pt/.pth checkpoint that holds the tensors (default: found, with a notice)")
    g.add_argument("--demo", nargs="?", const="torch", choices=("torch", "onnx"),
                   help="use the embedded demo model (PyTorch, or its ONNX export) and its held-out set")
    p.add_argument("--debug", action="store_true", help="show tracebacks")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bars")
    p.add_argument("-v", "--verbose", action="store_true", help="stage timings on stderr")
    p.add_argument("--json", action="store_true", help="print the report as JSON on stdout (nothing else)")


def _selection(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("layers and spectra")
    g.add_argument("--only", action="append", default=[], metavar="GLOB", help="consider only layers matching (repeatable)")
    g.add_argument("--skip", action="append", default=[], metavar="GLOB", help="leave layers matching dense (repeatable)")
    g.add_argument("--svd", choices=SVD_METHODS, default=_DEFAULTS.svd, help="exact, randomized, or auto (randomized only where the choosable ranks are well below the smaller side)")
    g.add_argument("--seed", type=int, default=_DEFAULTS.seed, help=f"seed of the randomized SVD (default {_DEFAULTS.seed})")
    g.add_argument("--oversampling", type=int, default=_DEFAULTS.oversampling, help=f"randomized SVD oversampling p (default {_DEFAULTS.oversampling})")
    g.add_argument("--power-iterations", type=int, default=_DEFAULTS.power_iterations, help=f"randomized SVD power iterations q (default {_DEFAULTS.power_iterations})")


def _plan_options(p: argparse.ArgumentParser, *, sweep: bool = False) -> None:
    g = p.add_argument_group("factors")
    g.add_argument("--method", choices=METHODS, default=_DEFAULTS.method,
                   help="svd (weights only), whitened (calibrated on real inputs), columns (pivoted-QR columns); "
                        "auto: whitened with --calibration, else svd")
    g.add_argument("--split", choices=SPLITS, default=_DEFAULTS.split, help="how singular values are shared by the factors")
    g.add_argument("--rank-step", type=int, default=_DEFAULTS.rank_step, metavar="N", help="round ranks to multiples of N (e.g. 8)")
    g.add_argument("--min-rank", type=int, default=_DEFAULTS.min_rank, metavar="N", help="lowest rank of a factorized layer")
    g = p.add_argument_group("calibration (data-aware factors; never the held-out set)")
    g.add_argument("--calibration", metavar="DATA", help="calibration .npz (inputs[, labels]) or FILE.py:FUNCTION")
    g.add_argument("--allow-overlap", action="store_true", help="allow the same data for --calibration and --heldout")
    g.add_argument("--ridge", type=float, default=_DEFAULTS.ridge, metavar="A",
                   help=f"ridge added to the calibration moments, as a fraction of their mean diagonal (default {_DEFAULTS.ridge})")
    g.add_argument("--shrinkage", action=argparse.BooleanOptionalAction, default=_DEFAULTS.shrinkage,
                   help="raise each layer's ridge to the Ledoit-Wolf shrinkage of its calibration moments "
                        "(large when a layer has few calibration rows per input feature; on by default)")
    g.add_argument("--rows-ridge", type=float, default=_DEFAULTS.rows_ridge, metavar="C",
                   help="with --shrinkage: each layer's ridge is at least C x its input width / its calibration rows "
                        f"(default {_DEFAULTS.rows_ridge:g}; binds where a layer sees few rows per feature)")
    g.add_argument("--sequential", action=argparse.BooleanOptionalAction, default=_DEFAULTS.sequential,
                   help="refit layers in forward order to the original outputs (reduced-rank regression); "
                        "on by default with whitened factors")
    g.add_argument("--sequential-groups", type=int, default=_DEFAULTS.sequential_groups, metavar="N",
                   help=f"most passes of a sequential refit: layers are refitted in N groups in forward order "
                        f"(default {_DEFAULTS.sequential_groups}; one group per layer is exact layer by layer)")
    g.add_argument("--allocation", choices=ALLOCATIONS, default=_DEFAULTS.allocation,
                   help="output: share ranks by each layer's measured effect on the model's output (PyTorch, needs "
                        "--calibration); energy-product: keep the most of the product of the layers' kept energy; "
                        "error-sum: least summed layer error; auto: output when it can, else error-sum")
    g.add_argument("--effect-samples", type=int, default=_DEFAULTS.effect_samples, metavar="N",
                   help=f"calibration samples the output-effect probes run on (default {_DEFAULTS.effect_samples})")
    g.add_argument("--bn-weights", action="store_true",
                   help="truncate each layer for its error after the eval-mode BatchNorm that reads it "
                        "(rows weighted by |gamma|/sqrt(var+eps); PyTorch, needs --heldout or --calibration)")
    g.add_argument("--bn-inputs", action=argparse.BooleanOptionalAction, default=None,
                   help="layers fed by an eval-mode BatchNorm (and an elementwise activation, average pooling) use the "
                        "input statistics it was trained to produce: without calibration, each is truncated for its "
                        "output error on them (the ranks are unchanged); with calibration, its moments are shrunk "
                        "toward them instead of the identity (default: on for PyTorch models; the chains are found "
                        "by one forward pass on --heldout or --calibration; --no-bn-inputs turns it off)")
    g.add_argument("--recover", type=int, default=_DEFAULTS.recover, metavar="STEPS",
                   help="PyTorch: fine-tune only the factors for up to STEPS steps on the calibration inputs")
    g.add_argument("--recover-lr", type=float, default=_DEFAULTS.recover_lr, metavar="LR",
                   help="recovery learning rate (default: the largest of 1e-3, 1e-4, 1e-5 and 1e-6 that stays stable "
                        "over a 10-step trial)")
    g = p.add_argument_group("evaluation and output")
    g.add_argument("--heldout", metavar="DATA", help="held-out .npz (inputs[, labels]) or FILE.py:FUNCTION")
    g.add_argument("--output", metavar="NAME",
                   help="which model output the metrics read: an entry of a dict or output object, or an index "
                        "into a tuple (default: the first tensor)")
    g.add_argument("--metric", choices=METRICS, help="default: top1 with class labels, mse with float targets, else cosine")
    g.add_argument("--batch-size", type=int, default=_DEFAULTS.batch_size, help=f"largest held-out and calibration batch (default {_DEFAULTS.batch_size}; cut to fit 256 MiB of activations)")
    g.add_argument("--error-samples", type=int, default=_DEFAULTS.error_samples, help="held-out samples for per-layer output error")
    g.add_argument("--out", metavar="DIR", help="write the results here (atomically)")
    g.add_argument("--force", action="store_true", help="replace a non-empty --out folder")
    if not sweep:
        g.add_argument("--export-onnx", action="store_true",
                       help="PyTorch models: also write model.onnx, checked against torch in onnxruntime")
        g.add_argument("--int8", action="store_true",
                       help="ONNX: also quantize to int8 (onnxruntime dynamic) and compare original, factorized, "
                            "int8-only and factorized+int8 (size, metric, latency)")
    g = p.add_argument_group("latency (measured on the CPU when --heldout is given)")
    g.add_argument("--latency-batch", type=int, default=_DEFAULTS.latency_batch, metavar="N", help=f"batch size of the timed runs (default {_DEFAULTS.latency_batch})")
    g.add_argument("--latency-threads", type=int, default=_DEFAULTS.latency_threads, metavar="N", help=f"CPU threads (default {_DEFAULTS.latency_threads})")
    g.add_argument("--latency-repeats", type=int, default=_DEFAULTS.latency_repeats, metavar="N", help=f"timed runs per model (default {_DEFAULTS.latency_repeats}; 0: off)")
    g.add_argument("--latency-warmup", type=int, default=_DEFAULTS.latency_warmup, metavar="N", help=f"untimed runs first (default {_DEFAULTS.latency_warmup})")
    g = p.add_argument_group("run file")
    g.add_argument("--config", metavar="RUN.toml",
                   help="read any option of this command from a TOML file; flags on the command line win")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Split a trained model's dense layers into two thin low-rank factors.",
                     epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    parser._subcommands = sub.choices

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
    g.add_argument("--budget", metavar="KIND=VALUE", action=_Once,
                   help="params=F|N, flops=F|N, energy=F or error=F (one per run)")
    g.add_argument("--keep-within", type=float, metavar="D",
                   help="instead of --budget: the smallest params budget whose held-out drop is at most D, in the "
                        "metric's units (percentage points for top1/top5/agreement, absolute for cosine and mse)")
    g.add_argument("--selection", metavar="DATA",
                   help="with --keep-within: the data the budget is chosen on (.npz or FILE.py:FUNCTION; not the "
                        "held-out set); without it the held-out set chooses and its figure is optimistic")
    _plan_options(p)
    g = p.add_argument_group("gate")
    g.add_argument("--fail-over", type=float, metavar="D",
                   help="write everything, then exit 3 when the held-out drop exceeds D (metric units as --keep-within)")
    p.set_defaults(func=cmd_compress)

    p = sub.add_parser("sweep", help="several budgets in one go, spectra and calibration computed once",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    _common(p)
    _selection(p)
    g = p.add_argument_group("plan")
    g.add_argument("--budgets", metavar="LIST", help="comma-separated budgets, e.g. params=0.8,0.6,0.4,0.2")
    g.add_argument("--save-models", action="store_true", help="also write each point's model folder under --out")
    _plan_options(p, sweep=True)
    p.set_defaults(func=cmd_sweep)

    p = sub.add_parser("evaluate", help="compare an original and a factorized model on a held-out set",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    _common(p)
    p.add_argument("--factorized", required=True, metavar="DIR", help="an output folder of compress")
    p.add_argument("--heldout", metavar="DATA", help="held-out .npz or FILE.py:FUNCTION")
    p.add_argument("--metric", choices=METRICS)
    p.add_argument("--output", metavar="NAME", help="which model output the metric reads (default: the first tensor)")
    p.add_argument("--batch-size", type=int, default=_DEFAULTS.batch_size)
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
        return onnx_backend.load(spec), _run_sources(args, {"model": spec, "format": "onnx",
                                                            "model_sha256": file_sha256(spec)})
    from pathlib import Path

    if Path(spec).is_dir() and (Path(spec) / "config.json").is_file():  # a Hugging Face-style model folder
        if args.weights:
            raise InputError(f"--weights is for a factory; the model folder {spec} holds its own weights")
        weights = next((str(p) for p in sorted(Path(spec).glob("*.safetensors"))), None)
        sources = {"model": spec, "format": "torch", "model_sha256": file_sha256(Path(spec) / "config.json"),
                   "weights": weights, "weights_sha256": file_sha256(weights) if weights else None,
                   "layout": "model-folder"}
        return torch_backend.load_pretrained(spec), _run_sources(args, sources)
    if ":" not in spec:
        raise InputError(f"--model {spec!r}: not an ONNX file, a model folder (config.json), or "
                         "FILE.py:FACTORY or package.module:FACTORY")
    import warnings

    if getattr(args, "weights_key", None) and not args.weights:
        raise InputError("--weights-key picks a key inside --weights; give --weights too")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", torch_backend.CheckpointNotice)
        model = torch_backend.build_model(spec, args.weights, weights_key=getattr(args, "weights_key", None))
    for w in caught:
        if issubclass(w.category, torch_backend.CheckpointNotice):
            _warn(str(w.message))
    if not args.weights:
        _warn(f"no --weights: {spec} is used with the weights its factory creates")
    from pathlib import Path

    target = spec.rpartition(":")[0]
    sources = {"model": spec, "format": "torch",
               "model_sha256": file_sha256(target) if Path(target).is_file() else None,
               "weights": args.weights, "weights_sha256": file_sha256(args.weights) if args.weights else None}
    return model, _run_sources(args, sources)


def _run_sources(args, sources: dict) -> dict:
    """Provenance: the run file (if any) and the command line."""
    if getattr(args, "config_file", None):
        sources["config_file"] = {k: args.config_file[k] for k in ("path", "sha256")}
    sources["argv"] = list(getattr(args, "argv", sys.argv[1:]))
    return sources


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


def _plan_config(args, budget: str) -> CompressConfig:
    return _config(args, budget=budget, method=args.method, split=args.split,
                   rank_step=args.rank_step, min_rank=args.min_rank, metric=args.metric, output=args.output,
                   batch_size=args.batch_size, error_samples=args.error_samples,
                   latency_batch=args.latency_batch, latency_threads=args.latency_threads,
                   latency_repeats=args.latency_repeats, latency_warmup=args.latency_warmup,
                   export_onnx=getattr(args, "export_onnx", False), int8=getattr(args, "int8", False),
                   sequential=args.sequential, sequential_groups=args.sequential_groups, recover=args.recover, recover_lr=args.recover_lr,
                   allow_overlap=args.allow_overlap, ridge=args.ridge, allocation=args.allocation,
                   effect_samples=args.effect_samples, bn_weights=args.bn_weights, bn_inputs=args.bn_inputs,
                   shrinkage=args.shrinkage, rows_ridge=args.rows_ridge)


def _calibration(args):
    from .data import load_heldout

    return load_heldout(args.calibration, flag="--calibration") if args.calibration else None


_WARNINGS: list[str] = []


def _warn(text: str) -> None:
    """Queue a warning: printed when the command finishes, dropped when it fails (so a failure is
    always exactly one line)."""
    _WARNINGS.append(text)


def _flush_warnings() -> None:
    for text in _WARNINGS:
        print(f"{PROG}: {_colour('warning', '33')}: {text}", file=sys.stderr)
    _WARNINGS.clear()


def _colour(text: str, code: str) -> str:
    """ANSI colour only on a terminal, and never when NO_COLOR is set (no-color.org)."""
    import os

    if sys.stderr.isatty() and not os.environ.get("NO_COLOR"):
        return f"\033[{code}m{text}\033[0m"
    return text


def _verbose(args, report: dict) -> None:
    if getattr(args, "verbose", False):
        stages = ", ".join(f"{k} {v:.2f} s" for k, v in report.get("wall_seconds", {}).items())
        print(f"{PROG}: stages: {stages}", file=sys.stderr)


def cmd_compress(args) -> int:
    from pathlib import Path

    from .run import compress
    from . import terminal
    from .sweep import POINT_UNITS, drop_of

    if args.budget is not None and not args.budget.strip():
        raise InputError("--budget '': empty; give KIND=VALUE, e.g. --budget params=0.5")
    if (args.budget is None) == (args.keep_within is None):
        raise InputError("give exactly one of --budget and --keep-within")
    import math

    for flag, value in (("--keep-within", args.keep_within), ("--fail-over", args.fail_over)):
        if value is not None and not (math.isfinite(value) and value >= 0):
            raise InputError(f"{flag} must be a finite number >= 0 (in the metric's units); got {value}")
    if (args.keep_within is not None or args.fail_over is not None) and not args.heldout and not args.demo:
        raise InputError(f"{'--keep-within' if args.keep_within is not None else '--fail-over'} needs --heldout "
                         "(the drop is measured on it)")
    config = _plan_config(args, args.budget or "params=1")
    model, sources = _load_model(args)
    heldout, calibration = _heldout(args), _calibration(args)
    if args.selection and args.keep_within is None:
        raise InputError("--selection is the data --keep-within chooses the budget on; give --keep-within too")
    from .data import load_heldout

    selection = load_heldout(args.selection, flag="--selection") if args.selection else None
    result = compress(model, config, heldout=heldout, out=args.out, force=args.force, sources=sources,
                      calibration=calibration, keep_within=args.keep_within, selection=selection)
    for warning in (result.report.get("calibration") or {}).get("warnings", []) + result.report.get("warnings", []):
        _warn(warning)
    _verbose(args, result.report)
    if args.json:
        _print_json(result.report)
    else:
        _flush_warnings()  # warnings first, one line each, then the results
        head, rows = terminal.layer_rows(result.report)
        print("\n".join(terminal.table(head, rows, optional=terminal.OPTIONAL_LAYER_COLUMNS)))
        if result.report["skipped"]:
            print(f"skipped {len(result.report['skipped'])} layer(s):")
            for s in result.report["skipped"]:
                print(f"  {s['name']}: {s['reason']}")
        if "search" in result.report:
            sr = result.report["search"]
            tried = ", ".join(f"{t['budget']} drop {t['drop']:.4g}" for t in sr["tried"])
            chooser = ("the selection set chose it" if sr.get("selection") else
                       "the held-out set chose it, so its figure below is optimistic (give --selection)")
            print(f"search: {sr['chosen']} is the smallest budget within a drop of {sr['keep_within']:g} "
                  f"{sr['unit']} ({sr['evaluations']} evaluations: {tried}); {chooser}")
        files = sorted(p.name for p in Path(args.out).iterdir()) if args.out else None
        print("\n".join(terminal.summary(result.report, args.out, files)))
    if args.fail_over is not None and result.metric is not None:
        drop = drop_of(result.metric)
        if drop > args.fail_over:
            print(f"{PROG}: {_colour('gate failed', '31')}: held-out {result.metric.name} dropped {drop:.4g} "
                  f"{POINT_UNITS[result.metric.name]}, more than --fail-over {args.fail_over:g} "
                  f"(by {drop - args.fail_over:.4g})", file=sys.stderr)
            return 3
    return 0


def cmd_sweep(args) -> int:
    from .sweep import parse_budget_list, sweep

    if not args.budgets:
        raise InputError("--budgets is required, e.g. --budgets params=0.8,0.6,0.4,0.2")
    budgets = parse_budget_list(args.budgets)
    config = _plan_config(args, budgets[0])
    model, sources = _load_model(args)
    doc = sweep(model, config, budgets, heldout=_heldout(args), calibration=_calibration(args), out=args.out,
                force=args.force, save_models=args.save_models, sources=sources)
    if args.json:
        _print_json(doc)
        return 0
    from .sweep import render_markdown

    print(render_markdown(doc), end="")
    if args.out:
        print(f"wrote {args.out}/ (sweep.json, sweep.csv, sweep.md, sweep.html"
              f"{', one folder per budget' if args.save_models else ''})")
    return 0


def cmd_evaluate(args) -> int:
    from .evaluation import evaluate
    from .store import load_factorized

    model, _ = _load_model(args)
    if not args.heldout:
        raise InputError("--heldout is required for evaluate")
    heldout = _heldout(args)
    factorized = load_factorized(model, args.factorized)
    result = evaluate(model, factorized, heldout, args.metric, CompressConfig(quiet=args.quiet, batch_size=args.batch_size,
                                                                                 output=args.output))
    if args.json:
        _print_json({"metric": result.to_dict(), "factorized": args.factorized, "heldout": heldout.source})
    else:
        from . import terminal

        change = terminal.fmt_change(result.name, result.before, result.after, result.higher_is_better)
        print(f"held-out {result.name} {terminal.fmt_value(result.name, result.before)} -> "
              f"{terminal.fmt_value(result.name, result.after)} ({change}; {result.samples} samples)")
    return 0


def _run_file_value(path, key: str, value, action):
    """Check a run-file value against the option it sets, as the command line would."""
    def bad(expected: str):
        return InputError(f"--config {path}: {key} must be {expected}; got {value!r}")

    if isinstance(action, (argparse._StoreTrueAction, argparse.BooleanOptionalAction)):
        if not isinstance(value, bool):
            raise bad("true or false")
    elif isinstance(action, argparse._AppendAction):
        if not (isinstance(value, list) and all(isinstance(v, str) for v in value)):
            raise bad("a string or a list of strings")
    elif action.type in (int, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or (action.type is int and not isinstance(value, int)):
            raise bad("an integer" if action.type is int else "a number")
        value = action.type(value)
    elif not isinstance(value, str):
        raise bad("a string (quote it in TOML)")
    if action.choices is not None and value not in action.choices and not isinstance(value, list):
        raise bad(f"one of {', '.join(map(str, action.choices))}")
    return value


def apply_run_file(parser, argv: list[str], args):
    """Re-parse with the TOML run file's values as defaults: flags on the command line win.
    Keys are the long option names (``rank-step`` or ``rank_step``); unknown keys are
    refused by name."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    from pathlib import Path

    from .data import file_sha256

    path = Path(args.config)
    if not path.is_file():
        raise InputError(f"--config {path}: file does not exist")
    try:
        values = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"--config {path}: not valid TOML ({exc})") from exc
    sub = parser._subcommands[args.command]
    actions = {a.dest: a for a in sub._actions if a.dest not in ("help", "config", "func", "model_path")}
    defaults, unknown = {}, []
    for key, value in values.items():
        dest = key.replace("-", "_")
        if dest not in actions:
            unknown.append(key)
            continue
        if dest == "budgets" and isinstance(value, list):
            value = ",".join(str(v) for v in value)
        if dest in ("only", "skip") and isinstance(value, str):
            value = [value]
        defaults[dest] = _run_file_value(path, key, value, actions[dest])
    if unknown:
        raise InputError(f"--config {path}: unknown key(s) {', '.join(sorted(unknown))} for '{args.command}'")
    sub.set_defaults(**defaults)
    new = parser.parse_args(argv)
    new.config_file = {"path": str(path), "sha256": file_sha256(path), "values": values}
    return new


class _Terminated(BaseException):
    """SIGTERM, raised where the program is, so every temporary folder is removed on the way out."""


def _on_sigterm(signum, frame):
    raise _Terminated()


def main(argv: list[str] | None = None) -> int:
    import signal

    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(argv)
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread (an embedding application): leave signals alone
        previous = None
    try:
        return _run(args, parser, argv)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _run(args, parser, argv) -> int:
    try:
        if getattr(args, "config", None):
            args = apply_run_file(parser, argv, args)
        args.argv = argv
        _WARNINGS.clear()
        code = args.func(args)
        _flush_warnings()
        return code
    except InputError as exc:
        _WARNINGS.clear()
        if args.debug:
            traceback.print_exc()
        print(f"{PROG}: {_colour('error', '31')}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return 130
    except _Terminated:
        print(f"{PROG}: terminated (SIGTERM); no partial output is left", file=sys.stderr)
        return 143
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
