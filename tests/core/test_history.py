"""Across review cycles: realised override value, repeat offenders, active and carried-over series.

Most checks run on the seeded month of weekly files in ``sample/cycles.py``, whose adjustment
values and actuals are set by construction and whose expected value added is written by hand in
``PLAN_LINES``. Oracles used here, each named beside its check:

* value added = |original − actual| − |adjusted − actual| is Gilliland's FVA with the
  statistical forecast as the previous step (Gilliland 2010; docs/sources.md §3.1);
* AvgRelMAE, Davydenko & Fildes (2013, IJF 29(3):510–522): weighted geometric mean of per-series
  MAE ratios, weights = number of forecasts;
* worst-offender sets: what ``ranking.scorecard`` + ``ranking.leading_cover`` showed on each
  week's own file (the ranking module is the reference for what the review list showed);
* plain per-cell Python loops for the totals.
"""

from __future__ import annotations

import csv
import dataclasses
import math
import shutil
from collections import defaultdict
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import portfolio_from, series_records

from sample.cycles import (
    CYCLES_SEED,
    FIRST_CYCLE_WEEK,
    N_FILES,
    CycleScenario,
    ExpectedLine,
    build_cycles,
)
from triage.core import history, schema, vocabulary
from triage.core.cycle import ReviewCycle
from triage.core.ledger import Ledger
from triage.core.metrics import window_columns
from triage.core.ranking import leading_cover, scorecard
from triage.core.read import read_portfolio
from triage.core.review import ReviewSession

ROOT = Path(__file__).resolve().parents[2]
NEWEST = N_FILES - 1


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> CycleScenario:
    return build_cycles(tmp_path_factory.mktemp("cycles"), seed=CYCLES_SEED)


@pytest.fixture(scope="module")
def ledger(scenario: CycleScenario):
    with Ledger.open(scenario.ledger, read_only=True) as opened:
        yield opened


def _portfolio(scenario: CycleScenario, k: int):
    return read_portfolio(scenario.files[k])


def _key(row: object) -> tuple[str, str, str, str]:
    get = row.__getitem__ if isinstance(row, (dict, pd.Series)) else lambda n: getattr(row, n)
    return (get("cycle"), get("item"), get("location"), get("period"))


def _file_actuals(path: Path) -> dict[tuple[str, str, str], float]:
    """Actual demand cells read with the csv module (independent of triage's loader)."""
    out = {}
    with path.open(encoding="utf-8", newline="") as handle:
        for row in csv.DictReader(handle):
            if row["demand"] != "":
                out[(row["item"], row["location"], row["period"])] = float(row["demand"])
    return out


# --------------------------------------------------------------------------------------------
# Realised value


@pytest.mark.parametrize("k", [NEWEST, NEWEST - 1, 1])
def test_realised_values_match_the_construction_exactly(
    scenario: CycleScenario, ledger: Ledger, k: int
) -> None:
    portfolio = _portfolio(scenario, k)
    realised = ReviewCycle(portfolio, ledger).realised
    expected = {_key(dataclasses.asdict(e)): e for e in scenario.realised_in(k)}
    assert len(expected) > 0
    got = {_key(r): r for r in realised.to_dict("records")}
    assert set(got) == set(expected)
    actuals = _file_actuals(scenario.files[k])
    for key, e in expected.items():
        r = got[key]
        # The planned actual is what the file holds (read without triage).
        assert actuals[(e.item, e.location, e.period)] == e.actual
        assert (r["original"], r["adjusted"], r["actual"]) == (e.original, e.adjusted, e.actual)
        # Gilliland's FVA step (IBF): Err(statistical) − Err(override), absolute error; the
        # expected value is worked out by hand in sample/cycles.PLAN_LINES.
        assert r["value_added"] == e.value_added
        assert r["abs_error_original"] - r["abs_error_adjusted"] == e.value_added
        assert r["helped"] == (e.value_added > 0)
        assert r["price"] == e.price
        assert r["value_added_value"] == pytest.approx(e.value_added * e.price, rel=1e-12)
        assert (r["direction"], r["size"]) == (e.direction, e.size)
        assert (r["reviewer"], r["root_cause"]) == (e.reviewer, e.root_cause)
        assert r["horizon"] == e.week - (FIRST_CYCLE_WEEK + scenario.cycles.index(e.cycle))
    assert list(realised.columns) == list(history.REALISED_COLUMNS)


