"""Loading the user's model: factories (FILE.py:FACTORY or module:FACTORY), Hugging Face-style
folders, and checkpoints (safetensors, sharded with an index, wrapped .pt)."""

from __future__ import annotations

import importlib
import importlib.util
import sys
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Callable

import torch
from torch import nn

from ...errors import InputError, readable_file

# ---------------------------------------------------------------- loading the user's model


def load_factory(spec: str) -> Callable[[], nn.Module]:
    """Resolve ``path/to/file.py:factory`` or ``package.module:factory`` to the callable."""
    target, sep, attr = spec.rpartition(":")
    if not sep or not target or not attr:
        raise InputError(
            f"--model {spec!r}: expected FILE.py:FACTORY or package.module:FACTORY "
            "(a callable that returns the nn.Module)"
        )
    if target.endswith(".py") or "/" in target or "\\" in target:
        path = readable_file(target, f"--model {spec!r}:", "Python file")
        name = f"_factorize_weights_user_{abs(hash(str(path.resolve())))}"
        try:
            module_spec = importlib.util.spec_from_file_location(name, path)
            module = importlib.util.module_from_spec(module_spec)
            sys.modules[name] = module
            module_spec.loader.exec_module(module)
        except Exception as exc:  # the user's file failed to import
            raise InputError(f"--model {spec!r}: importing {target} raised {_describe(exc)}") from exc
    else:
        try:
            module = importlib.import_module(target)
        except Exception as exc:
            raise InputError(f"--model {spec!r}: cannot import {target}: {_describe(exc)}") from exc
    factory = getattr(module, attr, None)
    if not callable(factory):
        raise InputError(f"--model {spec!r}: {target} has no callable named {attr!r}")
    return factory


def build_model(spec: str, weights: str | Path | None = None, *, weights_key: str | None = None) -> nn.Module:
    """Call the factory, check it returned an ``nn.Module``, load ``weights`` strictly, eval()."""
    factory = load_factory(spec)
    try:
        model = factory()
    except SystemExit as exc:  # a factory must return a model, not end the process (a pipeline would read 0)
        raise InputError(f"--model {spec!r}: the factory called sys.exit({exc.code!r}) instead of returning a model") from exc
    except Exception as exc:
        raise InputError(f"--model {spec!r}: the factory raised {_describe(exc)}") from exc
    if not isinstance(model, nn.Module):
        raise InputError(f"--model {spec!r}: the factory returned {type(model).__name__}, not an nn.Module")
    if weights is not None:
        load_weights(model, weights, key=weights_key)
    return model.eval()


def load_pretrained(folder: str | Path) -> nn.Module:
    """A Hugging Face-style model folder (``config.json`` plus weights saved by ``save_pretrained``)
    loaded through ``transformers`` from local files only: the class named in the config's
    ``architectures`` (so a classifier keeps its head), else ``AutoModel``. Never any network.
    A folder ``compress`` wrote from such a folder (``plan.json`` next to ``config.json``) is
    rebuilt from its config, then its factor pairs and weights (:func:`.layers.rebuild`)."""
    import os

    folder = Path(folder)
    if not (folder / "plan.json").is_file() and _is_result_report(folder / "report.json"):
        raise InputError(f"--model {folder}: a factorize-weights result folder (report.json) without its plan.json, so "
                         "its factorized layers cannot be rebuilt; restore plan.json, or give the original model folder")
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # local files only, whatever the environment says
    try:
        import transformers
    except ImportError as exc:
        raise InputError(f"--model {folder}: a Hugging Face model folder needs the optional package 'transformers' "
                         "(pip install 'factorize-weights[hf]')") from exc
    try:
        config = transformers.AutoConfig.from_pretrained(str(folder), local_files_only=True)
        names = getattr(config, "architectures", None) or []
        cls = getattr(transformers, names[0], None) if names else None
        if (folder / "plan.json").is_file():  # a folder this tool wrote: the architecture from the config,
            model = cls(config) if cls is not None else transformers.AutoModel.from_config(config)
        else:
            model = _with_all_weights(transformers, cls, folder, names)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"--model {folder}: not a loadable model folder ({_describe(exc)})") from exc
    if (folder / "plan.json").is_file():  # then its factor pairs and every weight from model.safetensors
        from ...plan_file import plan_layers
        from .layers import rebuild

        return rebuild(model.eval(), folder, plan_layers(folder))
    return model.eval()


def _is_result_report(path: Path) -> bool:
    """Whether ``path`` is the report.json a compress run writes (its top-level fields)."""
    import json

    try:
        report = json.loads(path.read_text(encoding="utf-8")) if path.is_file() else None
    except (OSError, ValueError):
        return False
    return isinstance(report, dict) and {"tool_version", "totals", "layers"} <= set(report)


