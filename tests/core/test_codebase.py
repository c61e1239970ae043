"""Rules of the code base that a test can hold: the core never imports the screens nor the
renderers, and the linter and type checker pass (one command, ``pytest``, runs every check;
common practice).
"""

from __future__ import annotations

import pkgutil
import re
import subprocess
import sys
from pathlib import Path

import triage.core

ROOT = Path(__file__).resolve().parents[2]


def _loaded_after_importing(modules: list[str], *prefixes: str) -> str:
    """The modules under ``prefixes`` that importing ``modules`` loads, in a fresh interpreter."""
    code = (
        "import importlib, sys\n"
        f"for name in {modules!r}:\n"
        "    importlib.import_module(name)\n"
        f"print(','.join(sorted(m for m in sys.modules if m.startswith({prefixes!r}))))\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120
    )
    assert result.returncode == 0, result.stderr
    return result.stdout.strip()


def test_core_modules_import_no_textual_and_no_screens() -> None:
    # The headless core is what the CLI, the tests and other programs use: importing any of its
    # modules must not pull in Textual or triage.tui (nor must the CLI entry point, which
    # imports the screens only for `review` and `demo`).
    modules = [f"triage.core.{m.name}" for m in pkgutil.iter_modules(triage.core.__path__)]
    assert len(modules) >= 15
    assert _loaded_after_importing([*modules, "triage.cli"], "textual", "triage.tui") == ""
    # The check sees Textual where it is loaded.
    assert "textual" in _loaded_after_importing(["triage.tui.app"], "textual").split(",")


def test_core_modules_import_no_renderers() -> None:
    # Renderers (triage.render) format and write what the core computes; the core never
    # depends on them, so the model can change without a renderer in the way and back.
    modules = [f"triage.core.{m.name}" for m in pkgutil.iter_modules(triage.core.__path__)]
    assert _loaded_after_importing(modules, "triage.render") == ""


#: Modules that take a review cycle (and the cycle itself): the model below them never
#: imports them, so the cycle is assembled in one place (DEVELOPERS.md, "Architecture").
CYCLE_AND_ABOVE = frozenset(
    {"triage.core.cycle", "triage.core.review", "triage.core.export", "triage.core.report"}
    | {"triage.core.decide", "triage.core.group_review"}
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


# ---- sources are cited inside the repository -------------------------------------------------

#: Notes that once lived beside the repository, and the folder they lived in. A newcomer cannot
#: open them, so a citation names the published source or a page in docs/ (docs/sources.md).
OUTSIDE_NOTES = re.compile(
    r"reliability\.md|reliability §|forecast-methods|methods reference|performance-notes"
    r"|STYLE\.md|shared/reference|\.\./shared|/shared/",
    re.IGNORECASE,
)
#: A Markdown file named anywhere in a comment, a docstring or a page.
MARKDOWN_NAME = re.compile(r"(?<![\w./-])((?:\.{1,2}/)*[\w-]+(?:/[\w.-]+)*\.md)\b")
#: A path that climbs out of the folder it is written in.
CLIMBING_PATH = re.compile(r"(?<![\w.])(?:\.\./)+[\w.-]+(?:/[\w.-]+)*")
#: A pointer into docs/sources.md and the sections it names (§4.2, §7.1-§7.2, §5 and §7).
SOURCES_POINTER = re.compile(r"docs/sources\.md`?((?:[ ,;:-]*(?:and )?§\d+(?:\.\d+)?)+)")
SOURCES_HEADING = re.compile(r"^#{2,3} (\d+(?:\.\d+)?)\.? ", re.MULTILINE)


def _text_files() -> list[Path]:
    """The repository's own source and documentation files (tracked by git when it can tell)."""
    suffixes = {".py", ".md", ".toml", ".cfg", ".ini", ".sh"}
    try:
        listed = subprocess.run(
            ["git", "ls-files", "-z"], capture_output=True, cwd=ROOT, timeout=60, check=True
        ).stdout.decode()
        files = [ROOT / name for name in listed.split("\0") if name]
    except (OSError, subprocess.SubprocessError):
        roots = [ROOT / name for name in ("triage", "tests", "sample", "docs", ".ci")]
        files = [p for r in roots for p in r.rglob("*") if ".venv" not in p.parts]
        files += [ROOT / "README.md", ROOT / "DEVELOPERS.md", ROOT / "pyproject.toml"]
    own = Path(__file__).resolve()
    return sorted(
        p
        for p in files
        if p.is_file()
        and p.resolve() != own
        and (p.suffix in suffixes or p.parent.name == ".ci")
        and "golden" not in p.relative_to(ROOT).parts
    )


def test_no_citation_of_notes_outside_the_repository() -> None:
    found = []
    for path in _text_files():
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if OUTSIDE_NOTES.search(line):
                found.append(f"{path.relative_to(ROOT)}:{number}: {line.strip()}")
            for climb in CLIMBING_PATH.findall(line):
                target = (path.parent / climb).resolve()
                if not target.is_relative_to(ROOT):
                    found.append(f"{path.relative_to(ROOT)}:{number}: {climb} leaves the repo")
    assert not found, "cite the published source or docs/sources.md instead:\n" + "\n".join(found)


def test_every_markdown_file_named_exists() -> None:
    # A name is looked up beside the file that names it, then from the repository root
    # (docs/metrics.md, sample/README.md), then as a page in docs/ ("keys.md" in a docs page).
    missing = []
    for path in _text_files():
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            for name in MARKDOWN_NAME.findall(line):
                places = (path.parent / name, ROOT / name, ROOT / "docs" / name)
                if not any(p.resolve().is_relative_to(ROOT) and p.is_file() for p in places):
                    missing.append(f"{path.relative_to(ROOT)}:{number}: {name}")
    assert not missing, "files named but not in the repository:\n" + "\n".join(missing)


def test_every_section_of_docs_sources_pointed_at_exists() -> None:
    sources = ROOT / "docs" / "sources.md"
    text = sources.read_text(encoding="utf-8")
    sections = set(SOURCES_HEADING.findall(text))
    assert {"1", "1.1", "4.2", "8.1"} <= sections
    missing = []
    for path in _text_files():
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            for pointer in SOURCES_POINTER.findall(line):
                for section in re.findall(r"§(\d+(?:\.\d+)?)", pointer):
                    if section not in sections:
                        missing.append(f"{path.relative_to(ROOT)}:{number}: §{section}")
    assert not missing, "docs/sources.md has no such section:\n" + "\n".join(missing)
    # The files docs/sources.md names as users of a fact exist.
    named = re.findall(r"`((?:triage|tests|docs|sample)/[\w./-]+\.\w+)`", text)
    assert named
    assert [n for n in named if not (ROOT / n).is_file()] == []
