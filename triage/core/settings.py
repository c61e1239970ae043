"""How a portfolio is scored and reviewed: each setting declared once.

A :class:`Setting` holds everything said about one setting: its default, how the command line
reads and checks it (the message names the option), its help text (the default is formatted
into it), its option names, and its key in the configuration file where it has one.
:class:`ScoreSettings` gathers the values; its defaults are the declarations'. The command
line builds its options from these declarations (``triage.arguments``), the configuration file
takes its default from them (``triage.core.config``), and the review screens start from a
``ScoreSettings``, so no default is written twice.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Generic, TypeVar

from triage.core import schema
from triage.core.errors import TriageError

if TYPE_CHECKING:
    import argparse


T = TypeVar("T")

#: Most periods --window and --season may count (almost two centuries of weeks); a larger
#: number is a typo, and would not fit the integer types of the measures.
PERIODS_MAX = 10_000


@dataclass(frozen=True)
class Setting(Generic[T]):
    """One setting, declared once.

    Attributes:
        name: The field of :class:`ScoreSettings`.
        default: The value when neither the command line nor the configuration sets it.
        flags: Command-line options that set it, the usual one first (``--cover`` and
            ``--target`` both set the target share).
        help: Help text of the option; ``{default}`` is replaced by :meth:`shown` of the
            default.
        convert: How the command line turns the option's text into a value (argparse's
            ``type``); a bad text is argparse's own usage error.
        check: The value as the setting holds it, given the converted value and the option's
            name; raises ``TriageError`` naming the option when the value cannot be used.
        metavar: The option's placeholder in the usage line (None: argparse's own).
        config_key: Its key in the configuration file, or None when only the command line
            sets it. A setting with a key has no default on the command line: not given
            there, the configuration's value (else ``default``) applies.
        show: How a value is written on the command line and in the help (``3/4``).
    """

    name: str
    default: T
    flags: tuple[str, ...]
    help: str
    convert: Callable[[str], Any]
    check: Callable[[Any, str], T]
    metavar: str | None = None
    config_key: str | None = None
    show: Callable[[T], str] = str

    @property
    def flag(self) -> str:
        """The usual command-line option."""
        return self.flags[0]

    @property
    def help_text(self) -> str:
        """The help text with the default written in."""
        return self.help.format(default=self.shown())

    def shown(self, value: T | None = None) -> str:
        """``value`` (the default when None) as written on the command line."""
        return self.show(self.default if value is None else value)

    def given(self, args: argparse.Namespace) -> tuple[str, Any] | None:
        """The option among :attr:`flags` given on a parsed command line, and its value.

        None when the command has none of the options or leaves them unset.
        """
        for flag in self.flags:
            value = getattr(args, flag.lstrip("-").replace("-", "_"), None)
            if value is not None:
                return flag, value
        return None


def _periods(value: int, option: str) -> int:
    """A count of periods: 1 to ``PERIODS_MAX``.

    Raises:
        TriageError: Below 1 or above ``PERIODS_MAX``, naming ``option``.
    """
    if value < 1:
        raise TriageError(f"{option} must be at least 1, not {value}.")
    if value > PERIODS_MAX:
        raise TriageError(f"{option} counts periods: at most {PERIODS_MAX:,}, not {value}.")
    return value


def is_share(value: float) -> bool:
    """Whether ``value`` is a share of a total: above 0 and at most 1 (NaN and inf are not)."""
    return math.isfinite(value) and 0.0 < value <= 1.0


def _share(value: float, option: str) -> float:
    """A share of total error, above 0 and at most 1.

    Raises:
        TriageError: Not a share, naming ``option``.
    """
    if not is_share(value):
        raise TriageError(
            f"{option} must be a fraction in (0, 1], e.g. {TARGET_SHARE.shown()}, not {value}."
        )
    return value


def _repeat(value: str, option: str) -> tuple[int, int]:
    """``"3/4"`` -> (3, 4).

    Raises:
        TriageError: Not two whole numbers with 1 <= N <= M, naming ``option``.
    """
    match = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", value or "")
    if not match:
        raise TriageError(
            f"{option} must be N/M, e.g. {REPEAT.shown()}, not {value!r}.",
            hint="N/M: in the worst set in at least N of the last M cycles.",
        )
    n, m = int(match[1]), int(match[2])
    if not 1 <= n <= m:
        raise TriageError(
            f"{option} {value}: N must be between 1 and M.", hint=f"For example {REPEAT.shown()}."
        )
    return n, m


def _show_repeat(value: tuple[int, int]) -> str:
    return f"{value[0]}/{value[1]}"


def _forecast_name(value: str, option: str) -> str:
    """A competing forecast's ``<name>`` (its column is ``forecast_<name>``).

    Raises:
        TriageError: Not lower-case letters, digits and ``_``, naming ``option``.
    """
    name = value.strip()
    if schema.competing_name(schema.COMPETING_PREFIX + name) is None:
        raise TriageError(
            f"{option} {value!r}: a forecast name is lower-case letters, digits and _.",
            hint=f"Name the forecast_<name> column without its prefix, e.g. {STAT_NAME.shown()} "
            f"for {schema.COMPETING_PREFIX}{STAT_NAME.shown()}.",
        )
    return name


def _any(value: Any, option: str) -> Any:
    """No check here: the loader checks a lag against the file's lags."""
    return value


