"""What each command does with its parsed options: load the model and the data, call the library,
print the results (an aligned table, a summary) or the JSON report."""

from __future__ import annotations

import json
import sys

from ..config import CompressConfig, cli_fields
from ..errors import InputError
from .options import PROFILE_FIELDS, PROG


def load_model(args):
    """The model and its provenance from ``MODEL`` / ``--model`` / ``--demo`` (backends/opening.py)."""
    from ..backends.opening import open_model

    if args.model_path and args.model:
        raise InputError(f"give the model once: positional {args.model_path!r} and --model {args.model!r}")
    spec = args.model_path or args.model
    weights, factory_weights = args.weights, args.factory_weights
    if args.demo:
        if spec or args.weights or factory_weights:
            raise InputError("--demo cannot be combined with a model, --weights or --factory-weights")
        from .. import demo

        spec, weights = demo.spec(args.demo)
        if getattr(args, "heldout", None) is None and hasattr(args, "heldout"):
            args.heldout = str(demo.HELDOUT)
    if not spec:
        raise InputError("no model given: MODEL.onnx, --model FILE.py:FACTORY (with --weights), or --demo")
    model, sources = open_model(spec, weights=weights, weights_key=args.weights_key,
                                factory_weights=factory_weights, warn=_warn)
    return model, _run_sources(args, sources)


def _run_sources(args, sources: dict) -> dict:
    """Provenance: the run file (if any) and the command line."""
    if getattr(args, "config_file", None):
        sources["config_file"] = {k: args.config_file[k] for k in ("path", "sha256")}
    sources["argv"] = list(getattr(args, "argv", sys.argv[1:]))
    return sources


def _heldout(args):
    from ..data import load_heldout

    return load_heldout(args.heldout) if getattr(args, "heldout", None) else None


def _config(args, command: str, **extra) -> CompressConfig:
    """The configuration from the parsed options: every field ``command`` offers, by its metadata."""
    values = {f.name: getattr(args, f.name) for f in cli_fields(command)}
    values.update(quiet=args.quiet, **extra)
    return CompressConfig(**values)


def _print_json(obj) -> None:
    print(json.dumps(obj, indent=2, allow_nan=False))


def cmd_inspect(args) -> int:
    from ..pipeline import inspect_model
    from ..terminal import inspect_lines

    model, _ = load_model(args)
    report = inspect_model(model, _config(args, "inspect"))
    if args.json:
        _print_json(report)
    else:
        print("\n".join(inspect_lines(report)))
    return 0


def _calibration(args):
    from ..data import load_heldout

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

    from ..run import compress
    from .. import terminal
    from ..formatting import fmt_points
    from ..sweep import drop_of

    if args.budget is not None and not args.budget.strip():
        raise InputError("--budget '': empty; give KIND=VALUE, e.g. --budget params=0.5")
    if (args.budget is None) == (args.keep_within is None):
        raise InputError("give exactly one of --budget and --keep-within")
    import math

    for flag, value in (("--keep-within", args.keep_within), ("--drop-limit", args.drop_limit)):
        if value is not None and not (math.isfinite(value) and value >= 0):
            raise InputError(f"{flag} must be a finite number >= 0 (in the metric's units); got {value}")
    if args.drop_limit is not None and not args.heldout and not args.demo:
        raise InputError("--drop-limit needs --heldout (the drop is measured on it)")
    config = _config(args, "compress", budget=args.budget or "params=1")
    model, sources = load_model(args)
    heldout, calibration = _heldout(args), _calibration(args)
    from ..data import load_heldout

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
            name = result.metric.name if result.metric is not None else ""
            tried = ", ".join(f"{t['budget']} drop {fmt_points(name, t['drop'])}" for t in sr["tried"])
            chooser = ("the selection set chose it" if sr.get("selection") else
                       "the held-out set chose it, so its figure below is optimistic (give --selection)")
            print(f"search: {sr['chosen']} is the smallest budget within a drop of {fmt_points(name, sr['keep_within'])} "
                  f"({sr['evaluations']} evaluations: {tried}); {chooser}")
        files = sorted(p.name for p in Path(args.out).iterdir()) if args.out else None
        hints = ()
        if args.demo and not args.calibration:
            from .. import demo

            hints = (f"calibrated factors: add --calibration {demo.CALIBRATION} (the demo's own calibration split)",)
        print("\n".join(terminal.summary(result.report, args.out, files, hints)))
    if args.drop_limit is not None and result.metric is not None:
        drop = drop_of(result.metric)
        if drop > args.drop_limit:
            name = result.metric.name
            print(f"{PROG}: {_colour('gate failed', '31')}: held-out {name} dropped {fmt_points(name, drop)}, more "
                  f"than --drop-limit {fmt_points(name, args.drop_limit)} (by {fmt_points(name, drop - args.drop_limit)})",
                  file=sys.stderr)
            return 3
    return 0


