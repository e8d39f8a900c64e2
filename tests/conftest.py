"""Shared fixtures. Tests run on the CPU with one torch thread so timings and results repeat."""

from __future__ import annotations

import os

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


@pytest.fixture(autouse=True, scope="session")
def private_cache(tmp_path_factory):
    """Latency cost tables measured by a test are cached in a folder of the test session, never in
    the user's cache (costs.cache_path reads XDG_CACHE_HOME)."""
    old = os.environ.get("XDG_CACHE_HOME")
    os.environ["XDG_CACHE_HOME"] = str(tmp_path_factory.mktemp("cache"))
    yield
    if old is None:
        os.environ.pop("XDG_CACHE_HOME", None)
    else:
        os.environ["XDG_CACHE_HOME"] = old


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


def assert_float32_products_close(actual, expected, rows: int):
    """A Gram-like matrix formed from float32 rows (stats.py: products in float32 over at most
    PRODUCT_ROWS rows, sums in float64) against its float64 value: by the inner-product bound
    |fl(x^T y) - x^T y| <= gamma_k |x|^T |y| (Higham, "Accuracy and Stability of Numerical
    Algorithms", 2nd ed., eq. 3.5, gamma_k = k u / (1 - k u), u = 2^-24) and Cauchy-Schwarz, every
    entry is within gamma_k sqrt(G_ii G_jj), k = rows per product."""
    import numpy as np

    from factorize_weights.stats import PRODUCT_ROWS

    k = min(rows, PRODUCT_ROWS)
    u = 2.0 ** -24
    gamma = k * u / (1 - k * u)
    d = np.sqrt(np.abs(np.diag(expected)))
    assert np.all(np.abs(actual - expected) <= gamma * np.outer(d, d) + 1e-300), \
        float(np.max(np.abs(actual - expected) / np.maximum(np.outer(d, d), 1e-300)))
