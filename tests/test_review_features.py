"""Sweeps, accuracy-targeted search, the CI gate, run files, and the HTML reports in a real
headless browser."""

from __future__ import annotations

import csv
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conftest import run_cli
from factorize_weights.cli import main

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


run = run_cli


@pytest.fixture(scope="module")
def demo_sweep(tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "s"
    t0 = time.perf_counter()
    code = main(["sweep", "--demo", "--budgets", "params=0.8,0.6,0.4,0.2,0.1", "--out", str(out), "-q",
                 "--latency-repeats", "3", "--method", "svd"])
    assert code == 0
    return out, json.loads((out / "sweep.json").read_text()), time.perf_counter() - t0


def test_sweep_writes_its_four_files(demo_sweep):
    out, doc, _ = demo_sweep
    assert sorted(p.name for p in out.iterdir()) == ["sweep.csv", "sweep.html", "sweep.json", "sweep.md"]
    assert [p["budget"] for p in doc["points"]] == ["params=0.8", "params=0.6", "params=0.4", "params=0.2", "params=0.1"]
    rows = list(csv.DictReader((out / "sweep.csv").open()))
    assert len(rows) == 5 and float(rows[0]["metric_before"]) == doc["points"][0]["metric"]["before"]
    for p in doc["points"]:
        assert p["params_ratio_pct"] <= 100 * float(p["budget"].split("=")[1]) + 1e-9
        assert p["latency"]["after_ms"] > 0


def test_sweep_is_monotone_where_theory_says_so(demo_sweep):
    # Eckart-Young: each layer's error falls as its rank grows, and the allocator minimises the
    # summed squared relative weight error, so more parameters kept never gives more of it
    _, doc, _ = demo_sweep
    errors = [p["weight_error_squared_sum"] for p in doc["points"]]  # budgets in decreasing order
    assert all(a <= b + 1e-12 for a, b in zip(errors, errors[1:]))
    kept = [p["params_after"] for p in doc["points"]]
    assert kept == sorted(kept, reverse=True)


def test_sweep_reuses_the_spectra(tmp_path, monkeypatch):
    # one decomposition per layer for all the points (counted, not timed: a wall-clock comparison
    # flips on a busy machine)
    from factorize_weights import pipeline

    calls = []
    original = pipeline.decompose

    def counted(records, *args, **kwargs):
        out = original(records, *args, **kwargs)
        calls.extend(out)
        return out

    monkeypatch.setattr(pipeline, "decompose", counted)
    code = main(["sweep", "--demo", "--budgets", "params=0.8,0.4,0.1", "--out", str(tmp_path / "s"), "-q",
                 "--latency-repeats", "0", "--method", "svd"])
    assert code == 0
    doc = json.loads((tmp_path / "s" / "sweep.json").read_text())
    assert len(doc["points"]) == 3 and doc["wall_seconds"]["prepare"] > 0
    assert calls and len(calls) == len(set(calls))  # every layer decomposed exactly once


def test_sweep_save_models_and_bad_budget_lists(tmp_path, capsys):
    code, _, err = run(capsys, "sweep", "--demo", "--budgets", "params=0.5,0.3", "--save-models", "--out",
                       tmp_path / "s", "-q", "--latency-repeats", "0")
    assert code == 0, err
    assert (tmp_path / "s" / "params-0_5" / "model.safetensors").is_file()
    assert (tmp_path / "s" / "params-0_3" / "report.html").is_file()
    for budgets, message in (("0.5,0.3", "the first entry needs a kind"), ("params=0.5,params=0.5", "listed twice"),
                             ("params=0.5,2.5", "fraction must be in (0, 1]")):
        code, _, err = run(capsys, "sweep", "--demo", "--budgets", budgets)
        assert code == 2 and message in err, err


def test_keep_within_finds_a_budget_within_target(tmp_path, capsys):
    out = tmp_path / "run"
    code, stdout, err = run(capsys, "compress", "--demo", "--keep-within", "0.5", "--out", out, "-q",
                            "--latency-repeats", "0", "--method", "svd")
    assert code == 0, err
    report = json.loads((out / "report.json").read_text())
    search = report["search"]
    chosen = float(search["chosen"].split("=")[1])
    # re-measured on the written report: within the target
    assert report["budget"]["given"] == search["chosen"]
    assert -report["metric"]["delta"] <= 0.5
    assert search["evaluations"] == len(search["tried"]) >= 2 and search["unit"] == "percentage points"
    smaller = [t for t in search["tried"] if float(t["budget"].split("=")[1]) < chosen]
    # the next-smaller budget it tried exceeded the target
    assert smaller and not max(smaller, key=lambda t: float(t["budget"].split("=")[1]))["within"]
    assert "search: params=" in stdout


def test_keep_within_needs_heldout_and_one_budget(capsys, tmp_path):
    (tmp_path / "m.py").write_text("from torch import nn\ndef build():\n    return nn.Sequential(nn.Linear(8, 8))\n")
    code, _, err = run(capsys, "compress", "--model", f"{tmp_path}/m.py:build", "--factory-weights", "--keep-within", "1")
    assert code == 2 and "--keep-within needs --heldout" in err
    code, _, err = run(capsys, "compress", "--demo", "--keep-within", "1", "--budget", "params=0.5")
    assert code == 2 and "exactly one of --budget and --keep-within" in err


def test_drop_limit_gate_exits_3_after_writing_everything(tmp_path, capsys):
    out = tmp_path / "gate"
    code, _, err = run(capsys, "compress", "--demo", "--budget", "params=0.05", "--method", "svd", "--drop-limit", "1.0",
                       "--out", out, "-q", "--latency-repeats", "0")
    assert code == 3
    lines = err.strip().splitlines()
    # the gate is the last line; params=0.05 without data also earns the aggressive-plan warning
    assert "gate failed" in lines[-1] and "more than --drop-limit 1" in lines[-1]
    assert all(": warning: " in line for line in lines[:-1])
    assert (out / "report.json").is_file() and (out / "model.safetensors").is_file()
    code, _, _ = run(capsys, "compress", "--demo", "--budget", "params=0.5", "--drop-limit", "1.0", "-q",
                     "--latency-repeats", "0")
    assert code == 0


def test_run_file_options_flags_override_and_unknown_keys(tmp_path, capsys):
    run_file = tmp_path / "run.toml"
    run_file.write_text('demo = "torch"\nbudget = "params=0.3"\nrank-step = 8\nlatency_repeats = 0\n'
                        f'out = "{tmp_path / "o"}"\n')
    code, stdout, err = run(capsys, "compress", "--config", run_file, "--json", "-q")
    assert code == 0, err
    report = json.loads(stdout)
    assert report["budget"]["given"] == "params=0.3" and report["config"]["rank_step"] == 8
    assert report["sources"]["config_file"]["sha256"] and (tmp_path / "o" / "report.json").is_file()
    code, stdout, err = run(capsys, "compress", "--config", run_file, "--budget", "params=0.5", "--force", "--json", "-q")
    assert code == 0 and json.loads(stdout)["budget"]["given"] == "params=0.5"  # the flag wins
    run_file.write_text('demo = "torch"\nbudget = "params=0.3"\nbugdet = 2\n')
    code, _, err = run(capsys, "compress", "--config", run_file)
    assert code == 2 and "unknown key(s) bugdet" in err
    run_file.write_text("budget = \n")
    code, _, err = run(capsys, "compress", "--config", run_file)
    assert code == 2 and "not valid TOML" in err


def test_no_color_and_verbose(tmp_path):
    env = dict(os.environ, NO_COLOR="1")
    proc = subprocess.run([sys.executable, "-m", "factorize_weights", "compress", "--demo", "--budget", "params=9"],
                          capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 2 and "\x1b[" not in proc.stderr
    proc = subprocess.run([sys.executable, "-m", "factorize_weights", "compress", "--demo", "--budget", "params=0.5",
                           "-v", "-q", "--latency-repeats", "0"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and "stages: prepare" in proc.stderr


# ---------------------------------------------------------------- the HTML in a real browser

PROBE = """
<script>
window.addEventListener('load', () => {
  const sizes = Array.from(document.querySelectorAll('svg')).map(s => {
    const r = s.getBoundingClientRect(); return [Math.round(r.width), Math.round(r.height)]; });
  const res = performance.getEntriesByType('resource').map(e => e.name);
  const sections = Array.from(document.querySelectorAll('section[id]')).map(s => {
    const r = s.getBoundingClientRect();
    return [s.id, Math.round(r.height), s.querySelectorAll('tr').length]; });
  document.body.setAttribute('data-probe', JSON.stringify({svgs: sizes, resources: res, sections: sections}));
});
</script>
"""


def _browser(html_path: Path, tmp_path: Path):
    """Screenshot plus a DOM dump of a copy with a measuring script (the report has no scripts)."""
    flags = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic",
             f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1280,2000"]
    shot = tmp_path / "page.png"
    subprocess.run(flags + [f"--screenshot={shot}", html_path.as_uri()], capture_output=True, timeout=120, check=True)
    probed = tmp_path / "probed.html"
    probed.write_text(html_path.read_text().replace("</body>", PROBE + "</body>"))
    dom = subprocess.run(flags + ["--dump-dom", "--virtual-time-budget=3000", probed.as_uri()],
                         capture_output=True, text=True, timeout=120, check=True).stdout
    start = dom.index("data-probe=") + len("data-probe=") + 1
    import html as _html

    probe = json.loads(_html.unescape(dom[start : dom.index('"', start)]))
    return shot, probe


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install chromium); .ci/run installs it")
def test_report_html_renders_in_chromium_without_network(tmp_path, capsys):
    out = tmp_path / "run"
    code, _, err = run(capsys, "compress", "--demo", "--budget", "params=0.3", "--out", out, "-q", "--latency-repeats", "3")
    assert code == 0, err
    page = (out / "report.html").read_text()
    assert "<script" not in page and "<link" not in page and "@import" not in page
    for ref in ('src="http', "src='http", 'href="http', "href='http", "url(http"):
        assert ref not in page  # nothing fetched from anywhere
    shot, probe = _browser(out / "report.html", tmp_path)
    assert shot.stat().st_size > 20_000  # a real rendering, not a blank page
    assert probe["resources"] == []  # the page asked for nothing: no network, no files
    layers = json.loads((out / "report.json").read_text())["layers"]
    assert len(probe["svgs"]) == 2 + len(layers)  # overview, parameters chart, one spectrum figure per layer
    assert all(w > 100 and h > 50 for w, h in probe["svgs"])
    # the reviewer's sections are rendered, with rows: the flagged layers and the per-class table
    # (the demo's held-out set has 10 classes: a header row plus one row each)
    sections = {name: (height, rows) for name, height, rows in probe["sections"]}
    assert sections["review"][0] > 50 and sections["review"][1] >= 2
    assert sections["per-class"][1] == 11


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install chromium); .ci/run installs it")
def test_sweep_html_renders_in_chromium(tmp_path, demo_sweep):
    out, _, _ = demo_sweep
    shot, probe = _browser(out / "sweep.html", tmp_path)
    assert probe["resources"] == [] and len(probe["svgs"]) == 2  # metric vs params, metric vs latency
    page = (out / "sweep.html").read_text()
    assert "<td>original</td>" in page and "held-out top1" in page and "p10-p90" in page  # baseline, named metric
    assert "| original | 100.0% |" in (out / "sweep.md").read_text()
    assert all(w > 100 and h > 50 for w, h in probe["svgs"])


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install chromium); .ci/run installs it")
def test_report_html_of_a_hundred_layer_model_stays_navigable(tmp_path):
    # 100 linear layers: the page draws the 12 largest spectra, folds the per-layer chart away, and
    # still flags the layers to review
    import numpy as np
    import torch
    from torch import nn

    import factorize_weights as fw

    torch.manual_seed(0)
    model = nn.Sequential(*[nn.Sequential(nn.Linear(32, 32), nn.Tanh()) for _ in range(100)]).eval()
    held = fw.HeldOut(np.random.default_rng(0).standard_normal((32, 32)).astype(np.float32), None, "x")
    fw.compress(model, fw.CompressConfig(budget="params=0.5", quiet=True, latency_repeats=2), heldout=held,
                out=tmp_path / "run")
    page = (tmp_path / "run" / "report.html").read_text()
    assert "The 12 largest layers are plotted" in page and "<details><summary>show the chart</summary>" in page
    shot, probe = _browser(tmp_path / "run" / "report.html", tmp_path)
    assert probe["resources"] == [] and len(probe["svgs"]) == 2 + 12  # overview + folded chart + 12 spectra
    sections = {name: rows for name, _, rows in probe["sections"]}
    assert sections["review"] == 6  # header + the five layers with the largest output error


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install chromium); .ci/run installs it")
def test_report_html_shows_the_budget_search(tmp_path, capsys):
    out = tmp_path / "run"
    code, _, err = run(capsys, "compress", "--demo", "--keep-within", "0.5", "--out", out, "-q", "--latency-repeats", "0")
    assert code == 0, err
    _, probe = _browser(out / "report.html", tmp_path)
    sections = {name: rows for name, _, rows in probe["sections"]}
    tried = json.loads((out / "report.json").read_text())["search"]["tried"]
    assert sections["search"] == 1 + len(tried)  # header + one row per budget tried
    assert "optimistic" in (out / "report.html").read_text()


def test_the_terminal_summary_gives_each_count_its_own_share(tmp_path, capsys):
    # with layer 9 skipped the selected layers' share and the whole model's differ; both are
    # recomputed here from the report's own totals (report.json is the reference)
    code, out, err = run(capsys, "compress", "--demo", "--budget", "params=0.5", "--skip", "9", "-q",
                         "--latency-repeats", "0", "--out", tmp_path / "o")
    assert code == 0, err
    t = json.loads((tmp_path / "o" / "report.json").read_text())["totals"]
    line = next(x for x in out.splitlines() if x.startswith("parameters:"))
    selected = 100 * t["params_after"] / t["params_before"]
    whole = 100 * t["model_params_after"] / t["model_params_before"]
    assert abs(selected - whole) > 5
    assert f"selected layers {t['params_before']:,} -> {t['params_after']:,} ({selected:.1f}%)" in line
    assert f"whole model {t['model_params_before']:,} -> {t['model_params_after']:,} ({whole:.1f}%)" in line
