"""The review's fixed words: decision outcomes and root causes, their codes and their labels.

One owner for the vocabulary the ledger stores, the history counts, the exports write and the
screens, the report and the command line show. A code is what the ledger keeps (stable, lower
case); a label is what a person reads; the short and tiny forms are for narrow screen columns.
Root causes can be replaced by the configuration file (``triage.core.config``); the outcomes
cannot.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

#: Review orders, the one list (``triage rank --by`` and the review screens' order key): the
#: largest share of absolute error first; persistent bias first; the most value destroyed by the
#: last process step first (``triage.core.compare.last_step_loss``).
BY_ERROR = "error"
BY_BIAS = "bias"
BY_FVA = "fva"
ORDERS = (BY_ERROR, BY_BIAS, BY_FVA)

#: Digits offered as shortcuts, in list order ("0" is the tenth entry, as on a keyboard row).
SHORTCUT_DIGITS = "1234567890"


@dataclass(frozen=True)
class Choice:
    """One entry of a fixed vocabulary (an outcome or a root cause)."""

    code: str
    """Stable identifier stored in the ledger (lower case, ``[a-z][a-z0-9_]*``)."""
    label: str
    """Words shown to the reviewer."""
    key: str = ""
    """Digit shortcut (``"1"``..``"9"``, ``"0"``), or empty when the list has more than ten."""


def numbered(pairs: tuple[tuple[str, str], ...] | list[tuple[str, str]]) -> tuple[Choice, ...]:
    """Build choices from ``(code, label)`` pairs, giving the first ten their digit shortcuts."""
    return tuple(
        Choice(code, label, SHORTCUT_DIGITS[i] if i < len(SHORTCUT_DIGITS) else "")
        for i, (code, label) in enumerate(pairs)
    )


def labels(choices: Iterable[Choice]) -> dict[str, str]:
    """Code -> label of a vocabulary."""
    return {c.code: c.label for c in choices}


def label_of(code: str | None, choices: Iterable[Choice]) -> str:
    """The label of ``code``, or the code itself when the vocabulary no longer has it (a root
    cause removed from the configuration after it was recorded)."""
    for choice in choices:
        if choice.code == code:
            return choice.label
    return str(code or "")


# --------------------------------------------------------------------------------------------
# Outcomes

NO_CHANGE = "no_change"
ADJUSTED = "adjusted"
HANDED_OFF = "handed_off"
DEFERRED = "deferred"

#: What a reviewer concluded about a series, in shortcut order.
OUTCOMES: tuple[Choice, ...] = numbered(
    (
        (NO_CHANGE, "No change needed"),
        (ADJUSTED, "Forward forecast adjusted"),
        (HANDED_OFF, "Handed to someone else to resolve"),
        (DEFERRED, "Put off to a later cycle"),
    )
)

#: Outcomes that settle a series for the cycle; handed-off and put-off ones are still open.
SETTLED: tuple[str, ...] = (NO_CHANGE, ADJUSTED)
#: Outcomes that leave a series open for a later cycle.
OPEN_OUTCOMES: tuple[str, ...] = (HANDED_OFF, DEFERRED)

#: An outcome in a few words (the decision history of the review screens).
OUTCOME_SHORT: dict[str, str] = {
    NO_CHANGE: "no change",
    ADJUSTED: "adjusted",
    HANDED_OFF: "handed off",
    DEFERRED: "later",
}
#: An outcome in one short word (a list column of an 80-column terminal).
OUTCOME_TINY: dict[str, str] = {
    NO_CHANGE: "ok",
    ADJUSTED: "adj",
    HANDED_OFF: "hand",
    DEFERRED: "later",
}


def outcome_label(code: str | None) -> str:
    """The words for an outcome code (never the code itself on a screen or in a report)."""
    return label_of(code, OUTCOMES)


# --------------------------------------------------------------------------------------------
# Root causes

#: Root causes a planner recognises, most frequent first so the common ones sit on 1-4.
DEFAULT_ROOT_CAUSES: tuple[Choice, ...] = numbered(
    (
        ("promotion", "Promotion or event"),
        ("large_order", "One-off large order"),
        ("stock_out", "Stock-out hid demand"),
        ("new_item", "New item ramp-up"),
        ("phase_out", "Phase-out"),
        ("price_change", "Price change"),
        ("season_trend", "Seasonality or trend shift"),
        ("data_error", "Data error (returns, master data)"),
        ("model_miss", "Model miss"),
        ("unknown", "Unknown"),
    )
)
