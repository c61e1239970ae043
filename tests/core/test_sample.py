"""The demo generator is deterministic and the committed sample shows the behaviours it promises."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[2]
# ``sample`` is a top-level folder, not part of the installed package.
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from sample import generate  # noqa: E402

SAMPLE = ROOT / "sample" / "portfolio.csv"
README = ROOT / "sample" / "README.md"
KEYS = ["item", "location"]
EXPECTED_COLUMNS = [
    "item",
    "location",
    "period",
    "demand",
    "forecast",
    "forecast_stat",
    "forecast_customer",
    "price",
    "family",
    "planner",
    "supplier",
    "abc_class",
]


@pytest.fixture(scope="module")
def sample_text() -> pd.DataFrame:
    """The committed file read as text, so ids such as ``00412`` and ``NA-17`` stay as written."""
    return pd.read_csv(SAMPLE, dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def sample_frame(sample_text: pd.DataFrame) -> pd.DataFrame:
    """The committed file with numbers and dates parsed; empty demand is missing."""
    out = sample_text.copy()
    for column in ("demand", "forecast", "forecast_stat", "forecast_customer", "price"):
        out[column] = pd.to_numeric(out[column].replace("", np.nan))
    out["period"] = pd.to_datetime(out["period"], format="%Y-%m-%d")
    return out


@pytest.fixture(scope="module")
def history(sample_frame: pd.DataFrame) -> pd.DataFrame:
    return sample_frame.loc[sample_frame["demand"].notna()]


def test_same_seed_gives_the_same_frame() -> None:
    first = generate.generate_portfolio(n_items=40, n_locations=3, seed=11)
    second = generate.generate_portfolio(n_items=40, n_locations=3, seed=11)
    pd.testing.assert_frame_equal(first, second)
    other = generate.generate_portfolio(n_items=40, n_locations=3, seed=12)
    assert not first["demand"].equals(other["demand"])


def test_committed_sample_is_what_the_documented_command_writes(tmp_path: Path) -> None:
    out = tmp_path / "portfolio.csv"
    subprocess.run(
        [sys.executable, "-m", "sample.generate", "--out", str(out), "--seed", "7"],
        cwd=ROOT,
        check=True,
        capture_output=True,
    )
    assert out.read_bytes() == SAMPLE.read_bytes()
    assert generate.SAMPLE_SEED == 7


def test_in_memory_build_equals_committed_file(tmp_path: Path) -> None:
    out = tmp_path / "again.csv"
    generate.write_csv(generate.build_sample(), out)
    assert out.read_bytes() == SAMPLE.read_bytes()
    assert SAMPLE.stat().st_size < 3_000_000


def test_parquet_stream_equals_in_memory_frame_across_blocks(tmp_path: Path) -> None:
    # More series than one simulation block, so a block boundary falls inside the file.
    n_items = generate.CHUNK // 3 + 50
    frame = generate.generate_portfolio(n_items, 3, 20, 3, seed=5)
    path = tmp_path / "p.parquet"
    rows = generate.write_parquet(path, n_items, 3, 20, 3, seed=5)
    back = pd.read_parquet(path)
    assert rows == len(frame) == len(back)
    assert n_items * 3 > generate.CHUNK
    for column in ("item", "location", "family", "planner", "supplier", "abc_class"):
        assert back[column].astype(str).tolist() == frame[column].astype(str).tolist(), column
    assert (pd.to_datetime(back["period"]).to_numpy() == frame["period"].to_numpy()).all()
    for column in ("demand", "forecast", "price"):
        np.testing.assert_array_equal(back[column].to_numpy(), frame[column].to_numpy())


def test_columns_and_formats(sample_text: pd.DataFrame, sample_frame: pd.DataFrame) -> None:
    assert list(sample_text.columns) == EXPECTED_COLUMNS
    assert sample_text["period"].str.fullmatch(r"\d{4}-\d{2}-\d{2}").all()
    assert (sample_frame["period"].dt.day_of_week == 0).all(), "periods are Mondays"
    demand = sample_text["demand"]
    assert demand.loc[demand != ""].str.fullmatch(r"-?\d+").all(), "demand in whole units"
    assert sample_text["forecast"].str.fullmatch(r"\d+(\.\d)?").all(), "forecast to 1 decimal"
    assert sample_frame["price"].between(0.5, 400).all()
    assert sample_frame.groupby(KEYS)["period"].is_monotonic_increasing.all()
    assert not sample_frame.duplicated(["item", "location", "period"]).any()


def test_size_and_calendar(sample_frame: pd.DataFrame, history: pd.DataFrame) -> None:
    series = sample_frame.groupby(KEYS).ngroups
    assert 250 <= series <= 400
    assert 30_000 <= len(sample_frame) <= 40_000
    calendar = np.sort(history["period"].unique())
    assert len(calendar) == 104
    assert (np.diff(calendar) == np.timedelta64(7, "D")).all()
    assert pd.Timestamp(calendar[-1]) == pd.Timestamp("2026-11-23")


def test_forward_rows_have_a_forecast_and_no_demand(sample_frame: pd.DataFrame) -> None:
    last = sample_frame.loc[sample_frame["demand"].notna(), "period"].max()
    forward = sample_frame.loc[sample_frame["period"] > last]
    assert forward["demand"].isna().all()
    assert forward["forecast"].notna().all()
    per_series = forward.groupby(KEYS).size()
    assert len(per_series) == sample_frame.groupby(KEYS).ngroups
    assert (per_series == 13).all()


def test_awkward_ids_survive_as_text(sample_text: pd.DataFrame) -> None:
    ids = set(sample_text["item"])
    assert {"00412", "NA-17"} <= ids
    ordinary = sample_text["item"].str.fullmatch(r"GF-\d{5}")
    assert ordinary.mean() > 0.95


def test_returns_missing_rows_launch_and_phase_out(
    sample_frame: pd.DataFrame, history: pd.DataFrame
) -> None:
    assert (history["demand"] < 0).sum() >= 5, "returns show as negative demand"
    assert (history["demand"] < 0).sum() < 0.01 * len(history)

    first = history.groupby(KEYS)["period"].min()
    start = history["period"].min()
    late = first.loc[first > start]
    assert late.index.get_level_values("item").nunique() == 1, "one item launched late"
    rows = history.groupby(KEYS).size()
    launched = rows.index.isin(late.index)
    gaps = rows.loc[~launched] < 104
    assert 3 <= gaps.sum() <= 40, "a few history rows are missing"

    end = history["period"].max()
    recent = history.loc[history["period"] > end - pd.Timedelta(weeks=6)]
    earlier = history.loc[history["period"] <= end - pd.Timedelta(weeks=30)]
    by_item_recent = recent.groupby("item")["demand"].sum()
    by_item_earlier = earlier.groupby("item")["demand"].sum()
    faded = (by_item_recent == 0) & (by_item_earlier.reindex(by_item_recent.index) > 500)
    assert faded.sum() == 1, "one item is phased out"


def test_price_is_constant_per_series_but_for_a_few_changes(sample_frame: pd.DataFrame) -> None:
    changes = sample_frame.groupby(KEYS)["price"].nunique()
    assert changes.max() == 2
    assert 1 <= (changes == 2).sum() <= 0.1 * len(changes)


def test_spring_peak_for_garden_families(history: pd.DataFrame) -> None:
    # Scenario definition (sample/README.md): seeds and soil peak in spring, lighting in autumn.
    month = history["period"].dt.month
    spring, autumn = month.isin([3, 4, 5]), month.isin([9, 10, 11])
    by_family = history.assign(spring=spring, autumn=autumn)
    for family in ("seeds", "soil"):
        part = by_family.loc[by_family["family"] == family]
        assert (
            part.loc[part["spring"], "demand"].sum()
            > 1.5 * part.loc[part["autumn"], "demand"].sum()
        )
    light = by_family.loc[by_family["family"] == "lighting"]
    assert (
        light.loc[light["autumn"], "demand"].sum()
        > 1.5 * light.loc[light["spring"], "demand"].sum()
    )


def sbc_classes(history: pd.DataFrame) -> pd.Series:
    """Syntetos-Boylan-Croston class of each series, in plain pandas.

    Source: Syntetos, A.A., Boylan, J.E. & Croston, J.D. (2005), "On the categorization of
    demand patterns", Journal of the Operational Research Society 56(5):495-503 (title from
    memory): ADI cut-off 1.32, CV² cut-off 0.49; smooth = low/low, erratic = low ADI & high CV²,
    intermittent = high ADI & low CV², lumpy = high/high. ADI is taken as history periods over
    periods with positive demand; CV² is the population variance over the squared mean of the
    positive demand sizes.
    """
    rows = []
    for key, part in history.groupby(KEYS):
        positive = part.loc[part["demand"] > 0, "demand"]
        adi = len(part) / len(positive) if len(positive) else np.inf
        cv2 = positive.var(ddof=0) / positive.mean() ** 2 if len(positive) else np.nan
        if adi <= 1.32:
            label = "smooth" if cv2 <= 0.49 else "erratic"
        else:
            label = "intermittent" if cv2 <= 0.49 else "lumpy"
        rows.append((*key, label))
    return pd.DataFrame(rows, columns=[*KEYS, "sbc"]).set_index(KEYS)["sbc"]


def test_every_demand_pattern_class_is_present(history: pd.DataFrame) -> None:
    counts = sbc_classes(history).value_counts()
    for label in ("smooth", "erratic", "intermittent", "lumpy"):
        assert counts.get(label, 0) >= 10, f"only {counts.get(label, 0)} {label} series"


def test_sbc_classifier_on_hand_made_series() -> None:
    # Known answers by the definitions above: constant demand is smooth; one order every other
    # period (ADI 2) of equal size is intermittent; sizes 1 and 9 (CV² = 16/25 = 0.64) are
    # erratic when every period has demand and lumpy when every other period has.
    def frame(item: str, demand: list[float]) -> pd.DataFrame:
        return pd.DataFrame({"item": item, "location": "X", "demand": demand})

    history = pd.concat(
        [
            frame("a", [5, 5, 5, 5]),
            frame("b", [4, 0, 4, 0]),
            frame("c", [1, 9, 1, 9]),
            frame("d", [1, 0, 9, 0]),
        ]
    )
    got = sbc_classes(history).droplevel("location").to_dict()
    assert got == {"a": "smooth", "b": "intermittent", "c": "erratic", "d": "lumpy"}


def _readme_series(title: str) -> list[tuple[str, str]]:
    """Series named in one ``**title**`` list of the sample README."""
    text = README.read_text(encoding="utf-8")
    block = text.split(f"**{title}**", 1)[1].split("\n\n**", 1)[0]
    return re.findall(r"^- `([^`]+)` @ (\w+)", block, flags=re.MULTILINE)


def test_readme_names_series_that_really_are_biased(history: pd.DataFrame) -> None:
    # Bias % = Σ(F − A) / Σ A (common practice; positive = over-forecast).
    sums = (
        history.assign(error=history["forecast"] - history["demand"])
        .groupby(KEYS)[["error", "demand"]]
        .sum()
    )
    bias = sums["error"] / sums["demand"]
    over, under = _readme_series("Over-forecast"), _readme_series("Under-forecast")
    assert len(over) >= 3 and len(under) >= 3
    assert (bias.loc[over] > 0.15).all(), bias.loc[over]
    assert (bias.loc[under] < -0.15).all(), bias.loc[under]
    unbiased = bias.drop(index=over + under)
    # Most other series carry no injected bias, so the flagged ones stand out.
    assert (unbiased.abs() < 0.15).mean() > 0.8


def test_readme_lists_every_new_and_phased_out_series(history: pd.DataFrame) -> None:
    first = history.groupby(KEYS)["period"].min()
    late = set(first.loc[first > history["period"].min()].index)
    assert set(_readme_series("New item")) == late
    assert len(_readme_series("Phase-out")) >= 1


def test_bad_arguments_are_rejected() -> None:
    from datetime import date

    with pytest.raises(ValueError, match="Monday"):
        generate.design_portfolio(10, 3, end=date(2026, 11, 24))
    with pytest.raises(ValueError, match="sum to 1"):
        generate.design_portfolio(10, 3, mix=generate.Mix(smooth=0.9))
    with pytest.raises(ValueError, match="n_weeks"):
        generate.design_portfolio(10, 3, n_weeks=2)


def test_competing_forecasts_mape_prefers_the_biased_one_wape_does_not(
    history: pd.DataFrame,
) -> None:
    # Issue 12: the sample's customer forecast runs low, which MAPE rewards (an under-forecast's
    # absolute percentage error is at most 100 %, an over-forecast's is unbounded: Hyndman &
    # Koehler 2006, "Another look at measures of forecast accuracy"), while WAPE, weighting
    # errors by volume, prefers the unbiased but noisy statistical one.
    from sklearn.metrics import mean_absolute_percentage_error

    both = history.loc[history["forecast_stat"].notna() & history["forecast_customer"].notna()]
    demand = both["demand"].to_numpy()
    stat, customer = both["forecast_stat"].to_numpy(), both["forecast_customer"].to_numpy()
    # MAPE by sklearn.metrics.mean_absolute_percentage_error on the cells with non-zero demand.
    nonzero = demand != 0
    mape_stat = mean_absolute_percentage_error(demand[nonzero], stat[nonzero])
    mape_customer = mean_absolute_percentage_error(demand[nonzero], customer[nonzero])
    assert mape_customer < mape_stat

    # WAPE = sum |forecast - demand| / sum |demand|; bias = sum (forecast - demand) / sum demand
    # (docs/metrics.md).
    def wape(forecast: np.ndarray) -> float:
        return float(np.abs(forecast - demand).sum() / np.abs(demand).sum())

    def bias(forecast: np.ndarray) -> float:
        return float((forecast - demand).sum() / demand.sum())

    assert wape(customer) > wape(stat)
    assert bias(customer) < -0.05
    assert abs(bias(stat)) < 0.05, "the statistical forecast is unbiased"
    # Noisy: further from demand than the planning forecast it was drawn around.
    assert wape(stat) > wape(both["forecast"].to_numpy())


def test_competing_forecasts_are_seeded_apart_from_the_other_columns(
    sample_frame: pd.DataFrame,
) -> None:
    # The competing forecasts come from a random stream of their own: without them, the
    # generator writes every other column exactly as before.
    without = generate.generate_portfolio(seed=generate.SAMPLE_SEED)
    assert list(without.columns) == list(generate.COLUMNS)
    for column in ("demand", "forecast", "price"):
        np.testing.assert_array_equal(sample_frame[column].to_numpy(), without[column].to_numpy())
    for column in ("item", "location", "family", "planner", "supplier", "abc_class"):
        assert sample_frame[column].tolist() == without[column].astype(str).tolist(), column
    assert sample_frame["forecast_customer"].isna().any(), "some customer cells are empty"
    assert sample_frame["forecast_stat"].notna().all()
