"""A seeded month of weekly reviews: four portfolio files and one decision ledger.

The scenario continues the invented *Hollowmere Garden Supply* (see ``generate.py``): 12 items at
two warehouses, reviewed on four consecutive Mondays. Each weekly file holds the same series with
one more week of actual demand than the file before and the forward forecast rolled on a week.
Between the files a reviewer records decisions through ``ReviewSession`` (so every adjustment
line is the one the review screens would store), including one undone decision, one decision
replaced within its cycle, hand-offs and put-offs.

The realised value of every adjustment is known by construction: the forward forecast of each
adjusted period and the actual demand that later arrives for it are set here, in whole multiples
of a per-series scale, and ``PLAN_LINES`` states by hand what each override should turn out to be
worth. Two series test the edges of the cross-cycle logic: one *appears* (its first row is in the
second week) and one *disappears* (it is delisted and missing from the last file).

``build_cycles(folder, seed=...)`` writes the files and the ledger and returns what the tests
expect. Run ``python -m sample.cycles --out DIR`` to look at them.
"""

from __future__ import annotations

import argparse
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

from sample import generate
from triage.core.ledger import FOLDER_LEDGER

#: Seed of the scenario the tests use.
CYCLES_SEED = 11
#: Last history week of the fourth (newest) file, a Monday.
CYCLES_END = date(2027, 3, 1)
N_ITEMS = 12
N_LOCATIONS = 2
#: History weeks in the newest file; each earlier file has one week less.
N_WEEKS = 40
N_FORWARD = 8
N_FILES = 4
#: The review folder's ledger, so every command run on a weekly file of the folder finds it.
LEDGER_NAME = FOLDER_LEDGER

#: Week index (0 = first history week) of the latest actual in the oldest file.
FIRST_CYCLE_WEEK = N_WEEKS - N_FILES

#: Series roles, assigned in ranking order of the oldest file among complete weekly-ordered
#: series (largest error first). ``S9`` is the last-ranked complete series left, ``S7`` the
#: smallest of the others and ``N`` (the series that appears) the dearest regular one left.
ROLES_BY_RANK = ("S5", "S8", "S1", "S2", "S3", "S6", "X", "S4")

#: Mean weekly units each adjusted role is scaled to: its plan values are multiplied by
#: ``max(1, round(recent mean demand / base))`` so the numbers suit the series' size.
ROLE_BASE = {"S1": 40.0, "S2": 100.0, "S3": 20.0, "X": 10.0}


@dataclass(frozen=True)
class PlanDecision:
    """One decision of the scenario, recorded in the cycle of file ``cycle``."""

    cycle: int
    role: str
    reviewer: str
    outcome: str
    root_cause: str
    spec: str | None = None
    """Adjustment spec; ``{s}`` is replaced by the role's scale."""
    note: str = ""
    undo: bool = False
    """Undo the decision right after recording it."""


@dataclass(frozen=True)
class PlanLine:
    """One adjusted forward period and, by hand, what it is worth once its actual is in.

    Values are in the role's base units; the scenario multiplies them by the role's scale.
    ``value_added`` is |original − actual| − |adjusted − actual| worked out by hand.
    """

    cycle: int
    role: str
    week: int
    original: float
    adjusted: float
    actual: float | None
    value_added: float | None
    direction: str
    size: str


PLAN: tuple[PlanDecision, ...] = (
    PlanDecision(
        0, "S1", "Mara", "adjusted", "model_miss", "1-3: -25%", "level fell after the range review"
    ),
    PlanDecision(0, "S2", "Tobias", "adjusted", "promotion", "+{8}", "spring mailing"),
    # Replaces the decision above within the same cycle (version 2 is effective).
    PlanDecision(
        0, "S2", "Tobias", "adjusted", "promotion", "1-2: +{4}", "mailing smaller than planned"
    ),
    PlanDecision(0, "S3", "Mara", "adjusted", "promotion", "+{10}", "garden-show stand"),
    PlanDecision(0, "S4", "Mara", "adjusted", "model_miss", "1: =60", "wrong series", undo=True),
    PlanDecision(0, "S5", "Mara", "deferred", "unknown", None, "waiting for the sales team"),
    PlanDecision(0, "S6", "Tobias", "handed_off", "large_order", None, "asked key accounts"),
    PlanDecision(1, "S1", "Mara", "adjusted", "season_trend", "1-2: -{6}", "cold March"),
    PlanDecision(1, "S7", "Tobias", "adjusted", "new_item", "1: =5", "first store order"),
    PlanDecision(1, "S8", "Tobias", "deferred", "promotion", None, "promotion dates unknown"),
    PlanDecision(1, "S9", "Mara", "deferred", "unknown", None, "small series, look later"),
    PlanDecision(
        1, "X", "Lena", "adjusted", "promotion", "1-2: +50%", "clearance before delisting"
    ),
    PlanDecision(2, "S6", "Tobias", "no_change", "large_order", None, "order confirmed as one-off"),
    PlanDecision(2, "S2", "Tobias", "adjusted", "large_order", "1-3: -{3}", "customer cut back"),
    PlanDecision(3, "S3", "Mara", "adjusted", "model_miss", "1-2: -{5}", "show stand smaller"),
    PlanDecision(3, "S1", "Mara", "no_change", "season_trend", None, "back on track"),
)

