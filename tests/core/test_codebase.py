"""Rules of the code base that a test can hold: the core never imports the screens nor the
renderers, and the linter and type checker pass (one command, ``pytest``, runs every check;
common practice).
"""

from __future__ import annotations

import pkgutil
import subprocess
import sys
from pathlib import Path

import triage.core

ROOT = Path(__file__).resolve().parents[2]


def test_core_modules_import_no_textual_and_no_screens() -> None:
    # The headless core is what the CLI, the tests and other programs use: importing any of its
    # modules must not pull in Textual or triage.tui (nor must the CLI entry point, which
    # imports the screens only for `review` and `demo`).
    modules = [f"triage.core.{m.name}" for m in pkgutil.iter_modules(triage.core.__path__)]
    assert len(modules) >= 15
    code = (
        "import importlib, sys\n"
        f"for name in {[*modules, 'triage.cli']!r}:\n"
        "    importlib.import_module(name)\n"
        "bad = sorted(m for m in sys.modules if m.split('.')[0] == 'textual'"
        " or m.startswith('triage.tui'))\n"
        "print(','.join(bad))\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120
    )
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == ""


def test_core_modules_import_no_renderers() -> None:
    # Renderers (triage.render) format and write what the core computes; the core never
    # depends on them, so the model can change without a renderer in the way and back.
    modules = [f"triage.core.{m.name}" for m in pkgutil.iter_modules(triage.core.__path__)]
    code = (
        "import importlib, sys\n"
        f"for name in {modules!r}:\n"
        "    importlib.import_module(name)\n"
        "print(','.join(sorted(m for m in sys.modules if m.startswith('triage.render'))))\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120
    )
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == ""


#: Modules that take a review cycle (and the cycle itself): the model below them never
#: imports them, so the cycle is assembled in one place (DEVELOPERS.md, "Architecture").
CYCLE_AND_ABOVE = frozenset(
    {"triage.core.cycle", "triage.core.review", "triage.core.export", "triage.core.report"}
    | {"triage.core.decide"}
)


def _imported(path: Path) -> set[str]:
    """Every ``triage...`` module a file imports, at its top or inside a function."""
    import ast

    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
            names.add(node.module)
            names.update(f"{node.module}.{a.name}" for a in node.names)
    return {n for n in names if n.startswith("triage.")}


def test_the_model_below_the_cycle_never_imports_it() -> None:
    core = ROOT / "triage" / "core"
    files = [
        p
        for p in core.rglob("*.py")
        if p.stem not in {m.rsplit(".", 1)[1] for m in CYCLE_AND_ABOVE} or p.parent != core
    ]
    assert len(files) >= 20
    offending = {str(p.relative_to(ROOT)): sorted(_imported(p) & CYCLE_AND_ABOVE) for p in files}
    assert {k: v for k, v in offending.items() if v} == {}
    # And the test can see an import where there is one.
    assert "triage.core.cycle" in _imported(core / "review.py")


def test_ruff_lint_and_format() -> None:
    # Configuration in pyproject.toml ([tool.ruff]).
    for args in (
        ["check", "triage", "tests", "sample"],
        ["format", "--check", "triage", "tests", "sample"],
    ):
        result = subprocess.run(
            [sys.executable, "-m", "ruff", *args],
            capture_output=True,
            text=True,
            cwd=ROOT,
            timeout=300,
        )
        assert result.returncode == 0, result.stdout + result.stderr


def test_mypy() -> None:
    # Configuration in pyproject.toml ([tool.mypy]).
    result = subprocess.run(
        [sys.executable, "-m", "mypy", "triage"],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=600,
    )
    assert result.returncode == 0, result.stdout + result.stderr
