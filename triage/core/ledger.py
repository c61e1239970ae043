"""The decision ledger: an append-only SQLite journal of review decisions.

Each decision a reviewer makes about a series (``item``, ``location``) in a review cycle (the ISO
date of the portfolio's latest actual period) is one row of ``event``; undoing a decision appends
an ``undo`` row that points at it. Rows are never changed or deleted (triggers refuse it), so the
file is its own audit trail. The current state of a cycle, the latest decision per series that
has not been undone, is derived from the events in SQL.

Durability (docs/ledger.md explains each choice):

* WAL journal with ``synchronous=FULL``: a decision whose ``record()`` returned survives a crash
  of the program, of the operating system and a power loss (docs/sources.md §4.1).
* Autocommit connection with one explicit ``BEGIN IMMEDIATE … COMMIT`` per decision, so a second
  session waits for the write lock (bounded by ``timeout``) instead of failing on a stale read
  snapshot, and no transaction is ever open while the reviewer thinks (docs/sources.md §4.2, §4.3).
* Every write checks the series version inside the transaction: a change made by another session
  since the reviewer looked is refused, never silently overwritten.
* A file that is not a ledger, is damaged, or comes from a newer schema is inspected through a
  read-only connection and left byte-for-byte as it was.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
import operator
import os
import re
import sqlite3
import tempfile
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any
from urllib.parse import quote

from triage.core.errors import TriageError
from triage.core.vocabulary import ADJUSTED, DEFAULT_ROOT_CAUSES, OUTCOMES, Choice

#: ``PRAGMA application_id`` of a triage ledger (the bytes ``TRLG``), so other tools and triage
#: itself can tell the file apart from any other SQLite database.
APPLICATION_ID = 0x54524C47
#: Longest note accepted, in characters (Unicode code points).
NOTE_MAX = 10_000
#: Longest item, location, reviewer or portfolio text accepted, in characters.
TEXT_MAX = 1_000
#: Ending of a per-file ledger of the older layout (``week47.ledger.sqlite``), still read.
LEDGER_SUFFIX = ".ledger.sqlite"
#: The ledger of a review folder: every portfolio file in the folder shares it.
FOLDER_LEDGER = "triage-ledger.sqlite"

DECISION = "decision"
UNDO = "undo"
#: Kinds of the ``adjustment_end`` journal: a reviewer ends an earlier cycle's adjustment, or
#: restores one ended by mistake.
END = "end"
RESTORE = "restore"

_ISO_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")


# --------------------------------------------------------------------------------------------
# Errors


class LedgerError(TriageError):
    """The ledger file cannot be opened or used as asked.

    Attributes:
        path: The ledger file.
    """

    def __init__(self, message: str, *, path: str | Path, hint: str | None = None) -> None:
        self.path = Path(path)
        super().__init__(message, hint=hint)


class LedgerBusyError(LedgerError):
    """Another session held the write lock for longer than the timeout; nothing was saved."""


class LedgerWriteError(LedgerError):
    """Writing failed (disk full, size limit, I/O error); nothing was saved, the file is intact."""


class LedgerReadOnlyError(LedgerError):
    """The ledger is open read-only, so a decision cannot be saved."""


class StaleDecisionError(LedgerError):
    """The series changed in another session since the caller last read it; nothing was saved.

    Attributes:
        cycle: Review cycle of the series.
        item: Item of the series.
        location: Location of the series.
        expected_version: Version the caller had seen.
        current_version: Version found in the ledger.
        reviewer: Who wrote the current version.
        recorded_at: When the current version was written (UTC, ISO 8601).
    """

    def __init__(
        self,
        *,
        path: Path,
        cycle: str,
        item: str,
        location: str,
        expected_version: int,
        current_version: int,
        reviewer: str,
        recorded_at: str,
    ) -> None:
        self.cycle = cycle
        self.item = item
        self.location = location
        self.expected_version = expected_version
        self.current_version = current_version
        self.reviewer = reviewer
        self.recorded_at = recorded_at
        super().__init__(
            f"Series {describe_series(item, location)} in cycle {cycle} was changed by "
            f"{reviewer!r} at {recorded_at} (now version {current_version}, you saw version "
            f"{expected_version}); nothing was saved.",
            path=path,
            hint="Reload the series, look at the newer decision, and decide again.",
        )


class DecisionError(TriageError):
    """A decision's fields are not acceptable (unknown code, note too long, bad date...)."""


def describe_series(item: str, location: str) -> str:
    """``'A-100' @ 'Lyon'`` (or just ``'A-100'``) with ``repr`` quoting, safe for any text."""
    return f"{item!r} @ {location!r}" if location else repr(item)


# --------------------------------------------------------------------------------------------
# Records


@dataclass(frozen=True)
class Line:
    """One forward period of an adjustment, as saved with the decision."""

    period: str
    """Period start date, ISO ``YYYY-MM-DD``."""
    original: float | None
    """Forward forecast before the adjustment; None where there was none."""
    adjusted: float | None
    """Forward forecast after the adjustment; None where there still is none."""


@dataclass(frozen=True)
class Event:
    """One row of the journal: a decision, or the undo of one."""

    id: int
    """Journal position; increases with every event in the file."""
    cycle: str
    """Review cycle, the ISO date of the portfolio's latest actual period."""
    item: str
    """Item of the series, exactly as in the portfolio."""
    location: str
    """Location of the series, ``""`` when the portfolio has none."""
    version: int
    """Position of this event among the series' events in the cycle (1, 2, 3, ...)."""
    kind: str
    """``"decision"`` or ``"undo"``."""
    undoes: int | None
    """For an undo, the id of the decision it reverts; None for a decision."""
    outcome: str | None
    """Outcome code (see ``OUTCOMES``); None for an undo."""
    root_cause: str | None
    """Root-cause code; None for an undo."""
    note: str
    """Free text, any Unicode, possibly several lines; ``""`` when none."""
    adjustment: str | None
    """Adjustment spec in canonical text (see ``triage.core.adjust``), or None."""
    reviewer: str
    """Who recorded the event."""
    recorded_at: str
    """When it was committed, UTC ISO 8601 with ``Z``."""
    portfolio_name: str
    """File name of the portfolio the decision was made on."""
    portfolio_fingerprint: str
    """Digest of that portfolio's content, as supplied by the caller."""
    lines: tuple[Line, ...] = ()
    """Forward periods of the adjustment, by period; empty without one."""
    group_id: int | None = None
    """The group decision (or group undo) this event is one series' part of
    (``GroupRecord.id``); None for a series-level event."""


@dataclass(frozen=True)
class Decision:
    """The effective decision for a series in a cycle: the latest one not undone."""

    cycle: str
    """Review cycle."""
    item: str
    """Item of the series."""
    location: str
    """Location of the series, ``""`` when none."""
    event_id: int
    """Id of the decision event."""
    version: int
    """Version of the decision event (the series may have later undo events)."""
    outcome: str
    """Outcome code."""
    root_cause: str
    """Root-cause code."""
    note: str
    """Free text."""
    adjustment: str | None
    """Adjustment spec in canonical text, or None."""
    reviewer: str
    """Who decided."""
    recorded_at: str
    """When, UTC ISO 8601 with ``Z``."""
    portfolio_name: str
    """File name of the portfolio."""
    portfolio_fingerprint: str
    """Digest of the portfolio's content."""
    lines: tuple[Line, ...] = ()
    """Forward periods of the adjustment."""
    group_id: int | None = None
    """The group decision this decision is one series' part of; None for a series decision."""


@dataclass(frozen=True)
class AdjustmentEnd:
    """One row of the ``adjustment_end`` journal: an adjustment ended, or an end restored."""

    id: int
    """Journal position (one sequence with ``Event.id``)."""
    kind: str
    """``"end"`` or ``"restore"``."""
    target: int
    """Id of the adjusting decision event this row is about."""
    reverts: int | None
    """For a restore, the id of the end it reverts; None for an end."""
    cycle: str
    """Review cycle in which it was recorded (the adjustment was made in an earlier one)."""
    item: str
    """Item of the series."""
    location: str
    """Location of the series, ``""`` when none."""
    note: str
    """Free text, ``""`` when none."""
    reviewer: str
    """Who recorded it."""
    recorded_at: str
    """When it was committed, UTC ISO 8601 with ``Z``."""
    portfolio_name: str
    """File name of the portfolio under review then."""
    portfolio_fingerprint: str
    """Digest of that portfolio's content."""


@dataclass(frozen=True)
class GroupRecord:
    """One row of the ``group_decision`` journal: a decision on a group of series, or its undo.

    The group's part for each series is an ordinary ``event`` row (with its lines) whose
    ``group_id`` names this record; ``items``, ``locations``, ``event_ids`` and ``versions`` list
    them in the order they were written.
    """

    id: int
    """Journal position (one sequence with ``Event.id``); the member events follow it."""
    kind: str
    """``"decision"`` or ``"undo"``."""
    undoes: int | None
    """For an undo, the id of the group decision it reverts; None for a decision."""
    cycle: str
    """Review cycle."""
    columns: tuple[str, ...]
    """The grouping columns (``location`` or attribute columns)."""
    key_values: tuple[str, ...]
    """The group's value of each grouping column."""
    outcome: str | None
    """Outcome code; None for an undo."""
    root_cause: str | None
    """Root-cause code; None for an undo."""
    note: str
    """Free text, ``""`` when none."""
    adjustment: str | None
    """The adjustment of the group's total, canonical text; None without one."""
    basis: str | None
    """How an absolute adjustment was split (``"forecasts"`` or ``"history"``); None without an
    adjustment."""
    reviewer: str
    """Who recorded it."""
    recorded_at: str
    """When it was committed, UTC ISO 8601 with ``Z``."""
    portfolio_name: str
    """File name of the portfolio."""
    portfolio_fingerprint: str
    """Digest of the portfolio's content."""
    items: tuple[str, ...] = ()
    """Items of the series it wrote an event for, in order."""
    locations: tuple[str, ...] = ()
    """Their locations, ``""`` where none."""
    event_ids: tuple[int, ...] = ()
    """Their event ids."""
    versions: tuple[int, ...] = ()
    """Their new versions in the cycle."""


@dataclass(frozen=True)
class WorstSet:
    """The worst-offender set the review list showed when a cycle was first opened."""

    cycle: str
    """Review cycle."""
    items: tuple[str, ...]
    """Items of the members, in list order (worst first)."""
    locations: tuple[str, ...]
    """Locations of the members, ``""`` where none."""
    target_share: float
    """Share of total error the set covers (the reviewer's target then)."""
    window: int
    """Scoring window in periods."""
    season: int
    """Seasonal period of the naive baseline."""
    ranked_by: str
    """``"value"`` (priced portfolio) or ``"units"``."""
    series: int
    """Series in the portfolio then."""
    reviewer: str
    """Who opened the cycle for review."""
    recorded_at: str
    """When, UTC ISO 8601 with ``Z``."""
    portfolio_name: str
    """File name of the portfolio."""
    portfolio_fingerprint: str
    """Digest of the portfolio's content."""


# --------------------------------------------------------------------------------------------
# Schema and migrations

