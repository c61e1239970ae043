"""`triage rank` and `triage check` on hand-written files of the kinds planners export.

Each file here is written byte by byte (BOMs, CRLF, quoting, odd ids, Parquet and xlsx types) and
run through the installed command in a subprocess. Numbers are checked against a plain
per-series oracle written for this file from the scoring contract, one series at a time, with no
numpy: Hyndman & Koehler (2006) "Another look at measures of forecast accuracy" for MAE, RMSE and
MASE; Brown's tracking signal as described by Trigg (1964); the exact sign test through
``scipy.stats.binomtest``; Gilliland (2010) for forecast value added over the naive forecast;
Syntetos, Boylan & Croston (2005) for ADI, CV² and the 1.32 / 0.49 cut-offs.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import math
import random
from pathlib import Path

import pytest
from scipy.stats import binomtest

from tests.cli.test_cli import run

# --- oracle


def _step(period: dt.date, freq: str, k: int) -> dt.date:
    if freq == "weekly":
        return period + dt.timedelta(days=7 * k)
    m = period.year * 12 + period.month - 1 + k
    return dt.date(m // 12, m % 12 + 1, 1)


def oracle(
    rows: list[dict], *, freq: str, window: int = 13, season: int = 1, lag=None, priced=False
):
    """Per-series measures; rows hold key (tuple), period, demand, forecast, price, lag."""
    if lag is not None:
        rows = [r for r in rows if r["lag"] == lag]
    actual = sorted({r["period"] for r in rows if r["demand"] is not None})
    last, win = actual[-1], set(actual[-window:])
    series: dict[tuple, dict] = {}
    for r in rows:
        series.setdefault(r["key"], {})[r["period"]] = r
    out = {}
    for key, by_p in series.items():
        errs, dem, fc, vabs, vbias, fva = [], [], [], [], [], []
        for p in sorted(by_p):
            r = by_p[p]
            if p in win and r["demand"] is not None and r["forecast"] is not None:
                e = r["forecast"] - r["demand"]  # e = forecast - demand (issue 2 §3)
                errs.append(e)
                dem.append(r["demand"])
                fc.append(r["forecast"])
                if priced:
                    vabs.append(abs(e) * r["price"])
                    vbias.append(e * r["price"])
                prev = by_p.get(_step(p, freq, -season))
                if prev is not None and prev["demand"] is not None:
                    fva.append(abs(r["demand"] - prev["demand"]) - abs(e))
        n, sd = len(errs), sum(dem)
        o = {
            "periods": n,
            "demand": sd,
            "forecast": sum(fc),
            "abs_error": sum(map(abs, errs)),
            "bias": sum(errs),
        }
        o["bias_pct"] = o["bias"] / sd if sd > 0 else None
        o["wape"] = o["abs_error"] / sd if sd > 0 else None
        o["mae"] = o["abs_error"] / n if n else None
        o["rmse"] = math.sqrt(sum(e * e for e in errs) / n) if n else None
        if priced:
            o["abs_error_value"], o["bias_value"] = sum(vabs), sum(vbias)
        o["tracking_signal"] = o["bias"] / o["mae"] if o["mae"] else None
        run_ = 0
        if errs and errs[-1] != 0:
            sign = 1 if errs[-1] > 0 else -1
            for e in reversed(errs):
                if e * sign <= 0:
                    break
                run_ += 1
            run_ *= sign
        o["bias_run"] = run_
        nz = [e for e in errs if e != 0]
        o["bias_pvalue"] = binomtest(sum(e > 0 for e in nz), len(nz), 0.5).pvalue if nz else 1.0
        hist = {p: r["demand"] for p, r in by_p.items() if p <= last and r["demand"] is not None}
        diffs = [
            abs(d - hist[_step(p, freq, -season)])
            for p, d in hist.items()
            if _step(p, freq, -season) in hist
        ]
        scale = sum(diffs) / len(diffs) if diffs else None
        o["mase"] = o["mae"] / scale if scale and o["mae"] is not None else None
        o["fva"] = sum(fva) / len(fva) if fva else None
        pos = [d for d in hist.values() if d > 0]
        if pos:
            mu = sum(pos) / len(pos)
            o["adi"] = len(hist) / len(pos)
            o["cv2"] = (sum((d - mu) ** 2 for d in pos) / len(pos)) / mu**2
            o["pattern"] = [["smooth", "erratic"], ["intermittent", "lumpy"]][o["adi"] >= 1.32][
                o["cv2"] >= 0.49
            ]
        else:
            o["adi"] = o["cv2"] = None
            o["pattern"] = "none"
        out[key] = o
    ranked_by = "abs_error_value" if priced else "abs_error"
    order = sorted(out, key=lambda k: (-out[k][ranked_by], k))  # ties: key ascending, code point
    total, cum = sum(o[ranked_by] for o in out.values()), 0.0
    for i, key in enumerate(order, 1):
        out[key]["rank"] = i
        cum += out[key][ranked_by]
        out[key]["error_share"] = out[key][ranked_by] / total if total > 0 else None
        out[key]["cum_share"] = cum / total if total > 0 else None
    return out


def assert_matches(want: dict, text: str, keys: tuple[str, ...]) -> list[dict]:
    rows = list(csv.DictReader(io.StringIO(text)))
    assert sorted(tuple(r[k] for k in keys) for r in rows) == sorted(want)
    for r in rows:
        o = want[tuple(r[k] for k in keys)]
        for column, value in o.items():
            got = r[column]
            if value is None:
                assert got == "", (r[keys[0]], column, got)
            elif isinstance(value, str):
                assert got == value, (r[keys[0]], column, got, value)
            else:
                assert got != "" and math.isclose(float(got), value, rel_tol=1e-9, abs_tol=1e-9), (
                    r[keys[0]],
                    column,
                    got,
                    value,
                )
    return rows


# --- file helpers


def weeks(start: str, n: int) -> list[dt.date]:
    first = dt.date.fromisoformat(start)
    return [first + dt.timedelta(days=7 * i) for i in range(n)]


def row(key, period, demand, forecast, price=None, lag=None) -> dict:
    return {
        "key": key,
        "period": period,
        "demand": demand,
        "forecast": forecast,
        "price": price,
        "lag": lag,
    }


def num(x) -> str:
    if x is None:
        return ""
    return str(int(x)) if float(x).is_integer() else repr(x)


def write_text(
    path: Path, header: list[str], records: list[list[str]], *, bom=False, eol="\n"
) -> Path:
    buf = io.StringIO()
    csv.writer(buf, lineterminator=eol).writerows([header, *records])
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + buf.getvalue().encode("utf-8"))
    return path


def simple_records(rows: list[dict]) -> list[list[str]]:
    return [
        [r["key"][0], r["period"].isoformat(), num(r["demand"]), num(r["forecast"])] for r in rows
    ]


def rank_csv(*args: str) -> str:
    result = run("rank", *args, "--format", "csv")
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr
    return result.stdout


def basic_weekly() -> list[dict]:
    rng = random.Random(11)
    rows = []
    for item in ("A1", "B2", "C3"):
        base = rng.randint(5, 50)
        for i, p in enumerate(weeks("2025-01-06", 20)):
            demand = float(rng.randint(0, 2 * base)) if i < 16 else None
            rows.append(row((item,), p, demand, round(base + rng.uniform(-5, 8), 1)))
    return rows


def edge_series() -> list[dict]:
    """Returns, all-zero, one period, forward only, late start, gaps, perfect, missing forecasts."""
    rng = random.Random(12)
    ws = weeks("2025-01-06", 18)
    rows = []
    for i, p in enumerate(ws):
        h = i < 15
        rows.append(row(("neg",), p, float(rng.randint(-5, 5)) if h else None, 1.0))
        rows.append(row(("zeros",), p, 0.0 if h else None, 0.0))
        rows.append(row(("zerofc",), p, 0.0 if h else None, 2.0))
        if i == 14:
            rows.append(row(("one",), p, 7.0, 5.0))
        if not h:
            rows.append(row(("fwdonly",), p, None, 3.0))
        if i >= 11:
            rows.append(row(("late",), p, float(i) if h else None, 12.0))
        if i not in (3, 9, 12, 13):
            rows.append(row(("gappy",), p, float(rng.randint(0, 10)) if h else None, 5.0))
        rows.append(row(("perfect",), p, float(i + 1) if h else None, float(i + 1)))
        rows.append(row(("nofc",), p, 3.0 if h else None, None if i in (12, 13) else 3.5))
        rows.append(row(("histgap",), p, None if i in (5, 6) or not h else float(i % 3), 1.0))
        rows.append(row(("negsum",), p, -3.0 if h else None, 1.0))
    return rows


# --- numbers against the oracle


@pytest.mark.parametrize(
    ("args", "options"),
    [(("--window", "4", "--season", "3"), {"window": 4, "season": 3})],
)
def test_weekly_file_matches_the_oracle(
    tmp_path: Path, args: tuple[str, ...], options: dict
) -> None:
    rows = basic_weekly()
    path = write_text(
        tmp_path / "weekly.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    assert_matches(oracle(rows, freq="weekly", **options), rank_csv(str(path), *args), ("item",))


def test_monthly_priced_located_file_with_shuffled_columns(tmp_path: Path) -> None:
    # Per-row prices, a location that starts late, two missing rows inside the window; value
    # weighting Σ|e|·price as in the M5 weights (Makridakis et al. 2020).
    rng = random.Random(13)
    months = [dt.date(2023 + (m // 12), m % 12 + 1, 1) for m in range(27)]
    rows, extra = [], []
    for item in ("P-100", "P-200"):
        for loc in ("NORTH", "SOUTH", "east"):
            price = round(rng.uniform(1, 90), 2)
            for i, p in enumerate(months):
                if (loc == "east" and i < 10) or (
                    (item, loc) == ("P-200", "SOUTH") and i in (20, 22)
                ):
                    continue
                demand = float(rng.choice([0, 0, rng.randint(1, 40)])) if i < 24 else None
                r = row(
                    (item, loc),
                    p,
                    demand,
                    float(rng.randint(0, 30)),
                    price if i % 5 else round(price * 1.1, 2),
                )
                rows.append(r)
                extra.append("pots, planters" if item == "P-100" else "tools")
    header = ["forecast", "planner", "location", "price", "period", "family", "item", "demand"]
    records = [
        [
            num(r["forecast"]),
            "Åsa",
            r["key"][1],
            num(r["price"]),
            r["period"].isoformat(),
            fam,
            r["key"][0],
            num(r["demand"]),
        ]
        for r, fam in zip(rows, extra, strict=True)
    ]
    path = write_text(tmp_path / "monthly.csv", header, records)
    for args, options in (
        ((), {}),
        (("--season", "12", "--window", "6"), {"season": 12, "window": 6}),
    ):
        got = assert_matches(
            oracle(rows, freq="monthly", priced=True, **options),
            rank_csv(str(path), *args),
            ("item", "location"),
        )
        assert {r["family"] for r in got} == {"pots, planters", "tools"}


@pytest.mark.parametrize(
    ("args", "options"),
    [((), {}), (("--window", "3", "--season", "2"), {"window": 3, "season": 2})],
)
def test_edge_series_match_the_oracle(tmp_path: Path, args: tuple[str, ...], options: dict) -> None:
    rows = edge_series()
    path = write_text(
        tmp_path / "edge.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    got = assert_matches(
        oracle(rows, freq="weekly", **options), rank_csv(str(path), *args), ("item",)
    )
    assert float(got[-1]["cum_share"]) == pytest.approx(1.0)


def test_check_counts_on_edge_series(tmp_path: Path) -> None:
    # Counted by hand from edge_series(): 4 gappy + 2 histgap rows missing in the window, 2 window
    # periods without forecast, 1 series with forward rows only, 3 forward periods.
    rows = edge_series()
    path = write_text(
        tmp_path / "edge.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    result = run("check", str(path))
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert f"rows           {len(rows)}" in out
    assert "(6 in the window)" in out
    assert "no forecast       2 window periods" in out
    assert "no actual demand  1 series" in out
    assert "forward        3 periods" in out
    negatives = sum(1 for r in rows if r["demand"] is not None and r["demand"] < 0)
    assert f"negative demand   {negatives} periods" in out


def test_several_lags_scored_one_at_a_time(tmp_path: Path) -> None:
    # Metrics never mix lags (issue 2 §2); demand is the same actual on every lag row.
    rng = random.Random(14)
    rows = []
    for item in ("L1", "L2"):
        demand = [float(rng.randint(0, 30)) for _ in range(14)]
        for lag in (0, 1, 2):
            for i, p in enumerate(weeks("2025-04-07", 14)):
                rows.append(
                    row(
                        (item,),
                        p,
                        demand[i] if i < 12 else None,
                        float(rng.randint(0, 30)),
                        lag=lag,
                    )
                )
    records = [
        [r["key"][0], str(r["lag"]), r["period"].isoformat(), num(r["demand"]), num(r["forecast"])]
        for r in rows
    ]
    path = write_text(
        tmp_path / "lags.csv", ["item", "lag", "period", "demand", "forecast"], records
    )
    for lag in (0, 2):
        assert_matches(
            oracle(rows, freq="weekly", lag=lag), rank_csv(str(path), "--lag", str(lag)), ("item",)
        )


def test_season_52_naive_baseline(tmp_path: Path) -> None:
    # Seasonal naive scale of MASE with m = 52 (Hyndman & Koehler 2006); S3 starts 60 weeks late.
    rng = random.Random(15)
    rows = []
    for item in ("S1", "S2", "S3"):
        for i, p in enumerate(weeks("2023-01-02", 125)):
            if item == "S3" and i < 60:
                continue
            demand = float(10 + i % 52 + rng.randint(-3, 3)) if i < 120 else None
            rows.append(row((item,), p, demand, float(10 + i % 52)))
    path = write_text(
        tmp_path / "season.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    want = oracle(rows, freq="weekly", season=52, window=26)
    assert_matches(want, rank_csv(str(path), "--season", "52", "--window", "26"), ("item",))


def test_parquet_typed_columns(tmp_path: Path) -> None:
    # Apache Parquet logical types: dictionary-encoded text, date32, float32, int32 with nulls.
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    rng = random.Random(16)
    rows = []
    for item in ("K-1", "K-2"):
        for loc in ("N", "S"):
            for i, p in enumerate(weeks("2025-01-05", 15)):
                rows.append(
                    row(
                        (item, loc),
                        p,
                        float(rng.randint(0, 9)) if i < 13 else None,
                        rng.randint(0, 36) / 4,
                        2.5,
                    )
                )
    table = pa.table(
        {
            "item": pa.array([r["key"][0] for r in rows]).dictionary_encode(),
            "location": [r["key"][1] for r in rows],
            "period": pa.array([r["period"] for r in rows], pa.date32()),
            "demand": pa.array(
                [None if r["demand"] is None else int(r["demand"]) for r in rows], pa.int32()
            ),
            "forecast": pa.array(
                [r["forecast"] for r in rows], pa.float32()
            ),  # quarters: exact in float32
            "price": [r["price"] for r in rows],
        }
    )
    path = tmp_path / "typed.parquet"
    pq.write_table(table, path)
    assert_matches(
        oracle(rows, freq="weekly", priced=True), rank_csv(str(path)), ("item", "location")
    )


def test_xlsx_hidden_first_sheet_and_sheet_option(tmp_path: Path) -> None:
    # openpyxl writes real date cells; --sheet matches case-insensitively (docs/input-format.md).
    openpyxl = pytest.importorskip("openpyxl")
    rows = basic_weekly()
    book = openpyxl.Workbook()
    old = book.active
    old.title = "Old"
    old.append(["junk"])
    old.sheet_state = "hidden"
    data = book.create_sheet("Demand")
    data.append(["Item", "Period", "Demand", "Forecast"])
    for r in rows:
        data.append(
            [r["key"][0], dt.datetime.combine(r["period"], dt.time()), r["demand"], r["forecast"]]
        )
    book.create_sheet("Other").append(["item", "period", "demand", "forecast"])
    path = tmp_path / "book.xlsx"
    book.save(path)
    assert_matches(oracle(rows, freq="weekly"), rank_csv(str(path), "--sheet", "demand"), ("item",))
    checked = run("check", str(path))
    assert "'Old' is hidden" in checked.stdout and "2 visible sheets" in checked.stdout


def test_random_priced_portfolio_with_gaps_and_shuffled_rows(tmp_path: Path) -> None:
    rng = random.Random(17)
    rows = []
    for s in range(40):
        start, kind, price = rng.choice([0, 0, 5, 30]), rng.choice("sin"), rng.randint(1, 80) / 4
        for i, p in enumerate(weeks("2024-06-03", 40)[start:], start):
            if rng.random() < 0.05:
                continue  # a missing row is missing, never zero
            demand = None
            if i < 34:
                demand = float(
                    {
                        "s": rng.randint(5, 15),
                        "i": rng.choice([0, 0, 0, rng.randint(1, 30)]),
                        "n": rng.randint(-3, 6),
                    }[kind]
                )
            forecast = None if rng.random() < 0.03 else rng.randint(0, 60) / 4
            rows.append(row((f"it{s % 20:02d}", f"L{s // 20}"), p, demand, forecast, price))
    rng.shuffle(rows)
    records = [
        [
            r["key"][1],
            r["key"][0],
            num(r["demand"]),
            num(r["forecast"]),
            num(r["price"]),
            r["period"].isoformat(),
        ]
        for r in rows
    ]
    path = write_text(
        tmp_path / "random.csv",
        ["location", "item", "demand", "forecast", "price", "period"],
        records,
    )
    want = oracle(rows, freq="weekly", priced=True, window=8, season=4)
    assert_matches(
        want, rank_csv(str(path), "--window", "8", "--season", "4"), ("item", "location")
    )


# --- how files are read


def test_ids_stay_text_in_csv_and_json(tmp_path: Path) -> None:
    # pandas.read_csv's default na_values would turn NA, null, N/A, nan, #N/A into missing and
    # 00123, 1e5 into numbers; ids must stay exactly as written (issue 2 §2, common practice).
    ids = [
        "NA",
        "00123",
        "123",
        "1e5",
        "TRUE",
        "null",
        "N/A",
        " x",
        "x",
        "nan",
        "-",
        "#N/A",
        "L" * 300,
        "0",
    ]
    rows = [
        row((item, loc), p, float(i + len(item) % 3), 4.0)
        for item in ids
        for loc in ("NA", "00123")
        for i, p in enumerate(weeks("2025-02-03", 4))
    ]
    records = [
        [r["key"][0], r["key"][1], r["period"].isoformat(), num(r["demand"]), num(r["forecast"])]
        for r in rows
    ]
    path = write_text(
        tmp_path / "ids.csv", ["item", "location", "period", "demand", "forecast"], records
    )
    assert_matches(oracle(rows, freq="weekly"), rank_csv(str(path)), ("item", "location"))
    doc = json.loads(run("rank", str(path), "--format", "json").stdout)
    assert {(s["item"], s["location"]) for s in doc["series"]} == {r["key"] for r in rows}


def test_bom_crlf_quoted_commas_and_unicode_ids(tmp_path: Path) -> None:
    # RFC 4180 (Shafranovich 2005) quoting; U+FEFF byte order mark as Excel's "CSV UTF-8" writes it.
    rng = random.Random(18)
    ids = ["Spaten, groß", "漢字-01", "café", "🌱-seed", 'say "hi"']
    rows = [
        row((item,), p, float(rng.randint(0, 9)) if i < 13 else None, float(rng.randint(0, 9)))
        for item in ids
        for i, p in enumerate(weeks("2025-03-03", 15))
    ]
    records = [[*rec, 'a, b; "c"'] for rec in simple_records(rows)]
    path = write_text(
        tmp_path / "excel.csv",
        ["item", "period", "demand", "forecast", "note"],
        records,
        bom=True,
        eol="\r\n",
    )
    got = assert_matches(oracle(rows, freq="weekly"), rank_csv(str(path)), ("item",))
    assert {r["note"] for r in got} == {'a, b; "c"'}


@pytest.mark.parametrize("eol", ["\r", "\n"])
def test_header_case_spaces_and_line_endings(tmp_path: Path, eol: str) -> None:
    # Old Mac exports end lines with CR alone; headers matched ignoring case and outer spaces.
    rows = [
        row((item,), p, float(i), float(10 - i))
        for item in "ab"
        for i, p in enumerate(weeks("2025-01-01", 10))
    ]
    path = write_text(
        tmp_path / "h.csv",
        [" Item ", "PERIOD", "Demand ", "  ForeCast"],
        simple_records(rows),
        eol=eol,
    )
    assert_matches(oracle(rows, freq="weekly"), rank_csv(str(path)), ("item",))


def test_multiline_cell_and_trailing_empty_column(tmp_path: Path) -> None:
    # A quoted line break (RFC 4180) is kept: CSV output is exact (issue 9 §5).
    rows = [row(("a",), p, float(i), 5.0) for i, p in enumerate(weeks("2025-01-06", 6))]
    records = [[*rec, "line1\nline2", ""] for rec in simple_records(rows)]
    path = write_text(
        tmp_path / "m.csv", ["item", "period", "demand", "forecast", "comment", ""], records
    )
    got = assert_matches(oracle(rows, freq="weekly"), rank_csv(str(path)), ("item",))
    assert got[0]["comment"] == "line1\nline2"


def test_missing_markers_are_missing_not_zero(tmp_path: Path) -> None:
    # Spreadsheet missing markers; a zero would change every measure, a missing row changes none.
    markers = ["NA", "N/A", "n/a", "#N/A", "-", "NaN", "nan", "null", "NULL", ""]
    text = "item,period,demand,forecast\n" + "".join(
        f'"M","{p}","{"1e2" if i % 2 == 0 else markers[i % len(markers)]}","1.5e2"\n'
        for i, p in enumerate(weeks("2025-01-06", 20))
    )
    path = tmp_path / "markers.csv"
    path.write_text(text, encoding="utf-8")
    [got] = list(csv.DictReader(io.StringIO(rank_csv(str(path)))))
    assert (
        got["periods"] == "10"
        and float(got["demand"]) == 1000.0
        and float(got["abs_error"]) == 500.0
    )


def test_column_mapping_wins_over_a_same_named_column(tmp_path: Path) -> None:
    rows = basic_weekly()
    records = [
        [r["key"][0], r["period"].isoformat()[:10], num(r["demand"]), num(r["forecast"]), "999"]
        for r in rows
    ]
    path = write_text(tmp_path / "erp.csv", ["SKU", "week", "qty_shipped", "fc", "demand"], records)
    mapping = "item=sku,period=week,demand=qty_shipped,forecast=fc"
    assert_matches(
        oracle(rows, freq="weekly"), rank_csv(str(path), "--columns", mapping), ("item",)
    )


def test_a_single_lag_needs_no_lag_option(tmp_path: Path) -> None:
    rows = basic_weekly()
    records = [[*rec, "1"] for rec in simple_records(rows)]
    path = write_text(
        tmp_path / "lag1.csv", ["item", "period", "demand", "forecast", "lag"], records
    )
    assert_matches(oracle(rows, freq="weekly"), rank_csv(str(path)), ("item",))


def test_parquet_numeric_ids_become_text_with_a_notice(tmp_path: Path) -> None:
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    ps = weeks("2025-01-05", 6)
    table = pa.table(
        {
            "item": pa.array([123, 4] * 6, pa.int64()),
            "period": pa.array(
                [dt.datetime.combine(p, dt.time()) for p in ps for _ in (0, 1)], pa.timestamp("us")
            ),
            "demand": [1.0, 2.0] * 6,
            "forecast": [2.0, 2.0] * 6,
        }
    )
    path = tmp_path / "ints.parquet"
    pq.write_table(table, path)
    assert {r["item"] for r in csv.DictReader(io.StringIO(rank_csv(str(path))))} == {"123", "4"}
    assert "ids stored as numbers" in run("check", str(path)).stdout


def test_ties_break_by_key_in_code_point_order(tmp_path: Path) -> None:
    # Equal errors everywhere; order is Python's str ordering (Unicode code points).
    ids = ["b", "B", "a", "A", "10", "9", "Z", "é"]
    rows = [
        row((item,), p, 5.0, 7.0 if i % 2 else 3.0)
        for item in ids
        for i, p in enumerate(weeks("2025-01-06", 6))
    ]
    random.Random(19).shuffle(rows)
    path = write_text(
        tmp_path / "ties.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    got = [r["item"] for r in csv.DictReader(io.StringIO(rank_csv(str(path))))]
    assert got == sorted(ids)


def test_perfect_forecasts_leave_shares_empty(tmp_path: Path) -> None:
    rows = [row((item,), p, 4.0, 4.0, 2.0) for item in "XY" for p in weeks("2025-01-06", 5)]
    records = [[*rec, "2"] for rec in simple_records(rows)]
    path = write_text(
        tmp_path / "perfect.csv", ["item", "period", "demand", "forecast", "price"], records
    )
    assert_matches(oracle(rows, freq="weekly", priced=True), rank_csv(str(path)), ("item",))


def test_escape_sequences_in_data_never_reach_the_terminal(tmp_path: Path) -> None:
    # ECMA-48 CSI / OSC sequences (colour, window title, hyperlink) and a C1 byte; shown as
    # Unicode Control Pictures (U+2400 block) and U+FFFD on screen. CSV sent to a pipe keeps the
    # ids exactly (issue 9 §5); what a terminal shows is tested in tests/cli/test_exact_keys.py.
    evil = ["\x1b[31mRED\x1b[0m", "bell\x07", "title\x1b]0;pwned\x07", "c1\x9bx", "tab\there"]
    records = [
        [item, p.isoformat(), str(i + 1), "2", "\x1b]8;;http://x\x07link"]
        for item in evil
        for i, p in enumerate(weeks("2025-01-06", 4))
    ]
    path = write_text(
        tmp_path / "evil.csv", ["item", "period", "demand", "forecast", "fam\x1b[1m"], records
    )
    for args in (("rank", str(path)), ("check", str(path))):
        result = run(*args)
        assert result.returncode == 0, result.stderr
        text = result.stdout + result.stderr
        assert not [c for c in text if (ord(c) < 32 and c not in "\n") or 0x7F <= ord(c) <= 0x9F], (
            args
        )
        if args[0] == "rank":
            assert "\u241b[31mRED" in text, args
    result = run("rank", str(path), "--format", "csv")
    assert result.returncode == 0, result.stderr
    assert not [c for c in result.stderr if (ord(c) < 32 and c != "\n") or 0x7F <= ord(c) <= 0x9F]
    got = list(csv.DictReader(io.StringIO(result.stdout)))
    assert sorted(r["item"] for r in got) == sorted(evil)
    assert {r["fam\u241b[1m"] for r in got} == {"\x1b]8;;http://x\x07link"}


def test_closed_week_is_skipped_by_the_window(tmp_path: Path) -> None:
    # Rows exist for week 8 but no series has an actual: the window skips it (docs/metrics.md).
    rng = random.Random(20)
    rows = [
        row((item,), p, None if i == 7 or i >= 10 else float(rng.randint(1, 9)), 5.0)
        for item in ("K1", "K2")
        for i, p in enumerate(weeks("2025-01-06", 12))
    ]
    path = write_text(
        tmp_path / "closed.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    assert_matches(
        oracle(rows, freq="weekly", window=4), rank_csv(str(path), "--window", "4"), ("item",)
    )
    doc = json.loads(run("rank", str(path), "--format", "json", "--window", "4").stdout)
    assert doc["window"] == {"first": "2025-02-10", "last": "2025-03-10", "periods": 4}


def test_by_bias_keeps_cover_on_the_error_order(tmp_path: Path) -> None:
    rows = edge_series()
    path = write_text(
        tmp_path / "edge.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    want = oracle(rows, freq="weekly")
    got = list(csv.DictReader(io.StringIO(rank_csv(str(path), "--by", "bias", "--cover", "0.5"))))
    by_error = sorted(want, key=lambda k: want[k]["rank"])
    need = next(i for i, k in enumerate(by_error, 1) if want[k]["cum_share"] >= 0.5)
    assert sorted((r["item"],) for r in got) == sorted(by_error[:need])


def test_cover_reaches_a_boundary_despite_rounding(tmp_path: Path) -> None:
    # Ten equal shares: the float running sum of 0.1 is 0.7999999999999999 after eight terms
    # (IEEE 754 double arithmetic), yet 8 series reach 80%.
    rows = [row((f"S{i}",), p, 10.0, 11.0) for i in range(10) for p in weeks("2025-01-06", 2)]
    path = write_text(
        tmp_path / "ten.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    for cover, count in (("0.8", 8), ("1", 10)):
        assert (
            len(list(csv.DictReader(io.StringIO(rank_csv(str(path), "--cover", cover))))) == count
        )


def test_output_replaces_an_existing_file_only_with_force(tmp_path: Path) -> None:
    rows = basic_weekly()
    path = write_text(
        tmp_path / "weekly.csv", ["item", "period", "demand", "forecast"], simple_records(rows)
    )
    target = tmp_path / "out.json"
    target.write_text("old report\n", encoding="utf-8")
    refused = run("rank", str(path), "--format", "json", "--output", str(target))
    assert refused.returncode == 2 and "already exists" in refused.stderr
    assert target.read_text(encoding="utf-8") == "old report\n"
    result = run("rank", str(path), "--format", "json", "--output", str(target), "--force")
    assert result.returncode == 0 and result.stdout == ""
    assert json.loads(target.read_text(encoding="utf-8"))["series"][0]["rank"] == 1


# --- bad inputs not covered elsewhere


def _write_bad(tmp_path: Path, name: str) -> tuple[Path, tuple[str, ...], tuple[str, ...]]:
    """(file, extra args, needles) for one bad input."""
    h = "item,period,demand,forecast\n"
    if name == "tab separated":
        return (
            _bytes(tmp_path / "p.csv", b"item\tperiod\tdemand\tforecast\nA\t2025-01-06\t1\t2\n"),
            (),
            ("tab-separated",),
        )
    if name == "only a BOM":
        return _bytes(tmp_path / "p.csv", b"\xef\xbb\xbf"), (), ("empty",)
    if name == "only blank lines":
        return _bytes(tmp_path / "p.csv", b"   \n\n  \n"), (), ("empty",)
    if name == "year 1850":
        return (
            _bytes(tmp_path / "p.csv", (h + "A,1850-01-07,1,2\n").encode()),
            (),
            ("period", "1900-2199", "row 2"),
        )
    if name == "--sheet on a csv":
        return (
            _bytes(tmp_path / "p.csv", (h + "A,2025-01-06,1,2\n").encode()),
            ("--sheet", "X"),
            ("no sheets",),
        )
    if name == "lag not in file":
        content = "item,period,lag,demand,forecast\nA,2025-01-06,0,5,4\nA,2025-01-06,1,5,6\n"
        return _bytes(tmp_path / "p.csv", content.encode()), ("--lag", "7"), ("lag 7", "0, 1")
    if name == "lags disagree on demand":
        content = "item,period,lag,demand,forecast\nA,2025-01-06,0,10,10\nA,2025-01-06,1,20,10\n"
        return (
            _bytes(tmp_path / "p.csv", content.encode()),
            ("--lag", "1"),
            ("different demand", "rows 2, 3"),
        )
    if name == "damaged parquet":
        return _bytes(tmp_path / "p.parquet", b"PAR1garbagePAR"), (), ("Parquet",)
    if name == "damaged xlsx":
        return _bytes(tmp_path / "p.xlsx", b"PK\x03\x04garbage"), (), ("Excel workbook",)
    if name == "unknown xlsx sheet":
        openpyxl = pytest.importorskip("openpyxl")
        book = openpyxl.Workbook()
        book.active.title = "Demand"
        book.active.append(["item", "period", "demand", "forecast"])
        book.save(tmp_path / "p.xlsx")
        return tmp_path / "p.xlsx", ("--sheet", "Forecasts"), ("Forecasts", "'Demand'")
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    path = tmp_path / "p.parquet"
    if name == "parquet text demand":
        pq.write_table(
            pa.table(
                {
                    "item": ["A", "A"],
                    "period": ["2025-01-06", "2025-01-13"],
                    "demand": ["1", "x"],
                    "forecast": [1.0, 2.0],
                }
            ),
            path,
        )
        return path, (), ("demand", "'x'", "row 2")
    assert name == "parquet infinite demand"
    pq.write_table(
        pa.table(
            {
                "item": ["A", "A"],
                "period": pa.array([dt.date(2025, 1, 6), dt.date(2025, 1, 13)]),
                "demand": [1.0, float("inf")],
                "forecast": [1.0, 2.0],
            }
        ),
        path,
    )
    return path, (), ("demand", "finite", "row 2")


def _bytes(path: Path, content: bytes) -> Path:
    path.write_bytes(content)
    return path


BAD = [
    "tab separated",
    "only a BOM",
    "year 1850",
    "--sheet on a csv",
    "lag not in file",
    "lags disagree on demand",
    "damaged parquet",
    "damaged xlsx",
    "unknown xlsx sheet",
    "parquet text demand",
    "parquet infinite demand",
]


BOTH = {"lag not in file", "lags disagree on demand"}


@pytest.mark.parametrize("name", BAD)
def test_more_bad_inputs_exit_2_with_a_message(tmp_path: Path, name: str) -> None:
    # Contract: issue 2 §2 (exit 2, no traceback, file named, what is wrong and what to do).
    path, args, needles = _write_bad(tmp_path, name)
    # The loader is shared; `check` is run too for the kinds that reach the builder.
    commands = ("rank", "check") if name in BOTH else ("rank",)
    for command in commands:
        result = run(command, str(path), *args)
        assert result.returncode == 2, (name, command, result.stderr)
        assert result.stdout == "" and "Traceback" not in result.stderr
        assert path.name in result.stderr and "What to do" in result.stderr, result.stderr
        for needle in needles:
            assert needle.lower() in result.stderr.lower(), (name, needle, result.stderr)
