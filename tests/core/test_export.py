"""Exports of a review cycle: round trips, spreadsheet safety, atomic writes, LibreOffice.

The expected values are built here from the rows written to the portfolio file and the lines
recorded in the ledger, not from the export code. Safety checks follow OWASP "CSV Injection"
(https://owasp.org/www-community/attacks/CSV_Injection: no text cell may begin with = + - @ Tab
CR, LF since 2025) and the measured facts of docs/sources.md §6 (openpyxl data types, the bare-CR
CSV bug of CPython < 3.11.9, Excel's row and cell limits).
"""

from __future__ import annotations

import csv
import errno
import hashlib
import json
import os
import re
import shutil
import subprocess
import tempfile
import zipfile
from collections.abc import Iterator
from decimal import ROUND_HALF_UP, Decimal
from pathlib import Path

import openpyxl
import pytest
from openpyxl.writer import excel

from triage.core.cycle import ReviewCycle
from triage.core.errors import TriageError
from triage.core.export import CAUTION, ExportError, file_tables, review_tables
from triage.core.ledger import Ledger
from triage.core.portfolio import Portfolio
from triage.core.read import read_portfolio
from triage.core.rounding import MAX_DECIMALS
from triage.core.vocabulary import numbered
from triage.render import export as export_mod
from triage.render.export import export_review

HISTORY = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26"]
FORWARD = ["2026-11-02", "2026-11-09", "2026-11-16"]
CYCLE = HISTORY[-1]
OLD_CYCLE = HISTORY[-2]

# Keys a loader or spreadsheet likes to "help" with: leading zeros, a missing-value token, a
# formula, a negative number, a sign, Unicode, a separator and quotes inside the text.
SPECIAL = [
    ("00123", "Lyon, FR"),
    ("00123", "L1"),
    ("NA", "L1"),
    ("=SUM(A1)", "L1"),
    ("-5", "L1"),
    ("+x", "L1"),
    ("Ünïcødé 日本 😀", 'say "hi"'),
]

# note -> (expected text in CSV, expected text in xlsx). The prefix rule is OWASP's; CR and
# CRLF become LF (docs/sources.md §6.3); xlsx cannot hold C0 controls other than tab/LF/CR, so
# they become the control pictures U+2400+code.
HOSTILE: dict[str, tuple[str, str, str]] = {
    "H01": ("=1+2", "'=1+2", "'=1+2"),
    "H02": ("@SUM(A1)", "'@SUM(A1)", "'@SUM(A1)"),
    "H03": ("+x", "'+x", "'+x"),
    "H04": ("-x", "'-x", "'-x"),
    "H05": ("\tTab first", "'\tTab first", "'\tTab first"),
    "H06": ("\rCR first", "'\nCR first", "'\nCR first"),
    "H07": ("\nLF first", "'\nLF first", "'\nLF first"),
    "H08": ("[/] not [bold]markup", "[/] not [bold]markup", "[/] not [bold]markup"),
    "H09": ("bare\rCR inside", "bare\nCR inside", "bare\nCR inside"),
    "H10": (
        '=HYPERLINK("http://x","c")',
        '\'=HYPERLINK("http://x","c")',
        '\'=HYPERLINK("http://x","c")',
    ),
    "H11": ('one\r\ntwo, "q"; three', 'one\ntwo, "q"; three', 'one\ntwo, "q"; three'),
    "H12": ("#N/A", "#N/A", "#N/A"),
    "H13": ("\x01bell\x1b[31mred", "\x01bell\x1b[31mred", "\u2401bell\u241b[31mred"),
}
TRIGGERS = tuple("=+-@\t\r\n\0")

ROOT_CAUSES = numbered([("promo", "-Promo, big"), ("unknown", "Unknown")])
REVIEWER = "=cmd|' /C calc'!A0"  # the classic DDE payload of the OWASP page


def series_keys() -> list[tuple[str, str]]:
    return SPECIAL + [(name, "L1") for name in HOSTILE]


def forecast_value(s: int, p: int) -> float:
    """Forward forecasts whose repr needs 17 significant digits for most cells."""
    return (s + 1) * 10 + (p + 1) / 3 + 0.1


def price_value(s: int, p: int) -> float:
    return 2.5 + 0.25 * p + s / 8