_SCHEMA_V1 = """
CREATE TABLE event (
    id INTEGER PRIMARY KEY,
    cycle TEXT NOT NULL CHECK (cycle GLOB '[0-9][0-9][0-9][0-9]-[0-9][0-9]-[0-9][0-9]'),
    item TEXT NOT NULL,
    location TEXT NOT NULL,
    version INTEGER NOT NULL CHECK (version >= 1),
    kind TEXT NOT NULL CHECK (kind IN ('decision', 'undo')),
    undoes INTEGER UNIQUE REFERENCES event (id),
    outcome TEXT,
    root_cause TEXT,
    note TEXT NOT NULL,
    adjustment TEXT,
    reviewer TEXT NOT NULL CHECK (reviewer <> ''),
    recorded_at TEXT NOT NULL,
    portfolio_name TEXT NOT NULL,
    portfolio_fingerprint TEXT NOT NULL,
    UNIQUE (cycle, item, location, version),
    CHECK (
        (kind = 'decision' AND undoes IS NULL AND outcome IS NOT NULL AND root_cause IS NOT NULL)
        OR (kind = 'undo' AND undoes IS NOT NULL AND outcome IS NULL AND root_cause IS NULL
            AND adjustment IS NULL)
    )
) STRICT;

CREATE INDEX event_by_series ON event (item, location, cycle);

CREATE TABLE event_line (
    event_id INTEGER NOT NULL REFERENCES event (id),
    period TEXT NOT NULL CHECK (period GLOB '[0-9][0-9][0-9][0-9]-[0-9][0-9]-[0-9][0-9]'),
    original REAL,
    adjusted REAL,
    PRIMARY KEY (event_id, period)
) STRICT, WITHOUT ROWID;

CREATE TRIGGER event_no_update BEFORE UPDATE ON event
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: events cannot be changed'); END;
CREATE TRIGGER event_no_delete BEFORE DELETE ON event
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: events cannot be deleted'); END;
CREATE TRIGGER event_line_no_update BEFORE UPDATE ON event_line
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: lines cannot be changed'); END;
CREATE TRIGGER event_line_no_delete BEFORE DELETE ON event_line
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: lines cannot be deleted'); END;

-- Versions are gapless per series and cycle whoever writes the file.
CREATE TRIGGER event_version_next BEFORE INSERT ON event
WHEN NEW.version <> 1 + (SELECT coalesce(max(version), 0) FROM event
                         WHERE cycle = NEW.cycle AND item = NEW.item AND location = NEW.location)
BEGIN SELECT RAISE(ABORT, 'event version must follow the latest version of its series'); END;

-- An undo reverts a decision of its own series and cycle.
CREATE TRIGGER event_undo_same_series BEFORE INSERT ON event
WHEN NEW.kind = 'undo' AND NOT EXISTS (
    SELECT 1 FROM event AS d
    WHERE d.id = NEW.undoes AND d.kind = 'decision'
      AND d.cycle = NEW.cycle AND d.item = NEW.item AND d.location = NEW.location)
BEGIN SELECT RAISE(ABORT, 'an undo must revert a decision of the same series and cycle'); END;
"""


def _migrate_to_v1(con: sqlite3.Connection) -> None:
    """Create the version-1 schema in an empty database."""
    for statement in _split_sql(_SCHEMA_V1):
        con.execute(statement)


def _split_sql(script: str) -> list[str]:
    """Statements of a script (``executescript`` would COMMIT the open transaction)."""
    statements: list[str] = []
    buffer = ""
    for line in script.splitlines(keepends=True):
        if line.lstrip().startswith("--"):
            continue
        buffer += line
        if sqlite3.complete_statement(buffer):
            statements.append(buffer.strip())
            buffer = ""
    if buffer.strip():
        raise AssertionError(f"incomplete statement in schema: {buffer!r}")
    return statements


# Version 2 adds two journals beside ``event``, both append-only like it:
#
# * ``adjustment_end``: a reviewer ends an earlier cycle's adjustment (it stops being carried
#   into later exports), or restores one ended by mistake. Its ids continue the journal
#   positions of ``event`` (one sequence across both tables, given explicitly by the writer), so
#   the two read as one journal in order. ``event``'s own CHECK on ``kind`` cannot change
#   without copying the table, which this migration never does.
# * ``worst_snapshot`` and ``worst_member``: the worst-offender set the review list showed when a
#   cycle was first opened for review, so repeat offenders count what reviewers saw.
_SCHEMA_V2 = """
CREATE TABLE adjustment_end (
    id INTEGER PRIMARY KEY,
    kind TEXT NOT NULL CHECK (kind IN ('end', 'restore')),
    target INTEGER NOT NULL REFERENCES event (id),
    reverts INTEGER UNIQUE REFERENCES adjustment_end (id),
    cycle TEXT NOT NULL CHECK (cycle GLOB '[0-9][0-9][0-9][0-9]-[0-9][0-9]-[0-9][0-9]'),
    item TEXT NOT NULL,
    location TEXT NOT NULL,
    note TEXT NOT NULL,
    reviewer TEXT NOT NULL CHECK (reviewer <> ''),
    recorded_at TEXT NOT NULL,
    portfolio_name TEXT NOT NULL,
    portfolio_fingerprint TEXT NOT NULL,
    CHECK ((kind = 'end' AND reverts IS NULL) OR (kind = 'restore' AND reverts IS NOT NULL))
) STRICT;

CREATE INDEX adjustment_end_by_target ON adjustment_end (target);

CREATE TRIGGER adjustment_end_no_update BEFORE UPDATE ON adjustment_end
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: ends cannot be changed'); END;
CREATE TRIGGER adjustment_end_no_delete BEFORE DELETE ON adjustment_end
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: ends cannot be deleted'); END;

-- One journal: every new row, in either table, takes the next position.
CREATE TRIGGER adjustment_end_next_id BEFORE INSERT ON adjustment_end
WHEN NEW.id < 1
  OR NEW.id <= (SELECT coalesce(max(id), 0) FROM event)
  OR NEW.id <= (SELECT coalesce(max(id), 0) FROM adjustment_end)
BEGIN SELECT RAISE(ABORT, 'a journal position must follow the latest one'); END;
CREATE TRIGGER event_next_id BEFORE INSERT ON event
WHEN NEW.id < 1 OR NEW.id <= (SELECT coalesce(max(id), 0) FROM adjustment_end)
BEGIN SELECT RAISE(ABORT, 'a journal position must follow the latest one'); END;

-- An end points at an adjustment of the same series made in an earlier cycle.
CREATE TRIGGER adjustment_end_target BEFORE INSERT ON adjustment_end
WHEN NEW.kind = 'end' AND NOT EXISTS (
    SELECT 1 FROM event AS d
    WHERE d.id = NEW.target AND d.kind = 'decision' AND d.outcome = 'adjusted'
      AND d.item = NEW.item AND d.location = NEW.location AND d.cycle < NEW.cycle)
BEGIN SELECT RAISE(ABORT, 'an end must point at an earlier cycle''s adjustment of the series');
END;
-- An adjustment is ended once until restored.
CREATE TRIGGER adjustment_end_once BEFORE INSERT ON adjustment_end
WHEN NEW.kind = 'end' AND EXISTS (
    SELECT 1 FROM adjustment_end AS e
    WHERE e.target = NEW.target AND e.kind = 'end'
      AND NOT EXISTS (SELECT 1 FROM adjustment_end AS r WHERE r.reverts = e.id))
BEGIN SELECT RAISE(ABORT, 'the adjustment is already ended'); END;
-- A restore reverts an end of the same adjustment.
CREATE TRIGGER adjustment_restore_end BEFORE INSERT ON adjustment_end
WHEN NEW.kind = 'restore' AND NOT EXISTS (
    SELECT 1 FROM adjustment_end AS e
    WHERE e.id = NEW.reverts AND e.kind = 'end' AND e.target = NEW.target
      AND e.item = NEW.item AND e.location = NEW.location)
BEGIN SELECT RAISE(ABORT, 'a restore must revert an end of the same adjustment'); END;

CREATE TABLE worst_snapshot (
    cycle TEXT PRIMARY KEY
        CHECK (cycle GLOB '[0-9][0-9][0-9][0-9]-[0-9][0-9]-[0-9][0-9]'),
    recorded_at TEXT NOT NULL,
    reviewer TEXT NOT NULL,
    portfolio_name TEXT NOT NULL,
    portfolio_fingerprint TEXT NOT NULL,
    target_share REAL NOT NULL CHECK (target_share > 0 AND target_share <= 1),
    window_periods INTEGER NOT NULL CHECK (window_periods >= 1),
    season INTEGER NOT NULL CHECK (season >= 1),
    ranked_by TEXT NOT NULL CHECK (ranked_by IN ('value', 'units')),
    series INTEGER NOT NULL CHECK (series >= 0),
    members INTEGER NOT NULL CHECK (members >= 0)
) STRICT, WITHOUT ROWID;

CREATE TABLE worst_member (
    cycle TEXT NOT NULL REFERENCES worst_snapshot (cycle),
    item TEXT NOT NULL,
    location TEXT NOT NULL,
    position INTEGER NOT NULL CHECK (position >= 1),
    PRIMARY KEY (cycle, item, location)
) STRICT, WITHOUT ROWID;

CREATE TRIGGER worst_snapshot_no_update BEFORE UPDATE ON worst_snapshot
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: snapshots cannot be changed');
END;
CREATE TRIGGER worst_snapshot_no_delete BEFORE DELETE ON worst_snapshot
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: snapshots cannot be deleted');
END;
CREATE TRIGGER worst_member_no_update BEFORE UPDATE ON worst_member
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: snapshots cannot be changed');
END;
CREATE TRIGGER worst_member_no_delete BEFORE DELETE ON worst_member
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: snapshots cannot be deleted');
END;
"""


def _migrate_to_v2(con: sqlite3.Connection) -> None:
    """Add the end-of-adjustment journal and the worst-set snapshots (no existing row moves)."""
    for statement in _split_sql(_SCHEMA_V2):
        con.execute(statement)


# Version 3 adds group decisions: one ``group_decision`` row (who, when, the outcome, root cause,
# note, the adjustment of the group's total and how it was split, the grouping columns and the
# group's key values) and one ordinary ``event`` row per series of the group, with its lines,
# whose new ``group_id`` names it; all in one transaction. An undo of the group is a
# ``group_decision`` row of kind 'undo' with one undo event per series it reverts. The new column
# is added (``ALTER TABLE ... ADD COLUMN``, NULL in every existing row): no row is copied,
# changed or moved. Positions continue the one journal sequence.
_SCHEMA_V3 = """
CREATE TABLE group_decision (
    id INTEGER PRIMARY KEY,
    kind TEXT NOT NULL CHECK (kind IN ('decision', 'undo')),
    undoes INTEGER UNIQUE REFERENCES group_decision (id),
    cycle TEXT NOT NULL CHECK (cycle GLOB '[0-9][0-9][0-9][0-9]-[0-9][0-9]-[0-9][0-9]'),
    columns TEXT NOT NULL CHECK (json_valid(columns) AND json_type(columns) = 'array'),
    key_values TEXT NOT NULL CHECK (json_valid(key_values) AND json_type(key_values) = 'array'),
    outcome TEXT,
    root_cause TEXT,
    note TEXT NOT NULL,
    adjustment TEXT,
    basis TEXT CHECK (basis IN ('forecasts', 'history')),
    reviewer TEXT NOT NULL CHECK (reviewer <> ''),
    recorded_at TEXT NOT NULL,
    portfolio_name TEXT NOT NULL,
    portfolio_fingerprint TEXT NOT NULL,
    CHECK (json_array_length(columns) = json_array_length(key_values)),
    CHECK (
        (kind = 'decision' AND undoes IS NULL AND outcome IS NOT NULL AND root_cause IS NOT NULL
         AND (adjustment IS NULL) = (basis IS NULL))
        OR (kind = 'undo' AND undoes IS NOT NULL AND outcome IS NULL AND root_cause IS NULL
            AND adjustment IS NULL AND basis IS NULL)
    )
) STRICT;

ALTER TABLE event ADD COLUMN group_id INTEGER REFERENCES group_decision (id);

CREATE INDEX event_by_group ON event (group_id) WHERE group_id IS NOT NULL;

CREATE TRIGGER group_decision_no_update BEFORE UPDATE ON group_decision
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: group decisions cannot be changed');
END;
CREATE TRIGGER group_decision_no_delete BEFORE DELETE ON group_decision
BEGIN SELECT RAISE(ABORT, 'the decision ledger is append-only: group decisions cannot be deleted');
END;

-- One journal across the three tables.
CREATE TRIGGER group_decision_next_id BEFORE INSERT ON group_decision
WHEN NEW.id < 1
  OR NEW.id <= (SELECT coalesce(max(id), 0) FROM event)
  OR NEW.id <= (SELECT coalesce(max(id), 0) FROM adjustment_end)
  OR NEW.id <= (SELECT coalesce(max(id), 0) FROM group_decision)
BEGIN SELECT RAISE(ABORT, 'a journal position must follow the latest one'); END;
CREATE TRIGGER event_after_group BEFORE INSERT ON event
WHEN NEW.id <= (SELECT coalesce(max(id), 0) FROM group_decision)
BEGIN SELECT RAISE(ABORT, 'a journal position must follow the latest one'); END;
CREATE TRIGGER adjustment_end_after_group BEFORE INSERT ON adjustment_end
WHEN NEW.id <= (SELECT coalesce(max(id), 0) FROM group_decision)
BEGIN SELECT RAISE(ABORT, 'a journal position must follow the latest one'); END;

-- A group undo reverts a group decision of its cycle.
CREATE TRIGGER group_undo_target BEFORE INSERT ON group_decision
WHEN NEW.kind = 'undo' AND NOT EXISTS (
    SELECT 1 FROM group_decision AS g
    WHERE g.id = NEW.undoes AND g.kind = 'decision' AND g.cycle = NEW.cycle)
BEGIN SELECT RAISE(ABORT, 'a group undo must revert a group decision of the same cycle'); END;

-- A series' part of a group decision carries the group's cycle, outcome, root cause and
-- adjustment; its part of a group undo reverts that series' part of the undone decision.
CREATE TRIGGER event_group_part BEFORE INSERT ON event
WHEN NEW.group_id IS NOT NULL AND NOT EXISTS (
    SELECT 1 FROM group_decision AS g
    WHERE g.id = NEW.group_id AND g.cycle = NEW.cycle AND g.kind = NEW.kind
      AND (g.kind = 'undo' OR (NEW.outcome = g.outcome AND NEW.root_cause = g.root_cause
                               AND NEW.adjustment IS g.adjustment))
      AND (g.kind = 'decision' OR EXISTS (
          SELECT 1 FROM event AS d WHERE d.id = NEW.undoes AND d.group_id = g.undoes)))
BEGIN SELECT RAISE(ABORT, 'an event of a group must match its group decision'); END;
"""