def _with_all_weights(transformers, cls, folder: Path, names: list[str]) -> nn.Module:
    """The config's class with every weight from the folder. A folder whose config names a class
    with a head its weights do not hold (a sentence-embedding folder saved from a masked-LM config:
    ``lm_head`` missing) would get that head randomly initialized; the base model (``AutoModel``)
    is loaded instead when it finds every weight, with a notice, and a folder that lacks weights
    even for that is refused: compressing or scoring random weights means nothing."""
    quiet = transformers.logging.get_verbosity()
    bars = transformers.utils.logging.is_progress_bar_enabled()
    transformers.logging.set_verbosity_error()  # the missing keys are said here, in one line
    transformers.utils.logging.disable_progress_bar()  # the tool's own bars say what runs
    try:
        model, info = (cls or transformers.AutoModel).from_pretrained(str(folder), local_files_only=True,
                                                                      output_loading_info=True)
        missing = list(info.get("missing_keys") or [])
        if missing and cls is not None:
            base, base_info = transformers.AutoModel.from_pretrained(str(folder), local_files_only=True,
                                                                     output_loading_info=True)
            if not base_info.get("missing_keys"):
                warnings.warn(CheckpointNotice(
                    f"--model {folder}: config.json names {names[0]}, but the weights hold no {missing[0]}"
                    + (f" (and {len(missing) - 1} more of its parameters)" if len(missing) > 1 else "")
                    + ": loaded the base model "
                    + f"{type(base).__name__} instead, without that head"))
                return base
    finally:
        transformers.logging.set_verbosity(quiet)
        if bars:
            transformers.utils.logging.enable_progress_bar()
    if missing:
        more = f" and {len(missing) - 1} more of its parameters" if len(missing) > 1 else ""
        raise InputError(f"--model {folder}: the weights hold no {missing[0]}{more} ({type(model).__name__}); they "
                         "would be random, so nothing is compressed")
    return model


class CheckpointNotice(UserWarning):
    """Something about a checkpoint the user should know (a key unwrapped); the CLI prints it."""


#: Keys under which training scripts commonly nest a state dict (common practice), in the order tried.
NESTED_KEYS = ("state_dict", "model_state_dict", "model", "module", "net", "network", "weights", "params")


def _is_tensor_map(value) -> bool:
    return isinstance(value, dict) and bool(value) and all(isinstance(v, torch.Tensor) for v in value.values())


class ShardedCheckpoint(Mapping):
    """The tensors of a sharded safetensors checkpoint (``*.safetensors.index.json`` plus shards),
    read one tensor at a time: shapes come from the shard headers, values on access."""

    def __init__(self, index: Path):
        import json

        try:
            weight_map = json.loads(index.read_text(encoding="utf-8"))["weight_map"]
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise InputError(f"--weights {index}: not a safetensors index (no readable 'weight_map': "
                             f"{type(exc).__name__})") from exc
        bad = next((f"{k!r} -> {v!r}" for k, v in weight_map.items() if not isinstance(v, str)), None) \
            if isinstance(weight_map, dict) else f"a {type(weight_map).__name__}"
        if bad:
            raise InputError(f"--weights {index}: 'weight_map' must map each tensor name to its shard's file name "
                             f"(got {bad}); write the index with save_pretrained")
        self.index = index
        self.files = {name: index.parent / shard for name, shard in weight_map.items()}
        missing = sorted({str(f) for f in self.files.values() if not f.is_file()})
        if missing:
            raise InputError(f"--weights {index}: shard file {missing[0]} is missing ({len(missing)} missing)")

    def _read(self, name: str, part: Callable):
        """``part(file, name)`` from the shard the index names for ``name``; a shard that is not
        safetensors, or lacks the tensor, is refused naming both files."""
        from safetensors import safe_open

        try:
            with safe_open(str(self.files[name]), framework="pt") as f:
                return part(f, name)
        except Exception as exc:  # safetensors raises its own error types (a damaged header, a missing tensor)
            raise InputError(f"--weights {self.index}: shard {self.files[name].name} cannot give tensor {name!r} "
                             f"({_describe(exc)}); the shard is damaged or the index names the wrong file") from exc

    def shape(self, name: str) -> tuple:
        return self._read(name, lambda f, n: tuple(f.get_slice(n).get_shape()))

    def __getitem__(self, name: str) -> torch.Tensor:
        return self._read(name, lambda f, n: f.get_tensor(n))

    def __iter__(self):
        return iter(self.files)

    def __len__(self):
        return len(self.files)