def cmd_sweep(args) -> int:
    from ..sweep import parse_budget_list, sweep

    if not args.budgets:
        raise InputError("--budgets is required, e.g. --budgets params=0.8,0.6,0.4,0.2")
    budgets = parse_budget_list(args.budgets)
    config = _config(args, "sweep", budget=budgets[0])
    model, sources = load_model(args)
    doc = sweep(model, config, budgets, heldout=_heldout(args), calibration=_calibration(args), out=args.out,
                force=args.force, save_models=args.save_models, sources=sources)
    if args.json:
        _print_json(doc)
        return 0
    from ..terminal import sweep_lines

    print("\n".join(sweep_lines(doc)))
    if args.out:
        print(f"wrote {args.out}/ (sweep.json, sweep.csv, sweep.md, sweep.html"
              f"{', one folder per budget' if args.save_models else ''})")
    return 0


def cmd_evaluate(args) -> int:
    from ..evaluation import evaluate
    from ..store import load_factorized

    config = CompressConfig(quiet=args.quiet, batch_size=args.batch_size, output=args.output,
                            latency_batch=args.latency_batch, latency_threads=args.latency_threads,
                            latency_repeats=args.latency_repeats)  # the options first: before any loading
    model, _ = load_model(args)
    if not args.heldout:
        raise InputError("--heldout is required for evaluate")
    heldout = _heldout(args)
    factorized = load_factorized(model, args.factorized)
    result = evaluate(model, factorized, heldout, args.metric, config)
    lat = None
    if args.latency_repeats > 0:  # the check of a plan made elsewhere happens here, on the device
        from ..evaluation import measure_latency

        lat = measure_latency(model, factorized, heldout, config)
    if args.json:
        _print_json({"metric": result.to_dict(), "factorized": args.factorized, "heldout": heldout.source,
                     "latency": lat})
    else:
        from .. import terminal

        change = terminal.fmt_change(result.name, result.before, result.after, result.higher_is_better)
        print(f"held-out {result.name} {terminal.fmt_value(result.name, result.before)} -> "
              f"{terminal.fmt_value(result.name, result.after)} ({change}; {result.samples} samples)")
        if lat:
            print(terminal.latency_line(lat))
    return 0


def cmd_profile(args) -> int:
    from pathlib import Path

    from ..pipeline import profile_latency
    from .. import terminal

    if not args.out:
        raise InputError("--out is required: the profile file to write (e.g. --out cpu-profile.json)")
    out = Path(args.out)
    if out.is_dir():
        raise InputError(f"--out {out}: is a folder; give the profile file's name (e.g. {out}/cpu-profile.json)")
    if out.exists() and not args.force:
        raise InputError(f"--out {out}: exists; give --force to replace it")
    if not out.parent.is_dir():
        raise InputError(f"--out {out}: folder {out.parent} does not exist")
    config = CompressConfig(quiet=args.quiet, **{k: getattr(args, k) for k in PROFILE_FIELDS})  # before any loading
    if config.latency_repeats < 1:
        raise InputError("--latency-repeats must be at least 1 for a profile (it is all timing)")
    model, _ = load_model(args)
    if not args.heldout:
        raise InputError("--heldout is required: the inputs the layers are timed on (their shapes are what counts)")
    profile = profile_latency(model, _heldout(args), config)
    profile.save(out)
    if args.json:
        _print_json(profile.to_dict())
    else:
        head, rows = terminal.profile_rows(profile)
        print("\n".join(terminal.table(head, rows, whole=str(out))))
        print(f"whole model {terminal.fmt_ms(profile.whole_ms)} ({profile.runtime['name']} {profile.runtime['version']}, "
              f"batch {profile.batch}, {profile.threads} thread{'s' if profile.threads != 1 else ''}, "
              f"{profile.machine['cpu']}); measured in {profile.seconds:.1f} s")
        print(f"wrote {out}")
        print(f"next: compress ... --budget latency=0.7 --latency-profile {out} (same --latency-batch and "
              "--latency-threads, same input shapes)")
    return 0