def _migrate_to_v3(con: sqlite3.Connection) -> None:
    """Add the group decisions (a new table and a NULL column on ``event``; no row moves)."""
    for statement in _split_sql(_SCHEMA_V3):
        con.execute(statement)


#: ``MIGRATIONS[i]`` brings a ledger from schema version ``i`` to ``i + 1``. Append only.
MIGRATIONS: list[Callable[[sqlite3.Connection], None]] = [
    _migrate_to_v1,
    _migrate_to_v2,
    _migrate_to_v3,
]
#: Schema version written by this code (``PRAGMA user_version``).
SCHEMA_VERSION = len(MIGRATIONS)


# --------------------------------------------------------------------------------------------
# Paths and permissions


def _dir_writable(folder: Path) -> bool:
    """Whether files can be created in ``folder``: ``os.access`` and a real probe file.

    ``os.access`` alone is not enough: root passes it everywhere, and mounts, ACLs and sandboxes
    can refuse what the mode bits allow (docs/sources.md §4.4).
    """
    if not folder.is_dir() or not os.access(folder, os.W_OK | os.X_OK):
        return False
    try:
        fd, probe = tempfile.mkstemp(prefix=".triage-probe-", dir=folder)
    except OSError:
        return False
    os.close(fd)
    with suppress(OSError):
        os.unlink(probe)
    return True


@dataclass(frozen=True)
class LedgerLocation:
    """Where the ledger of a portfolio (or of a review folder) is, and what to tell the user."""

    path: Path
    """The ledger file."""
    exists: bool
    """Whether the file exists now (a review creates it when it does not)."""
    notices: tuple[str, ...] = ()
    """Things the reviewer should know: a new ledger, an older per-file ledger, a fallback."""
    legacy: bool = False
    """The file is a per-file ledger of the older layout (``<portfolio stem>.ledger.sqlite``)."""
    stand_in_for: Path | None = None
    """The folder's own ledger, when the folder cannot be written and ``path`` (in the user data
    folder) stands in for it; None when ``path`` is the folder's ledger."""


def _fallback_folder(folder: Path) -> Path:
    """The user-data folder that stands in for a review folder nobody may write to.

    One per review folder (its name and a digest of its absolute path), so two read-only
    folders never share a ledger.
    """
    from platformdirs import user_data_dir

    digest = hashlib.sha256(os.fsencode(str(folder))).hexdigest()[:12]
    label = re.sub(r"[^A-Za-z0-9._-]", "_", folder.name)[:40] or "root"
    return Path(user_data_dir("triage")) / "folders" / f"{label}-{digest}"


def locate_ledger(
    portfolio_path: str | Path, *, name: str | None = None, for_writing: bool = True
) -> LedgerLocation:
    """Find the ledger of a portfolio: one ledger per review folder.

    A planner drops each week's file into one folder; every file there shares the folder's
    ledger, ``FOLDER_LEDGER`` (or ``name``, the ``ledger`` setting of the configuration: a file
    name kept in the folder, or a path). In order:

    1. the folder ledger, when it exists;
    2. else the portfolio's own per-file ledger of the older layout,
       ``<portfolio stem>.ledger.sqlite`` beside it, when it exists (a notice says how to make
       it the folder's ledger; docs/ledger.md);
    3. else, without a configured name, the one per-file ledger in the folder when there is
       exactly one (an earlier week's: its decisions carry on);
    4. else the folder ledger, new (a notice says where it is). When the folder cannot be
       written a ledger in the user data folder stands in for it (``_fallback_folder``), and
       an older per-file fallback (``<stem>.ledger.sqlite`` there) is still used when present.

    Args:
        portfolio_path: A portfolio file, or the review folder itself.
        name: The configured ledger name or path; default ``FOLDER_LEDGER``.
        for_writing: Look for a ledger to record decisions in (a review); False for commands
            that only read (they never get the user-data fallback of a folder they could read).

    Raises:
        LedgerError: For writing, neither the folder nor the user data folder can be written.
    """
    source = Path(portfolio_path).expanduser().absolute()
    is_folder = source.is_dir()
    folder = source if is_folder else source.parent
    configured = Path(name).expanduser() if name else None
    target = folder / FOLDER_LEDGER
    if configured is not None:
        target = configured if configured.is_absolute() else folder / configured
    if configured is not None and (configured.is_absolute() or len(configured.parts) > 1):
        # A path of its own: the configuration decides, nothing else is looked for.
        notices = () if target.exists() or not for_writing else (_new_notice(target, folder),)
        return LedgerLocation(target, target.exists(), notices)

    writable = _dir_writable(folder) if for_writing else True
    own = None if is_folder else folder / f"{source.stem}{LEDGER_SUFFIX}"
    others = sorted(
        p for p in folder.glob(f"*{LEDGER_SUFFIX}") if p.is_file() and p not in (target, own)
    )
    if not writable:
        return _unwritable_folder(source, folder, target, own)
    if target.exists():
        notices = ()
        if own is not None and own.exists():
            notices = (
                f"{own.name} (a per-file ledger of an earlier triage) is not read: this folder's "
                f"decisions are kept in {target.name}. Read the older file with "
                f"`triage history {own}`; docs/ledger.md says how to bring it along.",
            )
        return LedgerLocation(target, True, notices)
    if own is not None and own.exists():
        return LedgerLocation(own, True, (_legacy_notice(own, target),), legacy=True)
    if configured is None and len(others) == 1:
        return LedgerLocation(others[0], True, (_legacy_notice(others[0], target),), legacy=True)
    if not for_writing:
        # A review of this folder that could not write it kept its decisions here.
        from platformdirs import user_data_dir

        stand_ins = [_fallback_folder(folder) / target.name]
        if own is not None:
            stand_ins.append(Path(user_data_dir("triage")) / own.name)
        for stand_in in stand_ins:
            if stand_in.exists():
                return LedgerLocation(
                    stand_in,
                    True,
                    (f"Reading {stand_in}, where reviews of {folder} keep their decisions.",),
                    legacy=stand_in.name.endswith(LEDGER_SUFFIX),
                )
    notices_list: list[str] = []
    if for_writing:
        notices_list.append(_new_notice(target, folder))
    if others:
        notices_list.append(
            f"The per-file ledgers of an earlier triage in {folder} ("
            + ", ".join(p.name for p in others[:5])
            + (f" and {len(others) - 5} more" if len(others) > 5 else "")
            + f") are not read; read them with `triage history FILE`, or see docs/ledger.md "
            f"to bring one along as {target.name}."
        )
    return LedgerLocation(target, False, tuple(notices_list))


def _new_notice(target: Path, folder: Path) -> str:
    return (
        f"Decisions are kept in {target}: one ledger for every portfolio file in {folder}, so "
        "next week's file finds this week's decisions."
    )


def _legacy_notice(old: Path, target: Path) -> str:
    return (
        f"Using {old}, a per-file ledger of an earlier triage. To make it the ledger of every "
        f"file in this folder, rename it to {target.name} when no triage session is open "
        "(docs/ledger.md, 'Moving to one ledger per folder'); nothing in it changes."
    )


def _unwritable_folder(
    source: Path, folder: Path, target: Path, own: Path | None
) -> LedgerLocation:
    """A review in a folder nobody may write: a ledger in the user data folder stands in."""
    stand_in = _fallback_folder(folder)
    fallback = stand_in / target.name
    older = None
    if own is not None:
        from platformdirs import user_data_dir

        older = Path(user_data_dir("triage")) / own.name
    chosen, legacy = fallback, False
    if not fallback.exists() and older is not None and older.exists():
        chosen, legacy = older, True
    try:
        chosen.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LedgerError(
            f"Cannot keep decisions for {source.name}: {folder} is not writable and "
            f"{chosen.parent} cannot be created ({exc.strerror}).",
            path=chosen,
            hint="Pass --ledger PATH with a file in a folder you can write to.",
        ) from exc
    notice = f"The folder {folder} is not writable, so its decisions are kept in {chosen}" + (
        " (a per-file ledger of an earlier triage)." if legacy else "."
    )
    unused = [p for p in (target, own) if p is not None and p.exists()]
    if unused:
        notice += " The read-only ledger " + " and ".join(map(str, unused)) + " was not used."
    return LedgerLocation(chosen, chosen.exists(), (notice,), legacy=legacy, stand_in_for=target)


def default_ledger_path(portfolio_path: str | Path) -> tuple[Path, str | None]:
    """Where a review of the portfolio records decisions, and what to tell the reviewer.

    ``locate_ledger`` for writing, without a configured name; its notices joined.

    Raises:
        LedgerError: Neither the folder nor the user data folder can be written.
    """
    where = locate_ledger(portfolio_path, for_writing=True)
    return where.path, " ".join(where.notices) or None


def _sidecars(path: Path) -> list[Path]:
    return [path.with_name(path.name + suffix) for suffix in ("-wal", "-shm")]


def _unwritable_reason(path: Path) -> str | None:
    """Why the ledger cannot be written, or None when it can."""
    reasons: list[str] = []
    if path.exists() and not os.access(path, os.W_OK):
        reasons.append("the file is read-only")
    # WAL keeps its -wal and -shm files beside the ledger, so the folder must be writable too
    # (SQLITE_READONLY_DIRECTORY, measured; docs/sources.md §4.4).
    if not _dir_writable(path.parent):
        reasons.append(f"the folder {path.parent} is not writable")
    for side in _sidecars(path):
        if side.exists() and not os.access(side, os.W_OK):
            reasons.append(f"{side.name} belongs to another user and is read-only")
    return " and ".join(reasons) or None


def _uri(path: Path, mode: str, *, immutable: bool = False) -> str:
    uri = f"file:{quote(str(path))}?mode={mode}"
    return uri + "&immutable=1" if immutable else uri


# --------------------------------------------------------------------------------------------
# Error translation


def _translate(exc: sqlite3.Error, path: Path, *, saving: str | None = None) -> LedgerError:
    """Turn an SQLite error into a message for the reviewer, by error code (not message text).

    Args:
        exc: The error.
        path: The ledger file.
        saving: What was being saved (``"decision"``, ``"undo"``), or None for a read or open.
    """
    name = getattr(exc, "sqlite_errorname", "") or ""
    lost = f"The {saving} was NOT saved: " if saving else ""
    if name.startswith(("SQLITE_BUSY", "SQLITE_LOCKED")):
        if saving:
            text = (
                "The decision ledger is being written by another session; nothing was saved; "
                "retry in a moment"
            )
        else:
            text = "The decision ledger is being written by another session; retry in a moment"
        return LedgerBusyError(
            text,
            path=path,
            hint=f"Another triage session (or a program) holds {path.name} open for writing.",
        )
    if name.startswith(("SQLITE_FULL", "SQLITE_IOERR")):
        reason = (
            "the disk is full"
            if name.startswith("SQLITE_FULL")
            else "the disk write failed; the disk may be full, over a size limit or failing"
        )
        if not saving:
            # Opening a WAL ledger, even to read it, writes its -shm index beside it
            # (sqlite.org/walformat.html): a read can fail on a full disk too.
            return LedgerWriteError(
                f"The ledger {path} could not be opened: {reason} ({name}: {exc}). Even reading "
                "a ledger writes small working files beside it (-wal, -shm). Every decision in "
                "it is kept.",
                path=path,
                hint="Free disk space or raise the file-size limit (ulimit -f), then try again.",
            )
        return LedgerWriteError(
            f"{lost}{reason} ({name}: {exc}). "
            f"The ledger {path} still holds every earlier decision.",
            path=path,
            hint="Free disk space (or fix the disk) and save again.",
        )
    if name.startswith("SQLITE_READONLY"):
        return LedgerReadOnlyError(
            f"{lost}the ledger {path} cannot be written ({name}: {exc}).",
            path=path,
            hint="Check the permissions of the ledger and its folder, or pass another --ledger.",
        )
    if name.startswith("SQLITE_NOTADB"):
        return LedgerError(
            f"{path} is not a triage decision ledger (it is not an SQLite database, or its "
            "first page is damaged). It was left unchanged.",
            path=path,
            hint="Restore it from a backup if it was a ledger; else pass another --ledger path.",
        )
    if name.startswith("SQLITE_CORRUPT"):
        return _damaged(path, f"{name}: {exc}")
    if name.startswith(("SQLITE_CANTOPEN", "SQLITE_PERM", "SQLITE_AUTH")):
        return LedgerError(
            f"{lost}the ledger {path} cannot be opened ({name}: {exc}).",
            path=path,
            hint="Check that the folder exists and that you may read it.",
        )
    return LedgerError(
        f"{lost}the ledger {path} failed: {name or type(exc).__name__}: {exc}", path=path
    )


