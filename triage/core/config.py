"""The optional user configuration file (reviewer, root causes, target share).

The file is TOML, read from ``--config PATH`` or from ``config.toml`` in the user config folder
(``platformdirs.user_config_dir("triage")``). Every key is optional::

    reviewer = "Ana Ruiz"          # name stored with each decision (default: the login name)
    target_share = 0.8             # share of total error the worst-offender list should cover
    ledger = "triage-ledger.sqlite"  # the review folder's ledger: a name in the folder, or a path

    [root_causes]                  # replaces the whole default list, in this order
    promo = "Promotion or event"
    big_order = "One-off large order"

Root causes are offered in list order; the first ten get the digit shortcuts 1-9 and 0. The
default list and the outcomes are in ``triage.core.vocabulary``.
"""

from __future__ import annotations

import getpass
import re
import tomllib
import unicodedata
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from triage.core.errors import TriageError
from triage.core.settings import TARGET_SHARE, is_share
from triage.core.vocabulary import DEFAULT_ROOT_CAUSES, Choice, numbered

CONFIG_NAME = "config.toml"
#: Largest configuration file read, in bytes.
CONFIG_MAX_BYTES = 1 << 20

_CODE = re.compile(r"[a-z][a-z0-9_]{0,31}")
_LABEL_MAX = 60


class ConfigError(TriageError):
    """The configuration file cannot be used as written.

    Attributes:
        path: The configuration file.
        key: The offending key (dotted for a table entry), or None for a file-level problem.
    """

    def __init__(self, path: Path, key: str | None, message: str, *, hint: str | None = None):
        self.path = path
        self.key = key
        where = f"{path}: key '{key}'" if key else str(path)
        super().__init__(f"{where}: {message}", hint=hint)


@dataclass(frozen=True)
class Config:
    """Settings after the file (if any) is applied over the defaults."""

    reviewer: str | None = None
    """Name recorded with each decision; None means the login name."""
    root_causes: tuple[Choice, ...] = DEFAULT_ROOT_CAUSES
    """Root causes offered, in shortcut order."""
    target_share: float = TARGET_SHARE.default
    """Share of total error (0-1] the worst-offender list should cover."""
    auto_advance: bool = False
    """After a decision, move to the next series without one (``N`` toggles it in the app)."""
    ledger: str | None = None
    """The ledger of every review folder: a file name kept in the portfolio's folder, or a
    path (absolute, or with a folder part, relative to the portfolio's folder); None means
    ``triage.core.ledger.FOLDER_LEDGER`` in the portfolio's folder."""
    path: Path | None = None
    """The file the settings came from, or None when none was read."""


def default_config_path() -> Path:
    """``config.toml`` in the user config folder (created by nobody; the user writes it)."""
    from platformdirs import user_config_dir

    return Path(user_config_dir("triage")) / CONFIG_NAME


def load_config(path: str | Path | None = None) -> Config:
    """Read the configuration.

    Args:
        path: A file named with ``--config``; it must exist. None reads the user config file when
            there is one and otherwise returns the defaults.

    Raises:
        ConfigError: The file is missing (when named), unreadable, not TOML, or has an unknown
            key or a value of the wrong kind; the message names the file and the key.
    """
    if path is None:
        file = default_config_path()
        if not file.exists():
            return Config()
    else:
        file = Path(path)
    if file.is_dir():
        raise ConfigError(
            file,
            None,
            "is a folder, not a configuration file",
            hint=f"Give the path of the TOML file itself, e.g. {file / CONFIG_NAME}.",
        )
    if not file.is_file():
        raise ConfigError(file, None, "no such configuration file", hint="Check the --config path.")
    try:
        size = file.stat().st_size
        if size > CONFIG_MAX_BYTES:
            raise ConfigError(
                file,
                None,
                f"is {size:,} bytes long; a configuration file is a few lines (at most "
                f"{CONFIG_MAX_BYTES:,} bytes are read)",
                hint="Check that --config names the configuration file, not a data file.",
            )
        # utf-8-sig: Windows editors save "UTF-8 with BOM"; the mark is not part of the TOML.
        data = tomllib.loads(file.read_text(encoding="utf-8-sig"))
    except UnicodeDecodeError as exc:
        raise ConfigError(file, None, f"is not UTF-8 text ({exc.reason})") from exc
    except OSError as exc:
        raise ConfigError(file, None, f"cannot be read ({exc.strerror})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(
            file, None, f"is not valid TOML: {exc}", hint="Fix the line named above."
        ) from exc
    except RecursionError as exc:
        # The TOML parser descends once per nested array or inline table.
        raise ConfigError(
            file,
            None,
            "nests arrays or tables too deeply to be read",
            hint="A configuration needs no nesting beyond [root_causes]; rewrite the file.",
        ) from exc
    return _parse(file, data)


