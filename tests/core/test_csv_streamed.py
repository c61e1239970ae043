"""The streamed CSV reader of ``read_portfolio`` against the full loader and against pandas.

``read_portfolio`` parses a CSV file with Arrow's reader and builds the dense arrays block by
block (``read.scan_csv`` + ``read.stream.build_streamed``); it falls back to the full loader
(``read.load_frame`` + ``build_portfolio``, which parses with ``pandas.read_csv``) whenever Arrow
refuses the file or the streamed build cannot vouch for it. Both must give the same portfolio or
the same error. The reference for the numbers is pandas itself: the full loader's
``pandas.read_csv`` and ``pandas.DataFrame.pivot`` of the rows. Files are invented (a
garden-supply wholesaler).
"""

from __future__ import annotations

import csv
import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tests.core.test_parquet_streamed import assert_same, garden_rows, pivot_reference
from triage.core.errors import LoadError
from triage.core.portfolio import Portfolio, build_portfolio
from triage.core.ranking import scorecard
from triage.core.read import FastPathDeclined, delimited, load_frame, read_portfolio, scan_csv
from triage.core.read.stream import build_streamed


def to_csv(rows: pd.DataFrame, path: Path, **options: object) -> Path:
    """Rows as CSV the way a spreadsheet or database export writes them (pandas' writer)."""
    rows.to_csv(path, index=False, **options)  # type: ignore[call-overload]
    return path


def full_way(path: Path, lag: int | None = None) -> Portfolio:
    return build_portfolio(load_frame(path), lag=lag)


def streamed_way(path: Path, lag: int | None = None) -> Portfolio:
    return build_streamed(scan_csv(path), lag)


def test_exported_rows_give_the_same_portfolio_both_ways(tmp_path: Path) -> None:
    rows = garden_rows()
    path = to_csv(rows, tmp_path / "garden.csv")
    streamed, full = streamed_way(path), full_way(path)
    assert_same(streamed, full)
    assert_same(read_portfolio(path), full)
    for by in ("error", "bias"):
        pd.testing.assert_frame_equal(scorecard(streamed, by=by), scorecard(full, by=by))
    # Reference: pandas.DataFrame.pivot of the rows puts each value in its cell.
    for column in ("demand", "forecast"):
        np.testing.assert_array_equal(
            getattr(streamed, column), pivot_reference(rows, streamed, column)
        )


@pytest.mark.parametrize(
    "options",
    [
        {"quoting": csv.QUOTE_ALL},  # every field quoted (Arrow's own writer, many databases)
        {"quoting": csv.QUOTE_NONNUMERIC},
        {"lineterminator": "\r\n"},  # Windows line ends
        {"encoding": "utf-8-sig"},  # Excel's "CSV UTF-8" writes a byte-order mark
    ],
    ids=["quote-all", "quote-text", "crlf", "bom"],
)
def test_export_dialects_give_the_same_portfolio(tmp_path: Path, options: dict) -> None:
    rows = garden_rows(seed=8)
    path = to_csv(rows, tmp_path / "garden.csv", **options)
    assert_same(streamed_way(path), full_way(path))


def test_small_blocks_and_row_order_change_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rows = garden_rows(seed=9)
    path = to_csv(rows.sample(frac=1.0, random_state=3), tmp_path / "shuffled.csv")
    reference = full_way(to_csv(rows, tmp_path / "sorted.csv"))
    # Blocks of 4 KiB: many record batches, each with its own text dictionaries.
    monkeypatch.setattr(delimited, "_CSV_BLOCK_BYTES", 4096)
    source = scan_csv(path)
    assert source.tables is not None and len(source.tables) > 10
    assert_same(build_streamed(source, None), full_way(path))
    pd.testing.assert_frame_equal(
        scorecard(streamed_way(path)).reset_index(drop=True),
        scorecard(reference).reset_index(drop=True),
    )


def test_awkward_text_is_kept_exactly(tmp_path: Path) -> None:
    # Ids stay text exactly as written (issue 2, section 2): NA, 00123, 1e5, TRUE; a comma and
    # a quote inside a quoted cell; a quote inside an unquoted cell; non-ASCII text.
    ids = ["NA", "00123", "1e5", "TRUE", "rake, steel", 'pot 12"', "Gießkanne"]
    lines = ["item,location,period,demand,forecast,family"]
    for n, item in enumerate(ids):
        quoted = '"' + item.replace('"', '""') + '"' if "," in item else item
        for week in range(4):
            lines.append(f"{quoted},north,2025-03-{3 + 7 * week:02d},{n + week},{n},tools")
    path = tmp_path / "ids.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    streamed, full = streamed_way(path), full_way(path)
    assert_same(streamed, full)
    assert sorted(streamed.keys["item"]) == sorted(ids)


