"""The generated references are fresh: docs/cli.md from the argument parser, docs/report-fields.md
from the JSON Schemas (scripts/gen_docs.py writes both). A project rule, no outside source."""

from __future__ import annotations

import importlib.util
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _gen():
    spec = importlib.util.spec_from_file_location("gen_docs", ROOT / "scripts" / "gen_docs.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_generated_references_are_fresh():
    assert _gen().stale() == [], "run python scripts/gen_docs.py"


def test_every_option_is_in_the_cli_reference():
    from factorize_weights.cli import build_parser

    text = (ROOT / "docs" / "cli.md").read_text(encoding="utf-8")
    parser = build_parser()
    for command, sub in parser._subcommands.items():
        for action in sub._actions:
            for flag in action.option_strings:
                assert flag in text, (command, flag)


def test_every_report_field_is_in_the_field_reference():
    from factorize_weights import report

    text = (ROOT / "docs" / "report-fields.md").read_text(encoding="utf-8")
    for name in report.schema("report")["properties"]:
        assert f"| `{name}` |" in text, name
