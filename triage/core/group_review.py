"""The review screens' model of groups: the ranked groups of one review session, their totals,
their review state, and what the detail pane says about one group.

Built from a ``ReviewSession`` (its scorecard, window and outcomes) and the grouping columns;
the group scorecard itself is ``groups.group_scorecard``. Everything per group is computed for
all groups at once (``np.bincount`` over the series' group codes) and kept; only the review
state is recounted, when decisions change it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from triage.core import groups, schema, split
from triage.core.groups import column_total as _total
from triage.core.ranking import BY_BIAS, as_slice
from triage.core.review import ChartSeries, ReviewSession
from triage.core.text import percent


@dataclass(frozen=True)
class Contributor:
    """One series of a group and its part of the group's series-level error."""

    series: int
    """Portfolio index."""
    share: float
    """Its error over the group's (value where priced); NaN when the group has no error."""


class GroupReview:
    """The groups of one review session (see the module docstring).

    Args:
        session: The session whose series are grouped.
        by: The grouping columns (``groups.parse_group_columns``).
    """

    def __init__(self, session: ReviewSession, by: tuple[str, ...]) -> None:
        self.session = session
        self.by = by
        portfolio = session.portfolio
        self.grouping = groups.grouping(portfolio, by)
        self.codes = self.grouping.codes
        self.n_groups = self.grouping.n_groups
        table = groups.group_scorecard(portfolio, session.card, session.window_cols, self.grouping)
        self.error_order = table.index.to_numpy(dtype=np.int64)
        self.table = table.sort_index()
        """The group scorecard aligned on group number (row g = group g)."""
        self.bias_order = np.argsort(self.table["bias_rank"].to_numpy(), kind="stable")
        self.priced = "abs_error_value" in self.table
        self.error = self.table["abs_error_value" if self.priced else "abs_error"].to_numpy()
        flags = self.table["bias_flag"].to_numpy(dtype=object)
        self.flag = np.select([flags == "over", flags == "under"], [1, -1], 0).astype(np.int8)
        self.size = self.table["series"].to_numpy(dtype=np.int64)
        self._decided: np.ndarray | None = None
        self._labels: list[str] | None = None

    # -- the list -------------------------------------------------------------------------------

    def order(self, by: str) -> np.ndarray:
        """Group numbers in review order: share of error, or bias order."""
        return self.bias_order if by == BY_BIAS else self.error_order

    def label(self, group: int) -> str:
        """The group's key values, ``lighting · WST``."""
        if self._labels is None:
            keys = self.grouping.keys
            columns = [keys[name].to_numpy(dtype=object) for name in self.by]
            self._labels = [" · ".join(str(v) for v in row) for row in zip(*columns, strict=True)]
        return self._labels[group]

    def decided(self) -> np.ndarray:
        """Per group, its series with a decision in this cycle (recounted after ``forget``)."""
        if self._decided is None:
            done = self.session.reviewed()
            self._decided = np.bincount(self.codes, weights=done, minlength=self.n_groups).astype(
                np.int64
            )
        return self._decided

    def forget(self) -> None:
        """A decision changed: recount the review state on next use."""
        self._decided = None

    def period_totals(self, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Every group's total demand and forecast over calendar columns ``cols`` (groups x
        columns; NaN where every series of the group is missing): the list's sparklines."""
        p = self.session.portfolio
        picked = as_slice(cols)
        out = []
        for matrix in (p.demand, p.forecast):
            summed = np.zeros((self.n_groups, len(cols)))
            seen = np.zeros((self.n_groups, len(cols)))
            for lo in range(0, p.n_series, _ROWS):
                rows = slice(lo, lo + _ROWS)
                block = self.codes[rows]
                values = np.ascontiguousarray(matrix[rows, picked].T)
                present = ~np.isnan(values)
                for j in range(len(cols)):
                    summed[:, j] += np.bincount(
                        block, weights=np.where(present[j], values[j], 0.0), minlength=self.n_groups
                    )
                    seen[:, j] += np.bincount(block, weights=present[j], minlength=self.n_groups)
            out.append(np.where(seen > 0, summed, np.nan))
        return out[0], out[1]

    # -- one group ------------------------------------------------------------------------------

    def members(self, group: int) -> np.ndarray:
        """Portfolio indices of the group's series."""
        return self.grouping.members(group)

    def filters(self, group: int) -> dict[str, str]:
        """The series list's filters that show exactly this group's series."""
        keys = self.grouping.keys
        return {name: str(keys[name].iat[group]) for name in self.by}

    def chart(self, group: int, adjusted: np.ndarray | None = None) -> ChartSeries:
        """The group total's demand, forecast and competing forecasts, as the detail chart
        draws a series; ``adjusted`` is a previewed adjusted total of the forward periods."""
        p = self.session.portfolio
        members = self.members(group)
        labels = tuple(p.calendar.label(i) for i in range(len(p.calendar.periods)))
        whole = None
        if adjusted is not None:
            whole = np.full(len(labels), np.nan)
            whole[p.last_actual + 1 :] = adjusted
        return ChartSeries(
            labels=labels,
            demand=_total(p.demand[members]),
            forecast=_total(p.forecast[members]),
            adjusted=whole,
            window_start=int(self.session.window_cols[0]),
            last_actual=p.last_actual,
            others=tuple((name, _total(values[members])) for name, values in p.competing.items()),
        )

    @property
    def decimals(self) -> int:
        """The export's precision, which a group adjustment is split at
        (``ReviewSession.split_decimals``)."""
        return self.session.split_decimals

    def preview(self, group: int, spec: str, *, basis: str = split.FORECASTS) -> split.GroupSplit:
        """What ``spec`` would do to the group: applied to its total forward forecast and split
        to its series (``ReviewSession.preview_group``); nothing is saved.

        Raises:
            AdjustSyntaxError, AdjustError: The spec is not valid for this group.
        """
        return self.session.preview_group(self.members(group), spec, basis=basis)

    def contributors(self, group: int, count: int = 5) -> list[Contributor]:
        """The group's series with the largest error first (ties: portfolio order)."""
        members = self.members(group)
        error = np.nan_to_num(self.session.error[members], nan=0.0)
        top = members[np.argsort(-error, kind="stable")[:count]]
        total = float(error.sum())
        return [
            Contributor(int(s), float(self.session.error[s]) / total if total > 0 else math.nan)
            for s in top
        ]

    def flagged(self, group: int) -> np.ndarray:
        """The group's series with a persistent-bias flag of their own, largest error first."""
        members = self.members(group)
        hit = members[self.session.flag[members] != 0]
        error = np.nan_to_num(self.session.error[hit], nan=0.0)
        ordered: np.ndarray = hit[np.argsort(-error, kind="stable")]
        return ordered

    def describe(self, group: int) -> list[str]:
        """The group's measures in words, one line each."""
        row = self.table.iloc[group]
        unit = "weeks" if self.session.portfolio.calendar.freq == schema.WEEKLY else "months"
        periods = len(self.session.window_cols)
        lines = [f"{int(row['series']):,} series; {int(self.decided()[group]):,} decided"]
        bias_pct = row["bias_pct"]
        if isinstance(bias_pct, float) and not math.isnan(bias_pct):
            direction = "over" if bias_pct > 0 else "under"
            lines.append(
                f"group total {direction}-forecast by {abs(bias_pct) * 100:.0f}% over {periods} "
                f"{unit}" + (f"; persistent {row['bias_flag']}" if row["bias_flag"] else "")
            )
        share = row["error_share"]
        if isinstance(share, float) and not math.isnan(share):
            lines.append(
                f"{percent(share)} of the series' error (rank {int(row['rank'])} of "
                f"{self.n_groups:,} groups)"
            )
        series_error, total_error = float(row["abs_error"]), float(row["aggregate_abs_error"])
        if series_error > 0:
            cancel = 1 - total_error / series_error
            kind = (
                "the series err in opposite directions: a mix problem"
                if cancel >= MIX_SHARE
                else "the series err together: a level problem"
            )
            lines.append(
                f"series error {series_error:,.0f} units, the total's {total_error:,.0f}: "
                f"{cancel * 100:.0f}% cancels ({kind})"
            )
        if row["flagged_series"]:
            lines.append(f"{int(row['flagged_series']):,} series flagged for persistent bias")
        return lines


#: Series rows per block of the sparkline totals.
_ROWS = 1 << 15

#: Share of the series' error that cancels in the group total from which the detail pane calls
#: the group a mix problem (common practice: a rule of thumb, half).
MIX_SHARE = 0.5


def outcome_words(decided: int, size: int) -> str:
    """The review state of a group in the list: ``3/15``, ``all 15``."""
    if decided == 0:
        return ""
    return f"all {size}" if decided >= size else f"{decided}/{size}"