@pytest.fixture
def scenario(tmp_path: Path) -> Iterator[dict[str, object]]:
    """A portfolio file, its ledger with decisions for every hostile case, and expectations."""
    keys = series_keys()
    expected_forecast: dict[tuple[str, str, str], float | None] = {}
    rows = []
    for s, (item, location) in enumerate(keys):
        for p, period in enumerate(HISTORY):
            rows.append([item, location, period, 10 + s, 11 + s, price_value(s, p)])
        for p, period in enumerate(FORWARD):
            value: float | None = forecast_value(s, p)
            if (item, location) == ("NA", "L1") and p == 1:
                value = None  # a missing forward forecast stays missing
            if (item, location) == ("+x", "L1") and p == 0:
                value = -5.0  # a negative forecast stays a number
            if (item, location) == ("00123", "L1") and p == 2:
                value = 0.1 + 0.2  # repr 0.30000000000000004
            expected_forecast[(item, location, period)] = value
            price = price_value(s, len(HISTORY) + p)
            rows.append([item, location, period, "", "" if value is None else repr(value), price])
    path = tmp_path / "week44.csv"
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["item", "location", "period", "demand", "forecast", "price"])
        writer.writerows(rows)
    portfolio = read_portfolio(path)
    assert portfolio.cycle == CYCLE and portfolio.n_forward == len(FORWARD)

    base = {"portfolio_name": path.name, "portfolio_fingerprint": portfolio.fingerprint}
    ledger = Ledger.open(tmp_path / "week44.ledger.sqlite", root_causes=ROOT_CAUSES)
    lines: dict[tuple[str, str], list[tuple[str, float, float]]] = {}

    def price_of(key: tuple[str, str], period: str) -> float:
        return price_value(keys.index(key), len(HISTORY) + FORWARD.index(period))

    # Periods 2-3 of 00123 @ Lyon raised by 10 %.
    lyon = ("00123", "Lyon, FR")
    lines[lyon] = [
        (
            FORWARD[p],
            expected_forecast[(*lyon, FORWARD[p])],
            expected_forecast[(*lyon, FORWARD[p])] * 1.1,
        )
        for p in (1, 2)
    ]
    ledger.record(
        CYCLE,
        *lyon,
        outcome="adjusted",
        root_cause="promo",
        note="=1+2",
        reviewer=REVIEWER,
        adjustment="2-3: +10%",
        lines=lines[lyon],
        expected_version=0,
        **base,
    )
    # Every forward period of =SUM(A1) set to 120 (the spec itself starts with "=").
    formula = ("=SUM(A1)", "L1")
    lines[formula] = [(d, expected_forecast[(*formula, d)], 120.0) for d in FORWARD]
    ledger.record(
        CYCLE,
        *formula,
        outcome="adjusted",
        root_cause="unknown",
        note='=HYPERLINK("http://x","c")',
        reviewer="@ana",
        adjustment="=120",
        lines=lines[formula],
        expected_version=0,
        **base,
    )
    # NA: adjusted, then decided again without change -> the later decision is effective.
    na = ("NA", "L1")
    ledger.record(
        CYCLE,
        *na,
        outcome="adjusted",
        root_cause="promo",
        note="first",
        reviewer="ana",
        adjustment="=1",
        lines=[(FORWARD[0], expected_forecast[(*na, FORWARD[0])], 1.0)],
        expected_version=0,
        **base,
    )
    ledger.record(
        CYCLE,
        *na,
        outcome="no_change",
        root_cause="unknown",
        note="second thoughts",
        reviewer="ana",
        expected_version=1,
        **base,
    )
    # -5: adjusted, then undone -> not reviewed at all.
    minus = ("-5", "L1")
    ledger.record(
        CYCLE,
        *minus,
        outcome="adjusted",
        root_cause="promo",
        note="oops",
        reviewer="ana",
        adjustment="=0",
        lines=[(d, expected_forecast[(*minus, d)], 0.0) for d in FORWARD],
        expected_version=0,
        **base,
    )
    ledger.undo(CYCLE, *minus, reviewer="ana", expected_version=1, **base)
    for name, (note, _, _) in HOSTILE.items():
        ledger.record(
            CYCLE,
            name,
            "L1",
            outcome="handed_off",
            root_cause="unknown",
            note=note,
            reviewer="bo",
            expected_version=0,
            **base,
        )
    # A decision of the previous cycle, seen only when that cycle is exported.
    ledger.record(
        OLD_CYCLE,
        "+x",
        "L1",
        outcome="deferred",
        root_cause="unknown",
        note="last week",
        reviewer="ana",
        expected_version=0,
        **base,
    )
    try:
        yield {
            "path": path,
            "portfolio": portfolio,
            "ledger": ledger,
            "forecast": expected_forecast,
            "lines": lines,
            "price_of": price_of,
            "reviewed": {lyon, formula, na, *[(n, "L1") for n in HOSTILE]},
        }
    finally:
        ledger.close()


def folder_listing(folder: Path) -> dict[str, bytes]:
    """Every file and folder under ``folder`` (hidden ones too) and the bytes of each file,
    except the ledger (reading it touches -shm)."""
    return {
        str(p.relative_to(folder)): p.read_bytes() if p.is_file() else b"<folder>"
        for p in sorted(folder.rglob("*"))
        if ".ledger.sqlite" not in p.name
    }


#: The scenario's forward forecasts need 17 significant digits, more decimals than an export
#: keeps: adjusted values are rounded to the cap (docs/export.md, "Precision").
DECIMALS = MAX_DECIMALS


def rounded(value: float, decimals: int = DECIMALS) -> float:
    """The precision rule by the ``decimal`` module: the shortest decimal form of the value,
    rounded half away from zero (ROUND_HALF_UP)."""
    step = Decimal(1).scaleb(-decimals)
    return float(Decimal(repr(value)).quantize(step, ROUND_HALF_UP)) + 0.0


def expected_adjusted(scenario: dict) -> dict[tuple[str, str, str], float | None]:
    """adjusted_forecast per cell: the ledger lines of effective decisions at the export's
    precision, else the forecast as in the file."""
    out = dict(scenario["forecast"])
    for key, lines in scenario["lines"].items():
        for period, _, adjusted in lines:
            out[(*key, period)] = rounded(adjusted)
    return out


def same_number(got: object, want: float | None) -> bool:
    """Equal as floats, bit for bit via repr; None/'' stands for a missing number.

    openpyxl reads an integral number cell ("-5") back as int; it is still the same double.
    """
    if want is None:
        return got in (None, "")
    if isinstance(got, bool) or not isinstance(got, int | float):
        return False
    return repr(float(got)) == repr(want)


