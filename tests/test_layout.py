"""Guard rails on the code's shape (DESIGN.md, "Where things live"): no import cycle, no module over
the size budget, no model format tested by name outside ``backends/``, the linter clean, and the
examples in docstrings and the README running as written. These are checks of our own layout
rules, so they cite the design page, not an outside source."""

from __future__ import annotations

import ast
import doctest
import importlib
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "factorize_weights"
MAX_LINES = 500  # the size budget of one module (issue: "no module over 500 lines")


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = list(path.relative_to(ROOT).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


def _imports(name: str, path: Path, modules: dict) -> set[str]:
    """Every package module ``name`` imports, at the top or inside a function (relative imports
    resolved; ``from pkg import sub`` counts ``pkg.sub`` when it is a module)."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - node.level + 1]
                base = ".".join(anchor + ([base] if base else []))
            found.add(base)
            found.update(f"{base}.{a.name}" for a in node.names)
    return {m for m in found if m in modules and m != name}


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index, low, stack, on, out, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    sys.setrecursionlimit(max(sys.getrecursionlimit(), 10000))
    for v in graph:
        if v not in index:
            visit(v)
    return out


def test_no_import_cycle_anywhere_in_the_package():
    modules = _modules()
    graph = {name: _imports(name, path, modules) for name, path in modules.items()}
    # a package's __init__ importing its own submodules is how packages work, not a cycle, unless a
    # submodule imports the package back: drop only the downward edge from a package to its children
    for name in graph:
        graph[name] = {m for m in graph[name] if not m.startswith(name + ".")}
    assert _cycles(graph) == []


def test_the_cycle_finder_finds_a_planted_cycle():
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert _cycles(graph) == [["a", "b", "c"]]


def test_no_module_over_the_size_budget():
    sizes = {name: len(path.read_text(encoding="utf-8").splitlines()) for name, path in _modules().items()}
    assert {n: s for n, s in sizes.items() if s > MAX_LINES} == {}


FORMAT_NAMES = {"torch", "onnx"}


def _format_tests(tree: ast.AST) -> list[int]:
    """Lines where a value is compared with a format name, a backend's FORMAT is read in a test, or
    a backend's model class is tested with isinstance."""
    lines = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Compare):
            sides = [node.left, *node.comparators]
            if any(isinstance(s, ast.Constant) and s.value in FORMAT_NAMES for s in sides) or \
                    any(isinstance(s, ast.Attribute) and s.attr == "FORMAT" for s in sides):
                lines.append(node.lineno)
        elif isinstance(node, ast.Call) and getattr(node.func, "id", None) == "isinstance":
            if "OnnxModel" in ast.unparse(node) or "nn.Module" in ast.unparse(node):
                lines.append(node.lineno)
    return lines


def test_no_format_tested_by_name_outside_the_backends():
    found = {}
    for name, path in _modules().items():
        if name.startswith("factorize_weights.backends"):
            continue
        hits = _format_tests(ast.parse(path.read_text(encoding="utf-8")))
        if hits:
            found[name] = hits
    assert found == {}


def test_the_format_test_finder_finds_one():
    assert _format_tests(ast.parse("if backend.FORMAT != 'torch':\n    pass\n")) == [1]
    assert _format_tests(ast.parse("ok = isinstance(m, OnnxModel)\n")) == [1]


@pytest.mark.skipif(shutil.which("ruff") is None and importlib.util.find_spec("ruff") is None,
                    reason="ruff is not installed (pip install -e '.[test]' installs it)")
def test_the_linter_is_clean():
    # pyproject.toml [tool.ruff]: pyflakes, pycodestyle errors and warnings, line length 130
    run = subprocess.run([sys.executable, "-m", "ruff", "check", "factorize_weights", "tests", "scripts"],
                         cwd=ROOT, capture_output=True, text=True)
    assert run.returncode == 0, run.stdout + run.stderr


def test_docstring_examples_run_as_written():
    failed, tried = 0, 0
    for name in _modules():
        if name.endswith("__main__"):
            continue
        module = importlib.import_module(name)
        result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE, verbose=False)
        failed, tried = failed + result.failed, tried + result.attempted
    assert failed == 0 and tried > 0


def test_readme_python_examples_run_as_written(tmp_path, monkeypatch):
    # every ```python block of the README, in order, in one namespace, from a scratch folder
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", text, re.S)
    assert blocks
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    for block in blocks:
        exec(compile(block, "README.md", "exec"), namespace)  # noqa: S102 - the README's own examples