def read_checkpoint(path: str | Path, key: str | None = None):
    """A name -> tensor mapping from ``.safetensors``, a sharded safetensors index
    (``*.safetensors.index.json``, read lazily), or ``.pt``/``.pth``/``.bin`` read with
    ``torch.load(weights_only=True)`` (which refuses arbitrary pickled objects). A checkpoint that
    nests its tensors under one key (``{'model': state_dict, 'epoch': 3}``) is unwrapped: ``key``
    names it, else the first of :data:`NESTED_KEYS` that holds tensors is taken, with a notice."""
    import warnings

    path = readable_file(path, "--weights", "checkpoint file")
    if path.name.lower().endswith(".index.json"):
        if key is not None:
            raise InputError(f"--weights-key {key!r}: the sharded index {path} names tensors, not keys to unwrap; "
                             "leave --weights-key out")
        return ShardedCheckpoint(path)
    suffix = path.suffix.lower()
    try:
        if suffix == ".safetensors":
            from safetensors.torch import load_file

            state = load_file(str(path))
        elif suffix in (".pt", ".pth", ".bin"):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # torch's own warnings about the file format
                state = torch.load(str(path), map_location="cpu", weights_only=True)
        else:
            raise InputError(f"--weights {path}: expected a .safetensors, .safetensors.index.json, .pt or .pth file")
    except InputError:
        raise
    except Exception as exc:
        if suffix != ".safetensors" and "weights_only" in str(exc):  # torch refused a pickled object
            raise InputError(f"--weights {path}: holds pickled Python objects besides tensors, which this tool never "
                             "unpickles; save the weights with safetensors or torch.save(model.state_dict())") from exc
        raise InputError(f"--weights {path}: cannot be read as {suffix} ({_describe(exc)})") from exc
    if not isinstance(state, dict):
        raise InputError(f"--weights {path}: holds a {type(state).__name__}, not a mapping of tensor names to tensors")
    if key is not None:
        if not _is_tensor_map(state.get(key)):
            raise InputError(f"--weights-key {key!r}: {path} has no mapping of tensors under that key "
                             f"(top-level keys: {', '.join(map(str, list(state)[:8]))})")
        return state[key]
    if _is_tensor_map(state):
        return state
    nested = [k for k in NESTED_KEYS if _is_tensor_map(state.get(k))]
    others = [k for k in state if _is_tensor_map(state.get(k))]
    if nested or others:
        chosen = (nested or others)[0]
        warnings.warn(CheckpointNotice(
            f"--weights {path}: the tensors are under the key {chosen!r}; using them "
            f"(other keys: {', '.join(str(k) for k in state if k != chosen)[:200] or 'none'}; --weights-key picks another)"))
        return state[chosen]
    raise InputError(f"--weights {path}: expected a mapping of tensor names to tensors; found keys "
                     f"{', '.join(map(str, list(state)[:8]))} and none of them holds tensors")


def load_weights(model: nn.Module, path: str | Path, *, key: str | None = None) -> None:
    """Load a checkpoint into ``model``; every key and shape must match. Sharded checkpoints are
    copied one tensor at a time."""
    state = read_checkpoint(path, key)
    shape_of = state.shape if isinstance(state, ShardedCheckpoint) else (lambda k: tuple(state[k].shape))
    own = model.state_dict()
    missing = [k for k in own if k not in state]
    unexpected = [k for k in state if k not in own]
    wrong = [
        f"{k} {shape_of(k)} vs model {tuple(own[k].shape)}"
        for k in own
        if k in state and shape_of(k) != tuple(own[k].shape)
    ]
    if not isinstance(state, ShardedCheckpoint):
        for k in own:  # float16/bfloat16 into float32 is fine; integers into floats are not weights
            if k in state and own[k].is_floating_point() and not state[k].is_floating_point():
                raise InputError(f"--weights {path}: tensor {k!r} is {str(state[k].dtype).removeprefix('torch.')} "
                                 f"but the model's is {str(own[k].dtype).removeprefix('torch.')} (a quantized "
                                 "checkpoint? give the floating-point weights)")
    if missing or unexpected or wrong:
        parts = []
        if missing:
            parts.append(f"{len(missing)} missing (e.g. {', '.join(missing[:3])})")
        if unexpected:
            parts.append(f"{len(unexpected)} unexpected (e.g. {', '.join(unexpected[:3])})")
        if wrong:
            parts.append(f"{len(wrong)} with other shapes (e.g. {'; '.join(wrong[:2])})")
        raise InputError(f"--weights {path}: tensors do not match the model: {'; '.join(parts)}")
    if isinstance(state, ShardedCheckpoint):
        with torch.no_grad():
            for name, target in own.items():
                target.copy_(state[name])  # state_dict() tensors share storage with the model
        return
    model.load_state_dict(state, strict=True)


def _describe(exc: BaseException) -> str:
    import re

    text = re.sub(r"\x1b\[[0-9;]*m", "", str(exc)).strip().splitlines()  # torch colours some errors
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


