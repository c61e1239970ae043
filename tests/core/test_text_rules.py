"""One owner per rule: the spreadsheet sanitiser shows controls as the terminal one does, the
number formatter serves every renderer, and every outcome has its words (common practice)."""

from __future__ import annotations

import math

import pytest

from triage.core import text, vocabulary


def test_xlsx_cell_text_uses_the_terminal_symbols() -> None:
    # The characters a workbook cannot hold are shown as the terminal shows them (control
    # pictures), so a note reads the same on screen and in the spreadsheet.
    c0 = [chr(c) for c in range(0x20) if text.XLSX_ILLEGAL.match(chr(c))]
    assert len(c0) == 29  # all C0 but tab, LF and CR
    assert [text.xlsx_cell_text(c) for c in c0] == [text.visible(c) for c in c0]
    assert text.xlsx_cell_text("a\ufffeb\uffff") == "a\ufffdb\ufffd"
    # What a workbook can hold is kept, also what the terminal would replace.
    kept = "tab\there\nline\r\u200b\u202e\x7f"
    assert text.xlsx_cell_text(kept) == kept


def test_neutralise_guards_every_formula_trigger() -> None:
    # OWASP "CSV Injection": a leading = + - @ tab CR LF or NUL gets an apostrophe.
    shown = text.neutralise([f"{t}x" for t in text.FORMULA_TRIGGERS] + ["x=1", "1+1"]).tolist()
    assert shown[:-2] == [f"'{t}x".replace("\r", "\n") for t in text.FORMULA_TRIGGERS]
    assert shown[-2:] == ["x=1", "1+1"]
    assert text.neutralise_one("a\r\nb") == "a\nb"


@pytest.mark.parametrize("missing", ["", text.DASH])
def test_undefined_numbers_show_the_renderers_mark_never_zero(missing: str) -> None:
    for value in (None, math.nan, float("nan")):
        assert text.number(value, 1, missing=missing) == missing
        assert text.count(value, missing=missing) == missing
        assert text.percent(value, missing=missing) == missing
        assert text.ratio(value, missing=missing) == missing
    assert text.over_under(math.nan) == "" and text.compact(None) == ""


def test_numbers_in_a_planners_format() -> None:
    assert text.number(1234.56) == "1,235"
    assert text.number(-1234.56, 1, signed=True) == "-1,234.6"
    assert text.number(0.5, 2, signed=True) == "+0.50"
    assert text.count(1234.9) == "1,234"
    assert text.percent(0.41666) == "41.7%"
    assert text.percent(0.05, 0, signed=True) == "+5%"
    assert text.ratio(0.91234) == "0.912"
    assert text.over_under(0.123, 1, fraction=True) == "+12.3% over"
    assert text.over_under(-56.0) == "-56 under"
    assert text.over_under(0.0, 1, fraction=True) == "+0.0%"
    assert text.over_under(-0.0, 1, fraction=True, plain_zero=True) == "0.0%"
    assert [text.compact(v) for v in (1234.0, 123_456.0, 12_345_678.0)] == [
        "1,234",
        "123k",
        "12.3M",
    ]


def test_every_outcome_has_its_words() -> None:
    codes = [c.code for c in vocabulary.OUTCOMES]
    assert codes == ["no_change", "adjusted", "handed_off", "deferred"]
    assert set(vocabulary.OUTCOME_SHORT) == set(codes) == set(vocabulary.OUTCOME_TINY)
    assert set(vocabulary.SETTLED) | set(vocabulary.OPEN_OUTCOMES) == set(codes)
    assert not set(vocabulary.SETTLED) & set(vocabulary.OPEN_OUTCOMES)
    assert vocabulary.outcome_label("deferred") == "Put off to a later cycle"
    assert vocabulary.outcome_label("gone") == "gone"
