"""A reviewer's working state: one portfolio, its scorecard, and the ledger's decisions.

The review screens hold one ``ReviewSession`` and ask it for everything they show: the order of
the list, filters, progress against the target share, chart data, suggested adjustments and the
preview of an adjustment. Writing goes through ``commit_*`` (durable I/O, safe to call from a
worker thread, changes nothing in memory) and then ``apply_event`` (updates the in-memory state;
call it where the state is owned). Nothing here imports Textual.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Protocol

import numpy as np
import pandas as pd

from triage.core import adjust, compare, history, rounding, schema, split, vocabulary
from triage.core import ledger as ledger_mod
from triage.core.compare import last_step
from triage.core.cycle import ReviewCycle
from triage.core.errors import TriageError
from triage.core.ledger import AdjustmentEnd, Event, GroupRecord, Ledger
from triage.core.portfolio import Portfolio
from triage.core.ranking import BY_BIAS, BY_ERROR, BY_FVA, error_shares
from triage.core.text import percent

#: Fields a reviewer can filter on besides the attribute columns.
FILTER_FIELDS = ("pattern", "flag", "outcome", "repeat", "carried")
UNREVIEWED = "unreviewed"


class StillComputing(TriageError):
    """A piece the review screens compute after showing the list is not in yet (``ready``)."""


@dataclass(frozen=True)
class SearchIndex:
    """The text filter's index: per key and attribute column, each series' code into the
    column's casefolded distinct values.

    A filter matches the distinct values (at most one per series, and far fewer for locations
    and attributes), then the series through their codes: a substring of one column's value,
    as a filter means. ``pyarrow.compute.match_substring`` does the matching.
    """

    columns: tuple[tuple[np.ndarray, object], ...]
    """(int32 code per series, casefolded Arrow text of the distinct values) per column."""
    n_series: int

    @classmethod
    def of(cls, portfolio: Portfolio) -> SearchIndex:
        """The index of a portfolio's key and attribute columns."""
        import pyarrow as pa

        columns = []
        for name in (*portfolio.key_columns, *portfolio.attributes):
            codes, labels = portfolio.text_codes(name)
            folded = [None if v is None else v.casefold() for v in labels.to_pylist()]
            columns.append((codes, pa.array(folded, type=pa.large_string())))
        return cls(tuple(columns), portfolio.n_series)

    def matches(self, text: str) -> np.ndarray:
        """Per series: does any key or attribute contain ``text`` (case-insensitive)?"""
        import pyarrow.compute as pc

        needle = text.casefold()
        found = np.zeros(self.n_series, dtype=bool)
        for codes, labels in self.columns:
            hit = np.asarray(pc.match_substring(labels, needle).fill_null(False))
            if hit.any():
                found |= hit[codes]
        return found


@dataclass(frozen=True)
class Background:
    """What ``ReviewSession.background`` computes off the UI thread, for ``finish``."""

    search: SearchIndex
    """The text filter's index (key and attributes)."""
    suggest_spec: np.ndarray
    """Suggested adjustment per series, ``""`` when none."""
    suggest_reason: np.ndarray
    """Why, per series."""
    offenders: pd.DataFrame
    """``history.repeat_offenders`` of the cycle."""
    notices: tuple[str, ...]
    """What the reviewer should know (a worst set not stored, re-scored cycles)."""


#: What an outcome means for progress (``ReviewSession._state``): unreviewed, settled for the
#: cycle (``vocabulary.SETTLED``), handed off, put off, or a code this version does not know.
_OPEN, _SETTLED, _HANDED_OFF, _DEFERRED, _OTHER = range(5)


def _states(outcomes: np.ndarray) -> np.ndarray:
    """The progress state of each outcome code (see ``_OPEN``)."""
    out = np.full(len(outcomes), _OTHER, dtype=np.int8)
    out[outcomes == ""] = _OPEN
    out[np.isin(outcomes, vocabulary.SETTLED)] = _SETTLED
    out[outcomes == vocabulary.HANDED_OFF] = _HANDED_OFF
    out[outcomes == vocabulary.DEFERRED] = _DEFERRED
    return out


def _inverse_rank(rank: np.ndarray) -> np.ndarray:
    """Positions in rank order from 1-based ranks (a permutation): one scatter, no sort."""
    order = np.empty(len(rank), dtype=np.int64)
    order[np.asarray(rank, dtype=np.int64) - 1] = np.arange(len(rank))
    return order


@dataclass(frozen=True)
class Progress:
    """How far the review has got in this cycle."""

    reviewed: int
    """Series settled in the cycle: no change needed, or adjusted."""
    series: int
    """Series in the portfolio."""
    covered: float
    """Share of total ranking error held by the settled series (NaN when total error is 0)."""
    target: float
    """Share the reviewer aims to cover."""
    to_target: int
    """Series still needed, in error order, to reach the target (0 when reached)."""
    handed_off: int = 0
    """Series handed to someone else this cycle: decided, not settled."""
    deferred: int = 0
    """Series put off to a later cycle: decided, not settled."""


@dataclass(frozen=True)
class ChartSeries:
    """Arrays for the detail chart of one series, aligned on ``labels``."""

    labels: tuple[str, ...]
    """Period labels (ISO dates), history then forward."""
    demand: np.ndarray
    """Actual demand, NaN where missing or forward."""
    forecast: np.ndarray
    """Forecast at the scored lag, then the forward forecast."""
    adjusted: np.ndarray | None
    """Adjusted forward forecast (NaN outside the forward periods), or None."""
    window_start: int
    """First period of the scoring window."""
    last_actual: int
    """Last period with actuals; forward periods follow it."""
    others: tuple[tuple[str, np.ndarray], ...] = ()
    """The file's competing forecasts of the series (name, values on ``labels``), file order."""


@dataclass(frozen=True)
class ActiveAdjustment:
    """An earlier cycle's adjustment of one series that reaches into this file's forward periods.

    Periods are ISO dates of this portfolio's forward periods; every period the adjustment
    changed and that lies ahead is in exactly one of ``applied``, ``in_forecast``,
    ``replaced_now`` and ``superseded`` (all empty when it was ended).
    """

    event_id: int
    """Ledger id of the adjusting decision."""
    cycle: str
    """Cycle it was made in."""
    adjustment: str
    """Its spec as written (docs/adjustments.md)."""
    reviewer: str
    """Who made it."""
    periods: tuple[str, ...]
    """Its forward periods in this file that it changed."""
    applied: tuple[str, ...]
    """Periods whose adjusted value this cycle's export carries (``adjusted_in_cycle``)."""
    in_forecast: tuple[str, ...]
    """Periods where this file's forecast already equals the adjusted value: nothing to apply."""
    replaced_now: tuple[str, ...]
    """Periods this cycle's own adjustment of the series replaces."""
    superseded: tuple[str, ...]
    """Periods a newer earlier cycle's adjustment of the series stands for."""
    ended: AdjustmentEnd | None
    """The end in force (who ended it, when, in which cycle), or None."""

    @property
    def active(self) -> bool:
        """Whether the export of this cycle applies it to at least one period."""
        return bool(self.applied)