def _parse(file: Path, data: dict[str, Any]) -> Config:
    known = {"reviewer", "root_causes", "target_share", "auto_advance", "ledger"}
    for key in data:
        if key not in known:
            raise ConfigError(
                file, key, "is not a known setting", hint=f"Use one of: {', '.join(sorted(known))}."
            )
    reviewer = data.get("reviewer")
    if reviewer is not None and (not isinstance(reviewer, str) or not reviewer.strip()):
        raise ConfigError(file, "reviewer", 'must be a non-empty text, e.g. reviewer = "Ana"')
    problem = reviewer_problem(reviewer) if reviewer is not None else None
    if problem:
        raise ConfigError(
            file, "reviewer", problem, hint='Write a plain name, e.g. reviewer = "Ana".'
        )
    share = data.get("target_share", TARGET_SHARE.default)
    if isinstance(share, bool) or not isinstance(share, int | float):
        raise ConfigError(file, "target_share", f"must be a number, not {share!r}")
    share = float(share)
    if not is_share(share):
        raise ConfigError(
            file, "target_share", f"must be above 0 and at most 1 (a share), not {share!r}"
        )
    advance = data.get("auto_advance", False)
    if not isinstance(advance, bool):
        raise ConfigError(file, "auto_advance", f"must be true or false, not {advance!r}")
    ledger = data.get("ledger")
    if ledger is not None and (
        not isinstance(ledger, str)
        or not ledger.strip()
        or ledger != ledger.strip()
        or any(ch < " " for ch in ledger)
        or ledger.endswith(("/", "\\"))
    ):
        raise ConfigError(
            file,
            "ledger",
            f'must name a ledger file, e.g. ledger = "triage-ledger.sqlite", not {ledger!r}',
            hint="A file name is kept in each portfolio's folder; a path names one file.",
        )
    causes = DEFAULT_ROOT_CAUSES
    if "root_causes" in data:
        causes = _parse_causes(file, data["root_causes"])
    return Config(
        reviewer=reviewer.strip() if reviewer else None,
        root_causes=causes,
        target_share=share,
        auto_advance=advance,
        ledger=ledger,
        path=file,
    )


def _parse_causes(file: Path, table: Any) -> tuple[Choice, ...]:
    if not isinstance(table, dict):
        raise ConfigError(
            file,
            "root_causes",
            'must be a table of code = "label" lines under [root_causes]',
        )
    if not table:
        raise ConfigError(file, "root_causes", "is empty; give at least one root cause")
    pairs: list[tuple[str, str]] = []
    for code, label in table.items():
        if not _CODE.fullmatch(code):
            raise ConfigError(
                file,
                f"root_causes.{code}",
                "is not a usable code",
                hint="Codes are lower case letters, digits and _, starting with a letter "
                "(at most 32 characters).",
            )
        if not isinstance(label, str) or not label.strip():
            raise ConfigError(file, f"root_causes.{code}", "needs a non-empty text label")
        if len(label) > _LABEL_MAX or any(ch < " " for ch in label):
            raise ConfigError(
                file,
                f"root_causes.{code}",
                f"label must be one line of at most {_LABEL_MAX} characters",
            )
        pairs.append((code, label.strip()))
    return numbered(pairs)


def reviewer_problem(name: str) -> str | None:
    """Why ``name`` cannot be stored as a reviewer's name, or None when it can.

    The ledger stores at most ``ledger.TEXT_MAX`` characters; line breaks, control characters
    and bidirectional controls would make the name show as something else in the history.
    """
    from triage.core.ledger import TEXT_MAX  # ledger imports this module: import when used
    from triage.core.text import BIDI_CONTROLS

    if len(name) > TEXT_MAX:
        return f"is {len(name):,} characters long; a reviewer's name may have at most {TEXT_MAX:,}"
    odd = sorted(
        {
            f"U+{ord(ch):04X}"
            for ch in name
            if unicodedata.category(ch) in ("Cc", "Zl", "Zp") or ord(ch) in BIDI_CONTROLS
        }
    )
    if odd:
        return (
            f"contains control or line-break characters ({', '.join(odd[:5])}), which a name "
            "shown in the decision history may not hold"
        )
    return None


def default_reviewer(config: Config | None = None) -> str:
    """The reviewer name: the configured one, else the login name, else ``"unknown"``."""
    if config is not None and config.reviewer:
        return config.reviewer
    try:
        return getpass.getuser()
    except (OSError, KeyError):
        # No LOGNAME/USER and no passwd entry (some containers): a decision still needs a name.
        return "unknown"
