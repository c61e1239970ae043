"""One review cycle: a portfolio, its ledger and the settings, opened once and read once.

Everything that looks at a cycle (the review screens' session, the report, the export, the
``overrides`` command) takes a ``ReviewCycle`` and reads what it needs from it:

* the scorecard and the scoring window (``ranking.scorecard``, ``metrics.window_columns``);
* the worst-offender set (the leading set covering the target share);
* the decision log, read from the ledger once (``history.DecisionLog``), and every effective
  adjustment line located in the portfolio through its one series index
  (``Portfolio.series_index``), with its status;
* what follows from those lines: realised override value, active and carried adjustments, the
  override in force per forward period (the value also against the statistical forecast, when
  the file has one); carried-over series, coverage, decision counts, repeat
  offenders and the portfolio's forecast value added.

Each piece is computed on first use and kept (``functools.cached_property``); ``refresh`` drops
what depends on the ledger after decisions were written.
"""

from __future__ import annotations

from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from triage.core import history, metrics
from triage.core.ledger import Decision, Ledger
from triage.core.portfolio import Portfolio
from triage.core.ranking import scorecard
from triage.core.settings import ScoreSettings

if TYPE_CHECKING:
    from triage.core.on_demand import ScorecardReview

#: The cached pieces computed from the portfolio and settings alone.
_SCORING = ("card", "window_cols", "error", "error_order", "worst", "fva")
#: The cached pieces that are read from, or derived from, the ledger.
_FROM_LEDGER = (
    "log",
    "lines",
    "realised",
    "line_status",
    "active",
    "forward_overrides",
    "carried_lines",
    "carried_over",
    "coverage",
    "decision_counts",
)