def _damaged(path: Path, detail: str) -> LedgerError:
    return LedgerError(
        f"The decision ledger {path} is damaged ({detail}). It was left unchanged.",
        path=path,
        hint="Restore it from a backup, or move it aside to start a new ledger "
        "(`sqlite3 FILE .recover` may rescue decisions from a copy).",
    )


# --------------------------------------------------------------------------------------------
# Validation


def _check_date(value: object, what: str) -> str:
    if not isinstance(value, str) or not _ISO_DATE.fullmatch(value):
        raise DecisionError(f"{what} {value!r} is not an ISO date (YYYY-MM-DD)")
    try:
        date.fromisoformat(value)
    except ValueError as exc:
        raise DecisionError(f"{what} {value!r} is not a calendar date ({exc})") from exc
    return value


def _check_text(value: object, what: str, *, allow_empty: bool, limit: int = TEXT_MAX) -> str:
    if not isinstance(value, str):
        raise DecisionError(f"{what} must be text, not {type(value).__name__}")
    # Only "" is empty: series keys are compared byte-exact, so "  " is a (strange) key.
    if not allow_empty and not value:
        raise DecisionError(f"{what} is empty")
    if len(value) > limit:
        raise DecisionError(
            f"{what} is {len(value):,} characters long; the limit is {limit:,}",
            hint="Shorten it; nothing was saved.",
        )
    try:
        value.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise DecisionError(
            f"{what} contains a character that is not valid Unicode text "
            f"(position {exc.start}: {value[exc.start]!r})"
        ) from exc
    return value


def _check_reviewer(value: object) -> str:
    reviewer = _check_text(value, "reviewer", allow_empty=False)
    if not reviewer.strip():
        raise DecisionError("reviewer is blank", hint='Set reviewer = "..." in the config file.')
    return reviewer


def _check_code(value: object, choices: Sequence[Choice], what: str) -> str:
    codes = [c.code for c in choices]
    if value not in codes:
        raise DecisionError(f"unknown {what} {value!r}; use one of: {', '.join(codes)}")
    return str(value)


def _number(value: object, what: str) -> float | None:
    if value is None:
        return None
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError) as exc:
        raise DecisionError(f"{what} {value!r} is not a number") from exc
    if math.isnan(number):
        return None
    if math.isinf(number):
        raise DecisionError(f"{what} {value!r} is not a finite number")
    return number


def _check_lines(lines: Iterable[Line | Sequence[Any]] | None) -> tuple[Line, ...]:
    if lines is None:
        return ()
    out: list[Line] = []
    seen: set[str] = set()
    for raw in lines:
        if isinstance(raw, Line):
            period, original, adjusted = raw.period, raw.original, raw.adjusted
        else:
            try:
                period, original, adjusted = raw
            except (TypeError, ValueError) as exc:
                raise DecisionError(
                    f"adjustment line {raw!r} is not (period, original, adjusted)"
                ) from exc
        period = _check_date(period, "adjustment period")
        if period in seen:
            raise DecisionError(f"adjustment period {period} is given twice")
        seen.add(period)
        out.append(
            Line(
                period,
                _number(original, f"original forecast for {period}"),
                _number(adjusted, f"adjusted forecast for {period}"),
            )
        )
    return tuple(sorted(out, key=lambda line: line.period))


def _checked_row_fields(
    cycle: object,
    item: object,
    location: object,
    reviewer: object,
    note: object,
    portfolio_name: object,
    portfolio_fingerprint: object,
) -> tuple[str, str, str, str, str, str, str]:
    """The fields an undo, an end and a restore share, checked as a decision's are."""
    return (
        _check_date(cycle, "cycle"),
        _check_text(item, "item", allow_empty=False),
        _check_text(location, "location", allow_empty=True),
        _check_reviewer(reviewer),
        _check_text(note, "note", allow_empty=True, limit=NOTE_MAX),
        _check_text(portfolio_name, "portfolio name", allow_empty=True),
        _check_text(portfolio_fingerprint, "portfolio fingerprint", allow_empty=True),
    )


def _check_members(
    items: Sequence[str], locations: Sequence[str], expected: Sequence[int]
) -> list[tuple[str, str, int]]:
    """A group's series and the versions expected of them, each series once."""
    if not (len(items) == len(locations) == len(expected)):
        raise DecisionError(
            f"{len(items)} items, {len(locations)} locations and {len(expected)} versions given"
        )
    if not items:
        raise DecisionError("a group decision needs at least one series")
    members = [
        (
            _check_text(item, "item", allow_empty=False),
            _check_text(location, "location", allow_empty=True),
            _check_version(version),
        )
        for item, location, version in zip(items, locations, expected, strict=True)
    ]
    if len({(m[0], m[1]) for m in members}) != len(members):
        raise DecisionError("a series is given twice in the group")
    return members


def _check_group_lines(
    periods: Sequence[str],
    original: Sequence[Sequence[float | None]],
    adjusted: Sequence[Sequence[float | None]],
    members: Sequence[object],
    adjustment: str | None,
) -> list[tuple[int, str, float | None, float | None]]:
    """``(member position, period, original, adjusted)`` rows of a group decision's lines."""
    dates = [_check_date(p, "adjustment period") for p in periods]
    if len(set(dates)) != len(dates):
        raise DecisionError("an adjustment period is given twice")
    if (adjustment is None) != (not dates):
        raise DecisionError("adjustment lines go with an adjustment, and an adjustment has some")
    if not dates:
        return []
    if len(original) != len(members) or len(adjusted) != len(members):
        raise DecisionError(
            f"{len(members)} series but {len(original)} rows of original and {len(adjusted)} "
            "rows of adjusted values"
        )
    out: list[tuple[int, str, float | None, float | None]] = []
    for k, (before, after) in enumerate(zip(original, adjusted, strict=True)):
        if len(before) != len(dates) or len(after) != len(dates):
            raise DecisionError(f"series {k + 1} of the group has not one value per period")
        for period, o, a in zip(dates, before, after, strict=True):
            out.append(
                (
                    k,
                    period,
                    _number(o, f"original forecast for {period}"),
                    _number(a, f"adjusted forecast for {period}"),
                )
            )
    return out


def _json_list(values: Sequence[str]) -> str:
    """Text values as a JSON array, exactly (any Unicode, control characters escaped)."""
    return json.dumps(list(values), ensure_ascii=False)