def test_undone_and_replaced_decisions_do_not_count(
    scenario: CycleScenario, ledger: Ledger
) -> None:
    portfolio = _portfolio(scenario, NEWEST)
    realised = ReviewCycle(portfolio, ledger).realised
    s4 = scenario.roles["S4"]
    assert not ((realised["item"] == s4[0]) & (realised["location"] == s4[1])).any()
    s2 = scenario.roles["S2"]
    first = realised.loc[
        (realised["item"] == s2[0])
        & (realised["location"] == s2[1])
        & (realised["cycle"] == scenario.cycles[0])
    ]
    # Version 2 (+4 over two weeks) replaced version 1 (+8 over all eight).
    scale = scenario.scale["S2"]
    assert len(first) == 2
    assert (first["adjusted"] - first["original"]).tolist() == [4.0 * scale, 4.0 * scale]


def test_a_disappearing_series_is_counted_where_it_still_is(
    scenario: CycleScenario, ledger: Ledger
) -> None:
    item, location = scenario.roles[scenario.disappears]
    newest = _portfolio(scenario, NEWEST)
    status = ReviewCycle(newest, ledger).line_status.set_index("status")
    assert status.loc[history.NOT_IN_PORTFOLIO, "lines"] == 2
    assert status.loc[history.NOT_IN_PORTFOLIO, "decisions"] == 1
    assert status.loc[history.REALISED, "lines"] == len(scenario.realised_in(NEWEST))
    assert not (ReviewCycle(newest, ledger).realised["item"] == item).any()
    before = ReviewCycle(_portfolio(scenario, NEWEST - 1), ledger).realised
    mine = before.loc[(before["item"] == item) & (before["location"] == location)]
    assert mine["value_added"].tolist() == [3.0 * scenario.scale[scenario.disappears]]


def test_line_status_accounts_for_every_line(scenario: CycleScenario, ledger: Ledger) -> None:
    newest = _portfolio(scenario, NEWEST)
    status = ReviewCycle(newest, ledger).line_status
    assert status["status"].tolist() == list(history.LINE_STATUSES)
    assert int(status["lines"].sum()) == len(scenario.lines)
    ahead = [e for e in scenario.lines if e.actual is None]
    assert status.set_index("status").loc[history.AHEAD, "lines"] == len(ahead)


def _plain_summary(lines: list[ExpectedLine], event_of: dict[tuple[str, str, str], int]) -> dict:
    """Per-group figures with plain loops, from the scenario's hand values."""
    n = len(lines)
    helped = sum(1 for e in lines if e.value_added > 0)
    orig = sum(abs(e.original - e.actual) for e in lines)
    adj = sum(abs(e.adjusted - e.actual) for e in lines)
    added = sum(e.value_added for e in lines)
    # Davydenko & Fildes (2013) AvgRelMAE: exp(Σ n_i ln r_i / Σ n_i) over decisions whose
    # ratio is finite and positive.
    per: dict[int, list[ExpectedLine]] = defaultdict(list)
    for e in lines:
        per[event_of[(e.cycle, e.item, e.location)]].append(e)
    num = den = 0.0
    for group in per.values():
        a = sum(abs(e.adjusted - e.actual) for e in group)
        o = sum(abs(e.original - e.actual) for e in group)
        if a > 0 and o > 0:
            num += len(group) * math.log(a / o)
            den += len(group)
    return {
        "adjustments": n,
        "decisions": len(per),
        "helped": helped,
        "hurt": sum(1 for e in lines if e.value_added < 0),
        "share_helped": helped / n,
        "abs_error_original": orig,
        "abs_error_adjusted": adj,
        "value_added": added,
        "value_added_value": sum(e.value_added * e.price for e in lines),
        "relative_value_added": added / orig if orig else math.nan,
        "avg_rel_mae": math.exp(num / den) if den else math.nan,
    }