class ReviewCycle:
    """A portfolio's review cycle with its ledger and settings.

    Args:
        portfolio: The portfolio under review.
        ledger: Its decision ledger, or None (no decisions: every ledger figure is empty).
        settings: How the portfolio is scored (window, season, target share, repeat N of M).
        name: The review cycle (ISO date); default the portfolio's cycle (its latest actual).
            An export of an earlier cycle names it; adjustment ends count as of this cycle.
        card: The portfolio's scorecard at these settings, when it is at hand (the reopen
            cache, ``triage.core.cache``; a stored scorecard); else computed on first use.
        actual_cols: The calendar columns with any actual demand, when the histories are not
            in memory (a review on a stored scorecard, ``triage.core.on_demand``): the window
            is taken from them, and repeat offenders count the ledger's stored worst sets only.
    """

    def __init__(
        self,
        portfolio: Portfolio,
        ledger: Ledger | None = None,
        settings: ScoreSettings | None = None,
        *,
        name: str | None = None,
        card: pd.DataFrame | None = None,
        actual_cols: np.ndarray | None = None,
    ) -> None:
        self.portfolio = portfolio
        self.ledger = ledger
        self.settings = settings or ScoreSettings()
        self.name = portfolio.cycle if name is None else name
        self.actual_cols = actual_cols
        if card is not None:
            self.__dict__["card"] = card

    @classmethod
    def on_scorecard(cls, review: ScorecardReview, ledger: Ledger | None) -> ReviewCycle:
        """The cycle of a dataset reviewed on its stored scorecard (``on_demand.open_review``):
        its window from the dataset's periods with actuals, its repeat offenders from the
        ledger's stored worst sets, the histories fetched on demand."""
        return cls(
            review.portfolio,
            ledger,
            review.settings,
            card=review.card,
            actual_cols=review.histories.plan.actual_cols,
        )

    # -- scoring ------------------------------------------------------------------------------

    @cached_property
    def card(self) -> pd.DataFrame:
        """The scorecard in review order (largest error share first); index = position."""
        return scorecard(self.portfolio, self.settings.window, self.settings.season)

    @cached_property
    def window_cols(self) -> np.ndarray:
        """Calendar columns of the scoring window."""
        p = self.portfolio
        if self.actual_cols is not None:
            return np.asarray(self.actual_cols[-self.settings.window :], dtype=np.int64)
        return metrics.window_columns(p.demand, p.last_actual, self.settings.window)

    @property
    def priced(self) -> bool:
        """Whether errors rank in value (the portfolio has prices)."""
        return self.portfolio.price is not None

    @cached_property
    def error(self) -> np.ndarray:
        """Absolute error per series (value where priced), by position: what ranking sorts."""
        return self.by_position("abs_error_value" if self.priced else "abs_error")

    @cached_property
    def error_order(self) -> np.ndarray:
        """Positions in review order (largest error first): the scorecard's index."""
        order: np.ndarray = self.card.index.to_numpy(dtype=np.int64)
        return order

    @cached_property
    def in_position_order(self) -> bool:
        """Whether the scorecard's rows are already in position order (row i = series i): a
        stored scorecard reviewed as written (``on_demand.open_review``)."""
        index = self.card.index
        return (
            isinstance(index, pd.RangeIndex)
            and index.start == 0
            and index.step == 1
            and len(index) == self.portfolio.n_series
        )

    def aligned(self, values: np.ndarray) -> np.ndarray:
        """Values in review order (as in ``card``) aligned on portfolio position.

        One scatter through the scorecard's index; none when the card is in position order
        (the values are then returned read-only, not copied: at ten million series each copy
        is 80 MB of new memory).
        """
        if self.in_position_order:
            same = values.view()
            same.flags.writeable = False
            return same
        out = np.empty_like(values)
        out[self.error_order] = values
        return out

    def by_position(self, column: str) -> np.ndarray:
        """A scorecard column aligned on portfolio position (element i = series i), read-only
        where ``aligned`` does not copy it."""
        return self.aligned(self.card[column].to_numpy())

    @cached_property
    def worst(self) -> np.ndarray:
        """The worst-offender set as a mask by position (leading set covering the target)."""
        return history.worst_set_of_card(self.card, self.error, self.settings.target_share)

    @cached_property
    def fva(self) -> dict[str, float]:
        """The portfolio's forecast value added over naive in the window."""
        return history.portfolio_fva(
            self.portfolio, window=self.settings.window, season=self.settings.season
        )

    # -- the ledger, read once ----------------------------------------------------------------

    @cached_property
    def log(self) -> history.DecisionLog:
        """Every cycle's effective decisions and the adjustment ends in force."""
        return history.DecisionLog.read(self.ledger, self.name)

    def decisions(self) -> list[Decision]:
        """This cycle's effective decisions."""
        return self.log.current(self.name)

    @cached_property
    def lines(self) -> pd.DataFrame:
        """Every effective adjustment line, located, with its status."""
        return history.adjustment_lines(self.portfolio, self.log)

    @property
    def stat(self) -> np.ndarray | None:
        """The statistical forecast overrides are also valued against (``forecast_<name>`` of
        ``settings.stat_name``), or None when the file has no such column."""
        return history.stat_forecast(self.portfolio, self.settings.stat_name)

    @cached_property
    def realised(self) -> pd.DataFrame:
        """Adjustment lines whose period now has actual demand, with the value added (also
        against the statistical forecast, when the file has one)."""
        return history.realised_value(self.portfolio, self.lines, self.stat)

    @cached_property
    def line_status(self) -> pd.DataFrame:
        """Adjustment lines and decisions in each state."""
        return history.line_status(self.lines)

    @cached_property
    def active(self) -> pd.DataFrame:
        """Effective adjustments with forward periods still ahead."""
        return history.active_adjustments(self.portfolio, self.lines)

    @cached_property
    def forward_overrides(self) -> pd.DataFrame:
        """The override in force per adjusted forward period."""
        return history.forward_overrides(self.portfolio, self.lines)

    @cached_property
    def carried_lines(self) -> pd.DataFrame:
        """Earlier cycles' adjustment lines reaching into the forward periods, ended ones too
        (``ended`` True, never ``standing``)."""
        return history.carried_adjustments(self.portfolio, self.lines, self.name, keep_ended=True)

    @cached_property
    def carried_over(self) -> pd.DataFrame:
        """Handed-off and put-off series of earlier cycles still in the worst set."""
        return history.carried_over(self.portfolio, self.log, np.flatnonzero(self.worst))

    @cached_property
    def coverage(self) -> history.Coverage:
        """Review coverage of the cycle."""
        return history.coverage(self.portfolio, self.log, self.card, self.settings.target_share)

    @cached_property
    def decision_counts(self) -> pd.DataFrame:
        """The cycle's decisions: outcomes by root cause."""
        return history.decision_counts(self.log, self.name)

    def repeat_offenders(self, *, current: np.ndarray | None = None) -> pd.DataFrame:
        """Series in the worst set in N of the last M cycles (``history.repeat_offenders``).

        Args:
            current: This cycle's worst set as just stored by the caller, to use without
                reading it back.
        """
        n, m = self.settings.repeat
        if self.actual_cols is not None:
            return history.stored_repeat_offenders(
                self.portfolio,
                self.actual_cols,
                self.worst,
                self.by_position("periods") > 0,
                n=n,
                m=m,
                ledger=self.ledger,
            )
        return history.repeat_offenders(
            self.portfolio,
            n=n,
            m=m,
            target_share=self.settings.target_share,
            window=self.settings.window,
            ledger=self.ledger,
            current=current,
        )

    def reread(self) -> ReviewCycle:
        """A new cycle on the same portfolio, ledger and settings that reads the ledger afresh
        (for a worker thread: this one's pieces stay as they are); the scoring is shared."""
        again = ReviewCycle(
            self.portfolio, self.ledger, self.settings, name=self.name, actual_cols=self.actual_cols
        )
        for name, value in self.__dict__.items():
            if name in _SCORING:
                again.__dict__[name] = value
        return again

    def refresh(self) -> None:
        """Forget what was read from the ledger, so the next use reads it again."""
        for name in _FROM_LEDGER:
            self.__dict__.pop(name, None)
