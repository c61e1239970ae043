"""Adjustments of a series' forward forecast, written in a short text syntax.

A spec is ``[RANGE:] OP``. RANGE picks forward periods by 1-based horizon: ``3`` (one period),
``2-5`` (a span) or ``4-`` (from 4 to the end); without it the whole forward horizon is used.
OP is one of:

==============  ==============================================================================
``=120``        set every period in the range to 120 units
``+15%``        scale by percent (``-10%`` lowers by a tenth)
``x1.2``        multiply by a factor (``*1.2`` is read the same way)
``+40``         add units per period (``-25`` removes them)
``mean 8``      replace with the mean of the last 8 actual demands (missing ones skipped)
``bias``        multiply by Σdemand / Σforecast over the scoring window, removing the window bias
``100 120 130`` one value per period of the range (spaces, or a comma and a space, between
                them; ``1,200`` is refused as ambiguous)
``use stat``    take another forecast's forward values: the column ``forecast_stat`` of the file
                (``Portfolio.competing``); where it has no value the original is kept (noted)
==============  ==============================================================================

Specs are case-insensitive and whitespace-tolerant; ``str(parse(spec))`` is the canonical text
stored in the ledger. An adjusted forecast is never negative: values below zero become 0 and the
result says so. Examples and the suggestion rule are in docs/adjustments.md.

Bias uses the project's sign convention (``triage.core.metrics``): e = forecast − demand, so a
positive bias is an over-forecast and its correcting factor Σdemand / Σforecast is below 1.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from decimal import Decimal

import numpy as np
from numpy.typing import ArrayLike

from triage.core import schema
from triage.core.errors import TriageError
from triage.core.text import visible

SET = "set"
PERCENT = "percent"
MULTIPLY = "multiply"
ADD = "add"
MEAN = "mean"
BIAS = "bias"
VALUES = "values"
USE = "use"
OPERATIONS = (SET, PERCENT, MULTIPLY, ADD, MEAN, BIAS, VALUES, USE)

EXPECTED = (
    "expected one of =N, +N%, -N%, xF, +N, -N, mean K, bias, or values (e.g. 100 120 130), "
    "or use NAME (another forecast of the file, e.g. use stat), "
    "optionally after a range such as 3:, 2-5: or 4-:"
)

#: Largest horizon a range may name; far beyond any forward forecast, it only stops nonsense.
MAX_HORIZON = 10_000

_NUM = r"(?:\d+(?:\.\d*)?|\.\d+)"
_RANGE = re.compile(r"\s*(\d+)\s*(?:(-)\s*(\d+)?)?\s*")
_SET = re.compile(rf"=\s*(-?\s*{_NUM})")
_PERCENT = re.compile(rf"([+-])\s*({_NUM})\s*%")
_MULTIPLY = re.compile(rf"[x*×]\s*({_NUM})")
_ADD = re.compile(rf"([+-])\s*({_NUM})")
_MEAN = re.compile(r"mean\s*(\d+)")
_USE = re.compile(r"use(?:\s+(.*))?", re.DOTALL)
_VALUE = re.compile(_NUM)
_SEPARATORS = re.compile(r"[\s,;]+")
#: A comma between two digits (``1,200``, ``1,5``): a thousands separator or a decimal comma in
#: many locales, so it is refused rather than read as two values.
_DIGIT_COMMA_DIGIT = re.compile(r"\d+,\d+")


class AdjustError(TriageError):
    """An adjustment cannot be applied to this series as written."""


class AdjustSyntaxError(AdjustError):
    """The spec text does not follow the syntax.

    Attributes:
        spec: The text as given.
        position: 0-based index of the problem in ``spec``.
    """

    def __init__(self, spec: str, position: int, problem: str) -> None:
        self.spec = spec
        self.position = position
        # One visible symbol per character (``text.visible``), so the pointer line stays aligned.
        shown = visible(spec)
        pointer = " " * (position + 2) + "^"
        super().__init__(
            f'Cannot read the adjustment "{shown}": {problem}\n  {shown}\n{pointer}\n{EXPECTED}.'
        )


def _fmt(value: float) -> str:
    """Shortest plain decimal that reads back as the same float (no exponent)."""
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    text = repr(float(value))
    if "e" in text:
        text = format(Decimal(text), "f")
    return text


def _signed(value: float, suffix: str = "") -> str:
    return f"{'+' if value >= 0 else '-'}{_fmt(abs(value))}{suffix}"


@dataclass(frozen=True)
class Adjustment:
    """A parsed spec. ``str()`` gives its canonical text; equal specs compare equal."""

    op: str
    """One of ``OPERATIONS``."""
    value: float | None = None
    """Level (set), percent (percent), factor (multiply) or units per period (add)."""
    count: int | None = None
    """How many recent actuals ``mean`` averages."""
    values: tuple[float, ...] = ()
    """Per-period values of ``values``, in horizon order."""
    start: int = 1
    """First horizon of the range, 1-based."""
    end: int | None = None
    """Last horizon of the range (inclusive); None runs to the end of the forward forecast."""
    source: str = ""
    """Name of the other forecast ``use`` takes (the file's column ``forecast_<source>``)."""

    @property
    def range_text(self) -> str:
        """Canonical range (``"3"``, ``"2-5"``, ``"4-"``), ``""`` for the whole horizon."""
        if self.end is None:
            return "" if self.start == 1 else f"{self.start}-"
        return str(self.start) if self.start == self.end else f"{self.start}-{self.end}"

    @property
    def op_text(self) -> str:
        """Canonical operation without the range."""
        if self.op == SET:
            return f"={_fmt(self._value)}"
        if self.op == PERCENT:
            return _signed(self._value, "%")
        if self.op == MULTIPLY:
            return f"x{_fmt(self._value)}"
        if self.op == ADD:
            return _signed(self._value)
        if self.op == MEAN:
            return f"mean {self.count}"
        if self.op == BIAS:
            return "bias"
        if self.op == USE:
            return f"use {self.source}"
        return " ".join(_fmt(v) for v in self.values)

    @property
    def _value(self) -> float:
        assert self.value is not None
        return self.value

    def __str__(self) -> str:
        prefix = self.range_text
        return f"{prefix}: {self.op_text}" if prefix else self.op_text


def parse(spec: str) -> Adjustment:
    """Read an adjustment spec.

    Raises:
        AdjustSyntaxError: The text does not follow the syntax; the message quotes it, points at
            the problem and lists what is expected.
    """
    if not isinstance(spec, str):
        raise AdjustError(f"an adjustment is text, not {type(spec).__name__}")
    if not spec.strip():
        raise AdjustSyntaxError(spec, 0, "it is empty.")
    start, end = 1, None
    op_at = 0
    if ":" in spec:
        colon = spec.index(":")
        if ":" in spec[colon + 1 :]:
            raise AdjustSyntaxError(spec, spec.index(":", colon + 1), "only one ':' is allowed.")
        start, end = _parse_range(spec, spec[:colon])
        op_at = colon + 1
    op_raw = spec[op_at:]
    if m := _DIGIT_COMMA_DIGIT.search(op_raw):
        shown = op_raw[m.start() : m.end()].strip()
        raise AdjustSyntaxError(
            spec,
            op_at + m.start(),
            f"{shown!r} is ambiguous (a thousands separator, a decimal comma or two values): "
            f"write {shown.replace(',', '')}, or separate values with spaces "
            f"({shown.replace(',', ' ')}); decimals take a point.",
        )
    lead = len(op_raw) - len(op_raw.lstrip())
    op_at += lead
    op_text = op_raw.strip().lower()
    if not op_text:
        raise AdjustSyntaxError(spec, len(spec.rstrip()), "the operation after ':' is missing.")
    adjustment = _parse_op(spec, op_text, op_at, start, end)
    if adjustment.op == VALUES and end is not None and len(adjustment.values) != end - start + 1:
        size = end - start + 1
        raise AdjustSyntaxError(
            spec,
            op_at,
            f"{len(adjustment.values)} value(s) given for {size} period(s) "
            f"({adjustment.range_text}); give exactly one value per period.",
        )
    return adjustment


def _parse_range(spec: str, text: str) -> tuple[int, int | None]:
    match = _RANGE.fullmatch(text)
    at = len(text) - len(text.lstrip())
    if not match:
        if _MEAN_OR_OP_HINT.search(text):
            problem = f"{text.strip()!r} before ':' is not a range; the range comes first."
        else:
            problem = f"{text.strip()!r} is not a range of forward periods (3, 2-5 or 4-)."
        raise AdjustSyntaxError(spec, at, problem)
    first = int(match.group(1))
    last: int | None = first
    if match.group(2):
        last = int(match.group(3)) if match.group(3) else None
    if first < 1:
        raise AdjustSyntaxError(spec, at, "forward periods are numbered from 1.")
    if first > MAX_HORIZON or (last is not None and last > MAX_HORIZON):
        raise AdjustSyntaxError(spec, at, f"a range cannot go beyond period {MAX_HORIZON}.")
    if last is not None and last < first:
        raise AdjustSyntaxError(
            spec, at, f"the range {first}-{last} ends before it starts; write {last}-{first}."
        )
    if first == 1 and last is None:
        return 1, None
    return first, last


_MEAN_OR_OP_HINT = re.compile(r"[=%x*×]|mean|bias|use", re.IGNORECASE)


def _number(spec: str, text: str, at: int) -> float:
    value = float(text.replace(" ", ""))
    if not math.isfinite(value):
        raise AdjustSyntaxError(spec, at, f"{text} is too large a number.")
    return value


def _parse_op(spec: str, text: str, at: int, start: int, end: int | None) -> Adjustment:
    if m := _SET.fullmatch(text):
        return Adjustment(SET, value=_number(spec, m.group(1), at), start=start, end=end)
    if m := _PERCENT.fullmatch(text):
        percent = _number(spec, m.group(2), at)
        percent = -percent if m.group(1) == "-" else percent
        if percent < -100:
            raise AdjustSyntaxError(
                spec, at, f"{percent:g}% would make the forecast negative; the lowest is -100%."
            )
        return Adjustment(PERCENT, value=percent, start=start, end=end)
    if m := _MULTIPLY.fullmatch(text):
        return Adjustment(MULTIPLY, value=_number(spec, m.group(1), at), start=start, end=end)
    if m := _ADD.fullmatch(text):
        units = _number(spec, m.group(2), at)
        return Adjustment(ADD, value=-units if m.group(1) == "-" else units, start=start, end=end)
    if m := _MEAN.fullmatch(text):
        count = int(m.group(1))
        if count < 1:
            raise AdjustSyntaxError(spec, at, "mean needs at least 1 actual (mean 1 or more).")
        return Adjustment(MEAN, count=count, start=start, end=end)
    if text == "mean":
        raise AdjustSyntaxError(
            spec, at + len(text), "mean needs the number of actuals to average, e.g. mean 8."
        )
    if text == BIAS:
        return Adjustment(BIAS, start=start, end=end)
    if m := _USE.fullmatch(text):
        return Adjustment(USE, source=_parse_source(spec, m, at), start=start, end=end)
    if text.startswith(USE) and len(text) > len(USE) and _name_char(text[len(USE)]):
        raise AdjustSyntaxError(
            spec,
            at + len(USE),
            f"put a space between use and the forecast's name: {USE} {text[len(USE) :]}.",
        )
    return Adjustment(VALUES, values=_parse_values(spec, text, at), start=start, end=end)


def _name_char(char: str) -> bool:
    """Whether ``char`` may be part of a forecast's name (the rule: ``schema.competing_name``)."""
    return schema.competing_name(schema.COMPETING_PREFIX + char) is not None


def _parse_source(spec: str, match: re.Match[str], at: int) -> str:
    """The forecast name after ``use``: the ``<name>`` of a column ``forecast_<name>``."""
    name = (match.group(1) or "").strip()
    if not name:
        raise AdjustSyntaxError(
            spec,
            at + len(match.group(0).rstrip()),
            "use needs the name of another forecast, e.g. use stat for the column forecast_stat.",
        )
    name_at = at + match.start(1) + (len(match.group(1)) - len(match.group(1).lstrip()))
    if schema.competing_name(schema.COMPETING_PREFIX + name) is None:
        bad = next((i for i, char in enumerate(name) if not _name_char(char)), 0)
        raise AdjustSyntaxError(
            spec,
            name_at + bad,
            f"{name!r} is not a forecast name: a name is lower-case letters, digits and '_', "
            "as in the column forecast_<name> (use stat for forecast_stat).",
        )
    # The built-in benchmarks' names belong to triage compare (imported here, when a spec
    # names a forecast, so the review screens do not load scipy for it).
    from triage.core.compare import FORECAST, NAIVE, SNAIVE

    builtin = {
        NAIVE: f"{NAIVE} is a benchmark of past actuals (the previous period's actual), not a "
        "forecast of the forward periods; to carry the latest actual forward write mean 1.",
        SNAIVE: f"{SNAIVE} is a benchmark of past actuals (the actual one season back), not a "
        "forecast of the forward periods; to repeat last season, give its values "
        "(e.g. 1-3: 120 95 80).",
        FORECAST: f"{FORECAST} is the forecast under review itself; name another forecast of "
        "the file, e.g. use stat for the column forecast_stat.",
    }
    if name in builtin:
        raise AdjustSyntaxError(spec, name_at, builtin[name])
    return name


def _parse_values(spec: str, text: str, at: int) -> tuple[float, ...]:
    values: list[float] = []
    lowered = spec.lower()
    cursor = at
    for token in _SEPARATORS.split(text):
        if not token:
            continue
        position = lowered.find(token, cursor)
        position = at if position < 0 else position
        cursor = position + len(token)
        if not _VALUE.fullmatch(token):
            shown = spec[position : position + len(token)]
            if token.startswith(("+", "-")) and values:
                problem = f"{shown!r}: a list of values takes plain numbers without signs."
            elif re.fullmatch(rf"{_NUM}\s*%", token):
                problem = f"{shown!r} needs a sign: +{shown} raises, -{shown} lowers."
            elif not values and re.fullmatch(r"\d+-\d*", token):
                problem = f"{shown!r} looks like a range; put ':' and an operation after it."
            else:
                # Point past the part that reads as an operation so far ("+1" of "+1O%").
                prefix = re.match(rf"(?:[=x*×+-]\s*)?(?:{_NUM})?\s*%?", token)
                offset = prefix.end() if prefix and prefix.end() < len(token) else 0
                position += offset
                problem = f"{shown!r} is not an operation or a number."
            raise AdjustSyntaxError(spec, position, problem)
        values.append(_number(spec, token, position))
    return tuple(values)


# --------------------------------------------------------------------------------------------
# Applying


def units_change(original: np.ndarray, adjusted: np.ndarray) -> np.ndarray:
    """Adjusted − original per period, a missing value counted as 0: the change in units an
    adjustment makes (its sum is what the review shows, the export and the ledger's reports
    count)."""
    change = np.nan_to_num(adjusted, nan=0.0) - np.nan_to_num(original, nan=0.0)
    return np.asarray(change, dtype=np.float64)


@dataclass(frozen=True, eq=False)
class AdjustResult:
    """What an adjustment does to one series' forward forecast."""

    adjustment: Adjustment
    """The adjustment applied."""
    original: np.ndarray
    """Forward forecast before (float64, NaN where missing; read-only)."""
    adjusted: np.ndarray
    """Forward forecast after (float64, NaN where still missing, never negative; read-only)."""
    first: int
    """First forward period changed, 1-based."""
    last: int
    """Last forward period changed, 1-based inclusive."""
    delta_units: float
    """Σ adjusted − Σ original over the range (missing counted as 0)."""
    delta_value: float | None
    """Δ units × price over the range, None without a price."""
    clipped: bool
    """Whether some periods would have gone below zero and were set to 0."""
    message: str
    """Why values were clipped (``""`` when none were)."""
    notes: tuple[str, ...]
    """Other things the reviewer should know (fewer actuals than asked, missing prices...)."""
    description: str
    """One line for the reviewer, e.g. ``periods 1-4: +10% → +38 units (value +1,234)``."""

    def lines(self, periods: Sequence[str]) -> list[tuple[str, float | None, float | None]]:
        """``(period, original, adjusted)`` for the range, as the ledger stores them.

        Args:
            periods: ISO start dates of all forward periods, in horizon order.
        """
        if len(periods) != len(self.original):
            raise AdjustError(
                f"{len(periods)} period dates given for {len(self.original)} forward periods"
            )

        def cell(x: float) -> float | None:
            return None if math.isnan(x) else float(x)

        return [
            (periods[i], cell(self.original[i]), cell(self.adjusted[i]))
            for i in range(self.first - 1, self.last)
        ]


def _float_array(values: ArrayLike, what: str) -> np.ndarray:
    array = np.array(values, dtype=np.float64)
    if array.ndim != 1:
        raise AdjustError(f"{what} must be one row of numbers, not shape {array.shape}")
    if np.isinf(array).any():
        raise AdjustError(f"{what} contains an infinite value")
    return array


def _window_total(values: ArrayLike | None, what: str) -> float:
    if values is None:
        raise AdjustError(f"bias needs the {what} of the scoring window")
    array = np.asarray(values, dtype=np.float64)
    return float(array) if array.ndim == 0 else float(np.nansum(array))


def apply(
    adj: Adjustment,
    forward: ArrayLike,
    *,
    recent_actuals: ArrayLike,
    window_demand: ArrayLike | None,
    window_forecast: ArrayLike | None,
    price: ArrayLike | None = None,
    alternatives: Mapping[str, ArrayLike] | None = None,
) -> AdjustResult:
    """Apply an adjustment to one series' forward forecast.

    Args:
        adj: The adjustment (from ``parse``).
        forward: Forward forecast by horizon, NaN where missing.
        recent_actuals: The series' actual demand history, oldest first, NaN where missing.
        window_demand: Σ demand over the scoring window (or its per-period values).
        window_forecast: Σ forecast over the scoring window (or its per-period values); with
            per-period arrays only periods where both are present count.
        price: Unit value, one number or one per forward period, for the value impact.
        alternatives: The series' other forecasts of the forward periods by name (``<name>`` of
            each ``forecast_<name>`` column, ``Portfolio.competing``), NaN where missing: what
            ``use NAME`` takes.

    Raises:
        AdjustError: The range reaches past the forward horizon, the number of values does not
            match the range, ``bias`` has no (positive) window forecast, ``mean`` has no
            actuals, or ``use`` names a forecast the file does not have or one without a value
            in the range.
    """
    original = _float_array(forward, "the forward forecast")
    horizon = len(original)
    if horizon == 0:
        raise AdjustError("this series has no forward forecast to adjust")
    first = adj.start
    last = horizon if adj.end is None else adj.end
    if first > horizon or last > horizon:
        raise AdjustError(
            f"the range {adj.range_text} reaches period {max(first, last)}, but this series has "
            f"{horizon} forward period(s)",
            hint=f"Use a range within 1-{horizon}.",
        )
    lo, hi = first - 1, last
    span = hi - lo
    adjusted = original.copy()
    part = original[lo:hi]
    notes: list[str] = []

    if adj.op == SET:
        adjusted[lo:hi] = adj.value
        what = adj.op_text
    elif adj.op == PERCENT:
        adjusted[lo:hi] = part * (1.0 + adj._value / 100.0)
        what = adj.op_text
    elif adj.op == MULTIPLY:
        adjusted[lo:hi] = part * adj._value
        what = adj.op_text
    elif adj.op == ADD:
        adjusted[lo:hi] = part + adj._value
        what = adj.op_text
    elif adj.op == MEAN:
        level, used = _recent_mean(recent_actuals, adj.count or 1)
        if used < (adj.count or 1):
            notes.append(f"only {used} of the {adj.count} actuals asked for exist")
        adjusted[lo:hi] = level
        what = f"mean of last {used} actuals ({_fmt(round(level, 2))})"
    elif adj.op == BIAS:
        factor = _bias_factor(window_demand, window_forecast)
        adjusted[lo:hi] = part * factor
        what = f"bias x{factor:.3g}"
    elif adj.op == VALUES:
        if len(adj.values) != span:
            raise AdjustError(
                f"the adjustment gives {len(adj.values)} value(s) for {span} forward period(s) "
                f"({_periods(first, last)})",
                hint="Give exactly one value per period of the range.",
            )
        adjusted[lo:hi] = adj.values
        what = f"{span} value(s)" if span > 1 else f"={_fmt(adj.values[0])}"
    elif adj.op == USE:
        other = _alternative(adj.source, alternatives, horizon)[lo:hi]
        present = ~np.isnan(other)
        if not present.any():
            raise AdjustError(
                f"the forecast {adj.source} has no value in {_periods(first, last)}, so there "
                "is nothing to use",
                hint="Use it over periods where it has values, or set them (=N or values).",
            )
        # Where the other forecast is missing the original stays: a gap is not a change.
        adjusted[lo:hi] = np.where(present, other, part)
        if not present.all():
            kept = [str(h) for h in np.flatnonzero(~present) + first]
            notes.append(
                f"{adj.source} has no value in {_horizons(kept)}; the original forecast is kept "
                "there"
            )
        what = adj.op_text
    else:  # pragma: no cover - Adjustment is only built by parse()
        raise AdjustError(f"unknown operation {adj.op!r}")

    below = adjusted < 0  # NaN compares False: missing stays missing
    clipped = bool(below.any())
    message = ""
    if clipped:
        count = int(below.sum())
        adjusted[below] = 0.0
        message = f"{count} period(s) would fall below zero and were set to 0"

    change = units_change(original[lo:hi], adjusted[lo:hi])
    delta_units = float(change.sum())
    delta_value = _value_impact(change, price, horizon, lo, hi, notes)

    text = f"{_periods(first, last)}: {what} → {_amount(delta_units)} units"
    if delta_value is not None:
        text += f" (value {_amount(delta_value)})"
    for extra in ([message] if message else []) + notes:
        text += f"; {extra}"
    original.setflags(write=False)
    adjusted.setflags(write=False)
    return AdjustResult(
        adjustment=adj,
        original=original,
        adjusted=adjusted,
        first=first,
        last=last,
        delta_units=delta_units,
        delta_value=delta_value,
        clipped=clipped,
        message=message,
        notes=tuple(notes),
        description=text,
    )


def _alternative(
    name: str, alternatives: Mapping[str, ArrayLike] | None, horizon: int
) -> np.ndarray:
    """The forward values of the other forecast ``name``, checked against the horizon."""
    known = dict(alternatives or {})
    if name not in known:
        if not known:
            raise AdjustError(
                f"this file has no other forecast to use (use {name} needs a column "
                f"forecast_{name})",
                hint="Add the other forecast beside forecast as a column forecast_<name> (e.g. "
                "forecast_stat), or name a column so with --columns forecast_stat=HEADER; see "
                "docs/input-format.md, Competing forecasts.",
            )
        names = ", ".join(known)
        prefix = schema.COMPETING_PREFIX
        if name.startswith(prefix) and name[len(prefix) :] in known:
            hint = f"Write use {name[len(prefix) :]}: the name comes without '{prefix}'."
        else:
            hint = f"Write use NAME with one of: {names}."
        raise AdjustError(
            f"this file has no forecast {name!r} (no column forecast_{name}); its other "
            f"forecasts are: {names}",
            hint=hint,
        )
    values = _float_array(known[name], f"the forecast {name}")
    if values.shape != (horizon,):
        raise AdjustError(
            f"the forecast {name} has {values.size} forward value(s), the forward forecast "
            f"{horizon}"
        )
    return values


def _horizons(numbers: Sequence[str], limit: int = 5) -> str:
    """``period 3`` or ``periods 3, 5, 6 and 2 more`` (1-based horizons)."""
    word = "period" if len(numbers) == 1 else "periods"
    more = len(numbers) - limit
    return f"{word} {', '.join(numbers[:limit])}" + (f" and {more} more" if more > 0 else "")


def _periods(first: int, last: int) -> str:
    return f"period {first}" if first == last else f"periods {first}-{last}"


def _amount(value: float) -> str:
    """Signed, thousands-separated, no currency: ``+1,234``, ``-38``, ``+0.5``."""
    if abs(value) >= 10:
        value = round(value)
        return f"{value:+,.0f}" if value else "+0"
    value = round(value, 1)
    return f"{value:+,.1f}".replace(".0", "") if value else "+0"


def _recent_mean(recent_actuals: ArrayLike, count: int) -> tuple[float, int]:
    history = _float_array(recent_actuals, "the actual demand history")
    present = history[~np.isnan(history)]
    if present.size == 0:
        raise AdjustError(
            "this series has no actual demand to average",
            hint="Set a level (=N) or give values instead.",
        )
    recent = present[-count:]
    return float(recent.mean()), int(recent.size)


def _bias_factor(window_demand: ArrayLike | None, window_forecast: ArrayLike | None) -> float:
    demand = np.asarray(window_demand, dtype=np.float64) if window_demand is not None else None
    forecast = (
        np.asarray(window_forecast, dtype=np.float64) if window_forecast is not None else None
    )
    if demand is not None and forecast is not None and demand.ndim == 1 and forecast.ndim == 1:
        if demand.shape != forecast.shape:
            raise AdjustError("window demand and forecast have different lengths")
        both = ~np.isnan(demand) & ~np.isnan(forecast)
        demand_total = float(demand[both].sum())
        forecast_total = float(forecast[both].sum())
    else:
        demand_total = _window_total(window_demand, "demand")
        forecast_total = _window_total(window_forecast, "forecast")
    if not (math.isfinite(forecast_total) and forecast_total > 0):
        raise AdjustError(
            f"bias cannot be corrected: the forecast over the scoring window sums to "
            f"{forecast_total:g}, so Σdemand/Σforecast is undefined",
            hint="Set a level (=N) or use mean K instead.",
        )
    if not (math.isfinite(demand_total) and demand_total >= 0):
        raise AdjustError(
            f"bias cannot be corrected: demand over the scoring window sums to {demand_total:g} "
            "(returns exceed sales)",
            hint="Set a level (=N) instead.",
        )
    return demand_total / forecast_total


def _value_impact(
    change: np.ndarray,
    price: ArrayLike | None,
    horizon: int,
    lo: int,
    hi: int,
    notes: list[str],
) -> float | None:
    if price is None:
        return None
    prices = np.asarray(price, dtype=np.float64)
    if prices.ndim == 0:
        if not math.isfinite(float(prices)):
            return None
        return float((change * float(prices)).sum())
    if prices.shape != (horizon,):
        raise AdjustError(
            f"price has {prices.size} value(s); give one number or one per forward period "
            f"({horizon})"
        )
    window = prices[lo:hi]
    known = np.isfinite(window)
    missing = int((~known & (change != 0)).sum())
    if missing:
        notes.append(f"value leaves out {missing} period(s) without a price")
    if not known.any():
        return None
    return float((change[known] * window[known]).sum())


# --------------------------------------------------------------------------------------------
# Suggestions


def suggest(
    bias: ArrayLike,
    demand_sum: ArrayLike,
    forecast_sum: ArrayLike,
    bias_flag: ArrayLike,
    bias_run: ArrayLike,
    periods: ArrayLike,
) -> tuple[np.ndarray, np.ndarray]:
    """Suggest a bias correction for every persistently biased series at once.

    Rule: a series gets ``x<f>`` with f = Σdemand / Σforecast over the scoring window rounded to
    2 decimals (what ``bias`` would do, written out so the saved spec does not depend on the
    window) when it is flagged for persistent bias, Σforecast > 0, Σdemand >= 0, the window
    bias points the same way as the flag, and the rounded factor is not 1.

    Args:
        bias: Σ(forecast − demand) over the window, units (positive = over-forecast).
        demand_sum: Σ demand over the window.
        forecast_sum: Σ forecast over the window.
        bias_flag: +1 persistent over-forecast, −1 under, 0 none (or ``"over"``/``"under"``/"").
        bias_run: Signed length of the latest run of same-sign errors.
        periods: Window periods counted.

    Returns:
        Spec text and a one-line reason per series (object arrays of str, ``""`` when none),
        e.g. ``over-forecast by 23% over 13 periods (9 running); scale forward by 0.81``.
    """
    bias_arr = np.asarray(bias, dtype=np.float64)
    demand = np.asarray(demand_sum, dtype=np.float64)
    forecast = np.asarray(forecast_sum, dtype=np.float64)
    flag = _flag_array(bias_flag)
    run = np.abs(np.asarray(bias_run, dtype=np.int64))
    counted = np.asarray(periods, dtype=np.int64)
    n = demand.shape[0]
    for name, arr in (
        ("bias", bias_arr),
        ("forecast_sum", forecast),
        ("bias_flag", flag),
        ("bias_run", run),
        ("periods", counted),
    ):
        if arr.shape != (n,):
            raise ValueError(f"{name} has shape {arr.shape}, expected ({n},)")

    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.where(forecast > 0, demand / forecast, np.nan)
        percent = np.where(demand > 0, np.abs(bias_arr) / demand * 100.0, np.nan)
    rounded = np.round(factor, 2)
    agrees = ((flag > 0) & (factor < 1)) | ((flag < 0) & (factor > 1))
    keep = (flag != 0) & (forecast > 0) & (demand >= 0) & np.isfinite(factor) & agrees
    keep &= rounded != 1.0

    specs = np.full(n, "", dtype=object)
    reasons = np.full(n, "", dtype=object)
    # Formatting runs only over the flagged series; every decision above is vectorised.
    for i in np.flatnonzero(keep):
        f = float(rounded[i])
        direction = "over-forecast" if flag[i] > 0 else "under-forecast"
        if math.isfinite(percent[i]):
            size = f"{direction} by {percent[i]:.0f}%"
        else:
            size = f"{direction} with no demand"
        running = f" ({run[i]} running)" if run[i] > 0 else ""
        specs[i] = f"x{_fmt(f)}"
        reasons[i] = f"{size} over {counted[i]} periods{running}; scale forward by {f:.2f}"
    return specs, reasons


def _flag_array(bias_flag: ArrayLike) -> np.ndarray:
    raw = np.asarray(bias_flag)
    if raw.dtype.kind in "OUS":
        text = raw.astype(str)
        return np.select([text == "over", text == "under"], [1, -1], 0).astype(np.int8)
    return np.sign(raw.astype(np.float64)).astype(np.int8)