def _check_version(value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise DecisionError(f"expected_version must be a whole number >= 0, not {value!r}")
    return value


def _next_position(con: sqlite3.Connection) -> int:
    """The next journal position, shared by ``event``, ``adjustment_end`` and ``group_decision``
    (in a write; a ledger opened for writing is at the latest schema, which has all three).

    A group decision's undo can be the journal's latest row without an event after it (its
    members were already undone one by one): the next position must follow it too."""
    row = con.execute(
        "SELECT max(coalesce((SELECT max(id) FROM event), 0),"
        " coalesce((SELECT max(id) FROM adjustment_end), 0),"
        " coalesce((SELECT max(id) FROM group_decision), 0)) + 1"
    ).fetchone()
    return int(row[0])


def _check_id(value: object, what: str) -> int:
    number = None
    if not isinstance(value, bool):
        with suppress(TypeError):
            number = operator.index(value)  # type: ignore[arg-type]
    if number is None or number < 1:
        raise DecisionError(f"{what} must be a ledger id (a whole number >= 1), not {value!r}")
    return number


def _utc_now() -> str:
    return datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


# --------------------------------------------------------------------------------------------
# The ledger

_EVENT_COLUMNS = (
    "id, cycle, item, location, version, kind, undoes, outcome, root_cause, note, adjustment, "
    "reviewer, recorded_at, portfolio_name, portfolio_fingerprint"
)

# Decisions no undo points at, numbered per series from the newest: ``newest = 1`` is effective.
_EFFECTIVE = """
WITH effective AS (
    SELECT e.*, row_number() OVER (
        PARTITION BY e.item, e.location ORDER BY e.version DESC) AS newest
    FROM event AS e
    WHERE e.cycle = :cycle AND e.kind = 'decision'
      AND NOT EXISTS (SELECT 1 FROM event AS u WHERE u.undoes = e.id)
)
"""


@dataclass(frozen=True)
class _Inspection:
    application_id: int
    user_version: int
    tables: int
    immutable: bool
    wal_bytes: int


class Ledger:
    """An open decision ledger. Use ``Ledger.open``; close it, or use it as a context manager.

    One ``Ledger`` may be shared between threads (calls are serialised by a lock); several
    processes may open the same file at once (SQLite serialises their writes).

    Attributes:
        path: The ledger file.
        read_only: Whether decisions can be saved through this object.
        notice: Why the ledger was opened read-only although writing was asked for, or None.
        root_causes: Root causes accepted by ``record``.
        schema_version: Schema of the file as opened. A ledger opened for writing is always at
            ``SCHEMA_VERSION``; one opened read-only is read as it is, never migrated (schema 1
            has no ends of adjustments and no worst-set snapshots: they read as none).
    """

    def __init__(
        self,
        con: sqlite3.Connection,
        path: Path,
        *,
        read_only: bool,
        notice: str | None,
        root_causes: tuple[Choice, ...],
        schema_version: int = SCHEMA_VERSION,
    ) -> None:
        self._con = con
        self._lock = threading.RLock()
        self._batch: sqlite3.Connection | None = None
        self.path = path
        self.read_only = read_only
        self.notice = notice
        self.root_causes = root_causes
        self.schema_version = schema_version
        self._ro_reason = notice
        # The (device, inode) of the file and its -wal as opened for writing: a save checks the
        # path still names them, so a ledger deleted or replaced meanwhile is not written into
        # an unlinked file and reported as saved.
        self._identity: tuple[tuple[int, int] | None, ...] | None = (
            None if read_only else _identity(path)
        )

    # ---- opening ---------------------------------------------------------------------------

    @classmethod
    def open(
        cls,
        path: str | Path,
        *,
        read_only: bool = False,
        timeout: float = 5.0,
        root_causes: Sequence[Choice] | None = None,
    ) -> Ledger:
        """Open (or create) a ledger.

        Args:
            path: The ledger file; created with the current schema when it does not exist.
            read_only: Open for reading only, even when the file could be written.
            timeout: Seconds to wait for another session's write lock before giving up.
            root_causes: Root causes ``record`` accepts; default ``DEFAULT_ROOT_CAUSES``.

        Raises:
            LedgerError: The file is not a triage ledger, is damaged, has a newer schema, does not
                exist (read-only), or cannot be created. The file is left unchanged.
            LedgerBusyError: Creating or upgrading the file waited longer than ``timeout``.
        """
        target = Path(path).expanduser().absolute()
        causes = tuple(root_causes) if root_causes is not None else DEFAULT_ROOT_CAUSES
        if target.is_symlink() and not target.exists():
            # The ledger the link pointed to has moved or gone: a new, empty ledger in its place
            # would hide the loss of every decision in it.
            raise LedgerError(
                f"{target} is a symbolic link to {os.readlink(target)}, which does not exist "
                "(or the link points to itself); no ledger was opened or created",
                path=target,
                hint="Restore the ledger the link points to, or fix or remove the link.",
            )
        if target.is_dir():
            raise LedgerError(
                f"{target} is a folder, not a ledger file",
                path=target,
                hint="Pass the path of a .ledger.sqlite file.",
            )
        if not target.exists():
            if read_only:
                raise LedgerError(
                    f"There is no decision ledger at {target}",
                    path=target,
                    hint="Check the --ledger path.",
                )
            if not _dir_writable(target.parent):
                raise LedgerError(
                    f"Cannot create the decision ledger {target}: the folder does not exist or "
                    "is not writable",
                    path=target,
                    hint="Pass --ledger PATH with a file in a folder you can write to.",
                )
            return cls._open_rw(target, timeout, causes)

        info = _inspect(target, timeout)
        if info.application_id == 0 and info.tables == 0:
            # An empty SQLite file (zero bytes, or a creation that was interrupted before its
            # schema committed) holds nothing to protect; it becomes a ledger.
            if read_only:
                raise LedgerError(f"{target} is an empty file, not yet a ledger", path=target)
            reason = _unwritable_reason(target)
            if reason:
                raise LedgerError(
                    f"Cannot create the decision ledger {target}: {reason}", path=target
                )
            return cls._open_rw(target, timeout, causes)
        if info.application_id != APPLICATION_ID:
            owner = (
                "an SQLite database of another program"
                if info.application_id == 0
                else "an SQLite database of another program "
                f"(application id {info.application_id:#x})"
            )
            raise LedgerError(
                f"{target} is not a triage decision ledger: it is {owner}. It was left unchanged.",
                path=target,
                hint="Pass another --ledger path.",
            )
        if info.user_version > SCHEMA_VERSION:
            raise LedgerError(
                f"{target} was written by a newer triage (ledger schema {info.user_version}; "
                f"this version reads up to {SCHEMA_VERSION}). It was left unchanged.",
                path=target,
                hint="Upgrade triage to work with this ledger.",
            )

        unwritable = _unwritable_reason(target)
        if not read_only and unwritable is None:
            return cls._open_rw(target, timeout, causes)
        if read_only and unwritable is None:
            return cls._open_query_only(target, timeout, causes)
        reason = "opened read-only on request" if read_only else unwritable
        con = _connect(target, "ro", timeout, immutable=info.immutable)
        notice = None
        if not read_only:
            notice = (
                f"The decision ledger {target} is read-only ({reason}); decisions can be viewed "
                "but cannot be saved."
            )
            if info.immutable and info.wal_bytes:
                notice += " Decisions saved moments ago by another session may be missing."
            if info.user_version < SCHEMA_VERSION:
                later = (
                    "group decisions"
                    if info.user_version >= 2
                    else ("ended adjustments, worst-set snapshots and group decisions")
                )
                notice += (
                    f" It has ledger schema {info.user_version} and is read as it is ({later} "
                    f"need schema {SCHEMA_VERSION}; it is upgraded when it is next opened where "
                    "it can be written)."
                )
        ledger = cls(
            con,
            target,
            read_only=True,
            notice=notice,
            root_causes=causes,
            schema_version=info.user_version,
        )
        ledger._ro_reason = reason
        return ledger

    @classmethod
    def _open_query_only(cls, path: Path, timeout: float, causes: tuple[Choice, ...]) -> Ledger:
        """Read a ledger that could be written, without changing it or leaving files behind.

        A ``mode=ro`` connection cannot remove the ``-wal`` and ``-shm`` files WAL mode creates
        beside the database, so they would stay after every read-only command. A read-write
        connection with ``query_only`` refuses every change through SQL, does not migrate the
        schema, and as the last connection to close it removes both files, as SQLite does for
        any WAL database (sqlite.org/wal.html, "The WAL File"; sqlite.org/pragma.html,
        query_only). Older schemas are read as they are.
        """
        con = _connect(path, "rw", timeout)
        try:
            con.execute("PRAGMA query_only = ON")
            with suppress(sqlite3.Error):
                con.execute("PRAGMA foreign_keys = ON")
            version = int(con.execute("PRAGMA user_version").fetchone()[0])
        except sqlite3.Error as exc:
            con.close()
            raise _translate(exc, path) from exc
        ledger = cls(
            con, path, read_only=True, notice=None, root_causes=causes, schema_version=version
        )
        ledger._ro_reason = "opened read-only on request"
        return ledger

    @classmethod
    def _open_rw(cls, path: Path, timeout: float, causes: tuple[Choice, ...]) -> Ledger:
        deadline = time.monotonic() + timeout
        while True:
            try:
                return cls._open_rw_once(path, timeout, causes)
            except LedgerBusyError:
                # Switching a new file to WAL or creating the schema can return SQLITE_BUSY at
                # once, without the busy handler, while another session sets up the same file
                # (docs/sources.md §4.2): try again until the timeout.
                if time.monotonic() >= deadline:
                    raise
                time.sleep(0.05)

    @classmethod
    def _open_rw_once(cls, path: Path, timeout: float, causes: tuple[Choice, ...]) -> Ledger:
        con = _connect(path, "rwc", timeout)
        try:
            mode = con.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise LedgerError(
                    f"The decision ledger {path} cannot use write-ahead logging (journal mode "
                    f"stayed {mode!r}); is it on a network folder?",
                    path=path,
                    hint="Keep the ledger on a local disk.",
                )
            # FULL is the compile-time default here, not everywhere: set it (docs/sources.md §4.1).
            con.execute("PRAGMA synchronous = FULL")
            con.execute("PRAGMA foreign_keys = ON")
            _upgrade(con, path)
        except sqlite3.Error as exc:
            con.close()
            raise _translate(exc, path) from exc
        except BaseException:
            con.close()
            raise
        return cls(con, path, read_only=False, notice=None, root_causes=causes)

    # ---- context manager -------------------------------------------------------------------

    def close(self) -> None:
        """Close the connection (idempotent). Every saved decision is already on disk."""
        with self._lock:
            self._con.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # ---- writing ---------------------------------------------------------------------------

    def record(
        self,
        cycle: str,
        item: str,
        location: str,
        *,
        outcome: str,
        root_cause: str,
        note: str,
        reviewer: str,
        adjustment: str | None = None,
        lines: Iterable[Line | Sequence[Any]] | None = None,
        portfolio_name: str,
        portfolio_fingerprint: str,
        expected_version: int,
    ) -> Event:
        """Save a decision for a series; returns after it is durably committed.

        Args:
            cycle: Review cycle, ISO date of the portfolio's latest actual period.
            item: Item of the series.
            location: Location of the series, ``""`` when none.
            outcome: Outcome code from ``OUTCOMES``.
            root_cause: Root-cause code from ``root_causes``.
            note: Free text, up to ``NOTE_MAX`` characters.
            reviewer: Who decides.
            adjustment: Canonical adjustment spec; required when (and only when) the outcome is
                ``"adjusted"``.
            lines: ``(period, original, adjusted)`` per forward period the adjustment covers.
            portfolio_name: File name of the portfolio.
            portfolio_fingerprint: Digest of the portfolio's content.
            expected_version: The series' version the reviewer last saw (0 if it had none).

        Raises:
            DecisionError: A field is not acceptable.
            StaleDecisionError: Another session changed the series since ``expected_version``.
            LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was saved.
        """
        self._check_writable("decision")
        cycle = _check_date(cycle, "cycle")
        item = _check_text(item, "item", allow_empty=False)
        location = _check_text(location, "location", allow_empty=True)
        outcome = _check_code(outcome, OUTCOMES, "outcome")
        root_cause = _check_code(root_cause, self.root_causes, "root cause")
        note = _check_text(note, "note", allow_empty=True, limit=NOTE_MAX)
        reviewer = _check_reviewer(reviewer)
        if adjustment is not None:
            adjustment = _check_text(adjustment, "adjustment", allow_empty=False)
        if (outcome == ADJUSTED) != (adjustment is not None):
            raise DecisionError(
                "an adjustment goes with the outcome 'adjusted' and only with it "
                f"(outcome {outcome!r}, adjustment {adjustment!r})"
            )
        checked_lines = _check_lines(lines)
        if checked_lines and adjustment is None:
            raise DecisionError("adjustment lines were given without an adjustment")
        portfolio_name = _check_text(portfolio_name, "portfolio name", allow_empty=True)
        portfolio_fingerprint = _check_text(
            portfolio_fingerprint, "portfolio fingerprint", allow_empty=True
        )
        expected_version = _check_version(expected_version)

        with self._writing("decision") as con:
            version = self._claim_version(con, cycle, item, location, expected_version)
            recorded_at = _utc_now()
            event_id = con.execute(
                "INSERT INTO event (id, cycle, item, location, version, kind, undoes, outcome, "
                "root_cause, note, adjustment, reviewer, recorded_at, portfolio_name, "
                "portfolio_fingerprint) VALUES (?, ?, ?, ?, ?, 'decision', NULL, ?, ?, ?, ?, ?, "
                "?, ?, ?)",
                (
                    _next_position(con),
                    cycle,
                    item,
                    location,
                    version,
                    outcome,
                    root_cause,
                    note,
                    adjustment,
                    reviewer,
                    recorded_at,
                    portfolio_name,
                    portfolio_fingerprint,
                ),
            ).lastrowid
            con.executemany(
                "INSERT INTO event_line (event_id, period, original, adjusted) VALUES (?, ?, ?, ?)",
                [(event_id, ln.period, ln.original, ln.adjusted) for ln in checked_lines],
            )
        assert event_id is not None
        return Event(
            event_id,
            cycle,
            item,
            location,
            version,
            DECISION,
            None,
            outcome,
            root_cause,
            note,
            adjustment,
            reviewer,
            recorded_at,
            portfolio_name,
            portfolio_fingerprint,
            checked_lines,
        )

    def undo(
        self,
        cycle: str,
        item: str,
        location: str,
        *,
        reviewer: str,
        expected_version: int,
        portfolio_name: str,
        portfolio_fingerprint: str,
        note: str = "",
    ) -> Event:
        """Revert the series' effective decision in the cycle by appending an undo event.

        Undoing again reverts the decision before that one, and so on.

        Raises:
            DecisionError: The series has no effective decision in the cycle.
            StaleDecisionError, LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: as for
                ``record``; nothing was saved.
        """
        self._check_writable("undo")
        cycle, item, location, reviewer, note, portfolio_name, portfolio_fingerprint = (
            _checked_row_fields(
                cycle, item, location, reviewer, note, portfolio_name, portfolio_fingerprint
            )
        )
        expected_version = _check_version(expected_version)

        with self._write("undo") as con:
            version = self._claim_version(con, cycle, item, location, expected_version)
            row = con.execute(
                "SELECT e.id FROM event AS e WHERE e.cycle = ? AND e.item = ? AND e.location = ?"
                " AND e.kind = 'decision'"
                " AND NOT EXISTS (SELECT 1 FROM event AS u WHERE u.undoes = e.id)"
                " ORDER BY e.version DESC LIMIT 1",
                (cycle, item, location),
            ).fetchone()
            if row is None:
                raise DecisionError(
                    f"Series {describe_series(item, location)} has no decision to undo in "
                    f"cycle {cycle}"
                )
            target = int(row[0])
            recorded_at = _utc_now()
            event_id = con.execute(
                "INSERT INTO event (id, cycle, item, location, version, kind, undoes, outcome, "
                "root_cause, note, adjustment, reviewer, recorded_at, portfolio_name, "
                "portfolio_fingerprint) VALUES (?, ?, ?, ?, ?, 'undo', ?, NULL, NULL, ?, NULL, ?,"
                " ?, ?, ?)",
                (
                    _next_position(con),
                    cycle,
                    item,
                    location,
                    version,
                    target,
                    note,
                    reviewer,
                    recorded_at,
                    portfolio_name,
                    portfolio_fingerprint,
                ),
            ).lastrowid
        assert event_id is not None
        return Event(
            event_id,
            cycle,
            item,
            location,
            version,
            UNDO,
            target,
            None,
            None,
            note,
            None,
            reviewer,
            recorded_at,
            portfolio_name,
            portfolio_fingerprint,
            (),
        )

    def record_group(
        self,
        cycle: str,
        *,
        columns: Sequence[str],
        key_values: Sequence[str],
        items: Sequence[str],
        locations: Sequence[str],
        expected_versions: Sequence[int],
        outcome: str,
        root_cause: str,
        note: str,
        reviewer: str,
        portfolio_name: str,
        portfolio_fingerprint: str,
        adjustment: str | None = None,
        basis: str | None = None,
        periods: Sequence[str] = (),
        original: Sequence[Sequence[float | None]] = (),
        adjusted: Sequence[Sequence[float | None]] = (),
    ) -> GroupRecord:
        """Save one decision on a group of series, all or nothing; returns after the commit.

        One ``group_decision`` row and, for each series, an ordinary decision event naming it
        (``group_id``) with the series' lines: a series shows the group decision as its
        effective decision until a later decision of its own (or an undo) replaces it.

        Args:
            cycle: Review cycle.
            columns: The grouping columns.
            key_values: The group's value of each grouping column.
            items: Items of the group's series.
            locations: Their locations (``""`` where none).
            expected_versions: Each series' version the reviewer last saw (0 if none).
            outcome: Outcome code, the same for every series.
            root_cause: Root-cause code.
            note: Free text, up to ``NOTE_MAX`` characters.
            reviewer: Who decides.
            portfolio_name: File name of the portfolio.
            portfolio_fingerprint: Digest of the portfolio's content.
            adjustment: The adjustment of the group's total, canonical text; required when (and
                only when) the outcome is ``"adjusted"``.
            basis: How an absolute adjustment was split (``"forecasts"`` or ``"history"``);
                given with an adjustment only.
            periods: ISO dates of the adjusted periods (the lines' periods).
            original: Series x periods forecast before (None or NaN where missing).
            adjusted: Series x periods forecast after (the split).

        Raises:
            DecisionError: A field is not acceptable.
            StaleDecisionError: Another session changed one of the series; nothing was saved.
            LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was saved.
        """
        self._check_writable("group decision")
        cycle = _check_date(cycle, "cycle")
        outcome = _check_code(outcome, OUTCOMES, "outcome")
        root_cause = _check_code(root_cause, self.root_causes, "root cause")
        note = _check_text(note, "note", allow_empty=True, limit=NOTE_MAX)
        reviewer = _check_reviewer(reviewer)
        portfolio_name = _check_text(portfolio_name, "portfolio name", allow_empty=True)
        portfolio_fingerprint = _check_text(
            portfolio_fingerprint, "portfolio fingerprint", allow_empty=True
        )
        names = [_check_text(c, "grouping column", allow_empty=False) for c in columns]
        values = [_check_text(v, "group key value", allow_empty=True) for v in key_values]
        if not names or len(names) != len(values) or len(set(names)) != len(names):
            raise DecisionError(
                f"a group needs one key value per grouping column, each column once "
                f"(columns {names!r}, values {values!r})"
            )
        members = _check_members(items, locations, expected_versions)
        if adjustment is not None:
            adjustment = _check_text(adjustment, "adjustment", allow_empty=False)
        if (outcome == ADJUSTED) != (adjustment is not None):
            raise DecisionError(
                "an adjustment goes with the outcome 'adjusted' and only with it "
                f"(outcome {outcome!r}, adjustment {adjustment!r})"
            )
        if (basis is not None) != (adjustment is not None) or basis not in (
            None,
            "forecasts",
            "history",
        ):
            raise DecisionError(
                f"the split basis must be 'forecasts' or 'history', given with an adjustment "
                f"only (basis {basis!r})"
            )
        line_rows = _check_group_lines(periods, original, adjusted, members, adjustment)
        with self._writing("group decision") as con:
            self._claim_versions(con, cycle, members)
            position = _next_position(con)
            recorded_at = _utc_now()
            con.execute(
                "INSERT INTO group_decision (id, kind, undoes, cycle, columns, key_values, outcome,"
                " root_cause, note, adjustment, basis, reviewer, recorded_at, portfolio_name,"
                " portfolio_fingerprint) VALUES (?, 'decision', NULL, ?, ?, ?, ?, ?, ?, ?, ?, ?,"
                " ?, ?, ?)",
                (
                    position,
                    cycle,
                    _json_list(names),
                    _json_list(values),
                    outcome,
                    root_cause,
                    note,
                    adjustment,
                    basis,
                    reviewer,
                    recorded_at,
                    portfolio_name,
                    portfolio_fingerprint,
                ),
            )
            ids = range(position + 1, position + 1 + len(members))
            con.executemany(
                "INSERT INTO event (id, cycle, item, location, version, kind, undoes, outcome, "
                "root_cause, note, adjustment, reviewer, recorded_at, portfolio_name, "
                "portfolio_fingerprint, group_id) VALUES (?, ?, ?, ?, ?, 'decision', NULL, ?, ?,"
                " ?, ?, ?, ?, ?, ?, ?)",
                [
                    (
                        event_id,
                        cycle,
                        item,
                        location,
                        version + 1,
                        outcome,
                        root_cause,
                        note,
                        adjustment,
                        reviewer,
                        recorded_at,
                        portfolio_name,
                        portfolio_fingerprint,
                        position,
                    )
                    for event_id, (item, location, version) in zip(ids, members, strict=True)
                ],
            )
            con.executemany(
                "INSERT INTO event_line (event_id, period, original, adjusted) VALUES (?, ?, ?, ?)",
                ((position + 1 + k, period, o, a) for k, period, o, a in line_rows),
            )
        return GroupRecord(
            position,
            DECISION,
            None,
            cycle,
            tuple(names),
            tuple(values),
            outcome,
            root_cause,
            note,
            adjustment,
            basis,
            reviewer,
            recorded_at,
            portfolio_name,
            portfolio_fingerprint,
            items=tuple(m[0] for m in members),
            locations=tuple(m[1] for m in members),
            event_ids=tuple(ids),
            versions=tuple(m[2] + 1 for m in members),
        )

    def undo_group(
        self,
        cycle: str,
        group_id: int,
        *,
        reviewer: str,
        portfolio_name: str,
        portfolio_fingerprint: str,
        note: str = "",
    ) -> GroupRecord:
        """Undo a group decision whole: one group undo and an undo event for each series whose
        part of it is not undone yet, all or nothing.

        A series whose part a later decision of its own has replaced keeps that decision (its
        part is undone under it, so undoing the later decision does not bring the group's
        back); every other series reverts to the decision it had before the group's. The
        undo names the group decision, so no version is expected: what it does does not depend
        on what other sessions wrote meanwhile.

        Raises:
            DecisionError: ``group_id`` is not a group decision of ``cycle``, or it is undone.
            LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was saved.
        """
        self._check_writable("undo of the group decision")
        cycle = _check_date(cycle, "cycle")
        reviewer = _check_reviewer(reviewer)
        note = _check_text(note, "note", allow_empty=True, limit=NOTE_MAX)
        portfolio_name = _check_text(portfolio_name, "portfolio name", allow_empty=True)
        portfolio_fingerprint = _check_text(
            portfolio_fingerprint, "portfolio fingerprint", allow_empty=True
        )
        group_id = _check_id(group_id, "group decision")
        if self.schema_version < 3:
            raise DecisionError(f"ledger entry #{group_id} is not a group decision")
        with self._write("undo of the group decision") as con:
            row = con.execute(
                "SELECT kind, cycle, columns, key_values FROM group_decision WHERE id = ?",
                (group_id,),
            ).fetchone()
            if row is None or row[0] != DECISION or row[1] != cycle:
                raise DecisionError(
                    f"ledger entry #{group_id} is not a group decision of cycle {cycle}"
                )
            done = con.execute(
                "SELECT reviewer, recorded_at FROM group_decision WHERE undoes = ?", (group_id,)
            ).fetchone()
            if done is not None:
                raise DecisionError(
                    f"the group decision #{group_id} was already undone by {done[0]!r} at {done[1]}"
                )
            parts = con.execute(
                "SELECT d.id, d.item, d.location, (SELECT max(v.version) FROM event AS v"
                " WHERE v.cycle = d.cycle AND v.item = d.item AND v.location = d.location)"
                " FROM event AS d WHERE d.group_id = ? AND d.kind = 'decision'"
                " AND NOT EXISTS (SELECT 1 FROM event AS u WHERE u.undoes = d.id) ORDER BY d.id",
                (group_id,),
            ).fetchall()
            position = _next_position(con)
            recorded_at = _utc_now()
            con.execute(
                "INSERT INTO group_decision (id, kind, undoes, cycle, columns, key_values, outcome,"
                " root_cause, note, adjustment, basis, reviewer, recorded_at, portfolio_name,"
                " portfolio_fingerprint) VALUES (?, 'undo', ?, ?, ?, ?, NULL, NULL, ?, NULL, NULL,"
                " ?, ?, ?, ?)",
                (
                    position,
                    group_id,
                    cycle,
                    row[2],
                    row[3],
                    note,
                    reviewer,
                    recorded_at,
                    portfolio_name,
                    portfolio_fingerprint,
                ),
            )
            con.executemany(
                "INSERT INTO event (id, cycle, item, location, version, kind, undoes, outcome, "
                "root_cause, note, adjustment, reviewer, recorded_at, portfolio_name, "
                "portfolio_fingerprint, group_id) VALUES (?, ?, ?, ?, ?, 'undo', ?, NULL, NULL,"
                " ?, NULL, ?, ?, ?, ?, ?)",
                [
                    (
                        position + 1 + k,
                        cycle,
                        item,
                        location,
                        int(version) + 1,
                        target,
                        note,
                        reviewer,
                        recorded_at,
                        portfolio_name,
                        portfolio_fingerprint,
                        position,
                    )
                    for k, (target, item, location, version) in enumerate(parts)
                ],
            )
        return GroupRecord(
            position,
            UNDO,
            group_id,
            cycle,
            tuple(json.loads(row[2])),
            tuple(json.loads(row[3])),
            None,
            None,
            note,
            None,
            None,
            reviewer,
            recorded_at,
            portfolio_name,
            portfolio_fingerprint,
            items=tuple(p[1] for p in parts),
            locations=tuple(p[2] for p in parts),
            event_ids=tuple(range(position + 1, position + 1 + len(parts))),
            versions=tuple(int(p[3]) + 1 for p in parts),
        )

    def _claim_versions(
        self, con: sqlite3.Connection, cycle: str, members: Sequence[tuple[str, str, int]]
    ) -> None:
        """StaleDecisionError when a member's version is not the one expected (in the write)."""
        current = {
            (item, location): int(version)
            for item, location, version in con.execute(
                "SELECT item, location, max(version) FROM event WHERE cycle = ?"
                " GROUP BY item, location",
                (cycle,),
            )
        }
        for item, location, expected in members:
            if current.get((item, location), 0) != expected:
                self._claim_version(con, cycle, item, location, expected)

    def end_adjustment(
        self,
        cycle: str,
        item: str,
        location: str,
        *,
        target: int,
        reviewer: str,
        portfolio_name: str,
        portfolio_fingerprint: str,
        note: str = "",
    ) -> AdjustmentEnd:
        """End an earlier cycle's adjustment: from ``cycle`` on it is no longer carried.

        The adjustment stays in the journal as it was; an ``end`` row says who ended it, when,
        and in which cycle. ``restore_adjustment`` reverts an end.

        Args:
            cycle: The review cycle in which the reviewer ends it.
            item: Item of the series.
            location: Location of the series, ``""`` when none.
            target: Id of the adjusting decision (an effective ``adjusted`` decision of the
                same series in an earlier cycle).
            reviewer: Who ends it.
            portfolio_name: File name of the portfolio under review.
            portfolio_fingerprint: Digest of that portfolio's content.
            note: Why, free text.

        Raises:
            DecisionError: ``target`` is not such an adjustment, or it is already ended.
            LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was saved.
        """
        self._check_writable("end of the adjustment")
        cycle, item, location, reviewer, note, portfolio_name, portfolio_fingerprint = (
            _checked_row_fields(
                cycle, item, location, reviewer, note, portfolio_name, portfolio_fingerprint
            )
        )
        target = _check_id(target, "target")
        series = describe_series(item, location)
        with self._write("end of the adjustment") as con:
            row = con.execute(
                "SELECT cycle, item, location, kind, outcome FROM event WHERE id = ?", (target,)
            ).fetchone()
            if row is None or row[3] != DECISION or row[4] != ADJUSTED:
                raise DecisionError(f"ledger event #{target} is not an adjustment")
            if (row[1], row[2]) != (item, location):
                raise DecisionError(
                    f"ledger event #{target} is an adjustment of "
                    f"{describe_series(row[1], row[2])}, not of {series}"
                )
            if row[0] >= cycle:
                raise DecisionError(
                    f"the adjustment #{target} of {series} was made in cycle {row[0]}; only an "
                    f"earlier cycle's adjustment can be ended in cycle {cycle}",
                    hint="Undo a decision of this cycle instead.",
                )
            effective = con.execute(
                _EFFECTIVE + "SELECT id FROM effective WHERE newest = 1 AND item = :item"
                " AND location = :location",
                {"cycle": row[0], "item": item, "location": location},
            ).fetchone()
            if effective is None or int(effective[0]) != target:
                raise DecisionError(
                    f"the adjustment #{target} of {series} was undone or replaced in its cycle "
                    f"{row[0]}, so there is nothing to end"
                )
            standing = self._standing_end(con, target)
            if standing is not None:
                raise DecisionError(
                    f"the adjustment #{target} of {series} was already ended by "
                    f"{standing.reviewer!r} at {standing.recorded_at} (cycle {standing.cycle})"
                )
            record = self._insert_end(
                con,
                END,
                target,
                None,
                cycle,
                item,
                location,
                note,
                reviewer,
                portfolio_name,
                portfolio_fingerprint,
            )
        return record

    def restore_adjustment(
        self,
        cycle: str,
        item: str,
        location: str,
        *,
        end: int,
        reviewer: str,
        portfolio_name: str,
        portfolio_fingerprint: str,
        note: str = "",
    ) -> AdjustmentEnd:
        """Revert an end (``end_adjustment``): the adjustment is carried again.

        Raises:
            DecisionError: ``end`` is not a standing end of the series' adjustment.
            LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was saved.
        """
        self._check_writable("restore of the adjustment")
        cycle, item, location, reviewer, note, portfolio_name, portfolio_fingerprint = (
            _checked_row_fields(
                cycle, item, location, reviewer, note, portfolio_name, portfolio_fingerprint
            )
        )
        end = _check_id(end, "end")
        with self._write("restore of the adjustment") as con:
            row = con.execute(
                f"SELECT {_END_COLUMNS} FROM adjustment_end WHERE id = ?", (end,)
            ).fetchone()
            found = _end(row) if row is not None else None
            if (
                found is None
                or found.kind != END
                or (found.item, found.location)
                != (
                    item,
                    location,
                )
            ):
                raise DecisionError(
                    f"ledger entry #{end} is not an end of an adjustment of "
                    f"{describe_series(item, location)}"
                )
            if found.cycle > cycle:
                raise DecisionError(
                    f"the end #{end} was recorded in cycle {found.cycle}, after cycle {cycle}"
                )
            standing = self._standing_end(con, found.target)
            if standing is None or standing.id != end:
                raise DecisionError(f"the end #{end} was already restored")
            record = self._insert_end(
                con,
                RESTORE,
                found.target,
                end,
                cycle,
                item,
                location,
                note,
                reviewer,
                portfolio_name,
                portfolio_fingerprint,
            )
        return record

    @staticmethod
    def _standing_end(con: sqlite3.Connection, target: int) -> AdjustmentEnd | None:
        row = con.execute(
            f"SELECT {_END_COLUMNS} FROM adjustment_end AS e WHERE e.target = ? AND e.kind = 'end'"
            " AND NOT EXISTS (SELECT 1 FROM adjustment_end AS r WHERE r.reverts = e.id)"
            " ORDER BY e.id DESC LIMIT 1",
            (target,),
        ).fetchone()
        return _end(row) if row is not None else None

    @staticmethod
    def _insert_end(
        con: sqlite3.Connection,
        kind: str,
        target: int,
        reverts: int | None,
        cycle: str,
        item: str,
        location: str,
        note: str,
        reviewer: str,
        portfolio_name: str,
        portfolio_fingerprint: str,
    ) -> AdjustmentEnd:
        position = _next_position(con)
        recorded_at = _utc_now()
        con.execute(
            f"INSERT INTO adjustment_end ({_END_COLUMNS}) VALUES "
            "(?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (
                position,
                kind,
                target,
                reverts,
                cycle,
                item,
                location,
                note,
                reviewer,
                recorded_at,
                portfolio_name,
                portfolio_fingerprint,
            ),
        )
        return AdjustmentEnd(
            position,
            kind,
            target,
            reverts,
            cycle,
            item,
            location,
            note,
            reviewer,
            recorded_at,
            portfolio_name,
            portfolio_fingerprint,
        )

    def record_worst_set(
        self,
        cycle: str,
        items: Sequence[str],
        locations: Sequence[str],
        *,
        reviewer: str,
        portfolio_name: str,
        portfolio_fingerprint: str,
        target_share: float,
        window: int,
        season: int,
        ranked_by: str,
        series: int,
    ) -> bool:
        """Keep the cycle's worst-offender set, as the review list shows it, once per cycle.

        The first snapshot of a cycle stands; later calls change nothing and return False.
        Members are stored in list order (``position`` 1 = worst).

        Raises:
            DecisionError: Mismatched lengths or a setting out of range.
            LedgerBusyError, LedgerWriteError, LedgerReadOnlyError: nothing was saved.
        """
        self._check_writable("worst-offender set")
        cycle = _check_date(cycle, "cycle")
        reviewer = _check_reviewer(reviewer)
        if len(items) != len(locations):
            raise DecisionError(f"{len(items)} items but {len(locations)} locations")
        if ranked_by not in ("value", "units"):
            raise DecisionError(f"ranked_by must be 'value' or 'units', not {ranked_by!r}")
        if not 0 < target_share <= 1 or window < 1 or season < 1 or series < 0:
            raise DecisionError(
                f"snapshot settings out of range: share {target_share}, window {window}, "
                f"season {season}, series {series}"
            )
        with self._write("worst-offender set") as con:
            if con.execute("SELECT 1 FROM worst_snapshot WHERE cycle = ?", (cycle,)).fetchone():
                return False
            con.execute(
                "INSERT INTO worst_snapshot (cycle, recorded_at, reviewer, portfolio_name, "
                "portfolio_fingerprint, target_share, window_periods, season, ranked_by, series, "
                "members) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    cycle,
                    _utc_now(),
                    reviewer,
                    portfolio_name,
                    portfolio_fingerprint,
                    float(target_share),
                    int(window),
                    int(season),
                    ranked_by,
                    int(series),
                    len(items),
                ),
            )
            con.executemany(
                "INSERT INTO worst_member (cycle, item, location, position) VALUES (?, ?, ?, ?)",
                zip(
                    itertools.repeat(cycle),
                    map(str, items),
                    map(str, locations),
                    itertools.count(1),
                ),
            )
        return True

    def _check_writable(self, what: str) -> None:
        if self.read_only:
            raise LedgerReadOnlyError(
                f"The {what} was NOT saved: the decision ledger {self.path} is open read-only "
                f"({self._ro_reason}).",
                path=self.path,
                hint="Open a ledger in a folder you can write to (--ledger PATH).",
            )

    def _check_same_file(self, what: str) -> None:
        """Raise LedgerWriteError when the path no longer names the file opened for writing."""
        if self._identity is None:
            return
        now = _identity(self.path)
        # A -wal that did not exist at opening may appear; one that existed must stay the same.
        if now[0] == self._identity[0] and self._identity[1] in (None, now[1]):
            return
        raise LedgerWriteError(
            f"The {what} was NOT saved: the decision ledger {self.path} was deleted, moved or "
            "replaced while it was open, so anything written now would be lost.",
            path=self.path,
            hint="Restore the ledger (or its folder), then open it again and save again.",
        )

    def _claim_version(
        self, con: sqlite3.Connection, cycle: str, item: str, location: str, expected: int
    ) -> int:
        """The next version of the series, or StaleDecisionError; inside the write transaction."""
        row = con.execute(
            "SELECT version, reviewer, recorded_at FROM event"
            " WHERE cycle = ? AND item = ? AND location = ? ORDER BY version DESC LIMIT 1",
            (cycle, item, location),
        ).fetchone()
        current = int(row[0]) if row else 0
        if current != expected:
            raise StaleDecisionError(
                path=self.path,
                cycle=cycle,
                item=item,
                location=location,
                expected_version=expected,
                current_version=current,
                reviewer=row[1] if row else "(nobody)",
                recorded_at=row[2] if row else "(never)",
            )
        return current + 1

    @contextmanager
    def batch(self, what: str) -> Iterator[None]:
        """Every ``record`` inside is part of one transaction: all are saved, or none.

        For a batch of decisions prepared in a file (``triage decide``): a failure on any row
        (a stale version, a full disk) rolls every row back.
        """
        with self._write(what) as con:
            self._batch = con
            try:
                yield
            finally:
                self._batch = None

    @contextmanager
    def _writing(self, what: str) -> Iterator[sqlite3.Connection]:
        """The open batch's transaction, or a transaction of its own."""
        if self._batch is not None:
            with self._lock:
                yield self._batch
            return
        with self._write(what) as con:
            yield con

    @contextmanager
    def _write(self, what: str) -> Iterator[sqlite3.Connection]:
        """One short ``BEGIN IMMEDIATE … COMMIT``; rolled back and translated on any failure."""
        with self._lock:
            con = self._con
            try:
                # IMMEDIATE takes the write lock before reading the version, so the busy timeout
                # applies and no stale snapshot can be upgraded (docs/sources.md §4.2, measured).
                con.execute("BEGIN IMMEDIATE")
            except sqlite3.Error as exc:
                raise _translate(exc, self.path, saving=what) from exc
            try:
                self._check_same_file(what)
                yield con
                self._check_same_file(what)
                con.execute("COMMIT")
                self._check_same_file(what)
            except BaseException as exc:
                # After an I/O error SQLite may already have rolled back on its own.
                if con.in_transaction:
                    with suppress(sqlite3.Error):
                        con.execute("ROLLBACK")
                if isinstance(exc, sqlite3.Error):
                    raise _translate(exc, self.path, saving=what) from exc
                raise

    # ---- reading ---------------------------------------------------------------------------

    @contextmanager
    def _read(self) -> Iterator[sqlite3.Connection]:
        """A read transaction, so several SELECTs see one snapshot (never blocks writers)."""
        with self._lock:
            con = self._con
            try:
                con.execute("BEGIN")
                try:
                    yield con
                finally:
                    if con.in_transaction:
                        con.execute("COMMIT")
            except sqlite3.Error as exc:
                raise _translate(exc, self.path) from exc

    @property
    def _event_columns(self) -> str:
        """``_EVENT_COLUMNS`` and the group id (NULL in a ledger older than schema 3)."""
        return _EVENT_COLUMNS + (", group_id" if self.schema_version >= 3 else ", NULL")

    def version(self, cycle: str, item: str, location: str) -> int:
        """The series' latest event version in the cycle (decisions and undos), 0 if none."""
        with self._read() as con:
            row = con.execute(
                "SELECT coalesce(max(version), 0) FROM event"
                " WHERE cycle = ? AND item = ? AND location = ?",
                (cycle, item, location),
            ).fetchone()
        return int(row[0])

    def versions(self, cycle: str) -> dict[tuple[str, str], int]:
        """Latest event version of every series with an event in the cycle."""
        with self._read() as con:
            rows = con.execute(
                "SELECT item, location, max(version) FROM event WHERE cycle = ?"
                " GROUP BY item, location",
                (cycle,),
            ).fetchall()
        return {(item, location): int(v) for item, location, v in rows}

    def current(self, cycle: str) -> list[Decision]:
        """The effective decision of every series in the cycle, sorted by item and location."""
        with self._read() as con:
            rows = con.execute(
                _EFFECTIVE + f"SELECT {self._event_columns} FROM effective WHERE newest = 1"
                " ORDER BY item, location",
                {"cycle": cycle},
            ).fetchall()
            lines = self._lines(
                con,
                _EFFECTIVE + "SELECT l.event_id, l.period, l.original, l.adjusted"
                " FROM event_line AS l JOIN effective AS f ON f.id = l.event_id"
                " WHERE f.newest = 1 ORDER BY l.event_id, l.period",
                {"cycle": cycle},
            )
        return [
            Decision(
                cycle=r[1],
                item=r[2],
                location=r[3],
                event_id=r[0],
                version=r[4],
                outcome=r[7],
                root_cause=r[8],
                note=r[9],
                adjustment=r[10],
                reviewer=r[11],
                recorded_at=r[12],
                portfolio_name=r[13],
                portfolio_fingerprint=r[14],
                lines=lines.get(r[0], ()),
                group_id=r[15],
            )
            for r in rows
        ]

    def history(
        self, cycle: str | None = None, item: str | None = None, location: str | None = None
    ) -> list[Event]:
        """Every event (decisions and undos) matching the filters, oldest first, with lines."""
        where: list[str] = []
        params: dict[str, str] = {}
        for column, value in (("cycle", cycle), ("item", item), ("location", location)):
            if value is not None:
                where.append(f"{column} = :{column}")
                params[column] = value
        clause = f" WHERE {' AND '.join(where)}" if where else ""
        with self._read() as con:
            rows = con.execute(
                f"SELECT {self._event_columns} FROM event{clause} ORDER BY id", params
            ).fetchall()
            lines = self._lines(
                con,
                "SELECT l.event_id, l.period, l.original, l.adjusted FROM event_line AS l"
                f" WHERE l.event_id IN (SELECT id FROM event{clause})"
                " ORDER BY l.event_id, l.period",
                params,
            )
        return [_event(r, lines.get(r[0], ())) for r in rows]

    def ends(self, item: str | None = None, location: str | None = None) -> list[AdjustmentEnd]:
        """Every end and restore of adjustments (of one series when given), oldest first.

        Empty for a schema-1 ledger opened read-only (it has no such journal yet).
        """
        if self.schema_version < 2:
            return []
        where: list[str] = []
        params: dict[str, str] = {}
        for column, value in (("item", item), ("location", location)):
            if value is not None:
                where.append(f"{column} = :{column}")
                params[column] = value
        clause = f" WHERE {' AND '.join(where)}" if where else ""
        with self._read() as con:
            rows = con.execute(
                f"SELECT {_END_COLUMNS} FROM adjustment_end{clause} ORDER BY id", params
            ).fetchall()
        return [_end(r) for r in rows]

    def standing_ends(self, cycle: str | None = None) -> dict[int, AdjustmentEnd]:
        """Ends in force as of ``cycle``, by the id of the adjustment they end.

        An end counts from the cycle it was recorded in (on or before ``cycle``; every end
        when None) until a restore recorded on or before ``cycle`` reverts it.
        """
        ends = self.ends()
        if cycle is not None:
            ends = [e for e in ends if e.cycle <= cycle]
        reverted = {e.reverts for e in ends if e.kind == RESTORE}
        return {e.target: e for e in ends if e.kind == END and e.id not in reverted}

    def worst_sets(self, cycles: Iterable[str] | None = None) -> dict[str, WorstSet]:
        """Stored worst-offender sets by cycle (empty for a schema-1 ledger).

        Args:
            cycles: Only these cycles (a review reads the last few, never the whole year);
                None reads every stored set.
        """
        if self.schema_version < 2:
            return {}
        wanted = None if cycles is None else sorted(set(cycles))
        where = ""
        params: tuple[str, ...] = ()
        if wanted is not None:
            if not wanted:
                return {}
            where = f" WHERE cycle IN ({', '.join('?' * len(wanted))})"
            params = tuple(wanted)
        with self._read() as con:
            heads = con.execute(
                "SELECT cycle, target_share, window_periods, season, ranked_by, series, reviewer,"
                " recorded_at, portfolio_name, portfolio_fingerprint FROM worst_snapshot"
                + where
                + " ORDER BY cycle",
                params,
            ).fetchall()
            members: dict[str, tuple[list[str], list[str]]] = {h[0]: ([], []) for h in heads}
            rows = con.execute(
                "SELECT cycle, item, location FROM worst_member"
                + where
                + " ORDER BY cycle, position",
                params,
            ).fetchall()
            for cycle, item, location in rows:
                members[cycle][0].append(item)
                members[cycle][1].append(location)
        return {
            h[0]: WorstSet(
                cycle=h[0],
                items=tuple(members[h[0]][0]),
                locations=tuple(members[h[0]][1]),
                target_share=float(h[1]),
                window=int(h[2]),
                season=int(h[3]),
                ranked_by=h[4],
                series=int(h[5]),
                reviewer=h[6],
                recorded_at=h[7],
                portfolio_name=h[8],
                portfolio_fingerprint=h[9],
            )
            for h in heads
        }

    def group_decisions(self, cycle: str | None = None) -> list[GroupRecord]:
        """Every group decision and group undo (of one cycle when given), oldest first, each
        with the series it wrote an event for. Empty for a ledger older than schema 3."""
        if self.schema_version < 3:
            return []
        clause, params = (" WHERE cycle = ?", (cycle,)) if cycle is not None else ("", ())
        with self._read() as con:
            heads = con.execute(
                "SELECT id, kind, undoes, cycle, columns, key_values, outcome, root_cause, note,"
                " adjustment, basis, reviewer, recorded_at, portfolio_name, portfolio_fingerprint"
                f" FROM group_decision{clause} ORDER BY id",
                params,
            ).fetchall()
            parts: dict[int, list[tuple[str, str, int, int]]] = {h[0]: [] for h in heads}
            rows = con.execute(
                "SELECT group_id, item, location, id, version FROM event WHERE group_id IN"
                f" (SELECT id FROM group_decision{clause}) ORDER BY id",
                params,
            )
            for group_id, item, location, event_id, version in rows:
                parts[group_id].append((item, location, event_id, version))
        return [
            GroupRecord(
                id=h[0],
                kind=h[1],
                undoes=h[2],
                cycle=h[3],
                columns=tuple(json.loads(h[4])),
                key_values=tuple(json.loads(h[5])),
                outcome=h[6],
                root_cause=h[7],
                note=h[8],
                adjustment=h[9],
                basis=h[10],
                reviewer=h[11],
                recorded_at=h[12],
                portfolio_name=h[13],
                portfolio_fingerprint=h[14],
                items=tuple(p[0] for p in parts[h[0]]),
                locations=tuple(p[1] for p in parts[h[0]]),
                event_ids=tuple(p[2] for p in parts[h[0]]),
                versions=tuple(p[3] for p in parts[h[0]]),
            )
            for h in heads
        ]

    def group_keys(self) -> dict[int, tuple[tuple[str, ...], tuple[str, ...]]]:
        """Every group decision's grouping columns and key values, by its id (one read of the
        group table only; empty for a ledger older than schema 3)."""
        if self.schema_version < 3:
            return {}
        with self._read() as con:
            rows = con.execute(
                "SELECT id, columns, key_values FROM group_decision WHERE kind = ?", (DECISION,)
            ).fetchall()
        return {r[0]: (tuple(json.loads(r[1])), tuple(json.loads(r[2]))) for r in rows}

    def cycles(self) -> list[str]:
        """Review cycles with at least one event, oldest first."""
        with self._read() as con:
            rows = con.execute("SELECT DISTINCT cycle FROM event ORDER BY cycle").fetchall()
        return [r[0] for r in rows]

    @staticmethod
    def _lines(
        con: sqlite3.Connection, sql: str, params: dict[str, str]
    ) -> dict[int, tuple[Line, ...]]:
        grouped: dict[int, list[Line]] = {}
        for event_id, period, original, adjusted in con.execute(sql, params):
            grouped.setdefault(event_id, []).append(Line(period, original, adjusted))
        return {k: tuple(v) for k, v in grouped.items()}