@pytest.mark.parametrize("by", ["direction", "size", "reviewer", "root_cause", "cycle"])
def test_summaries_match_plain_sums_of_the_hand_values(
    scenario: CycleScenario, ledger: Ledger, by: str
) -> None:
    portfolio = _portfolio(scenario, NEWEST)
    realised = ReviewCycle(portfolio, ledger).realised
    event_of = {(r.cycle, r.item, r.location): r.event_id for r in realised.itertuples(index=False)}
    lines = scenario.realised_in(NEWEST)
    summary = history.summarise(realised, by)
    groups: dict[str, list[ExpectedLine]] = defaultdict(list)
    for e in lines:
        groups[getattr(e, by)].append(e)
    groups[history.ALL] = list(lines)
    assert sorted(summary[by]) == sorted(groups)
    assert summary[by].iloc[-1] == history.ALL
    for row in summary.to_dict("records"):
        plain = _plain_summary(groups[row[by]], event_of)
        for name, value in plain.items():
            if isinstance(value, float) and math.isnan(value):
                assert math.isnan(row[name]), name
            else:
                assert row[name] == pytest.approx(value, rel=1e-12, abs=1e-12), (row[by], name)


def test_summary_orders_bands_and_directions_and_crosses(
    scenario: CycleScenario, ledger: Ledger
) -> None:
    realised = ReviewCycle(_portfolio(scenario, NEWEST), ledger).realised
    size = history.summarise(realised, "size")["size"].tolist()
    assert size == [b for b in history.SIZE_BANDS if b in size[:-1]] + [history.ALL]
    assert history.summarise(realised, "direction")["direction"].tolist() == ["up", "down", "all"]
    cross = history.summarise(realised, ("direction", "size"))
    body = cross.iloc[:-1]
    assert int(body["adjustments"].sum()) == len(realised)
    assert body["value_added"].sum() == pytest.approx(realised["value_added"].sum())
    with pytest.raises(history.HistoryError, match="cannot group"):
        history.summarise(realised, "colour")


def test_summary_of_nothing_has_an_empty_all_row() -> None:
    empty = pd.DataFrame(columns=list(history.REALISED_COLUMNS))
    out = history.summarise(empty, "direction")
    assert out["direction"].tolist() == [history.ALL]
    assert out["adjustments"].iloc[0] == 0
    assert math.isnan(out["share_helped"].iloc[0])


def test_size_bands_hold_their_lower_edge() -> None:
    # Band edges are this project's choice; "record size (% of baseline)" is common practice
    # supported by Fildes et al. (2009), who split adjustments by size (docs/sources.md §3.2).
    original = np.array([100.0, 100.0, 100.0, 100.0, 100.0, 100.0, 0.0, -40.0, 100.0])
    adjusted = np.array([104.9, 105.0, 90.0, 80.0, 150.0, 99.0, 3.0, -30.0, 49.0])
    assert history.size_band(original, adjusted).tolist() == [
        "<5%",
        "5-10%",
        "10-20%",
        "20-50%",
        ">=50%",
        "<5%",
        "from zero",
        "20-50%",
        ">=50%",
    ]


# --------------------------------------------------------------------------------------------
# Repeat offenders


def _without(path: Path, key: tuple[str, str], folder: Path) -> Path:
    """A copy of a weekly file without one series (the csv module, text kept exactly)."""
    out = folder / path.name
    with path.open(encoding="utf-8", newline="") as src, out.open("w", newline="") as dst:
        reader = csv.reader(src)
        writer = csv.writer(dst, lineterminator="\n")
        header = next(reader)
        writer.writerow(header)
        item, location = header.index("item"), header.index("location")
        writer.writerows(r for r in reader if (r[item], r[location]) != key)
    return out


