"""Code rule: data text reaches the review screens only as plain text, never as markup.

Textual parses ``str`` as content markup in ``App.notify``, ``Static``, ``Label``, ``update``,
``border_title`` and ``tooltip``: a cell ``[/]`` crashes the app and ``[@click=app.quit]`` plants
an action. This test reads the source of ``triage/tui`` and fails when such a place is given text
built at run time (an f-string, a concatenation, a variable) instead of a ``rich.text.Text`` or a
literal; notifications must go through ``format.toast``, the one helper that turns markup off.
"""

from __future__ import annotations

import ast
from pathlib import Path

TUI = Path(__file__).resolve().parents[2] / "triage" / "tui"

#: Callables whose first argument Textual may read as markup.
RENDERS = {"Static", "Label", "Button", "Option", "update", "Content", "from_markup"}
#: Attributes Textual may read as markup when given a ``str``.
MARKUP_ATTRS = {"border_title", "border_subtitle", "tooltip", "title", "sub_title"}
#: Calls that make plain text (``rich.text.Text`` and its constructors).
PLAIN_MAKERS = {"Text", "assemble", "from_ansi", "render_chart", "Table", "Group"}


def _name(node: ast.AST) -> str:
    if isinstance(node, ast.Name):
        return node.id
    if isinstance(node, ast.Attribute):
        return node.attr
    return ""


def _known_plain(tree: ast.AST) -> set[str]:
    """Names the module makes plain: assigned from ``Text(...)``, annotated ``Text``, or
    functions returning ``Text`` (a light stand-in for type checking)."""
    known: set[str] = set()

    def is_text(annotation: ast.AST | None) -> bool:
        return annotation is not None and "Text" in ast.unparse(annotation)

    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            if is_text(node.returns):
                known.add(node.name)
            for arg in node.args.args + node.args.kwonlyargs:
                if is_text(arg.annotation):
                    known.add(arg.arg)
        elif isinstance(node, ast.AnnAssign) and is_text(node.annotation):
            known.add(_name(node.target))
        elif (
            isinstance(node, ast.Assign)
            and isinstance(node.value, ast.Call)
            and _name(node.value.func) in PLAIN_MAKERS
        ):
            known.update(_name(t) for t in node.targets)
    known.discard("")
    return known


def _is_plain(node: ast.AST, known: set[str] = frozenset()) -> bool:  # type: ignore[assignment]
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return "[" not in node.value
    if isinstance(node, ast.Call):
        return _name(node.func) in PLAIN_MAKERS or _name(node.func) in known
    if isinstance(node, (ast.Name, ast.Attribute)):
        return _name(node) in known
    return False


def _findings(path: Path) -> list[str]:
    return _findings_in(path, root=TUI.parent.parent)


def _findings_in(path: Path, *, root: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found = []
    where = lambda n: f"{path.relative_to(root)}:{n.lineno}"  # noqa: E731
    toast_owner = path.name == "format.py"
    known = _known_plain(tree)
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            name = _name(node.func)
            if name == "notify" and not toast_owner:
                found.append(f"{where(node)}: notify( outside format.toast")
            if name == "notify" and toast_owner:
                markup = [k for k in node.keywords if k.arg == "markup"]
                if not markup or not (
                    isinstance(markup[0].value, ast.Constant) and markup[0].value.value is False
                ):
                    found.append(f"{where(node)}: notify( without markup=False")
            if name in RENDERS and node.args and not _is_plain(node.args[0], known):
                found.append(f"{where(node)}: {name}( given text that is not plain")
            for keyword in node.keywords:
                if keyword.arg == "markup" and not (
                    isinstance(keyword.value, ast.Constant) and keyword.value.value is False
                ):
                    found.append(f"{where(node)}: markup= that is not False")
        if isinstance(node, ast.Assign):
            for target in node.targets:
                if (
                    isinstance(target, ast.Attribute)
                    and target.attr in MARKUP_ATTRS
                    and not _is_plain(node.value, known)
                ):
                    found.append(f"{where(node)}: .{target.attr} = text that is not plain")
    return found


def test_no_markup_from_run_time_text_in_the_review_screens() -> None:
    findings = [f for path in sorted(TUI.rglob("*.py")) for f in _findings(path)]
    assert findings == []


def test_the_rule_catches_what_it_is_for(tmp_path: Path) -> None:
    """The checker itself flags each unsafe form (so the rule cannot pass vacuously)."""
    source = (
        "self.notify(f'saved {item}')\n"
        "Static(f'{cell}')\n"
        "widget.update(name + 'x')\n"
        "widget.border_title = header\n"
        "Static('[b]x[/b]')\n"
        "Static(Text(cell), markup=True)\n"
        "Static(Text(cell))\n"
    )
    copy = tmp_path / "tui" / "probe.py"
    copy.parent.mkdir()
    copy.write_text(source, encoding="utf-8")
    findings = _findings_in(copy, root=tmp_path)
    assert len(findings) == 6, findings