_END_COLUMNS = (
    "id, kind, target, reverts, cycle, item, location, note, reviewer, recorded_at, "
    "portfolio_name, portfolio_fingerprint"
)


def _end(row: Sequence[Any]) -> AdjustmentEnd:
    """An AdjustmentEnd from a row of ``_END_COLUMNS``."""
    return AdjustmentEnd(*row)


def _event(row: Sequence[Any], lines: tuple[Line, ...]) -> Event:
    """An Event from a row of ``_EVENT_COLUMNS``."""
    return Event(
        id=row[0],
        cycle=row[1],
        item=row[2],
        location=row[3],
        version=row[4],
        kind=row[5],
        undoes=row[6],
        outcome=row[7],
        root_cause=row[8],
        note=row[9],
        adjustment=row[10],
        reviewer=row[11],
        recorded_at=row[12],
        portfolio_name=row[13],
        portfolio_fingerprint=row[14],
        lines=lines,
        group_id=row[15],
    )


# --------------------------------------------------------------------------------------------
# Connections


def _connect(
    path: Path, mode: str, timeout: float, *, immutable: bool = False
) -> sqlite3.Connection:
    try:
        con = sqlite3.connect(
            _uri(path, mode, immutable=immutable),
            uri=True,
            timeout=timeout,
            # Autocommit: this module issues every BEGIN itself (docs/sources.md §4.3).
            isolation_level=None,
            # Calls are serialised by Ledger._lock; the TUI calls from worker threads.
            check_same_thread=False,
        )
    except sqlite3.Error as exc:
        raise _translate(exc, path) from exc
    return con