# ---- the tables ---------------------------------------------------------------------------


def test_tables_apply_exactly_the_effective_adjustments(scenario: dict) -> None:
    tables = review_tables(ReviewCycle(scenario["portfolio"], scenario["ledger"]))
    fc = tables.forecast
    assert len(fc) == len(series_keys()) * len(FORWARD)
    want = expected_adjusted(scenario)
    adjusted_cells = {(*k, p) for k, lines in scenario["lines"].items() for p, _, _ in lines}
    for row in fc.itertuples(index=False):
        cell = (row.item, row.location, row.period)
        assert same_number(
            None if row.forecast != row.forecast else row.forecast, scenario["forecast"][cell]
        )
        got = None if row.adjusted_forecast != row.adjusted_forecast else row.adjusted_forecast
        assert same_number(got, want[cell]), cell
        assert bool(row.adjusted) == (cell in adjusted_cells), cell
        if (row.item, row.location) not in scenario["reviewed"]:
            # Unreviewed series: the forward forecast passes through untouched.
            assert row.outcome == "" and not row.adjusted
    assert tables.adjusted_periods == len(adjusted_cells)
    # The undone decision (-5) and the superseded adjustment (NA) are not applied.
    assert not fc[(fc["item"] == "-5") | (fc["item"] == "NA")]["adjusted"].any()
    assert set(fc[fc["item"] == "NA"]["outcome"]) == {"no_change"}


def test_units_and_value_change_follow_their_definition(scenario: dict) -> None:
    tables = review_tables(ReviewCycle(scenario["portfolio"], scenario["ledger"]))
    dec = tables.decisions.set_index(["item", "location"])
    for key, lines in scenario["lines"].items():
        # Definition (docs/export.md): Σ (adjusted − original), and Σ (adjusted − original) ×
        # the price of that period, with the adjusted values as exported; summed in period
        # order like the export, then rounded: units to the decimals of the export or of the
        # originals, whichever is more (no float noise), value to those plus the prices' (3
        # here: 2.5 + 0.25 p + s / 8), at most the cap.
        units = 0.0
        value = 0.0
        for period, original, adjusted in lines:
            units += rounded(adjusted) - original
            value += (rounded(adjusted) - original) * scenario["price_of"](key, period)
        assert repr(float(dec.loc[key, "units_change"])) == repr(rounded(units))
        want_value = rounded(value, min(DECIMALS + 3, MAX_DECIMALS))
        assert repr(float(dec.loc[key, "value_change"])) == repr(want_value)
    assert dec.loc[("H01", "L1"), "units_change"] == 0.0
    assert set(map(tuple, dec.index)) == scenario["reviewed"]


def test_other_cycle_and_unknown_series_are_reported(scenario: dict) -> None:
    ledger: Ledger = scenario["ledger"]
    portfolio: Portfolio = scenario["portfolio"]
    ledger.record(
        CYCLE,
        "GHOST",
        "L1",
        outcome="no_change",
        root_cause="unknown",
        note="",
        reviewer="ana",
        portfolio_name="other.csv",
        portfolio_fingerprint="0" * 64,
        expected_version=0,
    )
    tables = review_tables(ReviewCycle(portfolio, ledger))
    assert "GHOST" not in set(tables.decisions["item"])
    assert any("not in week44.csv" in w and "'GHOST'" in w for w in tables.warnings)
    old = review_tables(ReviewCycle(portfolio, ledger, name=OLD_CYCLE))
    assert list(old.decisions["item"]) == ["+x"] and list(old.decisions["outcome"]) == ["deferred"]
    assert any(f"Cycle {OLD_CYCLE} is not the cycle" in w for w in old.warnings)
    with pytest.raises(ExportError, match="not an ISO date"):
        review_tables(ReviewCycle(portfolio, ledger, name="last week"))


def test_portfolio_without_location_has_no_location_column(tmp_path: Path) -> None:
    path = tmp_path / "items.csv"
    path.write_text(
        "item,period,demand,forecast\nA,2026-10-05,1,2\nA,2026-10-12,,3\nB,2026-10-05,1,2\n"
        "B,2026-10-12,,4\n",
        encoding="utf-8",
    )
    portfolio = read_portfolio(path)
    with Ledger.open(tmp_path / "items.ledger.sqlite") as ledger:
        ledger.record(
            portfolio.cycle,
            "B",
            "",
            outcome="adjusted",
            root_cause="unknown",
            note="",
            reviewer="ana",
            adjustment="=5",
            lines=[("2026-10-12", 4.0, 5.0)],
            portfolio_name=path.name,
            portfolio_fingerprint=portfolio.fingerprint,
            expected_version=0,
        )
        tables = review_tables(ReviewCycle(portfolio, ledger))
        result = export_review(ReviewCycle(portfolio, ledger), tmp_path / "out.json")
    assert "location" not in tables.decisions and "location" not in tables.forecast
    assert tables.forecast["adjusted_forecast"].tolist() == [3.0, 5.0]
    # No price column: the value change is unknown, never 0 (empty in CSV, null in JSON).
    doc = json.loads(result.paths[0].read_text(encoding="utf-8"))
    assert doc["decisions"][0]["value_change"] is None
    assert doc["decisions"][0]["units_change"] == 1.0