_W = FIRST_CYCLE_WEEK  # week of the oldest file's latest actual
#: With ``competing``: the (role, week) whose statistical forecast is left empty, an adjusted
#: period that is realised in every later file.
STAT_BLANK = ("S1", _W + 1)
PLAN_LINES: tuple[PlanLine, ...] = (
    # cycle 0, S1 "1-3: -25%": 40 -> 30
    PlanLine(0, "S1", _W + 1, 40, 30, 32, 6, "down", "20-50%"),
    PlanLine(0, "S1", _W + 2, 40, 30, 28, 10, "down", "20-50%"),
    PlanLine(0, "S1", _W + 3, 40, 30, 38, -6, "down", "20-50%"),
    # cycle 0, S2 "1-2: +4": 100 -> 104 (a 4 % change)
    PlanLine(0, "S2", _W + 1, 100, 104, 98, -4, "up", "<5%"),
    PlanLine(0, "S2", _W + 2, 100, 104, 103, 2, "up", "<5%"),
    # cycle 0, S3 "+10" over all eight forward weeks: 20 -> 30
    PlanLine(0, "S3", _W + 1, 20, 30, 35, 10, "up", ">=50%"),
    PlanLine(0, "S3", _W + 2, 20, 30, 25, 0, "up", ">=50%"),
    PlanLine(0, "S3", _W + 3, 20, 30, 20, -10, "up", ">=50%"),
    *(PlanLine(0, "S3", _W + k, 20, 30, None, None, "up", ">=50%") for k in range(4, 9)),
    # cycle 1, S1 "1-2: -6": 40 -> 34 (15 %)
    PlanLine(1, "S1", _W + 2, 40, 34, 28, 6, "down", "10-20%"),
    PlanLine(1, "S1", _W + 3, 40, 34, 38, -2, "down", "10-20%"),
    # cycle 1, S7 "1: =5" on a forecast of 0
    PlanLine(1, "S7", _W + 2, 0, 5, 0, -5, "up", "from zero"),
    # cycle 1, X "1-2: +50%": 10 -> 15; X is not in the newest file
    PlanLine(1, "X", _W + 2, 10, 15, 14, 3, "up", ">=50%"),
    PlanLine(1, "X", _W + 3, 10, 15, 8, -5, "up", ">=50%"),
    # cycle 2, S2 "1-3: -3": 100 -> 97 (3 %)
    PlanLine(2, "S2", _W + 3, 100, 97, 99, -1, "down", "<5%"),
    PlanLine(2, "S2", _W + 4, 100, 97, None, None, "down", "<5%"),
    PlanLine(2, "S2", _W + 5, 100, 97, None, None, "down", "<5%"),
    # cycle 3, S3 "1-2: -5": 20 -> 15
    PlanLine(3, "S3", _W + 4, 20, 15, None, None, "down", "20-50%"),
    PlanLine(3, "S3", _W + 5, 20, 15, None, None, "down", "20-50%"),
)


@dataclass(frozen=True)
class ExpectedLine:
    """An adjusted period as the scenario made it, in units of the series."""

    cycle: str
    """Cycle of the decision (ISO date)."""
    role: str
    item: str
    location: str
    period: str
    original: float
    adjusted: float
    actual: float | None
    """Actual demand of the period, None while it is still ahead in the newest file."""
    value_added: float | None
    """By construction (hand value × scale); None while the actual is not in."""
    price: float
    """Unit price of the series in that period."""
    reviewer: str
    root_cause: str
    direction: str
    size: str
    week: int
    """Week index of the period (0 = first history week)."""