def _identity(path: Path) -> tuple[tuple[int, int] | None, ...]:
    """(device, inode) of the ledger file and of its ``-wal``, None for one that is missing."""
    found: list[tuple[int, int] | None] = []
    for name in (str(path), f"{path}-wal"):
        try:
            info = os.stat(name)
        except OSError:
            found.append(None)
        else:
            found.append((info.st_dev, info.st_ino))
    return tuple(found)


def _inspect(path: Path, timeout: float) -> _Inspection:
    """Read the header and run ``quick_check`` through a read-only connection.

    A read-only connection never writes to the database file, so a file that turns out not to be
    ours, or damaged, is left exactly as it was.
    """
    wal = path.with_name(path.name + "-wal")
    wal_bytes = wal.stat().st_size if wal.exists() else 0
    try:
        con = _connect(path, "ro", timeout)
        try:
            return _read_header(con, path, immutable=False, wal_bytes=wal_bytes)
        finally:
            con.close()
    except LedgerError as exc:
        cause = exc.__cause__
        name = getattr(cause, "sqlite_errorname", "") if cause else ""
        # A WAL database in a folder we cannot write has no -shm to map; SQLite documents
        # ``immutable`` as the way to read it (sqlite.org/wal.html, "Read-Only Databases").
        if not name.startswith(("SQLITE_READONLY", "SQLITE_CANTOPEN")):
            raise
    con = _connect(path, "ro", timeout, immutable=True)
    try:
        return _read_header(con, path, immutable=True, wal_bytes=wal_bytes)
    finally:
        con.close()


