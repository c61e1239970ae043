"""``triage rank|check|compare DATASET``: a folder of Parquet parts from the command line.

The reference for every output is the same command on the single file the dataset was cut from
(whose measures are checked against published formulas in tests/core/test_metrics_reference.py).
"""

from __future__ import annotations

import io
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from tests.cli.test_cli import run
from tests.core.datasets import generated, write_layout
from triage import cli
from triage.render import scorecard as report


@pytest.fixture(scope="module")
def single(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return generated(tmp_path_factory.mktemp("single"), 400)


@pytest.fixture(scope="module")
def lake(single: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    rows = pq.read_table(single).to_pandas()
    return write_layout(rows, tmp_path_factory.mktemp("lake") / "by-month", "period")


def test_rank_of_a_dataset_writes_the_single_files_csv(single: Path, lake: Path) -> None:
    alone = run("rank", str(single), "--format", "csv", "--by", "bias")
    spread = run("rank", str(lake), "--format", "csv", "--by", "bias")
    assert spread.returncode == 0, spread.stderr
    assert spread.stdout == alone.stdout


def test_check_and_compare_read_a_dataset(single: Path, lake: Path) -> None:
    for command in ("check", "compare"):
        alone = run(command, str(single))
        spread = run(command, str(lake))
        assert spread.returncode == 0, spread.stderr
        # The first line names what was read; everything after it is the same.
        assert spread.stdout.splitlines()[1:] == alone.stdout.splitlines()[1:]


def test_format_parquet_writes_the_scorecard_as_parts(
    tmp_path: Path, lake: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    assert cli.main(["rank", str(lake), "--format", "csv"]) == 0
    want = pd.read_csv(io.StringIO(capsys.readouterr().out), keep_default_na=False)
    monkeypatch.setattr(report, "PARQUET_ROWS", 500)
    out = tmp_path / "card"
    assert cli.main(["rank", str(lake), "--format", "parquet", "--output", str(out)]) == 0
    parts = sorted(p.name for p in out.iterdir() if p.suffix == ".parquet")
    assert parts == [f"part-{k:05d}.parquet" for k in range(-(-len(want) // 500))]
    # The description beside them: the review opens the folder (docs/scale.md).
    from triage.core.on_demand import open_review
    from triage.core.settings import ScoreSettings

    review = open_review(lake, out, ScoreSettings())
    assert review.portfolio.n_series == len(want)
    assert review.card["item"].astype(str).tolist() == want["item"].astype(str).tolist()
    got = pd.concat([pd.read_parquet(out / name) for name in parts], ignore_index=True)
    assert list(got.columns) == list(want.columns)
    for name in ("item", "location", "bias_flag", "pattern"):
        assert got[name].fillna("").astype(str).tolist() == want[name].astype(str).tolist()
    for name in ("rank", "bias_rank", "fva_rank", "periods"):
        assert got[name].tolist() == want[name].tolist()
    # The CSV writes 17 significant digits: the numbers round-trip.
    pd.testing.assert_series_equal(got["cum_share"], want["cum_share"].astype(float))
    # Measures stored plain (no codec, no dictionary: what makes the review's read fast), keys
    # and text with Parquet's default codec (render.scorecard.parquet_encoding).
    import pyarrow.parquet as pq

    stored = pq.ParquetFile(out / parts[0]).metadata.row_group(0)
    how = {
        stored.column(i).path_in_schema: (stored.column(i).compression, stored.column(i).encodings)
        for i in range(stored.num_columns)
    }
    assert how["cum_share"][0] == "UNCOMPRESSED"
    assert "RLE_DICTIONARY" not in how["cum_share"][1]
    assert how["item"][0] == how["rank"][0] == "SNAPPY"
    # A scorecard of fewer parts replaces it with --force: the older parts were rank's own.
    top = ["rank", str(lake), "--format", "parquet", "--output", str(out), "--top", "9"]
    assert cli.main([*top, "--force"]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["_scorecard.json", "part-00000.parquet"]
    assert len(pd.read_parquet(out / "part-00000.parquet")) == 9
    # A file rank did not write is never removed.
    (out / "notes.txt").write_text("mine")
    assert run(*top, "--force").returncode == 2
    assert (out / "notes.txt").read_text() == "mine"


def test_format_parquet_refusals(tmp_path: Path, lake: Path) -> None:
    alone = run("rank", str(lake), "--format", "parquet")
    assert alone.returncode == 2 and "needs --output DIR" in alone.stderr
    inside = run("rank", str(lake), "--format", "parquet", "--output", str(lake / "x"), "--force")
    assert inside.returncode == 2 and "being read" in inside.stderr
    out = tmp_path / "card"
    assert run("rank", str(lake), "--format", "parquet", "--output", str(out)).returncode == 0
    again = run("rank", str(lake), "--format", "parquet", "--output", str(out))
    assert again.returncode == 2 and "--force" in again.stderr
    forced = run("rank", str(lake), "--format", "parquet", "--output", str(out), "--force")
    assert forced.returncode == 0, forced.stderr
    for refused in (
        run("rank", str(lake), "--sheet", "Week 1"),
        run("rank", str(lake), "--engine", "dask", "--group", "family", "--by", "fva"),
        run("rank", str(lake), "--engine", "dask", "--group", "family", "--format", "parquet"),
        run("rank", str(tmp_path / "empty-folder-missing")),
    ):
        assert refused.returncode == 2, refused.stderr
        assert "Traceback" not in refused.stderr


@pytest.mark.parametrize("by", ["error", "bias", "fva"])
def test_top_k_rows_are_the_first_rows_of_the_whole_scorecard(lake: Path, by: str) -> None:
    # With --top K only K rows are built; their ranks and shares are still among every series.
    whole = run("rank", str(lake), "--format", "csv", "--by", by)
    top = run("rank", str(lake), "--format", "csv", "--by", by, "--top", "7")
    assert top.returncode == 0, top.stderr
    assert top.stdout.splitlines() == whole.stdout.splitlines()[:8]


def test_review_on_a_stored_scorecard_refuses_what_it_cannot_open(
    tmp_path: Path, single: Path, lake: Path
) -> None:
    import json
    import shutil

    from tests.core.datasets import stored_scorecard

    card = stored_scorecard(lake, tmp_path / "card")
    empty = tmp_path / "empty"
    empty.mkdir()
    damaged = tmp_path / "damaged"
    shutil.copytree(card, damaged)
    described = json.loads((damaged / "_scorecard.json").read_text())
    del described["plan"]["periods"]
    (damaged / "_scorecard.json").write_text(json.dumps(described))
    for args, says in (
        ((single, "--scorecard", card), "is not a folder"),
        ((lake, "--scorecard", card, "--group", "family"), "--group opens the group view"),
        ((lake, "--scorecard", empty), "has no _scorecard.json"),
        ((lake, "--scorecard", tmp_path / "missing"), "no such scorecard folder"),
        ((lake, "--scorecard", damaged), "description is damaged"),
        ((lake, "--scorecard", card, "--columns", "demand=forecast"), "--columns differs"),
    ):
        refused = run("review", *map(str, args))
        assert refused.returncode == 2, refused.stderr
        assert says in refused.stderr and "Traceback" not in refused.stderr
