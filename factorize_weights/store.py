"""The output folder: model.safetensors, plan.json, report.json, report.md — written atomically.

Everything is written into a fresh temporary folder next to the target and renamed into place in
one step, so a failed or interrupted run never leaves a half-written folder behind.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
from pathlib import Path

from ._version import __version__
from .allocate import Plan
from .backends import backend_for
from .config import CompressConfig
from .errors import InputError
from .plan_file import PLAN_FORMAT, PLAN_VERSION, plan_layers, read_plan  # noqa: F401 (read_plan: public)
from .records import LayerRecord
from .report import render_markdown

FILES = ("model.safetensors", "plan.json", "report.html", "report.json", "report.md")


def input_paths(sources: dict | None, *data) -> tuple:
    """Files a run reads (model, weights, run file, data): an output folder must not hold them."""
    sources = sources or {}
    paths = [sources.get("model"), sources.get("weights"), (sources.get("config_file") or {}).get("path")]
    if paths[0] and ":" in str(paths[0]) and not str(paths[0]).lower().endswith(".onnx"):
        paths[0] = str(paths[0]).rpartition(":")[0]
    paths += [d.source for d in data if d is not None]
    return tuple(p for p in paths if p and Path(str(p)).exists())


def check_out_dir(out: str | Path, force: bool, inputs: tuple = ()) -> None:
    """Refuse an existing non-empty folder (unless ``force``), a path that is a file, and a folder
    that holds any of ``inputs`` or the current folder (``--force`` would delete them)."""
    if str(out).strip() == "":
        raise InputError("--out: empty path")
    out = Path(out)
    if out.is_dir():
        root = out.resolve()
        for item in [Path.cwd(), *(Path(p) for p in inputs if p)]:
            try:
                item.resolve().relative_to(root)
            except ValueError:
                continue
            what = "the current folder" if item == Path.cwd() else f"the input {item}"
            raise InputError(f"--out {out}: holds {what}; replacing the folder would delete it (choose another --out)")
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a folder")
    if out.is_dir() and any(out.iterdir()) and not force:
        raise InputError(f"--out {out}: folder exists and is not empty (give --force to replace it)")
    parent = out.resolve().parent
    if not parent.is_dir():
        raise InputError(f"--out {out}: parent folder {parent} does not exist")
    if not os.access(parent, os.W_OK):
        raise InputError(f"--out {out}: parent folder {parent} is not writable")


def plan_dict(records: list[LayerRecord], plan: Plan, config: CompressConfig, method: str) -> dict:
    """plan.json: enough to rebuild the factorized structure from the original model."""
    layers = []
    for r in records:
        if r.skip_reason is not None:
            continue
        rank = plan.ranks[r.name]
        layers.append({
            "name": r.name,
            "kind": r.kind,
            "shape": list(r.weight_shape),
            "matrix_shape": list(r.matrix_shape),
            "rank": "dense" if rank is None else rank,
            "method": "dense" if rank is None else method,
        })
    return {
        "format": PLAN_FORMAT,
        "version": PLAN_VERSION,
        "tool_version": __version__,
        "budget": plan.budget.text,
        "method": method,
        "factor_split": config.split,
        "layers": layers,
    }


def _dump(path: Path, obj) -> None:
    path.write_text(json.dumps(obj, indent=2, allow_nan=False) + "\n", encoding="utf-8")


def write_model(model, folder: Path) -> list[str]:
    """The factorized model in its own format: model.safetensors (PyTorch) or model.onnx (ONNX,
    with model.onnx.data when the input kept its weights as external data)."""
    return backend_for(model).save_model(model, folder)


@contextlib.contextmanager
def atomic_folder(out: Path, force: bool = True):
    """Yield a fresh temporary folder next to ``out``; on success it replaces ``out`` in one rename
    (with the permissions the umask asks for), on any error it is removed and ``out`` untouched.
    Without ``force``, a non-empty ``out`` that appeared while the run worked (another run with
    the same ``--out``) is refused at the moment of the rename, not replaced."""
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.tmp-", dir=out.resolve().parent))
    umask = os.umask(0)
    os.umask(umask)
    try:
        yield tmp
        os.chmod(tmp, 0o777 & ~umask)  # mkdtemp makes a private folder
        for path in tmp.rglob("*"):
            os.chmod(path, (0o777 if path.is_dir() else 0o666) & ~umask)
        if not force and out.is_dir() and any(out.iterdir()):
            raise InputError(f"--out {out}: another run wrote this folder while this one worked; not replaced "
                             "(give --force to replace it)")
        if out.exists():
            trash = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.resolve().parent))
            os.replace(out, trash / "old")
            try:
                os.replace(tmp, out)
            except BaseException:
                os.replace(trash / "old", out)  # the previous result goes back where it was
                shutil.rmtree(trash, ignore_errors=True)
                raise
            shutil.rmtree(trash, ignore_errors=True)
        else:
            os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


# files of a model folder that hold weights (the run writes its own model.safetensors instead)
WEIGHT_SUFFIXES = (".safetensors", ".bin", ".pt", ".pth", ".ckpt", ".h5", ".msgpack", ".onnx")
# names the run itself writes
RUN_FILES = ("model.safetensors", "plan.json", "report.json", "report.md", "report.html", "model.onnx",
             "model.int8.onnx")


def folder_companions(source: Path, work: Path, taken: set) -> dict[str, Path]:
    """Copies (in ``work``) of a model folder's top-level files other than weights: ``config.json``,
    tokenizer files and the like, so the output folder is a model folder too (rebuilt by
    :func:`rebuild_folder`)."""
    out = {}
    for path in sorted(source.iterdir()):
        name = path.name
        if not path.is_file() or name in taken or name in RUN_FILES or name.endswith(WEIGHT_SUFFIXES) \
                or name.endswith(".index.json"):
            continue
        shutil.copy2(path, work / name)
        out[name] = work / name
    return out


def write_run_files(folder: Path, model, records, plan: Plan, report: dict, config: CompressConfig, *,
                    extra: dict[str, Path] | None = None, spectra: dict | None = None) -> None:
    """The model, plan.json, report.json, report.md and report.html into an existing folder."""
    write_model(model, folder)
    for name, src in (extra or {}).items():
        shutil.move(str(src), folder / name)
    # sizes on disk of what holds the model (every output shows them in MB); the report is the
    # caller's dict, so the terminal summary sees them too
    report["files"] = {p.name: p.stat().st_size for p in sorted(folder.iterdir())
                       if p.is_file() and (p.name.startswith("model.") or p.suffix == ".onnx")}
    _dump(folder / "plan.json", plan_dict(records, plan, config, report.get("method", "svd")))
    _dump(folder / "report.json", report)
    (folder / "report.md").write_text(render_markdown(report), encoding="utf-8")
    if spectra is not None:
        from .report_html import render_report_html

        (folder / "report.html").write_text(render_report_html(report, spectra), encoding="utf-8")


def write_run(out, model, records, plan: Plan, report: dict, config: CompressConfig, *, force: bool = False,
              extra: dict[str, Path] | None = None, spectra: dict | None = None) -> Path:
    """Write the model, plan.json, report.json, report.md, report.html (and ``extra`` files, moved
    in under their given names) into ``out`` atomically; return the folder."""
    out = Path(out)
    check_out_dir(out, force)
    try:
        with atomic_folder(out, force) as tmp:
            write_run_files(tmp, model, records, plan, report, config, extra=extra, spectra=spectra)
    except OSError as exc:
        raise _disk_error(out, exc) or exc
    return out


def _disk_error(out: Path, exc: OSError) -> InputError | None:
    """A full disk or quota is the environment, not a bug: one line naming --out and the space."""
    import errno

    if exc.errno not in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        return None
    free = shutil.disk_usage(out.resolve().parent).free
    return InputError(f"--out {out}: no space left on the device while writing the results ({free / 2**20:.1f} MiB "
                      "free; nothing was left behind)")


def load_factorized(model, folder: str | Path):
    """Rebuild the factorized model from the user's *original* model object plus an output folder.

    For an ONNX run the folder's ``model.onnx`` is the factorized model and is loaded as it is.
    For PyTorch the original is not modified. Layer names, kinds and shapes in ``plan.json`` must match the
    model; the weights in ``model.safetensors`` are then loaded strictly, so the result computes
    exactly what the saved run's factorized model computed.
    """
    from .backends import rebuild

    folder = Path(folder)
    return rebuild(model, folder, plan_layers(folder))


def open_model(spec: str, weights: str | None = None, *, weights_key: str | None = None,
               factory_weights: bool = False):
    """The model named as on the command line: an ONNX file, a model folder, or ``FILE.py:FACTORY``
    / ``package.module:FACTORY`` with its checkpoint (``weights``; or ``factory_weights=True``
    when the factory loads its own). With :func:`load_factorized` it rebuilds a saved result::

        small = load_factorized(open_model("net.py:build_net", weights="net.safetensors"), "compressed/")
    """
    from .backends.opening import open_model as _open

    return _open(spec, weights=weights, weights_key=weights_key, factory_weights=factory_weights)[0]
