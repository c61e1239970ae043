"""The readable ``triage rank`` table at different terminal widths.

A terminal is 80 columns unless the user widened it (common practice; the VT100's default width,
from memory). The table must then drop whole columns, least important first, and say which,
rather than cutting every value short: a truncated "12.…" is worse than no WAPE column.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from triage.core.ranking import scorecard
from triage.core.read import read_portfolio
from triage.render import scorecard as output

SAMPLE = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"


def table_at(width: int, monkeypatch: pytest.MonkeyPatch) -> list[str]:
    monkeypatch.setenv("COLUMNS", str(width))
    portfolio = read_portfolio(SAMPLE)
    card = scorecard(portfolio)
    text = output.rank_table(portfolio, card, card.iloc[:10], 13, 1)
    return text.splitlines()


def table_rows(lines: list[str]) -> list[str]:
    start = next(
        i
        for i, line in enumerate(lines)
        if line.split()[:1] == ["rank"] or line.split()[:2] == ["bias", "rank"]
    )
    return lines[start : start + 11]


def test_wide_terminal_shows_every_column(monkeypatch: pytest.MonkeyPatch) -> None:
    lines = table_at(160, monkeypatch)
    header = table_rows(lines)[0].split()
    for name in ("share", "cum", "WAPE", "TS", "run", "persistent", "pattern"):
        assert name in header
    assert not any("not shown" in line for line in lines)


@pytest.mark.parametrize("width", [80, 100])
def test_narrow_terminal_drops_columns_and_says_so(
    monkeypatch: pytest.MonkeyPatch, width: int
) -> None:
    lines = table_at(width, monkeypatch)
    rows = table_rows(lines)
    assert all(len(line) <= width for line in lines)
    # Nothing kept is cut short, and the key measures always stay.
    assert not any("…" in line for line in rows)
    header = rows[0].split()
    for name in ("rank", "item", "location", "share", "bias", "persistent"):
        assert name in header
    note = " ".join(
        line for line in lines if "not shown" in line or "--format csv for every" in line
    )
    assert f"not shown at {width} columns" in note
    assert "pattern" in note and "pattern" not in header


def test_signed_numbers_carry_their_direction_and_bias_order_shows_the_bias_rank(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Issue 2, section 3: "over"/"under" beside signed numbers in human output; e = F - A.
    monkeypatch.setenv("COLUMNS", "200")
    portfolio = read_portfolio(SAMPLE)
    card = scorecard(portfolio, by="bias")
    text = output.rank_table(portfolio, card, card.iloc[:10], 13, 1, by="bias")
    rows = table_rows(text.splitlines())
    assert rows[0].split()[:3] == ["bias", "rank", "item"]
    assert [int(r.split()[0]) for r in rows[1:]] == list(range(1, 11))
    for row, ts in zip(rows[1:], card["tracking_signal"].iloc[:10], strict=True):
        assert (f"{ts:+.1f} over" if ts > 0 else f"{ts:+.1f} under") in row


def test_bidirectional_controls_in_ids_do_not_reorder_the_row(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Unicode UAX #9: U+202E RIGHT-TO-LEFT OVERRIDE reverses the text after it on screen (the
    # "Trojan Source" reordering, Boucher & Anderson 2021). The id keeps it (CSV and JSON are
    # exact); the table shows a visible replacement so the columns stay in place.
    path = tmp_path / "bidi.csv"
    path.write_text(
        "item,period,demand,forecast\n"
        "AB\u202eCD,2025-01-06,1,2\nAB\u202eCD,2025-01-13,3,2\n"
        "EF,2025-01-06,1,9\nEF,2025-01-13,3,2\n",
        encoding="utf-8",
    )
    monkeypatch.setenv("COLUMNS", "160")
    portfolio = read_portfolio(path)
    assert "AB\u202eCD" in set(portfolio.keys["item"])
    card = scorecard(portfolio)
    text = output.rank_table(portfolio, card, card, 13, 1)
    assert "\u202e" not in text and "AB\ufffdCD" in text
