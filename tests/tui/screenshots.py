"""Write the README screenshots: ``python -m tests.tui.screenshots docs/`` (needs cairosvg).

Textual's SVG names the font "Fira Code"; where that font is missing, cairosvg falls back to a
proportional font and box and block characters drift. DejaVu Sans Mono is named instead.
"""

from __future__ import annotations

import asyncio
import shutil
import sys
import tempfile
from pathlib import Path

from triage.tui.app import Options, TriageApp

ROOT = Path(__file__).resolve().parents[2]
SIZE = (170, 46)


async def capture(out: Path) -> list[Path]:
    """Save SVGs of the main screen, the decision dialog and the group view; return their
    paths."""
    work = Path(tempfile.mkdtemp())
    shutil.copy(ROOT / "sample" / "portfolio.csv", work / "portfolio.csv")
    app = TriageApp(Options(portfolio=work / "portfolio.csv", reviewer="ana"))
    paths = [out / "review-main.svg", out / "review-decision.svg", out / "review-groups.svg"]
    async with app.run_test(size=SIZE) as pilot:
        while app.session is None:
            await pilot.pause(0.05)
        await pilot.pause(0.2)
        await pilot.press("c", "j", "j")
        await pilot.pause(0.4)
        app.save_screenshot(str(paths[0]))
        await pilot.press("s")
        await pilot.pause(0.5)
        app.save_screenshot(str(paths[1]))
        await pilot.press("escape")
        app.group_by = ("family", "location")
        await pilot.press("G")
        while not app.in_groups:
            await pilot.pause(0.05)
        await pilot.press("j")
        await pilot.pause(0.5)
        app.save_screenshot(str(paths[2]))
    return paths


def to_png(svg: Path) -> Path:
    import cairosvg

    text = svg.read_text(encoding="utf-8").replace(
        "Fira Code, monospace", "DejaVu Sans Mono, monospace"
    )
    png = svg.with_suffix(".png")
    cairosvg.svg2png(bytestring=text.encode("utf-8"), write_to=str(png), output_width=1700)
    return png


def main(argv: list[str]) -> int:
    out = Path(argv[0]) if argv else ROOT / "docs"
    out.mkdir(parents=True, exist_ok=True)
    for svg in asyncio.run(capture(out)):
        print(to_png(svg))
        svg.unlink()
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