def test_repeat_offender_windows_equal_each_weeks_own_worst_set(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    newest = _portfolio(scenario, NEWEST)
    table = history.repeat_offenders(newest, n=3, m=4, target_share=0.8)
    columns = [c for c in table.columns if c.startswith("worst_")]
    assert columns == [f"worst_{c}" for c in scenario.cycles]
    keys = list(zip(table["item"], table["location"], strict=True))
    for k, cycle in enumerate(scenario.cycles):
        # Reference: the worst set the review list showed on that week's own file.
        # The series delisted since is not in the newest file, so it cannot weigh in the
        # re-scored totals: the reference is that week's file without it.
        gone = scenario.roles[scenario.disappears]
        own = read_portfolio(_without(scenario.files[k], gone, tmp_path))
        shown = leading_cover(scorecard(own), 0.8)
        expected = set(zip(shown["item"], shown["location"], strict=True))
        got = {key for key, flag in zip(keys, table[f"worst_{cycle}"], strict=True) if flag}
        assert got == expected, cycle
    assert (table["times_in_worst"] == table[columns].sum(axis=1)).all()
    assert (table["repeat"] == (table["times_in_worst"] >= 3)).all()


def test_stored_worst_sets_are_exactly_what_each_weeks_list_showed(
    scenario: CycleScenario,
) -> None:
    # The sample month opened each week's file in a review session, which stored its set.
    newest = _portfolio(scenario, NEWEST)
    with Ledger.open(scenario.ledger, read_only=True) as ledger:
        table = history.repeat_offenders(newest, n=3, m=4, target_share=0.8, ledger=ledger)
    assert table.attrs["sources"] == {c: history.SNAPSHOT for c in scenario.cycles}
    assert history.repeat_notice(table) is None
    keys = list(zip(table["item"], table["location"], strict=True))
    gone = scenario.roles[scenario.disappears]
    for k, cycle in enumerate(scenario.cycles):
        # Reference: the week's own file as it was, the delisted series included (it weighed
        # in that week's totals); it is not reported now, being absent from the newest file.
        own = read_portfolio(scenario.files[k])
        shown = leading_cover(scorecard(own), 0.8)
        expected = set(zip(shown["item"], shown["location"], strict=True)) - {gone}
        got = {key for key, flag in zip(keys, table[f"worst_{cycle}"], strict=True) if flag}
        assert got == expected, cycle


def test_a_series_that_appears_is_counted_only_from_then_and_one_gone_is_absent(
    scenario: CycleScenario,
) -> None:
    newest = _portfolio(scenario, NEWEST)
    table = history.repeat_offenders(newest).set_index(["item", "location"])
    row = table.loc[scenario.roles[scenario.appears]]
    assert row["windows_seen"] == 3
    assert not row[f"worst_{scenario.cycles[0]}"]
    assert row["times_in_worst"] == 3
    assert row["repeat"]
    assert scenario.roles[scenario.disappears] not in table.index


def _hand_portfolio():
    """Four series, demand 10 every week; |error| per week as in the table below.

    week   0  1  2  3  4  5
    A      6  6  6  0  6  6
    B      1  1  5  6  1  1
    C      1  1  1  1  1  1
    D      -  -  -  -  5  5     (first row in week 4)
    """
    errors = {"A": [6, 6, 6, 0, 6, 6], "B": [1, 1, 5, 6, 1, 1], "C": [1] * 6}
    records = []
    for item, errs in errors.items():
        records += series_records([10.0] * 6, [10.0 + e for e in errs], item=item)
    records += series_records([10.0] * 2, [15.0] * 2, item="D", start=4)
    return portfolio_from(records)


def test_repeat_offenders_by_hand() -> None:
    # window = 1: each cycle's window is its own week. Worst set = leading set covering 50 %:
    # week 2: A 6/12 -> {A}; week 3: B 6/7 -> {B}; weeks 4, 5: A 6/13 < 50 %, + D -> {A, D}.
    table = history.repeat_offenders(_hand_portfolio(), n=3, m=4, target_share=0.5, window=1)
    assert table["item"].tolist() == ["A", "B", "C", "D"]
    assert table["times_in_worst"].tolist() == [3, 1, 0, 2]
    assert table["windows_seen"].tolist() == [4, 4, 4, 2]
    assert table["repeat"].tolist() == [True, False, False, False]
    assert table["in_worst_now"].tolist() == [True, False, False, True]
    two_of_four = history.repeat_offenders(_hand_portfolio(), n=2, m=4, target_share=0.5, window=1)
    assert two_of_four["repeat"].tolist() == [True, False, False, True]


def test_repeat_offenders_count_the_sets_the_list_showed(tmp_path: Path) -> None:
    # Same hand portfolio as above. The ledger holds the sets the review list showed in weeks 2
    # and 5 (say the history of week 2 was restated since: the list then showed C, not A).
    # Weeks 3 and 4 were never opened for review: they are re-scored, {B} and {A, D}.
    portfolio = _hand_portfolio()
    week = [d.strftime("%Y-%m-%d") for d in portfolio.calendar.periods]
    settings_ = {
        "reviewer": "ana",
        "portfolio_name": "w.csv",
        "portfolio_fingerprint": "",
        "target_share": 0.5,
        "window": 1,
        "season": 1,
        "ranked_by": "units",
        "series": 4,
    }
    with Ledger.open(tmp_path / "l.sqlite") as ledger:
        ledger.record_worst_set(week[2], ["C"], [""], **settings_)
        ledger.record_worst_set(week[5], ["A", "D", "gone"], ["", "", ""], **settings_)
        table = history.repeat_offenders(
            portfolio, n=2, m=4, target_share=0.5, window=1, ledger=ledger
        )
    assert table[f"worst_{week[2]}"].tolist() == [False, False, True, False]
    assert table[f"worst_{week[5]}"].tolist() == [True, False, False, True]
    # Counted per weekly cycle: A in weeks 4, 5; B in 3; C in 2; D in 4, 5.
    assert table["times_in_worst"].tolist() == [2, 1, 1, 2]
    assert table["repeat"].tolist() == [True, False, False, True]
    assert table.attrs["sources"] == {
        week[2]: history.SNAPSHOT,
        week[3]: history.RESCORED,
        week[4]: history.RESCORED,
        week[5]: history.SNAPSHOT,
    }
    notice = history.repeat_notice(table)
    assert notice is not None and f"2 of the last 4 cycles ({week[3]}, {week[4]})" in notice
    # Without a ledger every cycle is re-scored, as before.
    plain = history.repeat_offenders(portfolio, n=2, m=4, target_share=0.5, window=1)
    assert plain["times_in_worst"].tolist() == [3, 1, 0, 2]


def test_repeat_offenders_refuse_bad_settings() -> None:
    portfolio = _hand_portfolio()
    for n, m in ((0, 4), (5, 4), (1, 0)):
        with pytest.raises(history.HistoryError, match="N <= M"):
            history.repeat_offenders(portfolio, n=n, m=m)
    with pytest.raises(history.HistoryError, match="target share"):
        history.repeat_offenders(portfolio, target_share=1.5)


def test_repeat_windows_equal_scorecards_of_the_truncated_sample() -> None:
    # Reference: ranking.scorecard + leading_cover on the sample portfolio cut back to each
    # earlier week (the full scoring path, not the shortcut repeat_offenders takes).
    sample = read_portfolio(ROOT / "sample" / "portfolio.csv")
    table = history.repeat_offenders(sample, n=2, m=4, target_share=0.8)
    columns = [c for c in table.columns if c.startswith("worst_")]
    assert len(columns) == 4
    for j, column in enumerate(columns):
        cut = dataclasses.replace(sample, last_actual=sample.last_actual - (3 - j))
        shown = leading_cover(scorecard(cut), 0.8)
        mask = np.zeros(sample.n_series, dtype=bool)
        mask[shown.index.to_numpy()] = True
        assert (table[column].to_numpy() == mask).all(), column


# --------------------------------------------------------------------------------------------
# Active adjustments and carried-over series


def test_active_adjustments_of_the_newest_week(scenario: CycleScenario, ledger: Ledger) -> None:
    newest = _portfolio(scenario, NEWEST)
    active = ReviewCycle(newest, ledger).active
    s2, s3 = scenario.roles["S2"], scenario.roles["S3"]
    got = {(r.cycle, r.item, r.location): r for r in active.itertuples(index=False)}
    c0, c2, c3 = scenario.cycles[0], scenario.cycles[2], scenario.cycles[3]
    assert set(got) == {(c0, *s3), (c2, *s2), (c3, *s3)}
    ahead = defaultdict(list)
    for e in scenario.lines:
        if e.actual is None:
            ahead[(e.cycle, e.item, e.location)].append(e)
    # The cycle-3 override of S3 replaces the cycle-0 one for its two periods.
    replaced = {e.period for e in ahead[(c3, *s3)]}
    for key, row in got.items():
        older_s3 = key == (c0, *s3)
        standing = [e for e in ahead[key] if not (older_s3 and e.period in replaced)]
        assert row.remaining_periods == tuple(e.period for e in standing)
        assert row.remaining == len(standing)
        assert row.units_change == sum(e.adjusted - e.original for e in standing)
    assert got[(c0, *s3)].superseded == 2
    assert got[(c0, *s3)].periods == 8
    assert got[(c2, *s2)].superseded == 0


def test_an_adjustment_fully_replaced_later_is_not_active(
    scenario: CycleScenario, ledger: Ledger
) -> None:
    week38 = _portfolio(scenario, NEWEST - 1)
    active = ReviewCycle(week38, ledger).active
    s1 = scenario.roles["S1"]
    mine = active.loc[(active["item"] == s1[0]) & (active["location"] == s1[1])]
    # Cycle 0 covered one week still ahead (week 39); cycle 1 adjusted it again.
    assert mine["cycle"].tolist() == [scenario.cycles[1]]
    assert mine["remaining"].tolist() == [1]
    x = active.loc[active["item"] == scenario.roles[scenario.disappears][0]]
    assert (x["series"] >= 0).all() and len(x) == 1


def test_carried_over_are_open_series_still_among_the_worst(
    scenario: CycleScenario, ledger: Ledger
) -> None:
    newest = _portfolio(scenario, NEWEST)
    worst = leading_cover(scorecard(newest), 0.8)
    carried = history.carried_over(newest, ReviewCycle(newest, ledger).log, worst)
    roles = [scenario.roles[r] for r in scenario.carried]
    keys = list(zip(carried["item"], carried["location"], strict=True))
    assert sorted(keys) == sorted(roles)
    # In the worst set's (rank) order.
    rank = worst.set_index(["item", "location"])["rank"]
    assert [rank[k] for k in keys] == sorted(rank[k] for k in keys)
    assert not carried["reviewed_now"].any()
    assert set(carried["outcome"]) <= set(vocabulary.OPEN_OUTCOMES)
    for role in scenario.not_carried:
        assert scenario.roles[role] not in keys
    by_position = history.carried_over(
        newest, ReviewCycle(newest, ledger).log, worst.index.to_numpy()
    )
    assert by_position["series"].tolist() == carried["series"].tolist()


def test_carried_over_reviewed_now_and_listed_first(
    scenario: CycleScenario, tmp_path: Path
) -> None:
    copy = tmp_path / "copy.ledger.sqlite"
    shutil.copy(scenario.ledger, copy)
    newest = _portfolio(scenario, NEWEST)
    with Ledger.open(copy) as ledger:
        session = ReviewSession(ReviewCycle(newest, ledger), reviewer="Ines")
        s5 = session.find(*scenario.roles["S5"])
        session.commit_decision(s5, outcome="no_change", root_cause="unknown")
        worst = leading_cover(scorecard(newest), 0.8)
        carried = history.carried_over(newest, ReviewCycle(newest, ledger).log, worst)
    flags = dict(zip(carried["series"], carried["reviewed_now"], strict=True))
    assert flags[s5]
    assert sum(flags.values()) == 1
    order = session.error_order
    moved = history.carried_first(order, carried["series"].to_numpy())
    assert sorted(moved.tolist()) == sorted(order.tolist())
    front = moved[: len(carried)]
    assert set(front.tolist()) == set(carried["series"].tolist())
    rest = moved[len(carried) :]
    assert rest.tolist() == [s for s in order.tolist() if s not in set(front.tolist())]


def test_nothing_is_carried_or_active_without_a_ledger(scenario: CycleScenario) -> None:
    newest = _portfolio(scenario, NEWEST)
    assert ReviewCycle(newest, None).realised.empty
    assert ReviewCycle(newest, None).active.empty
    assert history.carried_over(newest, ReviewCycle(newest, None).log, [0, 1]).empty
    assert (
        history.coverage(newest, ReviewCycle(newest, None).log, scorecard(newest), 0.8).reviewed
        == 0
    )


# --------------------------------------------------------------------------------------------
# Context for the cycle


def test_portfolio_fva_by_hand() -> None:
    # Gilliland's FVA over the naive forecast (docs/sources.md §3.1), season 1, window 3:
    # naive |12-10| + |9-12| + |11-9| = 7; forecast |11-12| + |11-9| + |11-11| = 3.
    portfolio = portfolio_from(series_records([10, 12, 9, 11], [10, 11, 11, 11]))
    fva = history.portfolio_fva(portfolio, window=3, season=1)
    assert fva["naive_abs_error"] == 7
    assert fva["forecast_abs_error"] == 3
    assert fva["value_added"] == 4
    # Relative absolute error (Morlidge's avoidability ratio; docs/sources.md §3.1).
    assert fva["relative_error"] == pytest.approx(3 / 7)
    assert fva["value_added_share"] == pytest.approx(4 / 7)
    assert math.isnan(fva["value_added_value"])
    assert fva["series_worse_than_naive"] == 0


def test_portfolio_fva_equals_plain_loops_and_the_scorecard(scenario: CycleScenario) -> None:
    portfolio = _portfolio(scenario, NEWEST)
    card = scorecard(portfolio).sort_index()
    fva = history.portfolio_fva(portfolio)
    cols = window_columns(portfolio.demand, portfolio.last_actual, 13)
    naive = forecast = value = 0.0
    weighted = 0.0
    for s in range(portfolio.n_series):
        count = 0
        for t in cols:
            d, f = portfolio.demand[s, t], portfolio.forecast[s, t]
            lag = portfolio.demand[s, t - 1] if t >= 1 else math.nan
            if math.isnan(d) or math.isnan(f) or math.isnan(lag):
                continue
            naive += abs(d - lag)
            forecast += abs(f - d)
            value += (abs(d - lag) - abs(f - d)) * portfolio.price[s, t]
            count += 1
        if count:
            # The scorecard's fva is the per-series mean gain (metrics.naive_value_added).
            weighted += card["fva"].iloc[s] * count
    assert fva["naive_abs_error"] == pytest.approx(naive)
    assert fva["forecast_abs_error"] == pytest.approx(forecast)
    assert fva["value_added"] == pytest.approx(naive - forecast)
    assert fva["value_added"] == pytest.approx(weighted)
    assert fva["value_added_value"] == pytest.approx(value)
    assert fva["series_worse_than_naive"] == int((card["fva"] < 0).sum())


def test_coverage_is_the_review_screens_progress(scenario: CycleScenario, ledger: Ledger) -> None:
    portfolio = _portfolio(scenario, NEWEST)
    card = scorecard(portfolio)
    cov = history.coverage(portfolio, ReviewCycle(portfolio, ledger).log, card, 0.8)
    progress = ReviewSession(ReviewCycle(portfolio, ledger), reviewer="x").progress()
    assert cov.reviewed == progress.reviewed == len(scenario.reviewed_now)
    assert cov.covered == pytest.approx(progress.covered, rel=1e-12)
    assert cov.worst == len(leading_cover(card, 0.8))
    assert cov.not_in_portfolio == 0


def test_decision_counts_of_the_first_week(scenario: CycleScenario, ledger: Ledger) -> None:
    table = history.decision_counts(
        history.DecisionLog.read(ledger, scenario.cycles[0]), scenario.cycles[0]
    )
    # By hand from sample/cycles.PLAN: S1 model_miss, S2 and S3 promotion adjusted (S2's first
    # decision replaced, S4's undone), S5 put off (unknown), S6 handed off (large_order).
    assert table.loc["adjusted", "promotion"] == 2
    assert table.loc["adjusted", "model_miss"] == 1
    assert table.loc["deferred", "unknown"] == 1
    assert table.loc["handed_off", "large_order"] == 1
    assert table.loc["total", "total"] == 5
    assert table.index.tolist() == ["no_change", "adjusted", "handed_off", "deferred", "total"]
    assert (
        history.decision_counts(
            history.DecisionLog.read(None, scenario.cycles[0]), scenario.cycles[0]
        ).loc["total", "total"]
        == 0
    )


def test_a_monthly_portfolio_without_locations(tmp_path: Path) -> None:
    """Keys without a location column match ledger rows with location ""."""

    def write(name: str, demand: list[object]) -> Path:
        months = ["2026-01-01", "2026-02-01", "2026-03-01", "2026-04-01", "2026-05-01"]
        path = tmp_path / name
        with path.open("w", encoding="utf-8", newline="") as handle:
            out = csv.writer(handle)
            out.writerow(["item", "period", "demand", "forecast"])
            for month, d in zip(months, demand, strict=True):
                out.writerow(["P-1", month, d, 50])
        return path

    first = read_portfolio(write("march.csv", [40, 60, 50, "", ""]))
    with Ledger.open(tmp_path / "m.ledger.sqlite") as ledger:
        session = ReviewSession(ReviewCycle(first, ledger), reviewer="Kofi")
        session.commit_decision(0, outcome="adjusted", root_cause="promotion", adjustment="1: +10")
        later = read_portfolio(write("april.csv", [40, 60, 50, 58, ""]))
        realised = ReviewCycle(later, ledger).realised
        assert schema.LOCATION not in later.key_columns
    # |50 - 58| - |60 - 58| = 6, by hand.
    assert realised["value_added"].tolist() == [6.0]
    assert realised["location"].tolist() == [""]
    assert realised["period"].tolist() == ["2026-04-01"]
    assert history.series_positions(later, ["P-1", "P-1"], ["", "Lyon"]).tolist() == [0, -1]


@pytest.mark.parametrize("target", [0.3, 0.8, 1.0])
def test_the_worst_set_cut_on_the_scorecards_cum_share_is_the_worst_set(target: float) -> None:
    # history.worst_set forms the running shares again; the scorecard already holds them.
    path = Path(__file__).resolve().parents[2] / "sample" / "portfolio.csv"
    portfolio = read_portfolio(path)
    card = scorecard(portfolio)
    error = ReviewCycle(portfolio).error
    want = history.worst_set(error, target)
    assert want.any()
    np.testing.assert_array_equal(history.worst_set_of_card(card, error, target), want)
    # No error at all: no worst set (the shares are undefined).
    zero = card.assign(cum_share=np.nan)
    assert not history.worst_set_of_card(zero, np.zeros(len(card)), target).any()
