"""Shared fixtures. Tests run on the CPU with one torch thread so timings and results repeat."""

from __future__ import annotations

import numpy as np
import pytest
import torch

torch.set_num_threads(1)


def planted(m: int, n: int, singular_values, seed: int = 0) -> np.ndarray:
    """An m x n matrix with exactly the given singular values (random orthonormal U, V)."""
    rng = np.random.default_rng(seed)
    r = len(singular_values)
    u, _ = np.linalg.qr(rng.standard_normal((m, r)))
    v, _ = np.linalg.qr(rng.standard_normal((n, r)))
    return (u * np.asarray(singular_values, dtype=float)) @ v.T


def run_cli(capsys, *argv):
    """Run the CLI in-process; (exit code, stdout, stderr)."""
    from factorize_weights.cli import main

    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


@pytest.fixture(autouse=True)
def validate_every_report(monkeypatch):
    """Every report.json written and every --json report printed is checked against the JSON
    Schema the package ships (jsonschema is the validator)."""
    import jsonschema

    from factorize_weights import cli, report, store, sweep

    schemas = {name: report.schema(name) for name in ("report", "sweep")}
    real_write, real_print, real_sweep_write = store.write_run_files, cli.commands._print_json, sweep._write_sweep

    def write_run_files(folder, model, records, plan, rep, *args, **kwargs):
        jsonschema.validate(rep, schemas["report"])
        return real_write(folder, model, records, plan, rep, *args, **kwargs)

    def print_json(obj):
        if "layers" in obj and "budget" in obj:
            jsonschema.validate(obj, schemas["report"])
        elif "points" in obj:
            jsonschema.validate(obj, schemas["sweep"])
        return real_print(obj)

    def write_sweep(out, doc, *args, **kwargs):
        jsonschema.validate(doc, schemas["sweep"])
        return real_sweep_write(out, doc, *args, **kwargs)

    monkeypatch.setattr(store, "write_run_files", write_run_files)
    monkeypatch.setattr(cli.commands, "_print_json", print_json)
    monkeypatch.setattr(sweep, "_write_sweep", write_sweep)