class BatchDecision(Protocol):
    """One decision of a batch (``triage.core.decide.BatchRow`` is one)."""

    @property
    def series(self) -> int: ...
    @property
    def outcome(self) -> str: ...
    @property
    def root_cause(self) -> str: ...
    @property
    def note(self) -> str: ...
    @property
    def adjustment(self) -> str: ...


class ReviewSession:
    """Everything the review screens need about one review cycle.

    Args:
        cycle: The review cycle opened on a portfolio, its ledger (None to review without
            saving: a read-only view) and the settings (window, season, target share,
            repeat N of M).
        reviewer: Name stored with each decision.
        record_worst_set: Store this cycle's worst-offender set in a writable ledger when the
            cycle has none yet (opening a cycle for review does; the first set stands).
        defer: Leave the background pieces (``background``) to the caller, who hands them to
            ``finish``: the review screens show the list first. Else computed here.
    """

    def __init__(
        self,
        cycle: ReviewCycle,
        *,
        reviewer: str,
        record_worst_set: bool = True,
        defer: bool = False,
    ) -> None:
        self.review_cycle = cycle
        """The cycle this session reviews: scorecard, settings and the ledger read once."""
        portfolio = self.portfolio = cycle.portfolio
        self.ledger = cycle.ledger
        self.reviewer = reviewer
        settings = cycle.settings
        self.window = settings.window
        self.season = settings.season
        self.target_share = settings.target_share
        self.cycle = cycle.name
        ranked = self.ranked = cycle.card
        """The scorecard in review order (``cycle.card``; index = position)."""
        self.error_order = cycle.error_order
        n = portfolio.n_series
        if cycle.in_position_order:
            self.position = self.error_order
        else:
            self.position = np.empty(n, dtype=np.int64)
            self.position[self.error_order] = np.arange(n)
        """Row of each series in ``ranked`` (the inverse of ``error_order``)."""
        self.priced = "abs_error_value" in ranked
        self.error = cycle.error
        flags = ranked["bias_flag"]
        self.flag = self._aligned(
            (flags == "over").to_numpy(dtype=bool).astype(np.int8)
            - (flags == "under").to_numpy(dtype=bool).astype(np.int8)
        )
        self.bias_order = _inverse_rank(cycle.by_position("bias_rank"))
        self.bias_size = np.abs(cycle.by_position("bias_value" if self.priced else "bias"))
        """|bias| over the window (value where priced): what bias order sorts by, after the flag."""
        self.bias_share, self.bias_cum = error_shares(
            np.nan_to_num(self.bias_size), self.bias_order
        )
        """Share of the portfolio's total |bias|, and the cumulative share in bias order."""
        self.fva_order = _inverse_rank(cycle.by_position("fva_rank"))
        self.fva_loss = cycle.by_position("fva_loss_value" if self.priced else "fva_loss")
        """Error the last process step added over the window (value where priced; NaN without a
        comparable cell): what fva order sorts by (``compare.last_step_loss``)."""
        self.fva_steps = last_step(portfolio, settings.season)
        """(previous, final): the process step the loss is of."""
        self.window_cols = cycle.window_cols
        self.ready = False
        """Whether the background pieces are in (``finish``): suggestions, repeat offenders,
        the search index and the stored worst set. Until then ``suggest_spec`` is empty and
        ``repeat`` all False, and whatever needs them raises ``StillComputing``."""
        # Until ``finish``: one read-only blank array for both (ten million series: 80 MB each).
        self.suggest_spec = np.full(n, "", dtype=object)
        """Suggested adjustment per series (``adjust.suggest``), ``""`` when none."""
        self.suggest_spec.flags.writeable = False
        self.suggest_reason = self.suggest_spec
        self.outcome = np.full(n, "", dtype=object)
        """Effective outcome code per series in this cycle, ``""`` when unreviewed (changed
        only by ``_set_outcome``)."""
        self.outcome.flags.writeable = False
        self._state = np.zeros(n, dtype=np.int8)
        """What each outcome means for progress (``_OPEN`` ...), kept beside ``outcome``: the
        counts and masks over a million series are then integer compares."""
        self.version = np.zeros(n, dtype=np.int64)
        """Ledger version per series in this cycle (what the next write must expect)."""
        self.decided_by = np.full(n, "", dtype=object)
        """Who recorded the series' effective decision in this cycle, ``""`` when none."""
        self.group_of = np.zeros(n, dtype=np.int64)
        """The group decision the series' effective decision in this cycle is part of (its
        ledger id), 0 when the decision is the series' own or there is none."""
        self._search: SearchIndex | None = None
        self._folded: dict[str, np.ndarray] | None = None
        self.notices: list[str] = []
        """Things the reviewer should know about this session (shown by the screens)."""
        self.worst = cycle.worst
        """This cycle's worst-offender set (the leading set covering the target share)."""
        self._record_worst = record_worst_set
        self.repeat_nm = settings.repeat
        self.times_in_worst = np.zeros(n, dtype=np.int64)
        """Cycles (of the last M) the series was in the worst-offender set."""
        self.cycles_scored = 0
        self.repeat_sources: dict[str, str] = {}
        """Per cycle counted: ``"snapshot"`` (the stored set) or ``"rescored"``."""
        self.repeat = np.zeros(n, dtype=bool)
        """Repeat offender flag per series."""
        self.past_outcome = np.full(n, "", dtype=object)
        """Latest effective outcome from an earlier cycle, ``""`` when none."""
        self.past_cycle = np.full(n, "", dtype=object)
        self.carried = np.zeros(n, dtype=bool)
        """Handed off or put off in an earlier cycle and still in the worst set."""
        self.earlier_lines = pd.DataFrame(columns=list(history.CARRIED_LINE_COLUMNS))
        """Earlier cycles' adjustment lines reaching into the forward periods, ended ones too
        (``history.carried_adjustments``); the source of ``active_adjustments``."""
        self.carries = np.zeros(n, dtype=bool)
        """Per series: an earlier cycle's adjustment is carried into this cycle's export for at
        least one period (before this cycle's own adjustments take precedence): the list
        marker."""
        self._ends: dict[int, AdjustmentEnd] = {}
        self._lines_of: dict[int, np.ndarray] = {}
        self.forward_labels = tuple(
            portfolio.calendar.label(i)
            for i in range(portfolio.last_actual + 1, len(portfolio.calendar.periods))
        )
        self.forward_dates = tuple(
            portfolio.calendar.periods[i].strftime("%Y-%m-%d")
            for i in range(portfolio.last_actual + 1, len(portfolio.calendar.periods))
        )
        if self.ledger is not None:
            self._read_ledger()
        if not defer:
            self.finish(self.background())

    # -- the pieces computed after the list is shown -------------------------------------------

    def background(self, step: Callable[[int, int, str], None] | None = None) -> Background:
        """Compute what the list can show later: the search index, suggestions, the stored
        worst set and repeat offenders (safe on a worker thread: changes nothing here but the
        ledger's worst-set snapshot; ``finish`` takes the result where the state is owned).

        Args:
            step: Called with (step done, steps, what comes next) as the work goes on.
        """
        say = step or (lambda done, total, label: None)
        say(0, 3, "search index")
        search = SearchIndex.of(self.portfolio)
        say(1, 3, "suggestions")
        ranked = self.ranked

        def column(name: str) -> np.ndarray:
            return self._aligned(ranked[name].to_numpy())

        spec, reason = adjust.suggest(
            column("bias"),
            column("demand"),
            column("forecast"),
            self.flag,
            column("bias_run"),
            column("periods"),
        )
        say(2, 3, "repeat offenders")
        notices: list[str] = []
        stored_now = self._record_worst_set(notices) if self._record_worst else False
        # Just stored: the set in hand is the stored one, no need to read it back.
        offenders = self.review_cycle.repeat_offenders(current=self.worst if stored_now else None)
        notice = history.repeat_notice(offenders) if self.ledger is not None else None
        if notice:
            notices.append(notice)
        return Background(search, spec, reason, offenders, tuple(notices))

    def finish(self, done: Background) -> None:
        """Take the background pieces in (where the state is owned); ``ready`` turns True."""
        offenders = done.offenders
        self._search = done.search
        self.suggest_spec, self.suggest_reason = done.suggest_spec, done.suggest_reason
        self.times_in_worst = offenders["times_in_worst"].to_numpy(dtype=np.int64)
        self.cycles_scored = sum(c.startswith("worst_") for c in offenders.columns)
        self.repeat_sources = dict(offenders.attrs.get("sources", {}))
        self.repeat = offenders["repeat"].to_numpy(dtype=bool)
        self.notices.extend(done.notices)
        self.ready = True

    def _require_ready(self, what: str) -> None:
        if not self.ready:
            raise StillComputing(
                f"{what} {'are' if what.endswith('s') else 'is'} still being computed.",
                hint="It is ready when the summary line stops saying 'computing'.",
            )

    def _aligned(self, values: np.ndarray) -> np.ndarray:
        """Values in review order (as in ``ranked``) aligned on portfolio position
        (``ReviewCycle.aligned``: read-only, not copied, when already in that order)."""
        return self.review_cycle.aligned(values)

    @cached_property
    def card(self) -> pd.DataFrame:
        """Scorecard aligned on portfolio index (row i = series i); built on first use."""
        return self.ranked.sort_index()

    def card_row(self, series: int) -> pd.Series:
        """The scorecard row of one series."""
        return self.ranked.iloc[int(self.position[series])]

    # -- keys ---------------------------------------------------------------------------------

    def key(self, series: int) -> tuple[str, str]:
        """``(item, location)`` of a series as the ledger stores it (location ``""`` if none)."""
        return self.portfolio.key(series)

    def find(self, item: str, location: str = "") -> int | None:
        """Portfolio index of a series by key, None when it is not in the portfolio."""
        return self.portfolio.series_index.find(item, location)

    def find_all(self, item: str, location: str = "") -> np.ndarray:
        """Series whose item (and location, when given) match, ignoring case; in key order.

        What a reviewer types to go to a series: the item alone finds it at every location.
        """
        if self._folded is None:
            keys = self.portfolio.keys
            folded = {"item": keys[schema.ITEM].astype(str).str.casefold().to_numpy(dtype=object)}
            if schema.LOCATION in keys:
                folded["location"] = (
                    keys[schema.LOCATION].astype(str).str.casefold().to_numpy(dtype=object)
                )
            self._folded = folded
        hit = self._folded["item"] == item.strip().casefold()
        if location.strip() and "location" in self._folded:
            hit &= self._folded["location"] == location.strip().casefold()
        return np.flatnonzero(hit)

    # -- ledger state -------------------------------------------------------------------------

    def reload(self) -> None:
        """Read this cycle's effective decisions and versions from the ledger."""
        self._set_outcome(slice(None), "")
        self.version[:] = 0
        self.decided_by[:] = ""
        self.group_of[:] = 0
        self.past_outcome[:] = ""
        self.past_cycle[:] = ""
        self.carried[:] = False
        self._read_ledger()

    def _read_ledger(self) -> None:
        """The ledger's decisions onto blank per-series state, as ``__init__`` makes it (at
        ten million series each clearing pass is another 80 MB written) or ``reload`` clears
        it."""
        if self.ledger is None:
            return
        versions = self.ledger.versions(self.cycle)
        if versions:
            idx = self._indexer(list(versions))
            vals = np.fromiter(versions.values(), dtype=np.int64, count=len(versions))
            ok = idx >= 0
            self.version[idx[ok]] = vals[ok]
        self.review_cycle.refresh()
        decisions = self.review_cycle.decisions()
        if decisions:
            idx = self._indexer([(d.item, d.location) for d in decisions])
            outcomes = np.array([d.outcome for d in decisions], dtype=object)
            reviewers = np.array([d.reviewer for d in decisions], dtype=object)
            ok = idx >= 0
            self._set_outcome(idx[ok], outcomes[ok])
            self.decided_by[idx[ok]] = reviewers[ok]
            groups = np.array([d.group_id or 0 for d in decisions], dtype=np.int64)
            self.group_of[idx[ok]] = groups[ok]
        self._reload_earlier_cycles()

    def _reload_earlier_cycles(self) -> None:
        """Earlier cycles' outcomes, carried-over series and still-active adjustments (onto
        blank state: see ``_read_ledger``)."""
        earlier = self.review_cycle.log.before(self.cycle)
        if earlier:
            # Oldest cycle first, so the latest decision per series is written last.
            idx = self._indexer([(d.item, d.location) for d in earlier])
            ok = idx >= 0
            self.past_outcome[idx[ok]] = np.array([d.outcome for d in earlier], dtype=object)[ok]
            self.past_cycle[idx[ok]] = np.array([d.cycle for d in earlier], dtype=object)[ok]
            carried = self.review_cycle.carried_over
            self.carried[carried["series"].to_numpy(dtype=np.int64)] = True
        self._reload_carried()

    def _reload_carried(self) -> None:
        """Earlier cycles' adjustments reaching into this file's forward periods, and ends."""
        self._ends = dict(self.review_cycle.log.ends)
        self.earlier_lines = self.review_cycle.carried_lines
        self._derive_carried()

    def _derive_carried(self) -> None:
        """Standing lines, per-series index and the list marker, from ``earlier_lines``."""
        lines = self.earlier_lines
        if len(lines):
            ended = lines["event_id"].isin(list(self._ends)).to_numpy(dtype=bool)
            lines = lines.assign(ended=ended)
            lines["standing"] = history.standing_lines(lines)
            self.earlier_lines = lines
        series = lines["series"].to_numpy(dtype=np.int64)
        self._lines_of = (
            {int(k): v for k, v in pd.Series(np.arange(len(lines))).groupby(series).groups.items()}
            if len(lines)
            else {}
        )
        self.carries[:] = False
        live = lines["standing"].to_numpy(dtype=bool) & ~lines["in_forecast"].to_numpy(dtype=bool)
        self.carries[series[live]] = True

    def _record_worst_set(self, notices: list[str]) -> bool:
        """Keep the worst-offender set this list shows, once per cycle, in a writable ledger.

        A ledger that cannot take it (busy, disk full) costs the snapshot, never the session:
        the reason is added to ``notices`` and repeat offenders re-score this cycle.

        Args:
            notices: Where the reason goes when it is not stored.

        Returns:
            Whether this call stored it (False: stored before, or not storable).
        """
        if not self.can_save:
            return False
        assert self.ledger is not None
        members = self.error_order[self.worst[self.error_order]]
        keys = self.portfolio.keys
        items = keys[schema.ITEM].to_numpy(dtype=object)[members]
        if schema.LOCATION in keys:
            locations = keys[schema.LOCATION].to_numpy(dtype=object)[members]
        else:
            locations = np.full(len(members), "", dtype=object)
        try:
            return self.ledger.record_worst_set(
                self.cycle,
                items.tolist(),
                locations.tolist(),
                reviewer=self.reviewer,
                portfolio_name=self.portfolio.path.name,
                portfolio_fingerprint=self.portfolio.fingerprint,
                target_share=self.target_share,
                window=self.window,
                season=self.season,
                ranked_by="value" if self.priced else "units",
                series=self.portfolio.n_series,
            )
        except ledger_mod.LedgerError as exc:
            notices.append(
                f"This cycle's worst-offender set was not stored ({exc}); repeat offenders "
                "re-score it."
            )
            return False

    def _indexer(self, pairs: list[tuple[str, str]]) -> np.ndarray:
        return self.portfolio.series_index.positions([p[0] for p in pairs], [p[1] for p in pairs])

    @property
    def can_save(self) -> bool:
        """Whether decisions can be saved (a writable ledger is open)."""
        return self.ledger is not None and not self.ledger.read_only

    def _require_ledger(self) -> Ledger:
        if self.ledger is None:
            raise ledger_mod.LedgerReadOnlyError(
                "no ledger is open, so decisions cannot be saved.", path="(none)"
            )
        return self.ledger

    def commit_decision(
        self,
        series: int,
        *,
        outcome: str,
        root_cause: str,
        note: str = "",
        adjustment: str | None = None,
        expected_version: int | None = None,
    ) -> Event:
        """Save a decision durably; returns the event. In-memory state is not touched.

        Args:
            series: Portfolio index of the series.
            outcome: Outcome code.
            root_cause: Root-cause code.
            note: Free text.
            adjustment: Adjustment spec as typed, or None.
            expected_version: The series' version the reviewer decided on (see
                ``current_decision``); default the version this session last saw.

        Raises:
            DecisionError, StaleDecisionError, LedgerBusyError, LedgerWriteError,
            LedgerReadOnlyError, AdjustError: nothing was saved.
        """
        ledger = self._require_ledger()
        item, location = self.key(series)
        lines = None
        spec = None
        if adjustment:
            result = self.preview(series, adjustment)
            spec = str(result.adjustment)
            lines = result.lines(self.forward_dates)
        return ledger.record(
            self.cycle,
            item,
            location,
            outcome=outcome,
            root_cause=root_cause,
            note=note,
            reviewer=self.reviewer,
            adjustment=spec,
            lines=lines,
            portfolio_name=self.portfolio.path.name,
            portfolio_fingerprint=self.portfolio.fingerprint,
            expected_version=int(
                self.version[series] if expected_version is None else expected_version
            ),
        )

    def commit_batch(self, rows: Sequence[BatchDecision]) -> list[Event]:
        """Save many decisions in one transaction (all or none); in-memory state is not touched.

        Each row goes through ``commit_decision``, the path the review screens use.

        Raises:
            as ``commit_decision``: nothing was saved.
        """
        ledger = self._require_ledger()
        events = []
        with ledger.batch(f"{len(rows):,} decisions"):
            for row in rows:
                events.append(
                    self.commit_decision(
                        row.series,
                        outcome=row.outcome,
                        root_cause=row.root_cause,
                        note=row.note,
                        adjustment=row.adjustment or None,
                    )
                )
        return events

    def commit_undo(self, series: int, *, expected_version: int | None = None) -> Event:
        """Append an undo of the series' effective decision; in-memory state is not touched."""
        ledger = self._require_ledger()
        item, location = self.key(series)
        return ledger.undo(
            self.cycle,
            item,
            location,
            reviewer=self.reviewer,
            expected_version=int(
                self.version[series] if expected_version is None else expected_version
            ),
            portfolio_name=self.portfolio.path.name,
            portfolio_fingerprint=self.portfolio.fingerprint,
        )

    def commit_end_adjustment(self, series: int, event_id: int, note: str = "") -> AdjustmentEnd:
        """End an earlier cycle's adjustment of the series (``Ledger.end_adjustment``).

        From this cycle on the adjustment is no longer carried into exports. In-memory state is
        not touched; pass the result to ``apply_end``.

        Raises:
            DecisionError, LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was
                saved.
        """
        ledger = self._require_ledger()
        return ledger.end_adjustment(
            self.cycle, *self.key(series), target=event_id, **self._signed(note)
        )

    def commit_restore_adjustment(self, series: int, end_id: int, note: str = "") -> AdjustmentEnd:
        """Revert an end recorded for the series (``Ledger.restore_adjustment``).

        Raises:
            DecisionError, LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was
                saved.
        """
        ledger = self._require_ledger()
        return ledger.restore_adjustment(
            self.cycle, *self.key(series), end=end_id, **self._signed(note)
        )

    def _signed(self, note: str) -> dict[str, str]:
        """Who ends or restores, why, and on which file: what the ledger records with it."""
        return {
            "reviewer": self.reviewer,
            "note": note,
            "portfolio_name": self.portfolio.path.name,
            "portfolio_fingerprint": self.portfolio.fingerprint,
        }

    def apply_end(self, record: AdjustmentEnd) -> int | None:
        """Bring the in-memory state in line with a committed end or restore; returns its series.

        Works on the lines already in memory: no re-reading of the ledger or the portfolio.
        """
        series = self.find(record.item, record.location)
        if record.cycle > self.cycle:
            return series
        if record.kind == ledger_mod.END:
            self._ends[record.target] = record
        else:
            self._ends.pop(record.target, None)
        self._derive_carried()
        return series

    def active_adjustments(self, series: int) -> list[ActiveAdjustment]:
        """Earlier cycles' adjustments of the series reaching into this file's forward periods.

        Oldest cycle first, ended ones included (``ended`` set). A period this cycle's own
        adjustment covers is ``replaced_now`` (that decision takes precedence); the rest follow
        ``history.carried_adjustments``.
        """
        rows = self._lines_of.get(series)
        if rows is None or not len(rows):
            return []
        lines = self.earlier_lines.iloc[np.asarray(rows, dtype=np.int64)]
        now = self._adjusted_now(series)
        out = []
        for event_id, part in lines.groupby("event_id", sort=False):
            periods = part["period"].to_numpy(dtype=object).astype(str)
            standing = part["standing"].to_numpy(dtype=bool)
            already = part["in_forecast"].to_numpy(dtype=bool)
            replaced = np.isin(periods, list(now))
            ended = self._ends.get(int(event_id))
            first = part.iloc[0]

            def pick(mask: np.ndarray, periods: np.ndarray = periods) -> tuple[str, ...]:
                return tuple(sorted(periods[mask].tolist()))

            live = standing & (ended is None)
            out.append(
                ActiveAdjustment(
                    event_id=int(event_id),
                    cycle=str(first["cycle"]),
                    adjustment=str(first["adjustment"]),
                    reviewer=str(first["reviewer"]),
                    periods=tuple(sorted(periods.tolist())),
                    applied=pick(live & ~already & ~replaced),
                    in_forecast=pick(live & already & ~replaced),
                    replaced_now=pick(live & replaced),
                    superseded=pick(~standing & (ended is None)),
                    ended=ended,
                )
            )
        return sorted(out, key=lambda a: (a.cycle, a.event_id))

    def carried_forward(self, series: int) -> np.ndarray | None:
        """The series' forward forecast as this cycle's export carries earlier adjustments.

        NaN where no earlier adjustment is applied; None when none is. This cycle's own
        adjustment takes precedence over every carried value.
        """
        rows = self._lines_of.get(series)
        if rows is None or not len(rows):
            return None
        lines = self.earlier_lines.iloc[np.asarray(rows, dtype=np.int64)]
        live = lines["standing"].to_numpy(dtype=bool) & ~lines["in_forecast"].to_numpy(dtype=bool)
        now = self._adjusted_now(series)
        live &= ~np.isin(lines["period"].to_numpy(dtype=object).astype(str), list(now))
        if not live.any():
            return None
        out = np.full(self.portfolio.forecast.shape[1] - self.portfolio.last_actual - 1, np.nan)
        cols = lines["column"].to_numpy(dtype=np.int64)[live] - self.portfolio.last_actual - 1
        out[cols] = lines["adjusted"].to_numpy(dtype=np.float64)[live]
        return out

    def _adjusted_now(self, series: int) -> set[str]:
        """Periods this cycle's effective decision of the series adjusts (empty when none)."""
        if self.outcome[series] != vocabulary.ADJUSTED or self.ledger is None:
            return set()
        item, location = self.key(series)
        events = self.ledger.history(cycle=self.cycle, item=item, location=location)
        undone = {e.undoes for e in events if e.kind == ledger_mod.UNDO}
        standing = [e for e in events if e.kind == ledger_mod.DECISION and e.id not in undone]
        if not standing or standing[-1].outcome != vocabulary.ADJUSTED:
            return set()
        return {ln.period for ln in standing[-1].lines}

    def _set_outcome(self, rows: int | slice | np.ndarray, outcomes: str | np.ndarray) -> None:
        """The one place outcomes change: the codes and their progress state together
        (``outcome`` is read-only elsewhere)."""
        self.outcome.flags.writeable = True
        try:
            self.outcome[rows] = outcomes
        finally:
            self.outcome.flags.writeable = False
        if isinstance(outcomes, str):
            # One code for every row (a reload clears a million): its state, once.
            self._state[rows] = _states(np.array([outcomes], dtype=object))[0]
            return
        now = self.outcome[rows]
        states = _states(np.atleast_1d(np.asarray(now, dtype=object)))
        self._state[rows] = states if np.ndim(now) else states[0]

    def reviewed(self) -> np.ndarray:
        """Per series: does it have a decision in this cycle?"""
        done: np.ndarray = self._state != _OPEN
        return done

    def apply_event(self, event: Event) -> int | None:
        """Bring the in-memory state in line with a committed event; returns its series."""
        series = self.find(event.item, event.location)
        if series is None or event.cycle != self.cycle:
            return series
        self.version[series] = max(int(self.version[series]), event.version)
        if event.kind == ledger_mod.DECISION:
            self._set_outcome(series, event.outcome or "")
            self.decided_by[series] = event.reviewer
            self.group_of[series] = event.group_id or 0
        else:
            standing, _ = self.current_decision(series)
            self._set_outcome(series, (standing.outcome or "") if standing else "")
            self.decided_by[series] = standing.reviewer if standing else ""
            self.group_of[series] = (standing.group_id or 0) if standing else 0
        return series

    def refresh_series(self, series: int) -> None:
        """Read the series' state in this cycle again from the ledger (after another session
        wrote it): outcome, who decided, and the version the next write must expect."""
        standing, version = self.current_decision(series)
        self.version[series] = version
        self._set_outcome(series, (standing.outcome or "") if standing else "")
        self.decided_by[series] = standing.reviewer if standing else ""
        self.group_of[series] = (standing.group_id or 0) if standing else 0

    def current_decision(self, series: int) -> tuple[Event | None, int]:
        """The series' effective decision in this cycle as the ledger holds it now.

        Read from the file, not from this session's memory, so a decision recorded in an
        earlier session or by another reviewer is found. Reads only the series' own events.

        Returns:
            The latest decision event not undone (None when there is none) and the series'
            current version in the cycle (what a write based on this reading must expect).
        """
        if self.ledger is None:
            return None, 0
        item, location = self.key(series)
        events = self.ledger.history(cycle=self.cycle, item=item, location=location)
        undone = {e.undoes for e in events if e.kind == ledger_mod.UNDO}
        standing = [e for e in events if e.kind == ledger_mod.DECISION and e.id not in undone]
        version = events[-1].version if events else 0
        return (standing[-1] if standing else None), version

    # -- group decisions (docs/ledger.md, "Group decisions") ------------------------------------

    @cached_property
    def split_decimals(self) -> int:
        """Precision a group's split is made at: the export's default (``rounding.DEFAULT``,
        the decimals the file's forward forecast uses), so the exported series sum exactly to
        the group's adjusted total."""
        p = self.portfolio
        return rounding.decimals_for(rounding.DEFAULT, p.forecast[:, p.last_actual + 1 :])

    def preview_group(
        self, members: Sequence[int] | np.ndarray, spec: str, *, basis: str = split.FORECASTS
    ) -> split.GroupSplit:
        """What ``spec`` on the group's total would do to each member (nothing is saved).

        Args:
            members: Portfolio positions of the group's series, in the group's order.
            spec: The adjustment, in the series syntax (docs/adjustments.md).
            basis: How an absolute adjustment is split (``split.FORECASTS`` or
                ``split.HISTORY``).

        Raises:
            AdjustSyntaxError, AdjustError, TriageError: The spec has no meaning for the group.
        """
        rows = np.asarray(members, dtype=np.int64)
        p = self.portfolio
        ahead = p.last_actual + 1
        cols = np.asarray(self.window_cols, dtype=np.int64)
        return split.split(
            adjust.parse(spec),
            p.forecast[rows, ahead:],
            recent_actuals=p.demand[rows, :ahead],
            window_demand=p.demand[np.ix_(rows, cols)],
            window_forecast=p.forecast[np.ix_(rows, cols)],
            decimals=self.split_decimals,
            basis=basis,
            price=None if p.price is None else p.price[rows, ahead:],
            alternatives={name: values[rows, ahead:] for name, values in p.competing.items()},
        )

    def commit_group_decision(
        self,
        members: Sequence[int] | np.ndarray,
        *,
        by: Sequence[str],
        key_values: Sequence[object],
        outcome: str,
        root_cause: str,
        note: str = "",
        spec: str | None = None,
        basis: str = split.FORECASTS,
        expected_versions: Sequence[int] | np.ndarray | None = None,
    ) -> GroupRecord:
        """Save one decision on a group durably, split to its series; returns the record.

        In-memory state is not touched (like ``commit_decision``): pass the record to
        ``apply_group`` where the state is owned.

        Args:
            members: Portfolio positions of the group's series.
            by: The grouping columns.
            key_values: The group's value of each.
            outcome: Outcome code, for every member.
            root_cause: Root-cause code.
            note: Free text.
            spec: The adjustment of the group's total as typed (with ``adjusted`` only).
            basis: How an absolute adjustment is split.
            expected_versions: Each member's version the reviewer decided on; default the
                versions this session last saw.

        Raises:
            DecisionError, StaleDecisionError, LedgerBusyError, LedgerWriteError,
            LedgerReadOnlyError, AdjustError, TriageError: nothing was saved.
        """
        ledger = self._require_ledger()
        rows = np.asarray(members, dtype=np.int64)
        lines: dict[str, object] = {}
        if spec and spec.strip():
            result = self.preview_group(rows, spec, basis=basis)
            lo, hi = result.total.first - 1, result.total.last
            lines = {
                "adjustment": str(result.total.adjustment),
                "basis": basis,
                "periods": self.forward_dates[lo:hi],
                "original": result.original[:, lo:hi].tolist(),
                "adjusted": result.adjusted[:, lo:hi].tolist(),
            }
        keys = self.portfolio.keys
        items = keys[schema.ITEM].to_numpy(dtype=object)[rows]
        if schema.LOCATION in keys:
            locations = keys[schema.LOCATION].to_numpy(dtype=object)[rows]
        else:
            locations = np.full(len(rows), "", dtype=object)
        versions = self.version[rows] if expected_versions is None else expected_versions
        return ledger.record_group(
            self.cycle,
            columns=tuple(by),
            key_values=tuple(str(v) for v in key_values),
            items=[str(i) for i in items],
            locations=[str(loc) for loc in locations],
            expected_versions=[int(v) for v in versions],
            outcome=outcome,
            root_cause=root_cause,
            note=note,
            reviewer=self.reviewer,
            portfolio_name=self.portfolio.path.name,
            portfolio_fingerprint=self.portfolio.fingerprint,
            **lines,  # type: ignore[arg-type]
        )

    def commit_group_undo(self, group_id: int, note: str = "") -> GroupRecord:
        """Undo a group decision of this cycle whole (``Ledger.undo_group``); in-memory state is
        not touched: pass the record to ``apply_group``."""
        ledger = self._require_ledger()
        return ledger.undo_group(self.cycle, group_id, **self._signed(note))

    def apply_group(self, record: GroupRecord) -> np.ndarray:
        """Bring the in-memory state in line with a committed group decision or group undo;
        returns the portfolio positions of the series it wrote for."""
        idx = self._indexer(list(zip(record.items, record.locations, strict=True)))
        rows = idx[idx >= 0]
        if record.cycle != self.cycle or not len(rows):
            return rows
        versions = np.asarray(record.versions, dtype=np.int64)[idx >= 0]
        self.version[rows] = np.maximum(self.version[rows], versions)
        if record.kind == ledger_mod.DECISION:
            self._set_outcome(rows, record.outcome or "")
            self.decided_by[rows] = record.reviewer
            self.group_of[rows] = record.id
            return rows
        # An undo: each series is back to its decision before the group's (one read).
        ledger = self._require_ledger()
        standing = ledger.current(self.cycle)
        where = self._indexer([(d.item, d.location) for d in standing])
        outcome = np.full(self.portfolio.n_series, "", dtype=object)
        by = np.full(self.portfolio.n_series, "", dtype=object)
        group = np.zeros(self.portfolio.n_series, dtype=np.int64)
        found = where >= 0
        outcome[where[found]] = np.array([d.outcome for d in standing], dtype=object)[found]
        by[where[found]] = np.array([d.reviewer for d in standing], dtype=object)[found]
        group[where[found]] = np.array([d.group_id or 0 for d in standing], np.int64)[found]
        self._set_outcome(rows, outcome[rows])
        self.decided_by[rows], self.group_of[rows] = by[rows], group[rows]
        return rows

    def canonical_adjustment(self, series: int, spec: str) -> str:
        """``spec`` as the ledger would store it (``""`` when empty).

        Raises:
            AdjustSyntaxError, AdjustError: The spec is not valid for this series.
        """
        if not spec.strip():
            return ""
        return str(self.preview(series, spec).adjustment)

    def history(self, series: int) -> list[Event]:
        """Every ledger event of the series, all cycles, oldest first."""
        if self.ledger is None:
            return []
        item, location = self.key(series)
        return self.ledger.history(item=item, location=location)

    # -- ordering and filtering ---------------------------------------------------------------

    def _search_index(self) -> SearchIndex:
        if self._search is None:
            self._require_ready("The search index")
        assert self._search is not None
        return self._search

    def filter_values(self, field: str) -> list[str]:
        """Distinct values a field can be filtered on, sorted."""
        return sorted(set(self._field(field).tolist()))

    def filter_fields(self) -> tuple[str, ...]:
        """Every field ``order`` accepts in ``filters``."""
        extra = tuple(c for c in self.portfolio.key_columns[1:])
        return extra + tuple(self.portfolio.attributes) + FILTER_FIELDS

    def _field(self, field: str) -> np.ndarray:
        values: np.ndarray
        if field == "pattern":
            return self._aligned(self.ranked["pattern"].to_numpy(dtype=object))
        if field == "flag":
            flags = self._aligned(self.ranked["bias_flag"].to_numpy(dtype=object))
            return np.where(flags == "", "none", flags)
        if field == "outcome":
            return np.where(self.outcome == "", UNREVIEWED, self.outcome)
        if field == "repeat":
            self._require_ready("Repeat offenders")
            return np.where(self.repeat, "yes", "no")
        if field == "carried":
            return np.where(self.carried, "yes", "no")
        if field in self.portfolio.keys.columns:
            values = self.portfolio.keys[field].to_numpy(dtype=object)
            return values
        raise KeyError(field)

    def order(
        self,
        by: str = BY_ERROR,
        *,
        text: str = "",
        filters: dict[str, str] | None = None,
    ) -> np.ndarray:
        """Portfolio indices to show, in order: error, bias or fva order, filtered.

        Series handed off or put off in an earlier cycle and still in the worst set come first
        while they have no decision in this cycle.

        Args:
            by: ``"error"``, ``"bias"`` or ``"fva"`` (``ranking.ORDERS``).
            text: Case-insensitive substring of the key or any attribute.
            filters: Field -> exact value (see ``filter_fields``).
        """
        orders: dict[str, np.ndarray] = {BY_BIAS: self.bias_order, BY_FVA: self.fva_order}
        base = orders.get(by, self.error_order)
        keep = np.ones(self.portfolio.n_series, dtype=bool)
        if text:
            keep &= self._search_index().matches(text)
        for field, value in (filters or {}).items():
            keep &= self._field(field) == value
        shown: np.ndarray = base if keep.all() else base[keep[base]]
        first = self.carried & (self._state == _OPEN)
        if first.any():
            shown = history.carried_first(shown, np.flatnonzero(first))
        return shown

    def next_unreviewed(self, order: np.ndarray, after: int) -> int | None:
        """Position in ``order`` of the first unreviewed series after position ``after``."""
        pending = self._state[order] == _OPEN
        later = np.flatnonzero(pending[after + 1 :])
        if len(later):
            return int(after + 1 + later[0])
        earlier = np.flatnonzero(pending[: after + 1])
        return int(earlier[0]) if len(earlier) else None

    def progress(self) -> Progress:
        """Series settled and the share of total error they hold, against the target.

        Handed-off and put-off series are counted apart: they still need someone's review.
        """
        done = self._state == _SETTLED
        total = float(self.error.sum())
        covered = float(self.error[done].sum()) / total if total > 0 else math.nan
        to_target = 0
        if total > 0 and covered < self.target_share:
            remaining = self.error_order[~done[self.error_order]]
            need = self.target_share * total - float(self.error[done].sum())
            cum = np.cumsum(self.error[remaining])
            to_target = int(np.searchsorted(cum, need - 1e-9 * total) + 1)
            to_target = min(to_target, len(remaining))
        return Progress(
            reviewed=int(done.sum()),
            series=self.portfolio.n_series,
            covered=covered,
            target=self.target_share,
            to_target=to_target,
            handed_off=int(np.count_nonzero(self._state == _HANDED_OFF)),
            deferred=int(np.count_nonzero(self._state == _DEFERRED)),
        )

    def totals(self) -> dict[str, float]:
        """Portfolio totals over the window (see ``output.totals``)."""
        from triage.core.output import totals

        return totals(self.ranked)

    # -- one series ---------------------------------------------------------------------------

    def forward(self, series: int) -> np.ndarray:
        """The series' forward forecast by horizon."""
        return self.portfolio.forecast[series, self.portfolio.last_actual + 1 :]

    def preview(self, series: int, spec: str) -> adjust.AdjustResult:
        """What ``spec`` would do to the series' forward forecast (nothing is saved).

        Raises:
            AdjustSyntaxError, AdjustError: The spec is not valid for this series.
        """
        p = self.portfolio
        cols = self.window_cols
        price = None
        if p.price is not None:
            price = p.price[series, p.last_actual + 1 :]
        return adjust.apply(
            adjust.parse(spec),
            self.forward(series),
            recent_actuals=p.demand[series, : p.last_actual + 1],
            window_demand=p.demand[series, cols],
            window_forecast=p.forecast[series, cols],
            price=price,
            # The other forecasts' forward values, for ``use NAME`` (views, nothing copied).
            alternatives={
                name: values[series, p.last_actual + 1 :] for name, values in p.competing.items()
            },
        )

    def chart(self, series: int, adjusted: np.ndarray | None = None) -> ChartSeries:
        """Demand, forecast and adjusted forward values of one series.

        ``adjusted`` is a preview; without one, the earlier cycles' adjustments this cycle's
        export carries are shown (``carried_forward``), if any.
        """
        p = self.portfolio
        labels = tuple(p.calendar.label(i) for i in range(len(p.calendar.periods)))
        adj = None
        if adjusted is None:
            # Without a preview, the earlier adjustments this cycle's export carries.
            adjusted = self.carried_forward(series)
        if adjusted is not None:
            adj = np.full(len(labels), np.nan)
            adj[p.last_actual + 1 :] = adjusted
        return ChartSeries(
            labels=labels,
            demand=p.demand[series],
            forecast=p.forecast[series],
            adjusted=adj,
            window_start=int(self.window_cols[0]),
            last_actual=p.last_actual,
            others=tuple((name, values[series]) for name, values in p.competing.items()),
        )

    def forecast_scores(self, series: int) -> tuple[compare.SeriesScore, ...]:
        """Each forecast of the series (the file's, the competing ones, naive) on the same
        window cells: what ``triage compare --by-series`` counts. Empty without competing
        forecasts or when one is named like a built-in (``compare`` says why)."""
        if not self.portfolio.competing:
            return ()
        try:
            return compare.series_scores(self.portfolio, series, self.window_cols, self.season)
        except TriageError:
            return ()

    def forecasts_line(self, series: int) -> str:
        """The metrics card's line on competing forecasts, e.g.
        ``forecasts on the same 13 weeks, WAPE / bias: forecast 23% +12% · stat 18% -2%``
        (``""`` without competing forecasts)."""
        scores = self.forecast_scores(series)
        if not scores:
            return ""
        cells = scores[0].cells
        unit = "week" if self.portfolio.calendar.freq == schema.WEEKLY else "month"
        if cells == 0:
            return f"forecasts: no {unit} of the window has demand and every forecast"
        parts = [
            f"{s.name} {percent(s.wape, 0, missing='-')} "
            f"{percent(s.bias_pct, 0, signed=True, missing='-')}"
            for s in scores
        ]
        return (
            f"forecasts on the same {cells} {unit}{'' if cells == 1 else 's'}, WAPE / bias: "
            + " · ".join(parts)
        )

    def describe(self, series: int) -> str:
        """The metrics card in words, e.g. ``over-forecast by 23% over 13 weeks, 9 running``."""
        row = self.card_row(series)
        unit = "weeks" if self.portfolio.calendar.freq == schema.WEEKLY else "months"
        periods = int(row["periods"])
        if periods == 0:
            return "no period in the window has both demand and a forecast"
        parts = []
        bias_pct = row["bias_pct"]
        if isinstance(bias_pct, float) and not math.isnan(bias_pct):
            direction = "over" if bias_pct > 0 else "under"
            parts.append(
                f"{direction}-forecast by {abs(bias_pct) * 100:.0f}% over {periods} {unit}"
            )
        else:
            parts.append(
                f"bias {row['bias']:+,.0f} units over {periods} {unit} (no positive demand)"
            )
        run = int(row["bias_run"])
        if abs(run) >= 2:
            parts.append(f"{abs(run)} {unit} running {'over' if run > 0 else 'under'}")
        if row["bias_flag"]:
            parts.append(f"persistent ({'sign test p = ' + format(row['bias_pvalue'], '.3f')})")
        share = row["error_share"]
        if isinstance(share, float) and not math.isnan(share):
            parts.append(f"{share * 100:.1f}% of portfolio error (rank {int(row['rank'])})")
        return "; ".join(parts)

    def override_value(self) -> tuple[dict[str, pd.DataFrame], dict[str, float]]:
        """Realised value of past overrides by grouping, and the portfolio's FVA over naive.

        Returns:
            ``{grouping: history.summarise(...)}`` for every grouping in ``history.GROUPINGS``
            (empty frames without a ledger or realised lines), and ``history.portfolio_fva``
            (empty on a stored scorecard: it needs every series' history).
        """
        # Read afresh (this runs on a worker thread): the decisions saved until now count.
        fresh = self.review_cycle.reread()
        tables = {by: history.summarise(fresh.realised, by) for by in history.GROUPINGS}
        if fresh.actual_cols is not None:
            return tables, {}
        return tables, fresh.fva

    def across_cycles(self, series: int) -> list[str]:
        """Lines about the series' earlier cycles: adjustments still carried first (they change
        this cycle's export), then repeat offender and the last earlier decision."""
        lines = list(self.active_lines(series))
        n, m = self.repeat_nm
        times = int(self.times_in_worst[series])
        if not self.ready:
            lines.append("worst-offender set in earlier cycles: still computing…")
        elif self.cycles_scored:
            mark = "repeat offender: " if self.repeat[series] else ""
            rescored = sum(how == history.RESCORED for how in self.repeat_sources.values())
            notes = [f"flag at {n} of {m}"] if self.repeat[series] else []
            if rescored and self.ledger is not None:
                notes.append(f"{rescored} re-scored, no stored set")
            lines.append(
                f"{mark}in the worst-offender set {times} of the last {self.cycles_scored} cycles"
                + (f" ({'; '.join(notes)})" if notes else "")
            )
        if self.past_outcome[series]:
            carried = " and still in the worst set: carried over" if self.carried[series] else ""
            outcome = vocabulary.outcome_label(self.past_outcome[series]).lower()
            lines.append(f"last decided {self.past_cycle[series]}: {outcome}{carried}")
        return lines

    def active_lines(self, series: int) -> list[str]:
        """One line per earlier adjustment reaching into this cycle (``active_adjustments``)."""
        out = []
        for a in self.active_adjustments(series):
            head = f"adjustment from {a.cycle} ({a.adjustment}, by {a.reviewer})"
            if a.ended is not None:
                out.append(
                    f"{head}: ended by {a.ended.reviewer} at {a.ended.recorded_at} "
                    f"(cycle {a.ended.cycle}); not carried"
                )
                continue
            parts = []
            if a.applied:
                parts.append(
                    f"carried into this cycle's export for {_count(a.applied, 'period')} "
                    f"({_span(a.applied)})"
                )
            if a.in_forecast:
                parts.append(
                    f"already in this file's forecast for {_count(a.in_forecast, 'period')}"
                    f" ({_span(a.in_forecast)})"
                )
            if a.replaced_now:
                parts.append(
                    f"replaced by this cycle's adjustment for {_count(a.replaced_now, 'period')}"
                )
            if a.superseded:
                parts.append(
                    f"a later cycle's adjustment stands for {_count(a.superseded, 'period')}"
                )
            label = "active " if a.active else ""
            out.append(f"{label}{head}: " + "; ".join(parts))
        return out


def _count(periods: tuple[str, ...], word: str) -> str:
    return f"{len(periods)} {word}{'' if len(periods) == 1 else 's'}"


def _span(periods: tuple[str, ...]) -> str:
    return periods[0] if len(periods) == 1 else f"{periods[0]} .. {periods[-1]}"
