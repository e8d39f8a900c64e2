"""The argument parser. Options that set a configuration field are generated from the field's
metadata (``config.py``: help, group, allowed values, commands); the few options that are about the
run itself (the model, the data, the output folder, the budget) are declared here, once."""

from __future__ import annotations

import argparse
import dataclasses

from .. import demo
from .._version import __version__
from ..config import ADVANCED, GROUPS, CompressConfig, cli_fields, flag_of

PROG = "factorize-weights"

EPILOG = """\
exit codes: 0 success, 1 internal error, 2 bad input or usage, 3 gate failed (--drop-limit)
budgets:    params=0.3 (fraction of the selected layers' parameters), params=1.2M (absolute),
            flops=0.5 (needs --heldout), energy=0.9 (per layer), error=0.1 (per layer),
            latency=0.7 or latency=12ms (measured on this CPU or read from --latency-profile; needs --heldout)
model:      MODEL.onnx, a model folder (config.json), or --model FILE.py:FACTORY or
            package.module:FACTORY (a callable returning the nn.Module) with --weights CHECKPOINT
            (.safetensors; .pt/.pth read with weights_only=True), or --demo [torch|onnx]
"""

EXAMPLES = {
    "inspect": """\
examples:
  factorize-weights inspect --demo
  factorize-weights inspect --model net.py:build --weights net.safetensors --only 'encoder.*'
  factorize-weights inspect model.onnx --json > spectra.json""",
    "compress": """\
examples:
  factorize-weights compress --demo --budget params=0.3 --out demo-run
  factorize-weights compress --model net.py:build --weights net.safetensors --budget params=0.5 \\
      --heldout held.npz --calibration cal.npz --out small/
  factorize-weights compress model.onnx --keep-within 1.0 --heldout held.npz --selection pick.npz --out small/
  factorize-weights compress ... --budget params=0.4 --heldout held.npz --drop-limit 0.5 --out small/  # CI gate""",
    "sweep": """\
examples:
  factorize-weights sweep --demo --budgets params=0.8,0.6,0.4,0.2 --out demo-sweep
  factorize-weights sweep model.onnx --budgets params=0.9,0.7,0.5 --heldout held.npz --calibration cal.npz""",
    "profile": """\
examples:
  factorize-weights profile --demo --out cpu-profile.json          # on the target CPU
  factorize-weights profile model.onnx --heldout held.npz --latency-threads 2 --out board.json
  factorize-weights compress model.onnx --heldout held.npz --latency-threads 2 --budget latency=0.7 \\
      --latency-profile board.json --out small/                          # anywhere""",
    "evaluate": """\
examples:
  factorize-weights evaluate --demo --factorized demo-run
  factorize-weights evaluate --model net.py:build --weights net.safetensors --factorized small/ --heldout held.npz""",
}


#: The configuration fields the ``profile`` command offers (the layers chosen, the rank grid, the timing).
PROFILE_FIELDS = ("only", "skip", "rank_step", "min_rank", "latency_batch", "latency_threads", "latency_warmup",
                  "latency_repeats", "output")


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


def add_field(group, f: dataclasses.Field) -> None:
    """One configuration field as an option: its kind from the annotation, the rest from metadata."""
    m, default = f.metadata, getattr(_DEFAULTS, f.name)
    kind = str(f.type)
    shown = f" (default {default:g})" if isinstance(default, float) else (
        f" (default {default})" if isinstance(default, int) and not isinstance(default, bool) else "")
    kw = {"dest": f.name, "help": m["help"] + ("" if m.get("choices") else shown)}
    if kind.startswith("bool"):
        if default is False and "None" not in kind:
            group.add_argument(flag_of(f), action="store_true", **kw)
        else:  # on by default, or decided per model: --x / --no-x
            group.add_argument(flag_of(f), action=argparse.BooleanOptionalAction, default=default, **kw)
        return
    if kind.startswith("tuple"):
        group.add_argument(flag_of(f), action="append", default=[], metavar=m["metavar"], **kw)
        return
    typ = int if kind.startswith("int") else float if kind.startswith("float") else str
    group.add_argument(flag_of(f), type=typ, default=default, choices=m.get("choices"), metavar=m["metavar"], **kw)


_DEFAULTS = CompressConfig()  # the one source of every default


def _groups(p: argparse.ArgumentParser, command: str) -> dict:
    """The option groups of ``command``, in the order ``--help`` shows them."""
    return {name: p.add_argument_group(name) for name, commands in GROUPS.items()
            if command in commands and name != ADVANCED}


def _model_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("model")
    g.add_argument("model_path", nargs="?", metavar="MODEL",
                   help="MODEL.onnx, a model folder, or a PyTorch factory (same as --model)")
    g.add_argument("--model", metavar="SPEC", help="FILE.py:FACTORY, package.module:FACTORY, a model folder, or MODEL.onnx")
    g.add_argument("--weights", metavar="FILE",
                   help="checkpoint of a PyTorch factory (.safetensors, a sharded *.safetensors.index.json, .pt, .pth)")
    g.add_argument("--weights-key", metavar="KEY",
                   help="the key of a .pt/.pth checkpoint that holds the tensors (default: found, with a notice)")
    g.add_argument("--factory-weights", action="store_true",
                   help="use the weights the factory itself creates or loads (instead of --weights)")
    g.add_argument("--demo", nargs="?", const="torch", choices=tuple(demo.VARIANTS),
                   help="use the embedded demo model (PyTorch, or its ONNX export) and its held-out set")
    p.add_argument("--debug", action="store_true", help="show tracebacks")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bars")
    p.add_argument("-v", "--verbose", action="store_true", help="stage timings on stderr")
    p.add_argument("--json", action="store_true", help="print the report as JSON on stdout (nothing else)")


