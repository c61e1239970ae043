"""The review report's figures, weekly or monthly as the calendar is.

``build_report`` gathers every figure from the core functions (``ranking.scorecard``,
``history.*``, ``compare.compare`` when the file has competing forecasts) into a
``ReportData``; the renderer (``triage.render.report``: the HTML file, its charts and the
terminal summary) only formats them, so each number in the report can be traced
to one of those functions (the tests check that they match).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from triage.core import history
from triage.core.compare import Comparison, compare
from triage.core.cycle import ReviewCycle
from triage.core.errors import TriageError
from triage.core.export import CAUTION
from triage.core.output import window_info
from triage.core.portfolio import Portfolio
from triage.core.vocabulary import OUTCOMES

#: Top offenders shown with a chart.
TOP_DEFAULT = 10
#: History periods shown in an offender chart before the forward periods.
CHART_HISTORY = 26
#: Bias histogram: bin width and the |bias %| beyond which values go to the two outer bins.
BIAS_STEP = 0.1
BIAS_LIMIT = 1.0


class ReportError(TriageError):
    """The report cannot be written as asked."""


@dataclass(frozen=True)
class BiasBins:
    """Counts of series by window bias % (Σe / Σdemand), in fixed-width bins."""

    labels: tuple[str, ...]
    """Bin labels, lowest first; the outer two are open-ended."""
    low: np.ndarray
    """Lower edge of each bin (-inf for the first)."""
    high: np.ndarray
    """Upper edge of each bin (+inf for the last); each bin is [low, high)."""
    counts: np.ndarray
    """Series per bin (int64)."""
    undefined: int
    """Series whose bias % is undefined (no positive demand in the window)."""


def bias_distribution(
    card: pd.DataFrame, *, step: float = BIAS_STEP, limit: float = BIAS_LIMIT
) -> BiasBins:
    """Histogram of the scorecard's ``bias_pct`` in bins [low, high) of width ``step``.

    Values below ``-limit`` and at or above ``limit`` go to the two open outer bins, so a few
    extreme series do not flatten the picture. Positive = over-forecast.
    """
    values = card["bias_pct"].to_numpy(dtype=np.float64)
    finite = values[np.isfinite(values)]
    k = round(limit / step)
    edges = np.round(np.arange(-k, k + 1) * step, 12)
    index = np.searchsorted(edges, finite, side="right")
    counts = np.bincount(index, minlength=len(edges) + 1).astype(np.int64)
    low = np.concatenate([[-np.inf], edges])
    high = np.concatenate([edges, [np.inf]])
    labels = [f"< {edges[0] * 100:+.0f}%"]
    labels += [f"{a * 100:+.0f}% to {b * 100:+.0f}%" for a, b in itertools.pairwise(edges)]
    labels.append(f">= {edges[-1] * 100:+.0f}%")
    return BiasBins(tuple(labels), low, high, counts, int(len(values) - len(finite)))


@dataclass(frozen=True)
class OffenderChart:
    """Arrays of one top offender's chart, aligned on ``labels`` (one shared scale)."""

    series: int
    labels: tuple[str, ...]
    demand: np.ndarray
    forecast: np.ndarray
    adjusted: np.ndarray
    """Override in force per forward period, NaN elsewhere."""
    last_actual: int
    """Position of the latest actual period in ``labels``."""


@dataclass(frozen=True)
class ReportData:
    """Everything the report shows, each part straight from a core function."""

    portfolio_name: str
    portfolio_fingerprint: str
    ledger_name: str | None
    cycle: str
    frequency: str
    window: dict[str, Any]
    """``output.window_info``: first, last, periods."""
    season: int
    target_share: float
    repeat_n: int
    repeat_m: int
    priced: bool
    generated_at: str
    card: pd.DataFrame
    """``ranking.scorecard`` in rank order."""
    coverage: history.Coverage
    decisions: pd.DataFrame
    """``history.decision_counts`` of the cycle."""
    outcome_labels: dict[str, str]
    cause_labels: dict[str, str]
    bias: BiasBins
    top: pd.DataFrame
    """The first ``top`` rows of ``card``."""
    charts: tuple[OffenderChart, ...]
    current_outcome: dict[int, str]
    """Portfolio position -> outcome code of its decision in this cycle."""
    repeat: pd.DataFrame
    """``history.repeat_offenders``, all series (index = position)."""
    carried: pd.DataFrame
    active: pd.DataFrame
    realised: pd.DataFrame
    status: pd.DataFrame
    """``history.line_status``."""
    summaries: dict[str, pd.DataFrame]
    """``history.summarise`` by ``direction``, ``size``, ``direction_size``, ``reviewer``,
    ``root_cause`` and ``cycle``."""
    fva: dict[str, float]
    caution: str = CAUTION
    notices: tuple[str, ...] = field(default=())
    comparison: Comparison | None = None
    """``compare.compare`` of the file's forecasts with the cycle's window and season (the
    process-step table); None without competing forecasts, or when they share no cell."""
    comparison_note: str | None = None
    """Why a file with competing forecasts has no comparison (``compare``'s message)."""
    stat_name: str | None = None
    """The competing forecast the overrides are also valued against (``settings.stat_name``),
    None when the file has none: the ``stat`` figures of ``realised`` and ``summaries``."""
    units_reason: str = ""
    """Why errors rank in units although the file has a price column
    (``Portfolio.units_reason``)."""