# ---- CSV ------------------------------------------------------------------------------------


def read_csv(path: Path) -> list[list[object]]:
    # QUOTE_NONNUMERIC on reading turns every unquoted field into a float: numbers must come
    # back as floats and everything else as str, which proves numbers were written unquoted.
    with path.open(encoding="utf-8", newline="") as handle:
        return list(csv.reader(handle, quoting=csv.QUOTE_NONNUMERIC))


def test_csv_round_trip_keeps_keys_numbers_and_neutralises_text(
    scenario: dict, tmp_path: Path
) -> None:
    result = export_review(
        ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "up.csv"
    )
    names = [p.name for p in result.paths]
    assert names == ["up-decisions.csv", "up-forecast.csv", "up-README.txt"]
    # One folder holds the set (it is what gets replaced as a whole), and nothing else.
    assert {p.parent for p in result.paths} == {tmp_path / "up"}
    assert sorted(p.name for p in (tmp_path / "up").iterdir()) == sorted(names)
    assert not (tmp_path / "up.csv").exists()

    decisions = read_csv(tmp_path / "up" / "up-decisions.csv")
    header, body = decisions[0], decisions[1:]
    assert len(body) == len(scenario["reviewed"])  # no row was split by a line break or CR
    assert all(len(row) == len(header) for row in body)
    rows = {(r[0], r[1]): dict(zip(header, r, strict=True)) for r in body}
    assert set(rows) == scenario["reviewed"]
    for name, (_, csv_text, _) in HOSTILE.items():
        assert rows[(name, "L1")]["note"] == csv_text, name
    lyon = rows[("00123", "Lyon, FR")]
    assert lyon["reviewer"] == "'" + REVIEWER
    assert lyon["root_cause_label"] == "'-Promo, big"
    assert lyon["adjustment"] == "2-3: +10%"  # starts with a digit: nothing to neutralise
    assert rows[("=SUM(A1)", "L1")]["adjustment"] == "'=120"
    assert rows[("=SUM(A1)", "L1")]["reviewer"] == "'@ana"
    assert isinstance(lyon["units_change"], float) and isinstance(lyon["value_change"], float)
    for row in rows.values():
        for column, value in row.items():
            if column not in ("item", "location") and isinstance(value, str):
                assert not value.startswith(TRIGGERS), (column, value)

    forecast = read_csv(tmp_path / "up" / "up-forecast.csv")
    header, body = forecast[0], forecast[1:]
    assert header == [
        "item",
        "location",
        "period",
        "forecast",
        "adjusted_forecast",
        "adjusted",
        "adjusted_in_cycle",
        "outcome",
        "group_decision",
    ]
    assert len(body) == len(series_keys()) * len(FORWARD)
    want = expected_adjusted(scenario)
    for item, location, period, fc, adj, flag, made_in, _, group in body:
        assert group == ""  # no group decision in this scenario
        # Keys byte-exact (never prefixed), numbers exact.
        cell = (item, location, period)
        assert cell in scenario["forecast"]
        assert same_number(fc, scenario["forecast"][cell]), cell
        assert same_number(adj, want[cell]), cell
        assert flag in ("true", "false")
        # Every adjusted cell names the cycle whose decision made it (here: this cycle).
        assert made_in == (CYCLE if flag == "true" else ""), cell
    assert {(r[0], r[1]) for r in body} == set(series_keys())
    assert any("start with = + - @" in w for w in result.warnings)  # '=SUM(A1)', '-5', '+x'


def test_csv_bare_cr_never_reaches_the_file(scenario: dict, tmp_path: Path) -> None:
    export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "up.csv")
    raw = (tmp_path / "up" / "up-decisions.csv").read_bytes()
    # Records end with CRLF (RFC 4180); any other CR would be a bare CR from a note, the case
    # CPython < 3.11.9 writes unquoted (gh-67044, docs/sources.md §6.3).
    assert b"\r" not in raw.replace(b"\r\n", b"")


def test_csv_readme_carries_caution_and_provenance(scenario: dict, tmp_path: Path) -> None:
    export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "up.csv")
    readme = (tmp_path / "up" / "up-README.txt").read_text(encoding="utf-8")
    assert "advisory" in CAUTION and "planning system" in CAUTION
    assert CAUTION in readme
    portfolio: Portfolio = scenario["portfolio"]
    for text in (
        "week44.csv",
        portfolio.fingerprint,
        CYCLE,
        "week44.ledger.sqlite",
        "up-forecast.csv",
    ):
        assert text in readme
    assert re.search(r"Exported at \(UTC\)\s+\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", readme)
    # The CSV keeps control characters of notes exactly, so the README warns against a raw print.
    assert "never print them raw to a" in readme and "terminal" in readme
    # The manifest: each data file's size and SHA-256, so an upload can check it read this set.
    for name in ("up-decisions.csv", "up-forecast.csv"):
        data = (tmp_path / "up" / name).read_bytes()
        entry = re.search(
            re.escape(name) + r":.*\n\s+([\d,]+) bytes, SHA-256 ([0-9a-f]{64})", readme
        )
        assert entry, name
        assert int(entry[1].replace(",", "")) == len(data)
        assert entry[2] == hashlib.sha256(data).hexdigest()


# ---- xlsx -----------------------------------------------------------------------------------