WINDOW: Setting[int] = Setting(
    name="window",
    default=13,
    flags=("--window",),
    help="latest periods with actual demand to score (default {default})",
    convert=int,
    check=_periods,
)
SEASON: Setting[int] = Setting(
    name="season",
    default=1,
    flags=("--season",),
    help="seasonal period of the naive baseline (default {default})",
    convert=int,
    check=_periods,
)
TARGET_SHARE: Setting[float] = Setting(
    name="target_share",
    default=0.8,
    flags=("--cover", "--target"),
    help="share of total error the worst-offender set covers (default: config, else {default})",
    convert=float,
    check=_share,
    metavar="F",
    config_key="target_share",
)
REPEAT: Setting[tuple[int, int]] = Setting(
    name="repeat",
    default=(3, 4),
    flags=("--repeat",),
    help="repeat offender: in the worst set in at least N of the last M cycles (default {default})",
    convert=str,
    check=_repeat,
    metavar="N/M",
    show=_show_repeat,
)
LAG: Setting[int | None] = Setting(
    name="lag",
    default=None,
    flags=("--lag",),
    help="forecast lag to score, when the file holds several",
    convert=int,
    check=_any,
)

STAT_NAME: Setting[str] = Setting(
    name="stat_name",
    default="stat",
    flags=("--stat-name",),
    help="competing forecast the overrides are also valued against: the column "
    "forecast_NAME (default {default}, when the file has it)",
    convert=str,
    check=_forecast_name,
    metavar="NAME",
)


def _megabytes(value: int, option: str) -> int:
    """A size in MB, 0 or more.

    Raises:
        TriageError: Below 0, naming ``option``.
    """
    if value < 0:
        raise TriageError(f"{option} is a size in MB, 0 or more, not {value}.")
    return value


#: The reopen cache's bound (``triage.core.cache``); not a scoring setting, so not in
#: :data:`SETTINGS`. 0 keeps nothing.
CACHE_LIMIT_MB: Setting[int] = Setting(
    name="cache_limit_mb",
    default=8192,
    flags=("--cache-limit",),
    help="largest size of the reopen cache of loaded files, in MB; the least recently opened "
    "files go first (default {default}; 0 keeps nothing)",
    convert=int,
    check=_megabytes,
    metavar="MB",
)

#: Every declaration, in the order of :class:`ScoreSettings`' fields.
SETTINGS: tuple[Setting[Any], ...] = (WINDOW, SEASON, TARGET_SHARE, REPEAT, LAG, STAT_NAME)


@dataclass(frozen=True)
class ScoreSettings:
    """How a portfolio is scored and its worst offenders are chosen (defaults: the
    declarations above)."""

    window: int = WINDOW.default
    """Latest calendar periods with any actual demand that make up the scoring window."""
    season: int = SEASON.default
    """Seasonal period m of the naive baseline (1 = last period's actual)."""
    target_share: float = TARGET_SHARE.default
    """Share of total error (0-1] the worst-offender set covers."""
    repeat: tuple[int, int] = REPEAT.default
    """Repeat offender: in the worst-offender set in at least N of the last M cycles."""
    lag: int | None = LAG.default
    """Forecast lag to score, when the file holds several (None: the file's only lag)."""
    stat_name: str = STAT_NAME.default
    """The statistical forecast overrides are also valued against: the competing forecast
    ``forecast_<stat_name>``, when the file has it."""

    @classmethod
    def from_args(cls, args: argparse.Namespace, config: object | None = None) -> ScoreSettings:
        """The settings of a parsed command line, over the configuration, over the defaults.

        A setting whose option the command does not have, or that was not given, takes the
        configuration's value where the file has the key (``config``: a
        ``triage.core.config.Config``, which imports this module, so it is not named in the
        signature), else the declared default. Given values are checked in the order of
        :data:`SETTINGS`.

        Raises:
            TriageError: A given value cannot be used; the message names the option.
        """
        values: dict[str, Any] = {}
        for setting in SETTINGS:
            given = setting.given(args)
            if given is not None:
                flag, value = given
                values[setting.name] = setting.check(value, flag)
            elif config is not None and setting.config_key is not None:
                values[setting.name] = getattr(config, setting.config_key)
        return cls(**values)