@pytest.mark.parametrize(
    ("text", "why"),
    [
        ("item,period,demand,forecast\nA,2025-03-03,5,4\n\nA,2025-03-10,6,5\n", "blank line"),
        ("item,period,demand,forecast\nA,2025-03-03,5,4\nA,2025-03-10,6\n", "short line"),
        ("item,period,demand,forecast\nA,2025-03-03,5,4\nA,2025-03-10,6,5,9\n", "long line"),
        ("item,period,demand,forecast\nA,03/03/2025,5,4\nA,10/03/2025,6,5\n", "not ISO"),
        ("item,period,demand,forecast\nA,2025-03-03,five,4\nA,2025-03-10,6,5\n", "text number"),
        ("item,period,demand,forecast\nA,2025-03-03,5,inf\nA,2025-03-10,6,5\n", "not finite"),
        ("item,period,demand,forecast\n,2025-03-03,5,4\nA,2025-03-10,6,5\n", "blank id"),
        ('item,period,demand,forecast\n"A\x1b[31m",2025-03-03,5,4\n', "control characters"),
        ("item,period,demand,forecast\nA,2025-03-03,5,4\nA,2025-03-03,6,5\n", "duplicate"),
    ],
)
def test_what_the_fast_path_declines_gives_the_full_loaders_answer(
    tmp_path: Path, text: str, why: str
) -> None:
    path = tmp_path / "odd.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(FastPathDeclined):
        streamed_way(path)
    try:
        expected: Portfolio | str = full_way(path)
    except LoadError as exc:
        expected = str(exc)
    try:
        got: Portfolio | str = read_portfolio(path)
    except LoadError as exc:
        got = str(exc)
    if isinstance(expected, str):
        assert got == expected, why
    else:
        assert isinstance(got, Portfolio)
        assert_same(got, expected)


def test_errors_before_any_cell_are_the_full_loaders(tmp_path: Path) -> None:
    # Semicolons with decimal commas (a European Excel export): refused with the same message
    # before Arrow reads a cell.
    path = tmp_path / "semi.csv"
    path.write_text("item;period;demand;forecast\nA;2025-03-03;5,5;4\n", encoding="utf-8")
    with pytest.raises(LoadError) as fast:
        scan_csv(path)
    with pytest.raises(LoadError) as full:
        load_frame(path)
    assert str(fast.value) == str(full.value)
    assert "semicolon" in str(fast.value)


def test_missing_value_words_are_missing_in_numbers_only(tmp_path: Path) -> None:
    # The full loader's missing-value words (schema.NUMERIC_MISSING) in a numeric cell mean
    # missing; the same words as ids are ids (issue 2, section 2: NA is an id).
    monday = dt.date(2025, 3, 3)
    lines = ["item,location,period,demand,forecast"]
    for week, word in enumerate(["NA", "", "n/a", "#N/A", "-", "null", "7"]):
        lines.append(f"NA,null,{monday + dt.timedelta(weeks=week)},{word},{week}")
    path = tmp_path / "words.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    streamed, full = streamed_way(path), full_way(path)
    assert_same(streamed, full)
    assert list(streamed.keys["item"]) == ["NA"] and list(streamed.keys["location"]) == ["null"]
    assert np.isnan(streamed.demand[0, :6]).all() and streamed.demand[0, 6] == 7.0


def test_empty_attribute_cells_and_unused_columns(tmp_path: Path) -> None:
    # An attribute cell left empty, a column the file has but scoring does not use as a role
    # (kept as an attribute), and a header in other case and order (common practice: exports
    # from planning systems rarely agree on any of these).
    rows = garden_rows(seed=11)
    rows["buyer"] = rows["buyer"].where(rows.index % 3 != 0, "")
    rows = rows.rename(columns={"item": "Item", "demand": "DEMAND"})
    rows = rows[["period", "Item", "location", "forecast", "DEMAND", "price", "buyer"]]
    path = to_csv(rows, tmp_path / "export.csv")
    assert_same(streamed_way(path), full_way(path))


@pytest.mark.parametrize("block", [256, 311, 385, 459, 1024])
def test_quoted_line_breaks_at_any_block_boundary_never_split_a_record(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, block: int
) -> None:
    # RFC 4180 section 2.6: a quoted field may hold line breaks. Arrow's fast parse cuts blocks
    # at line breaks without looking at quotes; a cell whose line break falls on a cut must not
    # become two rows. The second cell is built so that its tail parses as a plausible row on its
    # own. Whatever the block size, the result is the full loader's.
    lines = ["item,period,demand,forecast,family"]
    for i in range(60):
        lines.append(f'"I{i:02d}",2025-03-03,1,2,"fam"')
        lines.append(f'"I{i:02d}",2025-03-10,1,2,"fam"')
    lines[41] = '"I20",2025-03-03,1,2,"fa\nm"'
    lines[81] = '"I40",2025-03-03,1,2,"fa\n,2025-03-10,3,4,x"'
    path = tmp_path / "breaks.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    monkeypatch.setattr(delimited, "_CSV_BLOCK_BYTES", block)
    reference = full_way(path)
    assert_same(read_portfolio(path), reference)
    assert "I40" in set(reference.keys["item"]) and reference.n_series == 60


def test_quoted_file_without_line_breaks_in_cells_takes_the_fast_parse(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import pyarrow.csv as pa_csv

    calls: list[bool] = []
    real = pa_csv.read_csv

    def spy(*args: object, **kwargs: object) -> object:
        calls.append(kwargs["parse_options"].newlines_in_values)  # type: ignore[union-attr]
        return real(*args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(pa_csv, "read_csv", spy)
    rows = garden_rows(seed=12)
    path = to_csv(rows, tmp_path / "quoted.csv", quoting=csv.QUOTE_ALL)
    assert_same(streamed_way(path), full_way(path))
    assert calls == [False]  # one parse, the fast one
    calls.clear()
    # A quote inside a value (a 12" pot) cannot be told apart from a split cell's leftover:
    # parsed again the careful way, same result.
    rows.loc[rows.index[:3], "buyer"] = 'pot 12"'
    path = to_csv(rows, tmp_path / "inch.csv", quoting=csv.QUOTE_ALL)
    assert_same(streamed_way(path), full_way(path))
    assert calls == [False, True]