@dataclass(frozen=True)
class CycleScenario:
    """What ``build_cycles`` wrote and what the tests should find in it."""

    files: tuple[Path, ...]
    """The weekly portfolio files, oldest first."""
    ledger: Path
    """The decision ledger shared by all weeks."""
    cycles: tuple[str, ...]
    """Review cycle (latest actual week) of each file."""
    roles: dict[str, tuple[str, str]]
    """Role -> (item, location)."""
    scale: dict[str, int]
    """Role -> the multiplier of its plan values."""
    lines: tuple[ExpectedLine, ...]
    """Every effective adjustment line, realised or not."""
    appears: str = "N"
    """Role of the series whose first row is in the second file's latest week."""
    disappears: str = "X"
    """Role of the series missing from the newest file."""
    carried: tuple[str, ...] = ("S5", "S8")
    """Roles handed off or put off earlier, unreviewed now, in the newest file's worst set."""
    not_carried: tuple[str, ...] = ("S6", "S9")
    """S6 was handed off and then closed; S9 was put off but is not among the worst."""
    reviewed_now: tuple[str, ...] = ("S1", "S3")
    """Roles decided in the newest file's cycle."""
    notes: dict[str, str] = field(default_factory=dict)

    def realised_in(self, file_index: int) -> list[ExpectedLine]:
        """Lines whose actual is in file ``file_index`` and whose series is in it."""
        last = FIRST_CYCLE_WEEK + file_index
        return [
            ln
            for ln in self.lines
            if ln.actual is not None
            and ln.week <= last
            and not (ln.role == self.disappears and file_index == N_FILES - 1)
        ]

    def file_of(self, role: str) -> dict[str, str]:
        """``{"item": ..., "location": ...}`` of a role."""
        item, location = self.roles[role]
        return {"item": item, "location": location}


def _week_dates(design: generate.Design) -> list[str]:
    return [str(d) for d in design.periods.astype("datetime64[D]")]


def _scorecard_order(path: Path) -> tuple[np.ndarray, float, pd.DataFrame]:
    """Series positions by error rank, total ranking error, and the scorecard of a file."""
    from triage.core.ranking import scorecard
    from triage.core.read import read_portfolio

    card = scorecard(read_portfolio(path))
    error = card["abs_error_value" if "abs_error_value" in card else "abs_error"]
    return card.index.to_numpy(), float(error.sum()), card


def _write(frame: pd.DataFrame, path: Path) -> Path:
    generate.write_csv(frame, path)
    return path


