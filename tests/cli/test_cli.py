"""The installed ``triage`` command, run as a user would: in a subprocess."""

from __future__ import annotations

import csv
import io
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"


def triage_command() -> list[str]:
    """The console script installed beside this interpreter, else the module."""
    script = Path(sys.executable).with_name("triage")
    return [str(script)] if script.exists() else [sys.executable, "-m", "triage.cli"]


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "COLUMNS": "160"}
    return subprocess.run(
        [*triage_command(), *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=120
    )


def write_csv(path: Path, rows: list[dict[str, object]]) -> Path:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    return path


@pytest.fixture
def small(tmp_path: Path) -> Path:
    """Two items over six weeks, two of them forward; A over-forecast, B intermittent."""
    weeks = ["2026-10-05", "2026-10-12", "2026-10-19", "2026-10-26", "2026-11-02", "2026-11-09"]
    a_demand = [10, 12, 9, 11, "", ""]
    b_demand = [0, 0, 5, 0, "", ""]
    rows = [
        {"item": "A", "period": w, "demand": d, "forecast": 11}
        for w, d in zip(weeks, a_demand, strict=True)
    ] + [
        {"item": "B", "period": w, "demand": d, "forecast": 1}
        for w, d in zip(weeks, b_demand, strict=True)
    ]
    return write_csv(tmp_path / "small.csv", rows)


def test_rank_csv_has_contract_columns_and_full_precision(small: Path) -> None:
    result = run("rank", str(small), "--format", "csv")
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    assert [r["item"] for r in rows] == ["B", "A"]
    for column in [
        "item",
        "rank",
        "periods",
        "demand",
        "forecast",
        "abs_error",
        "bias",
        "bias_pct",
        "wape",
        "mae",
        "rmse",
        "error_share",
        "cum_share",
        "tracking_signal",
        "bias_run",
        "bias_pvalue",
        "mase",
        "fva",
        "pattern",
        "adi",
        "cv2",
    ]:
        assert column in rows[0], column
    b, a = rows
    # B: e = F - D = [1, 1, -4, 1]: Σ|e| = 7, Σe = -1 (hand computation from the contract).
    assert float(b["abs_error"]) == 7.0 and float(b["bias"]) == -1.0
    assert float(b["error_share"]) == pytest.approx(7 / 11, rel=1e-15)
    assert b["error_share"] == repr(7 / 11)  # full precision, not rounded for display
    assert float(a["cum_share"]) == 1.0
    # Brown's tracking signal Σe / MAD (Trigg 1964): A has e = [1, -1, 2, 0], Σe = 2, MAD = 1.
    assert float(a["tracking_signal"]) == 2.0
    assert b["pattern"] == "intermittent" and a["pattern"] == "smooth"


def test_rank_json_is_valid_with_nulls(small: Path) -> None:
    result = run("rank", str(small), "--format", "json", "--window", "2")
    assert result.returncode == 0, result.stderr
    doc = json.loads(result.stdout)
    assert doc["cycle"] == "2026-10-26"
    assert doc["window"] == {"first": "2026-10-19", "last": "2026-10-26", "periods": 2}
    assert "NaN" not in result.stdout
    by_item = {s["item"]: s for s in doc["series"]}
    assert by_item["A"]["periods"] == 2
    # B's window demand [5, 0] is positive, so bias_pct is defined; A's mase is finite.
    assert not math.isnan(by_item["B"]["bias_pct"])


def test_rank_table_says_over_and_under(small: Path) -> None:
    result = run("rank", str(small))
    assert result.returncode == 0, result.stderr
    assert "over" in result.stdout and "under" in result.stdout
    assert "2 series" in result.stdout


def test_rank_top_cover_and_output(small: Path, tmp_path: Path) -> None:
    top = run("rank", str(small), "--format", "csv", "--top", "1")
    assert len(top.stdout.strip().splitlines()) == 2
    cover = run("rank", str(small), "--format", "csv", "--cover", "0.5")
    assert [r["item"] for r in csv.DictReader(io.StringIO(cover.stdout))] == ["B"]
    out = tmp_path / "ranked.csv"
    written = run("rank", str(small), "--format", "csv", "--output", str(out))
    assert written.returncode == 0 and written.stdout == ""
    assert out.read_text(encoding="utf-8") == run("rank", str(small), "--format", "csv").stdout
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]


def test_rank_output_to_dev_null_keeps_the_device(small: Path) -> None:
    if not Path("/dev/null").exists():
        pytest.skip("no /dev/null")
    result = run("rank", str(small), "--format", "csv", "--output", "/dev/null")
    assert result.returncode == 0, result.stderr
    assert Path("/dev/null").is_char_device()


def test_rank_by_bias_orders_flagged_first(tmp_path: Path) -> None:
    weeks = [
        f"2026-{m:02d}-{d:02d}"
        for m, d in [(9, 7), (9, 14), (9, 21), (9, 28), (10, 5), (10, 12), (10, 19), (10, 26)]
    ]
    rows = []
    for i, w in enumerate(weeks):
        # BIG: large errors of alternating sign (no bias); LOW: small, always over.
        rows.append({"item": "BIG", "period": w, "demand": 100, "forecast": 130 if i % 2 else 70})
        rows.append({"item": "LOW", "period": w, "demand": 10, "forecast": 13})  # always 3 over
    path = write_csv(tmp_path / "bias.csv", rows)
    by_error = list(csv.DictReader(io.StringIO(run("rank", str(path), "--format", "csv").stdout)))
    by_bias = list(
        csv.DictReader(
            io.StringIO(run("rank", str(path), "--format", "csv", "--by", "bias").stdout)
        )
    )
    assert by_error[0]["item"] == "BIG"
    assert by_bias[0]["item"] == "LOW" and by_bias[0]["bias_flag"] == "over"


def test_check_reports_and_exits_zero(small: Path) -> None:
    result = run("check", str(small))
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert "weekly" in out and "2 periods" in out  # forward periods
    assert "ok: the file can be scored" in out


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (("--window", "0"), "--window must be at least 1"),
        (("--season", "0"), "--season must be at least 1"),
    ],
)
def test_bad_options_exit_2(small: Path, args: tuple[str, ...], needle: str) -> None:
    result = run("rank", str(small), *args)
    assert result.returncode == 2
    assert needle in result.stderr
    assert "Traceback" not in result.stderr


def test_missing_file_exit_2(tmp_path: Path) -> None:
    result = run("rank", str(tmp_path / "nope.csv"))
    assert result.returncode == 2
    assert "nope.csv" in result.stderr and "Traceback" not in result.stderr


def test_duplicate_rows_exit_2_with_examples(tmp_path: Path) -> None:
    rows = [
        {"item": "A", "period": "2026-10-05", "demand": 10, "forecast": 9},
        {"item": "A", "period": "2026-10-05", "demand": 30, "forecast": 9},
        {"item": "A", "period": "2026-10-12", "demand": 5, "forecast": 9},
    ]
    result = run("rank", str(write_csv(tmp_path / "dup.csv", rows)))
    assert result.returncode == 2
    assert "dup.csv" in result.stderr and "rows 2, 3" in result.stderr and "10, 30" in result.stderr


def test_sample_portfolio_ranks() -> None:
    result = run("rank", str(SAMPLE), "--format", "csv")
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    assert len(rows) > 100
    assert float(rows[-1]["cum_share"]) == pytest.approx(1.0)