def _config_options(p: argparse.ArgumentParser, command: str, groups: dict) -> None:
    advanced = []
    for f in cli_fields(command):
        if f.metadata["group"] == ADVANCED:
            advanced.append(f)
        else:
            add_field(groups[f.metadata["group"]], f)
    if advanced:
        g = p.add_argument_group(ADVANCED)
        for f in advanced:
            add_field(g, f)


def _data_options(groups: dict) -> None:
    """The data and output folder of a run (not configuration: where things are)."""
    cal = next(g for name, g in groups.items() if name.startswith("calibration"))
    cal.add_argument("--calibration", metavar="DATA", help="calibration .npz (inputs[, labels]) or FILE.py:FUNCTION")
    ev = groups["evaluation and output"]
    ev.add_argument("--heldout", metavar="DATA", help="held-out .npz (inputs[, labels]) or FILE.py:FUNCTION")
    ev.add_argument("--out", metavar="DIR", help="write the results here (atomically)")
    ev.add_argument("--force", action="store_true", help="replace a non-empty --out folder")


def _run_file_option(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("run file")
    g.add_argument("--config", metavar="RUN.toml",
                   help="read any option of this command from a TOML file; flags on the command line win")


def _command(sub, name: str, help: str, func) -> argparse.ArgumentParser:
    # a one-line usage, so the examples come right after it (argparse would list every flag first)
    p = sub.add_parser(name, help=help, description=f"{help}\n\n{EXAMPLES[name]}", epilog=EPILOG,
                       usage=f"{PROG} {name} [MODEL] [options]  (every option below)",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.set_defaults(func=func, command=name)
    _model_options(p)
    return p


def build_parser(commands: dict) -> argparse.ArgumentParser:
    """The parser; ``commands`` maps each command name to the function that runs it."""
    parser = _Parser(prog=PROG, description="Split a trained model's dense layers into two thin low-rank factors.",
                     epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    parser._subcommands = sub.choices

    p = _command(sub, "inspect", "spectra and break-even ranks per layer; no rewrite", commands["inspect"])
    _config_options(p, "inspect", _groups(p, "inspect"))

    p = _command(sub, "compress", "plan ranks, rewrite, save, evaluate, report", commands["compress"])
    g = p.add_argument_group("plan")
    g.add_argument("--budget", metavar="KIND=VALUE", action=_Once,
                   help="params=F|N, flops=F|N, energy=F or error=F (one per run)")
    g.add_argument("--keep-within", type=float, metavar="D",
                   help="instead of --budget: the smallest params budget whose held-out drop is at most D, in the "
                        "metric's units (percentage points for top1/top5/agreement, absolute for cosine and mse)")
    g.add_argument("--selection", metavar="DATA",
                   help="with --keep-within: the data the budget is chosen on (.npz or FILE.py:FUNCTION; not the "
                        "held-out set); without it the held-out set chooses and its figure is optimistic")
    groups = _groups(p, "compress")
    _config_options(p, "compress", groups)
    _data_options(groups)
    g = p.add_argument_group("gate")
    g.add_argument("--drop-limit", type=float, metavar="D",
                   help="write everything, then exit 3 when the held-out drop exceeds D (metric units as --keep-within)")
    _run_file_option(p)

    p = _command(sub, "sweep", "several budgets in one go, spectra and calibration computed once", commands["sweep"])
    g = p.add_argument_group("plan")
    g.add_argument("--budgets", metavar="LIST", help="comma-separated budgets, e.g. params=0.8,0.6,0.4,0.2")
    g.add_argument("--save-models", action="store_true", help="also write each point's model folder under --out")
    groups = _groups(p, "sweep")
    _config_options(p, "sweep", groups)
    _data_options(groups)
    _run_file_option(p)

    p = _command(sub, "evaluate", "compare an original and a factorized model on a held-out set", commands["evaluate"])
    p.add_argument("--factorized", required=True, metavar="DIR", help="an output folder of compress")
    p.add_argument("--heldout", metavar="DATA", help="held-out .npz or FILE.py:FUNCTION (default with --demo: its own)")
    by_name = {f.name: f for f in dataclasses.fields(CompressConfig)}
    g = p.add_argument_group("evaluation")
    for name in ("metric", "output", "batch_size"):
        add_field(g, by_name[name])
    g = p.add_argument_group("latency (0 repeats: not timed)")
    for name in ("latency_batch", "latency_threads", "latency_repeats"):
        add_field(g, by_name[name])

    p = _command(sub, "profile", "time every layer, dense and factorized at a grid of ranks, on this CPU; write "
                 "the cost tables a latency budget plans with", commands["profile"])
    g = p.add_argument_group("what is timed")
    g.add_argument("--heldout", metavar="DATA", help="inputs to time on (.npz or FILE.py:FUNCTION; the first "
                   "--latency-batch samples; default with --demo: its own)")
    for name in PROFILE_FIELDS:
        add_field(g, by_name[name])
    g.add_argument("--out", metavar="FILE", help="the profile file to write (JSON; atomically)")
    g.add_argument("--force", action="store_true", help="replace an existing --out file")
    return parser