def build_cycles(
    folder: str | Path, *, seed: int = CYCLES_SEED, competing: bool = False
) -> CycleScenario:
    """Write the four weekly files and the ledger into ``folder`` and return what to expect.

    Args:
        folder: Where to write (created when missing).
        seed: The scenario's seed.
        competing: Also write the competing forecasts ``forecast_stat`` and
            ``forecast_customer`` (``generate.competing_forecasts``, drawn from the planning
            forecast as the scenario set it), with the statistical forecast left empty in the
            first realised adjusted period (``STAT_BLANK``). Off by default: every other column,
            and so every output of the scenario without them, stays the same.

    Raises:
        RuntimeError: The seed does not give a scenario with the promised properties (a plan
            series outside the worst set, an adjustment line that is not the planned one).
    """
    from triage.core.cycle import ReviewCycle
    from triage.core.ledger import Ledger
    from triage.core.ranking import leading_cover
    from triage.core.read import read_portfolio
    from triage.core.review import ReviewSession

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    design = generate.design_portfolio(
        N_ITEMS,
        N_LOCATIONS,
        N_WEEKS,
        N_FORWARD,
        seed,
        end=CYCLES_END,
        # Every planned cell must exist: no dropped rows in this scenario.
        mix=generate.Mix(missing_rows=0.0),
    )
    rows = generate.simulate(design, 0, design.n_series)
    series, week = rows["series"], rows["week"]
    T = design.n_periods
    # Rows are in series-major, week order with every (series, week) present for regular series.
    cell = {(int(s), int(w)): i for i, (s, w) in enumerate(zip(series, week, strict=True))}
    demand, forecast, price = rows["demand"], rows["forecast"], rows["price"]
    dates = _week_dates(design)

    item = np.arange(design.n_series) // design.n_locations
    complete = (
        (design.start_week[item] == 0)
        & (design.phase_out_end[item] < 0)
        & ~design.returns
        & (np.bincount(series, minlength=design.n_series) == T)
    )
    # Overrides of weekly-ordered series read naturally; sporadic ones only for S7 and S9.
    regular = complete & (design.pattern <= generate.ERRATIC)

    # Roles in ranking order of the oldest file, before any planned value is set.
    probe = _write(
        _frame(design, rows, keep=np.ones(len(series), bool), last=_W), folder / ".probe.csv"
    )
    order, total_error, _ = _scorecard_order(probe)
    probe.unlink()
    ranked = [int(s) for s in order if regular[s]]
    others = [int(s) for s in order if complete[s] and not regular[s]]
    recent = np.array(
        [
            np.nanmean(demand[[cell[(s, w)] for w in range(_W - 12, _W + 1)]])
            for s in range(design.n_series)
        ]
    )
    roles: dict[str, int] = dict(zip(ROLES_BY_RANK, ranked, strict=False))
    rest = [s for s in ranked + others if s not in roles.values()]
    roles["S9"] = rest[-1]
    roles["S7"] = min(rest[:-1], key=lambda s: recent[s])
    # The appearing series is the dearest regular one left: its first weeks weigh heavily in
    # value without swamping the unit totals.
    unit_price = design.item_price[np.arange(design.n_series) // design.n_locations]
    roles["N"] = max(
        (s for s in ranked if s not in roles.values()), key=lambda s: (unit_price[s], -s)
    )

    scale = {r: 1 for r in roles}
    for role, base in ROLE_BASE.items():
        scale[role] = max(1, round(float(recent[roles[role]]) / base))

    def put(role: str, w: int, *, fc: float | None = None, act: float | None = None) -> None:
        i = cell[(roles[role], w)]
        if fc is not None:
            forecast[i] = fc
        if act is not None:
            demand[i] = act

    for ln in PLAN_LINES:
        s = scale[ln.role]
        put(ln.role, ln.week, fc=ln.original * s, act=None if ln.actual is None else ln.actual * s)
    # The delisted series' other actuals stay as simulated; the appearing series gets a large
    # under-forecast in its first weeks, so it is among the worst from the week it appears.
    n_s = roles["N"]
    n_price = float(price[cell[(n_s, _W + 1)]])
    jump = math.ceil(0.1 * total_error / n_price)
    for w in range(_W + 1, T):
        level = float(round(4.0 * max(1.0, float(recent[n_s]))))
        put("N", w, fc=level, act=None if w >= N_WEEKS else level + jump)

    if competing:
        generate.competing_forecasts(design, rows, 0)
        role, blank_week = STAT_BLANK
        rows["forecast_stat"][cell[(roles[role], blank_week)]] = np.nan

    keep_all = np.ones(len(series), dtype=bool)
    keep_all &= ~((series == n_s) & (week <= _W))
    files: list[Path] = []
    cycles: list[str] = []
    for k in range(N_FILES):
        last = _W + k
        keep = keep_all & (week <= last + N_FORWARD)
        if k == N_FILES - 1:
            keep &= series != roles["X"]
        cycles.append(dates[last])
        files.append(
            _write(
                _frame(design, rows, keep=keep, last=last), folder / f"hollowmere-{dates[last]}.csv"
            )
        )

    keys = {
        r: (str(design.item_ids[s // design.n_locations]), design.locations[s % design.n_locations])
        for r, s in roles.items()
    }

    ledger_path = folder / LEDGER_NAME
    if ledger_path.exists():
        for extra in ("", "-wal", "-shm"):
            Path(str(ledger_path) + extra).unlink(missing_ok=True)
    with Ledger.open(ledger_path) as ledger:
        for k, path in enumerate(files):
            portfolio = read_portfolio(path)
            session = ReviewSession(ReviewCycle(portfolio, ledger), reviewer="planner")
            for plan in (p for p in PLAN if p.cycle == k):
                index = session.find(*keys[plan.role])
                if index is None:
                    raise RuntimeError(f"{plan.role} is not in {path.name}")
                session.reviewer = plan.reviewer
                spec = _scaled(plan.spec, scale[plan.role]) if plan.spec else None
                event = session.commit_decision(
                    index,
                    outcome=plan.outcome,
                    root_cause=plan.root_cause,
                    note=plan.note,
                    adjustment=spec,
                )
                session.apply_event(event)
                if plan.undo:
                    session.apply_event(session.commit_undo(index))
                elif event.lines and plan is _effective(plan.cycle, plan.role):
                    _check_lines(plan, event.lines, scale[plan.role], dates)

        # The worst set of the newest file must hold the carried-over roles and not S9.
        from triage.core.ranking import scorecard

        newest = read_portfolio(files[-1])
        worst = set(leading_cover(scorecard(newest), 0.8).index.tolist())
        positions = {r: _position(newest, keys[r]) for r in roles if r != "X"}
        for role in ("S5", "S8"):
            if positions[role] not in worst:
                raise RuntimeError(f"seed {seed}: {role} is not in the newest file's worst set")
        if positions["S9"] in worst:
            raise RuntimeError(f"seed {seed}: S9 is in the newest file's worst set")

    lines = tuple(_expected(ln, keys, scale, dates, price, cell, roles) for ln in PLAN_LINES)
    return CycleScenario(
        files=tuple(files),
        ledger=ledger_path,
        cycles=tuple(cycles),
        roles=keys,
        scale=scale,
        lines=lines,
    )


def _scaled(spec: str, scale: int) -> str:
    """``+{8}`` -> ``+24`` for a scale of 3: braces hold plan units, multiplied by the scale."""
    out = spec
    while "{" in out:
        start = out.index("{")
        end = out.index("}", start)
        number = float(out[start + 1 : end]) * scale
        out = (
            out[:start]
            + (str(int(number)) if number == int(number) else repr(number))
            + out[end + 1 :]
        )
    return out


def _position(portfolio: object, key: tuple[str, str]) -> int:
    keys = portfolio.keys  # type: ignore[attr-defined]
    hit = np.flatnonzero(
        (keys["item"] == key[0]).to_numpy() & (keys["location"] == key[1]).to_numpy()
    )
    return int(hit[0])


def _effective(cycle: int, role: str) -> PlanDecision:
    """The plan's last decision for a role in a cycle (the one the ledger keeps)."""
    return next(p for p in reversed(PLAN) if p.cycle == cycle and p.role == role)


def _check_lines(plan: PlanDecision, lines: Sequence[object], scale: int, dates: list[str]) -> None:
    """The recorded lines are the planned ones (the plan's hand values stay true)."""
    planned = {
        dates[ln.week]: (ln.original * scale, ln.adjusted * scale)
        for ln in PLAN_LINES
        if ln.cycle == plan.cycle and ln.role == plan.role
    }
    recorded = {ln.period: (ln.original, ln.adjusted) for ln in lines}  # type: ignore[attr-defined]
    if recorded != planned:
        raise RuntimeError(
            f"{plan.role} cycle {plan.cycle}: recorded {recorded}, planned {planned}"
        )


def _expected(
    ln: PlanLine,
    keys: dict[str, tuple[str, str]],
    scale: dict[str, int],
    dates: list[str],
    price: np.ndarray,
    cell: dict[tuple[int, int], int],
    roles: dict[str, int],
) -> ExpectedLine:
    s = scale[ln.role]
    plan = _effective(ln.cycle, ln.role)
    return ExpectedLine(
        cycle=dates[_W + ln.cycle],
        role=ln.role,
        item=keys[ln.role][0],
        location=keys[ln.role][1],
        period=dates[ln.week],
        original=ln.original * s,
        adjusted=ln.adjusted * s,
        actual=None if ln.actual is None else ln.actual * s,
        value_added=None if ln.value_added is None else ln.value_added * s,
        price=float(price[cell[(roles[ln.role], ln.week)]]),
        reviewer=plan.reviewer,
        root_cause=plan.root_cause,
        direction=ln.direction,
        size=ln.size,
        week=ln.week,
    )


def _frame(
    design: generate.Design, rows: dict[str, np.ndarray], *, keep: np.ndarray, last: int
) -> pd.DataFrame:
    """The long frame of one weekly file: rows in ``keep``, demand emptied after week ``last``."""
    picked = {k: v[keep] for k, v in rows.items()}
    picked["demand"] = np.where(picked["week"] > last, np.nan, picked["demand"])
    return generate.frame_from_rows(design, picked)


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: write the scenario into a folder and list what it holds."""
    parser = argparse.ArgumentParser(
        prog="python -m sample.cycles", description=__doc__.splitlines()[0]
    )
    parser.add_argument("--out", type=Path, required=True, help="folder to write into")
    parser.add_argument("--seed", type=int, default=CYCLES_SEED)
    parser.add_argument(
        "--competing",
        action="store_true",
        help="also write the competing forecasts forecast_stat and forecast_customer",
    )
    args = parser.parse_args(argv)
    scenario = build_cycles(args.out, seed=args.seed, competing=args.competing)
    for path, cycle in zip(scenario.files, scenario.cycles, strict=True):
        print(f"{cycle}  {path}")
    print(f"ledger      {scenario.ledger}")
    for role, (item, location) in sorted(scenario.roles.items()):
        print(f"{role:3} {item} @ {location} (scale {scenario.scale[role]})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
