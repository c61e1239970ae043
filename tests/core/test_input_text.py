"""Issue 10 §6 and §7: limits known where text enters, and text that is not what it looks like.

* Ids longer than the ledger stores (``ledger.TEXT_MAX``) are refused at load, naming the rows,
  not at every save; a reviewer's name is checked where it is configured.
* Ids that look alike but differ stay different series, with a notice naming them.
* Numbers and dates written with digits of other scripts are refused (docs/input-format.md:
  plain numbers and ISO dates), the same way from CSV, xlsx and Parquet, and the streamed readers
  decline them so that both ways agree (as tests/core/test_csv_streamed.py requires).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tests.core.test_load import load_error
from triage.core.config import ConfigError, load_config
from triage.core.errors import LoadError
from triage.core.ledger import TEXT_MAX
from triage.core.read import (
    FastPathDeclined,
    delimited,
    load_frame,
    lookalike_keys,
    read_portfolio,
    scan_csv,
    scan_parquet,
)
from triage.core.read.stream import build_streamed
from triage.core.text import CONTROL_TABLE, STORED_TABLE

WEEKS = ["2026-10-05", "2026-10-12"]


def rows_of(ids: list[str], column: str = "item") -> pd.DataFrame:
    """Two weeks of rows for each id, in ``column`` (item or location)."""
    records = []
    for n, key in enumerate(ids):
        for week in WEEKS:
            record: dict[str, object] = {"item": "I", "period": week, "demand": n, "forecast": 1}
            record[column] = key
            records.append(record)
    return pd.DataFrame.from_records(records)


def write_all(frame: pd.DataFrame, folder: Path) -> dict[str, Path]:
    """The same rows as CSV, xlsx and Parquet (periods as text in CSV, dates elsewhere)."""
    typed = frame.copy()
    if typed["period"].map(lambda v: isinstance(v, str) and v[:4].isascii()).all():
        typed["period"] = pd.to_datetime(typed["period"])
    paths = {
        "csv": folder / "p.csv",
        "xlsx": folder / "p.xlsx",
        "parquet": folder / "p.parquet",
    }
    frame.to_csv(paths["csv"], index=False)
    typed.to_excel(paths["xlsx"], index=False)
    pq.write_table(pa.Table.from_pandas(typed, preserve_index=False), paths["parquet"])
    return paths


def streamed(path: Path) -> object:
    scan = scan_csv if path.suffix == ".csv" else scan_parquet
    return build_streamed(scan(path), None)


# --- §6: ids the ledger cannot store ------------------------------------------------------------


@pytest.mark.parametrize("column", ["item", "location"])
def test_ids_longer_than_the_ledger_stores_are_refused_at_load(tmp_path: Path, column: str) -> None:
    at_limit, over = "x" * TEXT_MAX, "y" * (TEXT_MAX + 1)
    ok = write_all(rows_of(["A", at_limit], column), tmp_path)
    for path in ok.values():
        assert at_limit in read_portfolio(path).keys[column].tolist()
    folder = tmp_path / "over"
    folder.mkdir()
    for kind, path in write_all(rows_of(["A", over], column), folder).items():
        error = load_error(path)
        assert f"longer than {TEXT_MAX:,} characters" in error.message
        first = 1 if kind == "parquet" else 2
        assert f"rows {first + 2}, {first + 3}" in error.message, error.message
        assert f"The longest is {TEXT_MAX + 1:,} characters" in error.message
        assert over not in error.message  # not quoted: it would flood the terminal
        if kind != "xlsx":
            with pytest.raises(FastPathDeclined):
                streamed(path)
            with pytest.raises(LoadError) as caught:
                read_portfolio(path)
            assert str(caught.value) == str(error)


def test_a_reviewer_name_longer_than_the_ledger_stores_is_refused_in_the_config(
    tmp_path: Path,
) -> None:
    config = tmp_path / "config.toml"
    config.write_text(f'reviewer = "{"a" * TEXT_MAX}"\n')
    assert load_config(config).reviewer == "a" * TEXT_MAX
    config.write_text(f'reviewer = "{"a" * 200_000}"\n')
    with pytest.raises(ConfigError) as caught:
        load_config(config)
    assert caught.value.key == "reviewer"
    assert f"is 200,000 characters long; a reviewer's name may have at most {TEXT_MAX:,}" in str(
        caught.value
    )


@pytest.mark.parametrize("name", ["Ana\\nRuiz", "Ana\\u0007", "Ana\\u2028", "\\u202eanA"])
def test_a_reviewer_name_with_control_or_line_break_characters_is_refused(
    tmp_path: Path, name: str
) -> None:
    config = tmp_path / "config.toml"
    config.write_text(f'reviewer = "{name}"\n')
    with pytest.raises(ConfigError) as caught:
        load_config(config)
    assert "contains control or line-break characters (U+" in str(caught.value)


def test_an_oversized_configuration_file_is_refused_without_parsing_it(tmp_path: Path) -> None:
    config = tmp_path / "config.toml"
    config.write_text("# " + "x" * (2 << 20) + "\n")
    with pytest.raises(ConfigError) as caught:
        load_config(config)
    assert "a configuration file is a few lines" in str(caught.value)


# --- §7: look-alike ids -------------------------------------------------------------------------

LOOKALIKES = [
    ("A", "A "),  # a trailing space
    ("Caf\u00e9", "Cafe\u0301"),  # NFC and NFD
    ("BX", "B\u200dX"),  # a zero-width joiner
    ("L", "L\u2028"),  # a line separator
]


@pytest.mark.parametrize(("first", "second"), LOOKALIKES)
def test_lookalike_ids_stay_apart_with_a_notice_from_every_format(
    tmp_path: Path, first: str, second: str
) -> None:
    paths = write_all(rows_of([first, second, "Gie\u00dfkanne"]), tmp_path)
    notices = set()
    for kind, path in paths.items():
        portfolio = read_portfolio(path)
        assert sorted(portfolio.keys["item"]) == sorted([first, second, "Gie\u00dfkanne"]), kind
        notice = [n for n in portfolio.notices if "look like another id" in n]
        assert len(notice) == 1, (kind, portfolio.notices)
        notices.add(notice[0])
        if kind != "xlsx":
            with pytest.raises(FastPathDeclined):
                streamed(path)
    assert len(notices) == 1  # the same words whatever the format
    (notice,) = notices
    assert "2 ids look like another id" in notice
    # Each is shown so that the two can be told apart: what does not show is written as a code.
    shown = notice.split("series: ")[1]
    assert shown.count("'") == 4
    assert len({part.strip() for part in shown.split(".")[0].split(" and ")}) == 2


def test_lookalikes_in_different_blocks_of_a_streamed_file_are_found(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # 'A' near the start, 'A ' near the end: in different Arrow blocks.
    ids = ["A", *[f"S{n:05d}" for n in range(3000)], "A "]
    path = tmp_path / "p.csv"
    rows_of(ids).to_csv(path, index=False)
    monkeypatch.setattr(delimited, "_CSV_BLOCK_BYTES", 4096)
    assert len(scan_csv(path).tables or []) > 10
    with pytest.raises(FastPathDeclined):
        streamed(path)
    assert any("look like another id" in n for n in read_portfolio(path).notices)
    # Distinct ids, ASCII or not, still take the streamed way, without a notice.
    plain = tmp_path / "plain.csv"
    rows_of(["A", "A B", "Gie\u00dfkanne", "\u6c34\u74f6", *ids[1:-1]]).to_csv(plain, index=False)
    assert not any("look like" in n for n in streamed(plain).notices)  # type: ignore[attr-defined]


def test_lookalike_keys() -> None:
    keys = lookalike_keys(pd.Series(["A ", " A", "A\u200b", "A\u00a0", "\uff21", "A  B", "a"]))
    assert keys.tolist() == ["A", "A", "A", "A", "A", "A B", "a"]  # case still tells apart


# --- §7: digits of other scripts ----------------------------------------------------------------

ARABIC_THREE = "\u0663"
FULL_WIDTH_TWELVE = "\uff11\uff12"


@pytest.mark.parametrize("value", [ARABIC_THREE, FULL_WIDTH_TWELVE, "1\u0660"])
def test_numbers_with_digits_of_another_script_are_refused_everywhere(
    tmp_path: Path, value: str
) -> None:
    frame = rows_of(["A"])
    frame["demand"] = frame["demand"].astype(object)
    frame.loc[0, "demand"] = value
    frame["demand"] = frame["demand"].astype(str)
    messages = []
    for kind, path in write_all(frame, tmp_path).items():
        error = load_error(path)
        assert "column 'demand' has values that are not numbers" in error.message, kind
        assert "of another script" in (error.hint or ""), kind
        messages.append(error.hint)
        if kind == "csv":
            with pytest.raises(FastPathDeclined):
                streamed(path)
            with pytest.raises(LoadError):
                read_portfolio(path)
    assert len(set(messages)) == 1


def test_lags_with_digits_of_another_script_are_refused(tmp_path: Path) -> None:
    path = tmp_path / "p.csv"
    path.write_text(
        f"item,period,lag,demand,forecast\nA,2026-10-05,{ARABIC_THREE},5,4\nA,2026-10-12,1,5,6\n"
    )
    assert "not whole numbers" in load_error(path).message


def test_dates_with_digits_of_another_script_are_refused_everywhere(tmp_path: Path) -> None:
    arabic_year = "".join(chr(0x0660 + int(d)) for d in "2026")
    frame = rows_of(["A"])
    frame.loc[0, "period"] = f"{arabic_year}-10-05"
    for kind, path in write_all(frame, tmp_path).items():
        error = load_error(path)
        assert "column 'period' has dates that are ambiguous or not ISO" in error.message, kind
        assert "digits of another script" in error.message, kind
        if kind == "csv":
            with pytest.raises(FastPathDeclined):
                streamed(path)


def test_full_width_iso_dates_are_refused(tmp_path: Path) -> None:
    wide = "".join(chr(0xFF10 + int(c)) if c.isdigit() else c for c in "2026-10-05")
    path = tmp_path / "p.csv"
    path.write_text(f"item,period,demand,forecast\nA,{wide},5,4\nA,2026-10-12,5,6\n")
    assert "digits of another script" in load_error(path).message


def test_headers_are_cleaned_with_the_stored_part_of_the_display_table(tmp_path: Path) -> None:
    # One owner for the sanitiser tables (triage.core.text): what the loader writes in place of
    # a header's control characters is the display table's C0, DEL and C1 part, symbol for
    # symbol; bidi and invisible characters stay in a header as written, as they do in ids, and
    # only a terminal shows them as symbols.
    assert set(STORED_TABLE) == {*range(0x20), 0x7F, *range(0x80, 0xA0)}
    assert {code: CONTROL_TABLE[code] for code in STORED_TABLE} == STORED_TABLE
    odd = "".join(chr(code) for code in (0x1B, 0x7F, 0x9B, 0x200B, 0x202E))
    path = tmp_path / "p.csv"
    path.write_text(f"item,period,demand,forecast,n{odd}\nA,2026-10-05,5,4,x\n", encoding="utf-8")
    assert load_frame(path).attributes == ("n\u241b\u2421\ufffd\u200b\u202e",)
    assert scan_csv(path).attributes == ("n\u241b\u2421\ufffd\u200b\u202e",)