def _read_header(
    con: sqlite3.Connection, path: Path, *, immutable: bool, wal_bytes: int
) -> _Inspection:
    try:
        # One read transaction for all three: in autocommit each statement sees its own
        # snapshot, and another session creating the file between them would make a new ledger
        # look like "tables but no application id", another program's database.
        con.execute("BEGIN")
        try:
            app_id = int(con.execute("PRAGMA application_id").fetchone()[0])
            user_version = int(con.execute("PRAGMA user_version").fetchone()[0])
            tables = int(con.execute("SELECT count(*) FROM sqlite_schema").fetchone()[0])
        finally:
            # After an I/O error SQLite has already rolled back: a COMMIT would only hide it.
            if con.in_transaction:
                con.execute("COMMIT")
        if app_id == APPLICATION_ID:
            problems = [r[0] for r in con.execute("PRAGMA quick_check(5)").fetchall()]
            if problems != ["ok"]:
                raise _damaged(path, "quick_check: " + "; ".join(problems))
    except sqlite3.Error as exc:
        raise _translate(exc, path) from exc
    return _Inspection(app_id, user_version, tables, immutable, wal_bytes)


def _upgrade(con: sqlite3.Connection, path: Path) -> None:
    """Create or migrate the schema in one write transaction (a no-op when current)."""
    if (
        int(con.execute("PRAGMA user_version").fetchone()[0]) == SCHEMA_VERSION
        and int(con.execute("PRAGMA application_id").fetchone()[0]) == APPLICATION_ID
    ):
        return
    con.execute("BEGIN IMMEDIATE")
    try:
        # Read again under the write lock: another process may have created it meanwhile.
        app_id = int(con.execute("PRAGMA application_id").fetchone()[0])
        version = int(con.execute("PRAGMA user_version").fetchone()[0])
        tables = int(con.execute("SELECT count(*) FROM sqlite_schema").fetchone()[0])
        if app_id == 0 and tables == 0:
            version = 0
        elif app_id != APPLICATION_ID:
            raise LedgerError(
                f"{path} is not a triage decision ledger. It was left unchanged.", path=path
            )
        if version > SCHEMA_VERSION:
            raise LedgerError(
                f"{path} was written by a newer triage (ledger schema {version}).", path=path
            )
        for step in MIGRATIONS[version:]:
            step(con)
        con.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        con.execute(f"PRAGMA application_id = {APPLICATION_ID}")
        con.execute("COMMIT")
    except BaseException:
        if con.in_transaction:
            con.execute("ROLLBACK")
        raise
