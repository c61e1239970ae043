"""The screens as a person sees them: SVG screenshots of the main screen and the dialog."""

from __future__ import annotations

from pathlib import Path

from tests.tui.screenshots import capture


async def test_screenshots_show_the_review(tmp_path: Path) -> None:
    main, dialog, groups = await capture(tmp_path)
    main_svg = main.read_text(encoding="utf-8")
    dialog_svg = dialog.read_text(encoding="utf-8")
    groups_svg = groups.read_text(encoding="utf-8")
    for needle in ("18&#160;groups&#160;by&#160;family,&#160;location", "group&#160;rank&#160;2"):
        assert needle in groups_svg, needle
    # Header with totals and progress, the ranked list, the detail pane (SVG text uses &#160;).
    for needle in ("300&#160;series", "reviewed&#160;1", "GF-10213", "over-forecast&#160;by"):
        assert needle in main_svg, needle
    for needle in ("Decision&#160;for", "Stock-out&#160;hid&#160;demand", "ctrl+s:&#160;save"):
        assert needle in dialog_svg, needle