def sheet_rows(book: openpyxl.Workbook, name: str) -> list[list[object]]:
    return [[c.value for c in row] for row in book[name].iter_rows()]


def test_xlsx_has_no_formula_and_keeps_keys_and_numbers(scenario: dict, tmp_path: Path) -> None:
    target = tmp_path / "up.xlsx"
    result = export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), target)
    assert result.paths == (target,)
    with zipfile.ZipFile(target) as archive:
        sheets = [n for n in archive.namelist() if n.startswith("xl/worksheets/")]
        assert sheets
        for member in sheets:
            xml = archive.read(member).decode("utf-8")
            # Formula element, error cell, hyperlink: none (docs/sources.md §6.2).
            assert not re.search(r"<f[\s>/]", xml), member
            assert 't="e"' not in xml and "<hyperlink" not in xml, member
    book = openpyxl.load_workbook(target)
    assert book.sheetnames == ["Decisions", "Forecast", "Read me"]
    for sheet in book.worksheets:
        for row in sheet.iter_rows():
            for cell in row:
                assert cell.data_type not in ("f", "e"), (sheet.title, cell.coordinate, cell.value)
                if isinstance(cell.value, str) and cell.column > 2:
                    assert not cell.value.startswith(TRIGGERS), (sheet.title, cell.value)

    decisions = sheet_rows(book, "Decisions")
    header = decisions[0]
    rows = {(r[0], r[1]): dict(zip(header, r, strict=True)) for r in decisions[1:]}
    assert set(rows) == scenario["reviewed"]
    for name, (_, _, xlsx_text) in HOSTILE.items():
        assert rows[(name, "L1")]["note"] == xlsx_text, name
    assert rows[("=SUM(A1)", "L1")]["adjustment"] == "'=120"
    assert book["Decisions"]["A1"].value == "item"

    forecast = sheet_rows(book, "Forecast")
    want = expected_adjusted(scenario)
    assert len(forecast) == 1 + len(series_keys()) * len(FORWARD)
    for item, location, period, fc, adj, flag, _, _, _ in forecast[1:]:
        cell = (item, location, period.date().isoformat())  # periods are date cells
        assert same_number(fc, scenario["forecast"][cell]), cell
        assert same_number(adj, want[cell]), cell
        assert isinstance(flag, bool)
    # Key cells are string cells even when they look like a formula or a number.
    key_cells = [r[0] for r in book["Forecast"].iter_rows(min_row=2, max_col=1)]
    assert all(c.data_type == "s" and isinstance(c.value, str) for c in key_cells)
    assert {c.value for c in key_cells} >= {"=SUM(A1)", "-5", "00123", "NA"}
    assert any("control characters" in w for w in result.warnings)


def test_xlsx_read_me_has_caution_and_provenance(scenario: dict, tmp_path: Path) -> None:
    target = tmp_path / "up.xlsx"
    export_review(
        ReviewCycle(scenario["portfolio"], scenario["ledger"]), target, exported_by="=boss"
    )
    readme = sheet_rows(openpyxl.load_workbook(target), "Read me")
    values = {r[0]: r[1] for r in readme if r and r[0]}
    assert values["Caution"] == CAUTION
    assert values["Portfolio file"] == "week44.csv"
    assert values["Portfolio fingerprint (SHA-256)"] == scenario["portfolio"].fingerprint
    assert values["Review cycle"] == CYCLE
    assert values["Exported by"] == "'=boss"
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", values["Exported at (UTC)"])
    # The format's own findings are listed too.
    assert any(r[0] == "Warning" and "control characters" in r[1] for r in readme if r and r[0])


def test_xlsx_refuses_more_rows_than_a_sheet_holds(
    scenario: dict, tmp_path: Path, monkeypatch
) -> None:
    monkeypatch.setattr(export_mod, "XLSX_MAX_ROWS", len(series_keys()) * len(FORWARD))
    target = tmp_path / "big.xlsx"
    with pytest.raises(ExportError, match=r"(?s)at most 60.*Export to CSV instead"):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), target)
    assert not target.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".big.xlsx")]


def test_xlsx_cuts_long_cells_with_a_marker_and_a_warning(
    scenario: dict, tmp_path: Path, monkeypatch
) -> None:
    ledger: Ledger = scenario["ledger"]
    long_note = "😀" * 150 + "end"  # 303 UTF-16 units: Excel counts UTF-16 code units
    ledger.record(
        CYCLE,
        "+x",
        "L1",
        outcome="no_change",
        root_cause="unknown",
        note=long_note,
        reviewer="ana",
        portfolio_name="week44.csv",
        portfolio_fingerprint=scenario["portfolio"].fingerprint,
        expected_version=0,
    )
    monkeypatch.setattr(export_mod, "XLSX_MAX_CELL", 120)
    result = export_review(ReviewCycle(scenario["portfolio"], ledger), tmp_path / "cut.xlsx")
    rows = sheet_rows(openpyxl.load_workbook(tmp_path / "cut.xlsx"), "Decisions")
    note = next(r[7] for r in rows if r[0] == "+x")
    assert len(note.encode("utf-16-le")) // 2 <= 120
    assert note.startswith("😀") and "cut: 153 characters" in note
    assert any("were cut" in w for w in result.warnings)
    # CSV and JSON keep the whole note.
    export_review(ReviewCycle(scenario["portfolio"], ledger), tmp_path / "cut.json")
    doc = json.loads((tmp_path / "cut.json").read_text(encoding="utf-8"))
    assert next(d for d in doc["decisions"] if d["item"] == "+x")["note"] == long_note


