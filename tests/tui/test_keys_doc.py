"""docs/keys.md must list exactly the bindings the screens have (style guide: keys documented)."""

from __future__ import annotations

import re
from pathlib import Path

from textual.binding import Binding

from tests.tui.keys_doc import SECTIONS
from triage.tui.app import TriageApp
from triage.tui.screens.decision import DecisionScreen
from triage.tui.screens.overrides import OverridesScreen
from triage.tui.widgets.series_list import SeriesList

DOC = Path(__file__).resolve().parents[2] / "docs" / "keys.md"
ROW = re.compile(r"^\| `([^`]+)` \| ([^|]*) \| ([^|]*) \| `([^`]+)` \|$")


def documented() -> set[tuple[str, str, str, str]]:
    rows = set()
    for line in DOC.read_text(encoding="utf-8").splitlines():
        match = ROW.match(line)
        if match:
            rows.add(tuple(part.strip() for part in match.groups()))
    return rows


def bound() -> set[tuple[str, str, str, str]]:
    rows = set()
    owners = [SeriesList, TriageApp, DecisionScreen, OverridesScreen]
    owners += [o for _, group in SECTIONS for o in group if o not in owners]
    for owner in owners:
        for binding in owner.BINDINGS:
            assert isinstance(binding, Binding)
            assert binding.id, f"{owner.__name__} binding {binding.key} has no id"
            rows.add((binding.key, binding.description, binding.tooltip, binding.id))
    return rows


def test_keys_doc_matches_bindings() -> None:
    doc, code = documented(), bound()
    assert doc - code == set(), "documented but not bound"
    assert code - doc == set(), "bound but not documented"


def test_binding_ids_are_unique() -> None:
    ids = [b.id for owner in (SeriesList, TriageApp, DecisionScreen) for b in owner.BINDINGS]
    assert len(ids) == len(set(ids))


def test_footer_shows_six_to_eight_keys() -> None:
    shown = [b for b in TriageApp.BINDINGS if b.show]
    assert 6 <= len(shown) <= 8
