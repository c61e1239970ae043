"""Write docs/keys.md from the bindings: ``python -m tests.tui.keys_doc`` (a test checks it)."""

from __future__ import annotations

from pathlib import Path

from textual.binding import Binding

from triage.tui.app import TriageApp
from triage.tui.screens.decision import DecisionScreen
from triage.tui.screens.dialogs import ChooseScreen, ConfirmScreen, HelpScreen, PromptScreen
from triage.tui.screens.group_decision import GroupDecisionScreen
from triage.tui.screens.overrides import OverridesScreen
from triage.tui.widgets.series_list import SeriesList

DOC = Path(__file__).resolve().parents[2] / "docs" / "keys.md"

#: (section title, classes whose BINDINGS it lists)
SECTIONS = (
    ("List (moving)", (SeriesList,)),
    ("Main screen", (TriageApp,)),
    ("Decision dialog", (DecisionScreen,)),
    ("Group decision dialog (group view, `a`)", (GroupDecisionScreen,)),
    ("Did past overrides help?", (OverridesScreen,)),
    ("Prompts, questions, lists and help", (PromptScreen, ConfirmScreen, ChooseScreen, HelpScreen)),
)

INTRO = """# Keys of the review screens

The footer shows the main keys; `?` opens a help screen with all of them, and `ctrl+p` opens the
command palette, where every main action can be found by name. Keys can be remapped through
Textual's keymap by binding id.

While a text field has focus (filter, adjustment, note), letter and digit keys type text;
`escape` and `ctrl+s` still work.

Keys are handled in the order they were typed, however fast: a key that opens a dialog or moves
to the next field takes effect before the next key is handled, and `ctrl+s` saves the fields as
they are after every key typed before it.
"""


def render() -> str:
    lines = [INTRO]
    for title, owners in SECTIONS:
        lines += [
            f"## {title}",
            "",
            "| key | action | what it does | id |",
            "| --- | --- | --- | --- |",
        ]
        for owner in owners:
            for b in owner.BINDINGS:
                assert isinstance(b, Binding)
                lines.append(f"| `{b.key}` | {b.description} | {b.tooltip} | `{b.id}` |")
        lines.append("")
    return "\n".join(lines)


if __name__ == "__main__":
    DOC.write_text(render(), encoding="utf-8")
    print(DOC)