# ---- JSON -----------------------------------------------------------------------------------


def test_json_round_trip_is_exact(scenario: dict, tmp_path: Path) -> None:
    target = tmp_path / "up.json"
    export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), target)
    text = target.read_text(encoding="utf-8")
    assert "NaN" not in text and "Infinity" not in text
    doc = json.loads(text)
    assert list(doc) == [
        "caution",
        "portfolio",
        "cycle",
        "ledger",
        "exported_at",
        "exported_by",
        "triage_version",
        "warnings",
        "decisions",
        "forecast",
    ]
    assert doc["caution"] == CAUTION
    assert doc["portfolio"] == {
        "name": "week44.csv",
        "fingerprint": scenario["portfolio"].fingerprint,
    }
    assert doc["cycle"] == CYCLE
    by_key = {(d["item"], d["location"]): d for d in doc["decisions"]}
    assert set(by_key) == scenario["reviewed"]
    for name, (note, _, _) in HOSTILE.items():
        # JSON has no formula evaluator: text is exported exactly as the ledger holds it.
        assert by_key[(name, "L1")]["note"] == note
    assert by_key[("00123", "Lyon, FR")]["reviewer"] == REVIEWER
    want = expected_adjusted(scenario)
    assert len(doc["forecast"]) == len(series_keys()) * len(FORWARD)
    for rec in doc["forecast"]:
        cell = (rec["item"], rec["location"], rec["period"])
        assert all(isinstance(rec[k], str) for k in ("item", "location", "period"))
        assert same_number(rec["forecast"], scenario["forecast"][cell]), cell
        assert same_number(rec["adjusted_forecast"], want[cell]), cell
        assert isinstance(rec["adjusted"], bool)


def test_json_escapes_terminal_controls_but_decodes_exactly(tmp_path: Path, scenario: dict) -> None:
    ledger: Ledger = scenario["ledger"]
    note = "csi\x9b31m del\x7f esc\x1b]2;title\x07"
    ledger.record(
        CYCLE,
        "+x",
        "L1",
        outcome="no_change",
        root_cause="unknown",
        note=note,
        reviewer="ana",
        portfolio_name="week44.csv",
        portfolio_fingerprint=scenario["portfolio"].fingerprint,
        expected_version=0,
    )
    export_review(ReviewCycle(scenario["portfolio"], ledger), tmp_path / "c.json")
    text = (tmp_path / "c.json").read_text(encoding="utf-8")
    assert not re.search("[\x00-\x1f\x7f-\x9f]", text.replace("\n", ""))
    doc = json.loads(text)
    assert next(d for d in doc["decisions"] if d["item"] == "+x")["note"] == note


# ---- files: existing targets, failures ------------------------------------------------------


@pytest.mark.parametrize("name", ["up.xlsx", "up.json", "up.csv"])
def test_existing_target_is_kept_without_force(scenario: dict, tmp_path: Path, name: str) -> None:
    target = tmp_path / name
    if name == "up.csv":  # the set's folder is what exists
        (tmp_path / "up").mkdir()
        existing, named = tmp_path / "up" / "up-README.txt", tmp_path / "up"
    else:
        existing = named = tmp_path / name
    existing.write_bytes(b"old content")
    before = folder_listing(tmp_path)
    with pytest.raises(TriageError, match=re.escape(str(named)) + " already exist"):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), target)
    assert folder_listing(tmp_path) == before  # nothing else written either
    result = export_review(
        ReviewCycle(scenario["portfolio"], scenario["ledger"]), target, force=True
    )
    assert existing.read_bytes() != b"old content"
    assert all(p.exists() for p in result.paths)


def test_unknown_suffix_and_folder_targets_are_refused(scenario: dict, tmp_path: Path) -> None:
    with pytest.raises(
        ExportError, match=r"unknown file type '\.txt'.*\n.*\.csv, \.xlsx or \.json"
    ):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "x.txt")
    (tmp_path / "dir.json").mkdir()
    with pytest.raises(ExportError, match="is a folder"):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "dir.json")


def disk_full(*_args: object, **_kwargs: object) -> None:
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def test_xlsx_failure_mid_write_leaves_old_file_and_no_temp(
    scenario: dict, tmp_path: Path, monkeypatch
) -> None:
    target = tmp_path / "up.xlsx"
    target.write_bytes(b"old workbook")

    def half_save(self: excel.ExcelWriter) -> None:
        self._archive.writestr("xl/half.xml", b"half a workbook")
        disk_full()

    # openpyxl spools write-only sheets in the system temp folder unless told otherwise:
    # give it one of our own, to see that nothing is left there either.
    spools = tmp_path / "system-tmp"
    spools.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(spools))
    monkeypatch.setattr(excel.ExcelWriter, "save", half_save)
    before = folder_listing(tmp_path)
    with pytest.raises(TriageError, match=r"No space left on device.*nothing was changed"):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), target, force=True)
    assert folder_listing(tmp_path) == before
    assert list(spools.iterdir()) == []


