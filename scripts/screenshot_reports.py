"""Screenshots of report.html and sweep.html as headless Chromium renders them.

Builds, in a temporary folder, the demo's report.html (``compress --demo --budget params=0.3``) and
sweep.html (``sweep --demo --budgets params=0.8,0.5,0.3,0.2``), and the report of a 40-layer
stack of Linear layers with random weights (``--many``), and writes

    reports/report_html_demo.png, reports/sweep_html_demo.png, reports/report_html_many_layers.png

Needs Chromium (Debian: ``apt-get install -y chromium``). About a minute on 2 cores.

    python scripts/screenshot_reports.py [--keep DIR] [--no-many]
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def chromium() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if not found:
        sys.exit("Chromium is not installed (Debian: apt-get install -y chromium)")
    return found


def screenshot(page: Path, png: Path, size: str = "1200,3000") -> None:
    with tempfile.TemporaryDirectory() as profile:
        subprocess.run([chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", f"--window-size={size}",
                        f"--screenshot={png}", page.resolve().as_uri()], check=True, capture_output=True, timeout=180)
    print(f"wrote {png.relative_to(ROOT) if png.is_relative_to(ROOT) else png}")


def cli(*args: str) -> None:
    subprocess.run([sys.executable, "-m", "factorize_weights", *args, "-q", "--force"], check=True, cwd=ROOT,
                   stdout=subprocess.DEVNULL)


def many_layer_report(out: Path, layers: int = 40) -> Path:
    """A stack of ``layers`` Linear layers of mixed widths with random weights, compressed to half
    its parameters with the Python API (held-out inputs are random too: output errors, no labels)."""
    import numpy as np
    import torch
    from torch import nn

    import factorize_weights as fw

    torch.manual_seed(0)
    rng = np.random.default_rng(0)
    widths = [64] + [int(w) for w in rng.choice([32, 48, 64, 96], size=layers)]
    blocks = []
    for a, b in zip(widths[:-1], widths[1:]):
        blocks += [nn.Linear(a, b), nn.Tanh()]
    model = nn.Sequential(*blocks).eval()
    held = fw.HeldOut(rng.standard_normal((64, widths[0])).astype(np.float32), None, "random inputs")
    fw.compress(model, fw.CompressConfig(budget="params=0.5", quiet=True, latency_repeats=3), heldout=held, out=out)
    return out / "report.html"


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--keep", type=Path, help="build the pages in this folder (kept) instead of a temporary one")
    ap.add_argument("--no-many", action="store_true", help="skip the many-layer report")
    ap.add_argument("--reports", type=Path, default=ROOT / "reports", help="where the PNG files go")
    args = ap.parse_args(argv)
    chromium()
    with tempfile.TemporaryDirectory() as tmp:
        work = args.keep or Path(tmp)
        work.mkdir(parents=True, exist_ok=True)
        cli("compress", "--demo", "--budget", "params=0.3", "--out", str(work / "compress"))
        cli("sweep", "--demo", "--budgets", "params=0.8,0.5,0.3,0.2", "--out", str(work / "sweep"))
        args.reports.mkdir(exist_ok=True)
        screenshot(work / "compress" / "report.html", args.reports / "report_html_demo.png")
        screenshot(work / "sweep" / "sweep.html", args.reports / "sweep_html_demo.png", "1200,1800")
        if not args.no_many:
            page = many_layer_report(work / "many")
            screenshot(page, args.reports / "report_html_many_layers.png")


if __name__ == "__main__":
    main()