SUMMARY_BY: dict[str, str | tuple[str, ...]] = {
    "direction_size": ("direction", "size"),
    "direction": "direction",
    "size": "size",
    "reviewer": "reviewer",
    "root_cause": "root_cause",
    "cycle": "cycle",
    "group": "group",
}


def build_report(
    review: ReviewCycle,
    *,
    top: int = TOP_DEFAULT,
    generated_at: datetime | None = None,
) -> ReportData:
    """Gather the report's figures from the review cycle (nothing is written).

    Raises:
        ReportError: Settings out of range (window, season, share, top).
        HistoryError: N of M out of range (``history.repeat_offenders``).
    """
    portfolio, ledger, settings = review.portfolio, review.ledger, review.settings
    window, season, target_share = settings.window, settings.season, settings.target_share
    repeat_n, repeat_m = settings.repeat
    if top < 1:
        raise ReportError(f"the number of top offenders must be at least 1, not {top}.")
    if window < 1 or season < 1:
        raise ReportError(f"window and season must be at least 1, not {window} and {season}.")
    if not 0 < target_share <= 1:
        raise ReportError(f"the target share must be in (0, 1], not {target_share}.")
    card = review.card
    repeat = review.repeat_offenders()
    worst = card.loc[review.worst[card.index]]
    realised = review.realised
    summaries = {name: history.summarise(realised, by) for name, by in SUMMARY_BY.items()}
    current = review.decisions()
    pos = portfolio.series_index.positions([d.item for d in current], [d.location for d in current])
    current_outcome = {int(p): d.outcome for p, d in zip(pos, current, strict=True) if p >= 0}
    head = card.iloc[:top]
    comparison, comparison_note = _comparison(portfolio, window, season)
    stamp = (generated_at or datetime.now(UTC)).astimezone(UTC)
    notices = list(portfolio.notices)
    if ledger is None:
        notices.append("No decision ledger was given, so no decision or override is shown.")
    else:
        repeat_note = history.repeat_notice(repeat)
        if repeat_note:
            notices.append(repeat_note)
    return ReportData(
        portfolio_name=portfolio.path.name,
        portfolio_fingerprint=portfolio.fingerprint,
        ledger_name=ledger.path.name if ledger is not None else None,
        cycle=portfolio.cycle,
        frequency=portfolio.calendar.freq,
        window=window_info(portfolio, window),
        season=season,
        target_share=target_share,
        repeat_n=repeat_n,
        repeat_m=repeat_m,
        priced=portfolio.price is not None,
        generated_at=stamp.isoformat(timespec="seconds").replace("+00:00", "Z"),
        card=card,
        coverage=review.coverage,
        decisions=review.decision_counts,
        outcome_labels={c.code: c.label for c in OUTCOMES},
        cause_labels={c.code: c.label for c in review.log.root_causes},
        bias=bias_distribution(card),
        top=head,
        charts=tuple(_offender_charts(review, head.index.to_numpy())),
        current_outcome=current_outcome,
        repeat=repeat,
        carried=history.carried_over(portfolio, review.log, worst),
        active=review.active,
        realised=realised,
        status=review.line_status,
        summaries=summaries,
        fva=review.fva,
        notices=tuple(notices),
        comparison=comparison,
        comparison_note=comparison_note,
        stat_name=settings.stat_name if review.stat is not None else None,
        units_reason=portfolio.units_reason,
    )


def _comparison(
    portfolio: Portfolio, window: int, season: int
) -> tuple[Comparison | None, str | None]:
    """The process-step table of a file with competing forecasts (``compare.compare``, default
    steps), or why there is none; (None, None) without competing forecasts: the report's
    forecast value added over naive is then the one step."""
    if not portfolio.competing:
        return None, None
    try:
        return compare(portfolio, window, season), None
    except TriageError as error:
        return None, error.message + (f" {error.hint}" if error.hint else "")


def error_column(card: pd.DataFrame) -> str:
    """The scorecard column ranked by: absolute error in value where priced, else in units."""
    return "abs_error_value" if "abs_error_value" in card else "abs_error"


def _offender_charts(review: ReviewCycle, series: np.ndarray) -> list[OffenderChart]:
    portfolio = review.portfolio
    last = portfolio.last_actual
    lo = max(0, last + 1 - CHART_HISTORY)
    cols = np.arange(lo, len(portfolio.calendar.periods))
    labels = tuple(portfolio.calendar.label(int(c)) for c in cols)
    overrides = review.forward_overrides
    out = []
    for s in series:
        adjusted = np.full(len(cols), np.nan)
        mine = overrides.loc[overrides["series"] == s]
        adjusted[mine["column"].to_numpy(dtype=np.int64) - lo] = mine["adjusted"].to_numpy()
        out.append(
            OffenderChart(
                series=int(s),
                labels=labels,
                demand=portfolio.demand[s, cols],
                forecast=portfolio.forecast[s, cols],
                adjusted=adjusted,
                last_actual=last - lo,
            )
        )
    return out


def default_report_path(portfolio: Portfolio) -> Path:
    """``<portfolio stem>-report-<cycle>.html`` beside the portfolio."""
    return portfolio.path.with_name(f"{portfolio.path.stem}-report-{portfolio.cycle}.html")