def test_json_failure_mid_write_leaves_no_temp(scenario: dict, tmp_path: Path, monkeypatch) -> None:
    calls = {"n": 0}
    real = export_mod._dumps

    def failing(value: object, **kwargs: object) -> str:
        calls["n"] += 1
        if calls["n"] > 20:  # after the head and some records are on disk
            disk_full()
        return real(value, **kwargs)

    monkeypatch.setattr(export_mod, "_dumps", failing)
    before = folder_listing(tmp_path)
    with pytest.raises(TriageError, match="No space left"):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "up.json")
    assert calls["n"] > 20
    assert folder_listing(tmp_path) == before


@pytest.mark.parametrize("old_files", [False, True])
def test_csv_set_is_all_or_nothing(
    scenario: dict, tmp_path: Path, monkeypatch, old_files: bool
) -> None:
    if old_files:
        (tmp_path / "up").mkdir()
        for name in ("up-decisions.csv", "up-forecast.csv", "up-README.txt"):
            (tmp_path / "up" / name).write_text(f"old {name}", encoding="utf-8")
    before = folder_listing(tmp_path)
    real = export_mod._write_csv

    def second_fails(path: Path, frame, style=export_mod.CSV_STYLE) -> None:
        if "adjusted_forecast" in frame:  # the forecast file, written after the decisions
            with path.open("w", encoding="utf-8") as handle:
                handle.write("item,location\nhalf")
            disk_full()
        real(path, frame, style)

    monkeypatch.setattr(export_mod, "_write_csv", second_fails)
    with pytest.raises(TriageError, match=r"up-forecast\.csv.*No space left"):
        export_review(
            ReviewCycle(scenario["portfolio"], scenario["ledger"]),
            tmp_path / "up.csv",
            force=old_files,
        )
    # The decisions file written first is gone again (or the old one is back), no temp or
    # backup file is left, and the old files are byte-identical.
    assert folder_listing(tmp_path) == before


# ---- a real spreadsheet program -------------------------------------------------------------


def libreoffice_csv(book: Path, out: Path, profile: Path) -> dict[str, list[list[str]]]:
    """Every sheet of ``book`` as LibreOffice saves it to CSV (UTF-8), by sheet name.

    Filter options (LibreOffice "CSV Filter Options", token 12 = -1 exports each sheet to
    NAME-Sheet.csv, LibreOffice >= 7.2): comma, double quote, UTF-8 (76), from line 1.
    """
    command = [
        shutil.which("soffice") or "soffice",
        f"-env:UserInstallation={profile.as_uri()}",
        "--headless",
        "--convert-to",
        "csv:Text - txt - csv (StarCalc):44,34,76,1,,0,false,true,false,false,false,-1",
        "--outdir",
        str(out),
        str(book),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    sheets = {}
    for name in ("Decisions", "Forecast", "Read me"):
        path = out / f"{book.stem}-{name}.csv"
        assert path.exists(), (done.stdout, sorted(p.name for p in out.iterdir()))
        with path.open(encoding="utf-8", newline="") as handle:
            sheets[name] = list(csv.reader(handle))
    return sheets


def lo_number(text: str, want: float | None) -> bool:
    # LibreOffice 7.4 writes at most 15 significant digits to CSV (measured: 0.30000000000000004
    # comes out as 0.3), so numbers are compared to 1e-14 relative.
    if want is None:
        return text == ""
    return float(text) == pytest.approx(want, rel=1e-14, abs=1e-300)


@pytest.mark.skipif(
    shutil.which("soffice") is None,
    reason="LibreOffice (soffice) is not on PATH; CI installs libreoffice-calc for this test",
)
def test_libreoffice_reads_the_workbook_as_written(scenario: dict, tmp_path: Path) -> None:
    book = tmp_path / "up.xlsx"
    export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), book)
    export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "up.csv")
    ours = read_csv(tmp_path / "up" / "up-decisions.csv")
    sheets = libreoffice_csv(book, tmp_path / "lo", tmp_path / "lo-profile")

    theirs = sheets["Decisions"]
    assert theirs[0] == ours[0]
    assert len(theirs) == len(ours)  # no row split or merged by a line break
    numbers = {"units_change", "value_change"}
    xlsx_notes = {f"{k}": v[2] for k, v in HOSTILE.items()}
    for mine, lo in zip(ours[1:], theirs[1:], strict=True):
        row = dict(zip(ours[0], mine, strict=True))
        for column, got in zip(ours[0], lo, strict=True):
            want = row[column]
            if column in numbers:
                assert lo_number(got, want if isinstance(want, float) else None), (
                    column,
                    got,
                    want,
                )
            elif column == "note" and row["item"] in xlsx_notes:
                assert got == xlsx_notes[row["item"]], (row["item"], got)
            else:
                # Text, including '=SUM(A1)' and "'=1+2": read as text, never evaluated.
                assert got == want, (column, got, want)

    forecast = sheets["Forecast"]
    want_adj = expected_adjusted(scenario)
    assert len(forecast) == 1 + len(series_keys()) * len(FORWARD)
    for item, location, period, fc, adj, flag, _, _, _ in forecast[1:]:
        cell = (item, location, period)
        assert lo_number(fc, scenario["forecast"][cell]), cell
        assert lo_number(adj, want_adj[cell]), cell
        assert flag in ("TRUE", "FALSE")
    readme = {r[0]: r[1] for r in sheets["Read me"] if len(r) > 1 and r[0]}
    assert readme["Caution"] == CAUTION


