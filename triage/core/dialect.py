"""How a portfolio file writes its cells, when that differs from triage's default.

Many planning systems export "regional" CSV: fields separated by semicolons, decimal commas
(``1,5``) and day-first dates (``01.10.2025``), often below a title block. triage reads such
files only when told how, with explicit options (:class:`FileOptions`: ``--sep``,
``--decimal``, ``--date-format``, ``--header-row``); it never guesses. When a file looks like
one of these and the options are missing, the loader refuses it and names the options that
would read it (:func:`date_formats` and :meth:`FileOptions.command_line` word that advice).

This module owns the options: their defaults, what each accepts, and how they are written on a
command line. Cells are parsed by ``triage.core.read`` (numbers, dates), which reads them with
the options given here. Writing files with the same conventions (exports "as the file came") is
meant to go through :meth:`FileOptions.format_number` and :meth:`FileOptions.format_period`.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass

from triage.core.errors import TriageError

#: Field separators a CSV file may use, by the name a message gives them.
SEPARATORS: dict[str, str] = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}
#: Decimal marks of numbers written as text.
DECIMALS: tuple[str, ...] = (".", ",")
#: Directives a date format may use: day, month, year (four or two digits), a literal %.
DATE_DIRECTIVES: tuple[str, ...] = ("%d", "%m", "%Y", "%y", "%%")
#: Highest header row accepted: a title block is a few rows; a larger number is a typo.
HEADER_ROW_MAX = 10_000
#: Formats the loader tries on periods that are not ISO, only to name the option that reads
#: them in its message (never to read them): day-first and month-first with the usual marks.
CANDIDATE_FORMATS: tuple[str, ...] = (
    "%d.%m.%Y",
    "%m.%d.%Y",
    "%d/%m/%Y",
    "%m/%d/%Y",
    "%d-%m-%Y",
    "%m-%d-%Y",
    "%Y/%m/%d",
    "%Y.%m.%d",
    "%d.%m.%y",
    "%m.%d.%y",
    "%d/%m/%y",
    "%m/%d/%y",
    "%m.%Y",
    "%m/%Y",
)


@dataclass(frozen=True)
class FileOptions:
    """How the cells of a file are written (the default is triage's own format).

    Attributes:
        sep: CSV field separator (``,`` ``;`` ``|`` or tab).
        decimal: Decimal mark of numbers written as text (``.`` or ``,``), in every file type.
            With ``,`` no thousands separator is read: ``1.500`` is refused, never 1500 or 1.5.
        date_format: How periods written as text are read, with ``%d``, ``%m``, ``%Y``/``%y``
            (e.g. ``%d.%m.%Y`` for ``01.10.2025``); None: ISO ``YYYY-MM-DD`` / ``YYYY-MM``.
            Without ``%d`` a period is a month, read as its first day. Date cells (xlsx) and
            date columns (Parquet) are dates already and are read as they are.
        header_row: The row of the header, counted from 1 as a spreadsheet does (CSV: the line,
            rows above it are skipped as they are); None: the first row (CSV) or the first
            non-empty row (xlsx).
    """

    sep: str = ","
    decimal: str = "."
    date_format: str | None = None
    header_row: int | None = None

    def command_line(self) -> str:
        """The options that differ from the default, as typed on a command line."""
        parts = []
        if self.sep != ",":
            parts.append("--sep tab" if self.sep == "\t" else f"--sep '{self.sep}'")
        if self.decimal != ".":
            parts.append(f"--decimal {self.decimal}")
        if self.date_format is not None:
            parts.append(f"--date-format {self.date_format}")
        if self.header_row is not None:
            parts.append(f"--header-row {self.header_row}")
        return " ".join(parts)

    def format_number(self, value: float) -> str:
        """A number as the file would write it (the shortest text that reads back exactly).

        For exports that follow the file's conventions; ``load`` reads the result back as
        ``value``.
        """
        text = repr(float(value))
        if text.endswith(".0"):
            text = text[:-2]
        return text.replace(".", self.decimal) if self.decimal != "." else text

    def format_period(self, day: dt.date) -> str:
        """A period as the file would write it (``date_format``, else ISO ``YYYY-MM-DD``)."""
        return day.strftime(self.date_format) if self.date_format else day.isoformat()


def file_options(
    *,
    sep: str | None = None,
    decimal: str | None = None,
    date_format: str | None = None,
    header_row: int | None = None,
) -> FileOptions | None:
    """Check the options as given on the command line; None when none is given.

    ``sep`` may be written as the character, or as ``tab`` or ``\\t`` for a tab.

    Raises:
        TriageError: An option triage cannot read a file with, naming it and what to write.
    """
    if sep is None and decimal is None and date_format is None and header_row is None:
        return None
    chosen_sep = ","
    if sep is not None:
        chosen_sep = "\t" if sep.strip().lower() in ("tab", "\\t") else sep
        if chosen_sep not in SEPARATORS:
            raise TriageError(
                f"--sep {sep!r} is not a separator triage reads.",
                hint="Write --sep ';' (semicolon), --sep '|' (pipe), --sep tab, or leave it out "
                "for commas. Quote ; and | so that the shell passes them on.",
            )
    chosen_decimal = "."
    if decimal is not None:
        chosen_decimal = decimal.strip()
        if chosen_decimal not in DECIMALS:
            raise TriageError(
                f"--decimal {decimal!r} is not a decimal mark triage reads.",
                hint="Write --decimal , for numbers such as 1,5, or leave it out for 1.5.",
            )
    if sep is not None and chosen_sep == chosen_decimal:
        raise TriageError(
            f"--sep and --decimal are both '{chosen_sep}': a number such as 1{chosen_sep}5 "
            "would be two fields.",
            hint="Files with decimal commas separate their fields with semicolons: "
            "--sep ';' --decimal ,",
        )
    if date_format is not None:
        _check_date_format(date_format)
    if header_row is not None and not 1 <= header_row <= HEADER_ROW_MAX:
        raise TriageError(
            f"--header-row counts rows from 1 (the first row of the file): at most "
            f"{HEADER_ROW_MAX:,}, not {header_row}.",
            hint="Give the row number of the header as a spreadsheet shows it.",
        )
    return FileOptions(chosen_sep, chosen_decimal, date_format, header_row)


_DIRECTIVE = re.compile(r"%.?")


def _check_date_format(text: str) -> None:
    hint = (
        "Write the format with %d (day), %m (month) and %Y (four-digit year) or %y (two "
        "digits), and the characters between them as in the file: --date-format %d.%m.%Y "
        "reads 01.10.2025, --date-format %m/%d/%Y reads 10/01/2025, --date-format %m.%Y reads "
        "10.2025 (the month)."
    )
    directives = _DIRECTIVE.findall(text)
    unknown = [d for d in directives if d not in DATE_DIRECTIVES]
    if unknown:
        raise TriageError(
            f"--date-format {text!r}: {unknown[0]!r} is not a directive triage reads "
            "(periods are dates, without times or month names).",
            hint=hint,
        )
    used = [d for d in directives if d != "%%"]
    years = sum(d in ("%Y", "%y") for d in used)
    if years != 1 or used.count("%m") != 1 or used.count("%d") > 1:
        raise TriageError(
            f"--date-format {text!r} must name the year and the month once each "
            "(and the day at most once).",
            hint=hint,
        )
    # Two directives side by side (%d%m) cannot be told apart in 1112025.
    if re.search(r"%[dmYy]%[dmYy]", text):
        raise TriageError(
            f"--date-format {text!r} has two numbers with nothing between them, which cannot "
            "be told apart (is 1112025 1 November or 11 January?).",
            hint=hint,
        )


def date_formats(sample: list[str]) -> list[str]:
    """The candidate formats that read every text of ``sample`` (digits 0-9 only).

    For advice in messages only: several formats may fit (``01.02.2025`` is day-first or
    month-first), and the loader never picks one itself.
    """
    texts = [s.strip() for s in sample if s.strip()]
    if not texts or any(ch.isdigit() and not ch.isascii() for s in texts for ch in s):
        return []
    fits = []
    for fmt in CANDIDATE_FORMATS:
        try:
            for text in texts:
                dt.datetime.strptime(text, fmt)
        except ValueError:
            continue
        fits.append(fmt)
    return fits


def date_format_advice(sample: list[str]) -> str:
    """A sentence naming the ``--date-format`` that reads ``sample``, or '' when none fits."""
    fits = date_formats(sample)
    example = next((s.strip() for s in sample if s.strip()), "")
    if len(fits) == 1:
        return f"Read them with --date-format {fits[0]}."
    if len(fits) > 1:
        first, second = fits[0], fits[1]
        return (
            f"'{example}' could be day-first or month-first: read the file with --date-format "
            f"{first} if {_first_field(first)} comes first, --date-format {second} if "
            f"{_first_field(second)} does."
        )
    return ""


def _first_field(fmt: str) -> str:
    first = _DIRECTIVE.search(fmt)
    return {"%d": "the day", "%m": "the month"}.get(first.group() if first else "", "the year")


def looks_like_decimal_comma(texts: list[str]) -> bool:
    """Whether number texts use a decimal comma (``1,5``, ``-0,25``) and none a decimal point."""
    comma = re.compile(r"^\s*[+-]?[0-9]*,[0-9]+\s*$")
    point = re.compile(r"^\s*[+-]?[0-9]*\.[0-9]+\s*$")
    cells = [t for t in texts if t.strip()]
    return any(comma.match(t) for t in cells) and not any(point.match(t) for t in cells)
