"""``triage rank --group``: the group scorecard from the command line, on the sample and on a
hand-made file whose groups can be worked out by hand."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pandas as pd
import pytest

from tests.cli.test_cli import SAMPLE, run, write_csv

CONTRACT = [
    "series",
    "demand",
    "forecast",
    "abs_error",
    "aggregate_abs_error",
    "bias",
    "bias_pct",
    "wape",
    "error_share",
    "cum_share",
    "rank",
    "bias_rank",
    "bias_flag",
    "flagged_series",
    "top_series",
]


@pytest.fixture
def families(tmp_path: Path) -> Path:
    """Family "pair": A over by 2 and B under by 2 every week (they cancel in the total);
    family "one": C over by 1 every week. Eight weeks of history, one forward."""
    weeks = [f"2026-{d}" for d in ("09-07", "09-14", "09-21", "09-28", "10-05", "10-12")] + [
        f"2026-{d}" for d in ("10-19", "10-26", "11-02")
    ]
    rows = []
    for item, family, error in (("A", "pair", 2), ("B", "pair", -2), ("C", "one", 1)):
        for i, week in enumerate(weeks):
            forward = i == len(weeks) - 1
            rows.append(
                {
                    "item": item,
                    "period": week,
                    "demand": "" if forward else 10,
                    "forecast": 10 + error,
                    "family": family,
                }
            )
    return write_csv(tmp_path / "families.csv", rows)


def test_group_csv_worked_by_hand(families: Path) -> None:
    result = run("rank", str(families), "--group", "family", "--format", "csv")
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    assert list(rows[0]) == ["family", *CONTRACT]
    by = {r["family"]: r for r in rows}
    assert [r["family"] for r in rows] == ["pair", "one"]  # 16 units of error before 4
    pair, one = by["pair"], by["one"]
    # pair: Σ|e| = 8 weeks x (2 + 2) = 32; the total errs by 2 - 2 = 0 each week.
    assert float(pair["abs_error"]) == 32 and float(pair["aggregate_abs_error"]) == 0
    assert float(pair["bias"]) == 0 and pair["bias_flag"] == ""
    # Each series alone errs one way in all 8 weeks: sign test p = 2 x 0.5^8 = 0.0078
    # (scipy.stats.binomtest) and a run of 8 >= 6, with a material 20% bias: both flagged.
    assert pair["flagged_series"] == "2"
    assert float(pair["wape"]) == 32 / 160 and float(pair["error_share"]) == 0.8
    # one: eight over-forecasts of 1 on demand 10 (10%, material): persistent over.
    assert float(one["aggregate_abs_error"]) == 8 and one["bias_flag"] == "over"
    assert one["top_series"] == "C" and pair["top_series"] == "A"  # tie A/B: file order
    assert float(one["cum_share"]) == 1.0


def test_group_table_json_top_cover_and_bias_order() -> None:
    table = run("rank", str(SAMPLE), "--group", "family,location", "--top", "3")
    assert table.returncode == 0, table.stderr
    assert "300 series in 18 groups by family, location" in table.stdout
    assert "showing 3 of 18 groups" in table.stdout
    doc = json.loads(run("rank", str(SAMPLE), "--group", "family", "--format", "json").stdout)
    assert doc["grouped_by"] == ["family"] and len(doc["groups"]) == 6
    assert sum(g["series"] for g in doc["groups"]) == 300
    cover = run("rank", str(SAMPLE), "--group", "family", "--cover", "0.5", "--format", "csv")
    shares = [float(r["cum_share"]) for r in csv.DictReader(io.StringIO(cover.stdout))]
    assert shares[-1] >= 0.5 and (len(shares) == 1 or shares[-2] < 0.5)
    bias = run("rank", str(SAMPLE), "--group", "family", "--by", "bias", "--format", "csv")
    frame = pd.read_csv(io.StringIO(bias.stdout), keep_default_na=False)
    assert list(frame["bias_rank"]) == list(range(1, len(frame) + 1))
    flagged = (frame["bias_flag"] != "").to_numpy()
    assert not flagged[flagged.argmin() :].any()  # flagged groups first


def test_group_sums_match_the_series_scorecard() -> None:
    """Group sums are the series' sums: the series scorecard grouped with pandas."""
    series = pd.read_csv(io.StringIO(run("rank", str(SAMPLE), "--format", "csv").stdout))
    grouped = run("rank", str(SAMPLE), "--group", "planner", "--format", "csv")
    groups = pd.read_csv(io.StringIO(grouped.stdout)).set_index("planner").sort_index()
    expected = series.groupby("planner").agg(
        series=("item", "size"),
        abs_error=("abs_error", "sum"),
        abs_error_value=("abs_error_value", "sum"),
        bias=("bias", "sum"),
    )
    pd.testing.assert_frame_equal(
        groups[["series", "abs_error", "abs_error_value", "bias"]],
        expected,
        check_dtype=False,
        rtol=1e-12,
    )


@pytest.mark.parametrize(
    ("value", "needle"),
    [
        ("colour", "no column 'colour' to group by"),
        ("item", "one series per group"),
        ("family,", "an empty column name"),
    ],
)
def test_bad_group_exits_2(value: str, needle: str) -> None:
    result = run("rank", str(SAMPLE), "--group", value)
    assert result.returncode == 2
    assert needle in result.stderr and "Traceback" not in result.stderr


def test_groups_do_not_take_the_fva_order() -> None:
    result = run("rank", str(SAMPLE), "--group", "family", "--by", "fva")
    assert result.returncode == 2
    assert "groups rank by error or bias" in result.stderr and "Traceback" not in result.stderr


def test_groups_are_not_written_as_parquet(tmp_path: Path) -> None:
    # --format parquet writes a folder of the series' scorecard; with --group it used to write
    # the groups' table as a plain file under that name. Refused before the file is read.
    out = tmp_path / "groups"
    result = run(
        "rank", str(SAMPLE), "--group", "family", "--format", "parquet", "--output", str(out)
    )
    assert result.returncode == 2
    assert "the groups' is a CSV, JSON or table" in result.stderr
    assert "Traceback" not in result.stderr
    assert not out.exists()