def test_chunked_writing_gives_the_same_tables(
    scenario: dict, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    one, many = tmp_path / "one", tmp_path / "many"
    one.mkdir()
    many.mkdir()
    for name in ("up.csv", "up.json", "up.xlsx"):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), one / name)
    # 7 rows per chunk: the forecast table (60 rows) spans nine chunks, with a partial last one.
    monkeypatch.setattr(export_mod, "_CHUNK_ROWS", 7)
    for name in ("up.csv", "up.json", "up.xlsx"):
        export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), many / name)
    for name in ("up-decisions.csv", "up-forecast.csv"):
        assert (one / "up" / name).read_bytes() == (many / "up" / name).read_bytes()
    a, b = (json.loads((d / "up.json").read_text(encoding="utf-8")) for d in (one, many))
    assert a["decisions"] == b["decisions"] and a["forecast"] == b["forecast"]
    for sheet in ("Decisions", "Forecast"):
        assert sheet_rows(openpyxl.load_workbook(one / "up.xlsx"), sheet) == sheet_rows(
            openpyxl.load_workbook(many / "up.xlsx"), sheet
        )


def test_export_never_replaces_the_portfolio_even_with_force(tmp_path: Path) -> None:
    # Project rule (the inputs are the reviewer's work, docs/sources.md §5): an export named like
    # the workbook being reviewed is refused, --force or not, and the workbook is unchanged.
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.append(["item", "period", "demand", "forecast"])
    for week, day in enumerate(("2026-10-05", "2026-10-12", "2026-10-19")):
        sheet.append(["A", day, 10 + week, 11])
    sheet.append(["A", "2026-10-26", None, 12])
    path = tmp_path / "week44.xlsx"
    book.save(path)
    before = path.read_bytes()
    portfolio = read_portfolio(path)
    with (
        Ledger.open(tmp_path / "week44.ledger.sqlite") as ledger,
        pytest.raises(ExportError, match="is the portfolio itself"),
    ):
        export_review(ReviewCycle(portfolio, ledger), path, force=True)
    assert path.read_bytes() == before


def test_flat_files_of_an_earlier_export_are_kept_and_named(scenario: dict, tmp_path: Path) -> None:
    # Earlier versions wrote NAME-decisions.csv etc. beside each other. They are the user's
    # now: kept byte for byte, and named in a warning so that no upload reads them by mistake;
    # their temporary and backup files, left by a crash, are removed.
    flat = tmp_path / "up-forecast.csv"
    flat.write_text("last week's forecast", encoding="utf-8")
    crashed = [tmp_path / ".up-forecast.csv.a1b2c3d4.bak", tmp_path / ".up-README.txt.ab_cd12z.tmp"]
    for path in crashed:
        path.write_text("leftover", encoding="utf-8")
    result = export_review(
        ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "up.csv"
    )
    assert flat.read_text(encoding="utf-8") == "last week's forecast"
    assert not any(p.exists() for p in crashed)
    assert any(
        "up-forecast.csv beside the folder up come from an earlier export" in w
        for w in result.warnings
    )
    readme = (tmp_path / "up" / "up-README.txt").read_text(encoding="utf-8")
    assert "come from an earlier export" in readme


# ---- CSV style: the one place a separator and decimal mark are set ---------------------------


def test_csv_style_sets_separator_and_decimal_mark_in_one_place(
    scenario: dict, tmp_path: Path
) -> None:
    tables = review_tables(ReviewCycle(scenario["portfolio"], scenario["ledger"]))
    _, forecast, _ = file_tables(tables)
    style = export_mod.CsvStyle(sep=";", decimal=",")
    export_mod._write_csv(tmp_path / "semi.csv", forecast, style)
    export_mod._write_csv(tmp_path / "plain.csv", forecast)
    with (tmp_path / "semi.csv").open(encoding="utf-8", newline="") as handle:
        semi = list(csv.reader(handle, delimiter=";"))
    plain = read_csv(tmp_path / "plain.csv")
    assert semi[0] == plain[0] and len(semi) == len(plain)
    raw = (tmp_path / "semi.csv").read_text(encoding="utf-8")
    for mine, theirs in zip(plain[1:], semi[1:], strict=True):
        for a, b in zip(mine, theirs, strict=True):
            if isinstance(a, float):
                # Unquoted, with a decimal comma, the same number.
                assert float(b.replace(",", ".")) == a and "." not in b
                assert f";{b};" in raw or raw.count(f";{b}\r\n")
            else:
                assert b == a
    assert '"Lyon, FR"' in raw  # text stays quoted, separators inside it too
    for bad in ({"sep": ","}, {"sep": ";;"}, {"decimal": "·"}, {"sep": '"'}):
        with pytest.raises(ExportError):
            export_mod.CsvStyle(**{"decimal": ",", **bad})


def test_whole_numbers_are_written_without_a_decimal_point(scenario: dict, tmp_path: Path) -> None:
    export_review(ReviewCycle(scenario["portfolio"], scenario["ledger"]), tmp_path / "up.csv")
    raw = (tmp_path / "up" / "up-forecast.csv").read_text(encoding="utf-8")
    # =SUM(A1) was set to 120; +x has the forecast -5 in the file.
    assert f'"=SUM(A1)","L1","{FORWARD[0]}",' in raw
    line = next(ln for ln in raw.splitlines() if ln.startswith(f'"=SUM(A1)","L1","{FORWARD[0]}"'))
    assert line.split(",")[4] == "120"
    assert f'"+x","L1","{FORWARD[0]}",-5,-5,"false"' in raw
