"""plan.json: the one file that says how a result folder's model is built from the original (which
layers are split, at which rank). Written by :mod:`.store`, read here by every backend's rebuild;
it imports no backend, so backends and the store both use it."""

from __future__ import annotations

import json
from pathlib import Path

from .errors import InputError

PLAN_FORMAT = "factorize-weights/plan"
PLAN_VERSION = 1


def read_plan(folder: str | Path) -> dict:
    folder = Path(folder)
    path = folder / "plan.json"
    if not path.is_file():
        raise InputError(f"{folder}: no plan.json (is this a factorize-weights output folder?)")
    try:
        plan = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not valid JSON ({exc})") from exc
    if not isinstance(plan, dict) or plan.get("format") != PLAN_FORMAT:
        raise InputError(f"{path}: not a factorize-weights plan (format field missing or different)")
    if plan.get("version", 0) > PLAN_VERSION:
        raise InputError(f"{path}: plan version {plan.get('version')} is newer than this tool understands ({PLAN_VERSION})")
    return plan


def plan_layers(folder: str | Path) -> list[dict]:
    """The validated ``layers`` entries of ``folder/plan.json`` (name, kind, shape, rank each)."""
    folder = Path(folder)
    layers = read_plan(folder).get("layers")
    if not isinstance(layers, list):
        raise InputError(f"{folder}/plan.json: no 'layers' list (a damaged or foreign result folder)")
    for i, entry in enumerate(layers):
        missing = [f for f in ("name", "kind", "shape", "rank") if not isinstance(entry, dict) or f not in entry]
        if missing:
            raise InputError(f"{folder}/plan.json: layer entry {i} lacks the field(s) {', '.join(missing)} "
                             "(a damaged result folder)")
    return layers
