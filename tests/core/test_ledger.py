"""The decision ledger: events, undo, derived state, versions, schema, text fidelity, config.

Process-level faults (kill -9, full disk, locks, corrupt files, read-only folders) are in
test_ledger_faults.py.
"""

from __future__ import annotations

import sqlite3
import threading
from pathlib import Path

import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, precondition, rule

from triage.core import config as config_mod
from triage.core.config import (
    ConfigError,
    default_reviewer,
    load_config,
)
from triage.core.errors import TriageError
from triage.core.ledger import (
    APPLICATION_ID,
    FOLDER_LEDGER,
    NOTE_MAX,
    SCHEMA_VERSION,
    DecisionError,
    Ledger,
    LedgerError,
    LedgerReadOnlyError,
    Line,
    StaleDecisionError,
    default_ledger_path,
    locate_ledger,
)
from triage.core.vocabulary import DEFAULT_ROOT_CAUSES, OUTCOMES

CYCLE = "2026-11-23"
NEXT_CYCLE = "2026-11-30"
PORTFOLIO = {"portfolio_name": "week47.csv", "portfolio_fingerprint": "ab" * 32}


def decide(ledger: Ledger, item: str, location: str = "", *, version: int = 0, **fields):
    values = {
        "outcome": "no_change",
        "root_cause": "unknown",
        "note": "",
        "reviewer": "ana",
        **PORTFOLIO,
        **fields,
    }
    cycle = values.pop("cycle", CYCLE)
    return ledger.record(cycle, item, location, expected_version=version, **values)


def take_back(ledger: Ledger, item: str, location: str = "", *, version: int, **fields):
    values = {"reviewer": "ana", **PORTFOLIO, **fields}
    cycle = values.pop("cycle", CYCLE)
    return ledger.undo(cycle, item, location, expected_version=version, **values)


@pytest.fixture
def path(tmp_path: Path) -> Path:
    return tmp_path / "week47.ledger.sqlite"


@pytest.fixture
def ledger(path: Path):
    with Ledger.open(path) as opened:
        yield opened


def raw(path: Path) -> sqlite3.Connection:
    return sqlite3.connect(path, isolation_level=None)


# ---- events, undo, derived state ------------------------------------------------------------


def test_record_returns_the_committed_event_and_history_matches(ledger: Ledger) -> None:
    lines = [("2026-11-30", 40.0, 44.0), ("2026-12-07", None, None), ("2026-12-14", 38, 41.8)]
    event = decide(
        ledger,
        "A-100",
        "Lyon",
        outcome="adjusted",
        root_cause="promotion",
        note="Flyer week 48",
        adjustment="1-3: +10%",
        lines=lines,
    )
    assert event.version == 1 and event.kind == "decision" and event.undoes is None
    assert event.recorded_at.endswith("Z") and "T" in event.recorded_at
    assert event.lines == (
        Line("2026-11-30", 40.0, 44.0),
        Line("2026-12-07", None, None),
        Line("2026-12-14", 38.0, 41.8),
    )
    assert ledger.history() == [event]
    assert ledger.version(CYCLE, "A-100", "Lyon") == 1
    assert ledger.version(CYCLE, "A-100", "") == 0  # location is part of the key
    assert ledger.cycles() == [CYCLE]


def test_nan_forecast_is_stored_as_missing(ledger: Ledger) -> None:
    event = decide(
        ledger,
        "A",
        outcome="adjusted",
        adjustment="=5",
        lines=[("2026-11-30", float("nan"), 5.0)],
    )
    assert ledger.history()[0].lines == event.lines == (Line("2026-11-30", None, 5.0),)


def test_current_is_the_latest_decision_not_undone(ledger: Ledger) -> None:
    decide(ledger, "A", note="first")
    decide(ledger, "A", version=1, note="second", reviewer="bob")
    decide(ledger, "B", note="only")
    decide(ledger, "A", cycle=NEXT_CYCLE, note="next week")
    now = {d.item: d for d in ledger.current(CYCLE)}
    assert {k: v.note for k, v in now.items()} == {"A": "second", "B": "only"}
    assert now["A"].version == 2 and now["A"].reviewer == "bob"

    undo = take_back(ledger, "A", version=2, note="wrong series")
    assert undo.kind == "undo" and undo.version == 3 and undo.undoes == now["A"].event_id
    assert {d.item: d.note for d in ledger.current(CYCLE)} == {"A": "first", "B": "only"}

    take_back(ledger, "A", version=3)
    assert [d.item for d in ledger.current(CYCLE)] == ["B"]
    with pytest.raises(DecisionError, match="no decision to undo"):
        take_back(ledger, "A", version=4)

    decide(ledger, "A", version=4, note="third")
    assert {d.item: d.note for d in ledger.current(CYCLE)} == {"A": "third", "B": "only"}
    assert ledger.versions(CYCLE) == {("A", ""): 5, ("B", ""): 1}
    assert [d.note for d in ledger.current(NEXT_CYCLE)] == ["next week"]
    assert ledger.cycles() == [CYCLE, NEXT_CYCLE]


def test_history_filters_and_keeps_undos_in_order(ledger: Ledger) -> None:
    decide(ledger, "A", "North")
    decide(ledger, "A", "South")
    take_back(ledger, "A", "North", version=1)
    decide(ledger, "A", "North", cycle=NEXT_CYCLE)
    assert [e.kind for e in ledger.history(item="A", location="North")] == [
        "decision",
        "undo",
        "decision",
    ]
    assert [e.id for e in ledger.history()] == sorted(e.id for e in ledger.history())
    assert [e.location for e in ledger.history(cycle=CYCLE, item="A")] == [
        "North",
        "South",
        "North",
    ]
    assert ledger.history(item="missing") == []


def test_current_carries_the_lines_of_the_effective_decision(ledger: Ledger) -> None:
    decide(ledger, "A", outcome="adjusted", adjustment="=10", lines=[("2026-11-30", 8, 10)])
    decide(
        ledger, "A", version=1, outcome="adjusted", adjustment="=12", lines=[("2026-11-30", 8, 12)]
    )
    decide(ledger, "B")
    now = {d.item: d for d in ledger.current(CYCLE)}
    assert now["A"].adjustment == "=12" and now["A"].lines == (Line("2026-11-30", 8.0, 12.0),)
    assert now["B"].lines == ()


# ---- append-only ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "statement",
    [
        "UPDATE event SET note = 'rewritten'",
        "DELETE FROM event",
        "UPDATE event_line SET adjusted = 0",
        "DELETE FROM event_line",
    ],
)
def test_events_cannot_be_changed_or_deleted(path: Path, ledger: Ledger, statement: str) -> None:
    decide(ledger, "A", outcome="adjusted", adjustment="=1", lines=[("2026-11-30", 2, 1)])
    with raw(path) as con, pytest.raises(sqlite3.IntegrityError, match="append-only"):
        con.execute(statement)
    assert ledger.history()[0].note == "" and len(ledger.history()[0].lines) == 1


def test_versions_cannot_skip_even_when_written_by_hand(path: Path, ledger: Ledger) -> None:
    decide(ledger, "A")
    con = raw(path)
    with pytest.raises(sqlite3.IntegrityError, match="version must follow"):
        con.execute(
            "INSERT INTO event (id, cycle, item, location, version, kind, outcome, root_cause,"
            " note, reviewer, recorded_at, portfolio_name, portfolio_fingerprint) VALUES"
            " (2, ?, 'A', '', 3, 'decision', 'no_change', 'unknown', '', 'x', 'now', '', '')",
            (CYCLE,),
        )
    con.close()


# ---- stale changes --------------------------------------------------------------------------


def test_stale_change_is_refused_naming_series_and_reviewer(path: Path) -> None:
    with Ledger.open(path) as mine, Ledger.open(path) as theirs:
        seen = mine.version(CYCLE, "A-100", "Lyon")
        decide(theirs, "A-100", "Lyon", version=seen, reviewer="Bob Kahn", note="theirs")
        before = mine.history()
        with pytest.raises(StaleDecisionError) as caught:
            decide(mine, "A-100", "Lyon", version=seen, note="mine")
        message = str(caught.value)
        assert "'A-100' @ 'Lyon'" in message and "Bob Kahn" in message and CYCLE in message
        assert "nothing was saved" in message
        assert caught.value.current_version == 1 and caught.value.expected_version == 0
        assert caught.value.recorded_at == before[-1].recorded_at
        assert mine.history() == before
        with pytest.raises(StaleDecisionError):
            take_back(mine, "A-100", "Lyon", version=0)
        decide(mine, "A-100", "Lyon", version=1, note="mine, after reload")
        assert [d.note for d in theirs.current(CYCLE)] == ["mine, after reload"]


# ---- schema -----------------------------------------------------------------------------------


def test_schema_version_application_id_and_settings(path: Path, ledger: Ledger) -> None:
    con = raw(path)
    # PRAGMA semantics: https://sqlite.org/pragma.html (application_id, user_version,
    # journal_mode); why WAL + FULL, STRICT and foreign keys: docs/sources.md §4.1.
    assert con.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID
    assert con.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION == 3
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    strict = {r[1]: r[5] for r in con.execute("PRAGMA table_list") if r[2] == "table"}
    strict = {name: flag for name, flag in strict.items() if not name.startswith("sqlite_")}
    assert strict == {
        "event": 1,
        "event_line": 1,
        "adjustment_end": 1,
        "worst_snapshot": 1,
        "worst_member": 1,
        "group_decision": 1,
    }
    con.close()
    own = ledger._con
    assert own.execute("PRAGMA synchronous").fetchone()[0] == 2  # 2 = FULL (pragma.html)
    assert own.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    assert own.isolation_level is None and not own.in_transaction


def test_state_persists_across_reopen(path: Path) -> None:
    with Ledger.open(path) as first:
        decide(first, "A", note="kept")
        take_back(first, "A", version=1)
        decide(first, "A", version=2, note="kept again")
        history = first.history()
    with Ledger.open(path) as again:
        assert again.history() == history
        assert [d.note for d in again.current(CYCLE)] == ["kept again"]
        assert again.version(CYCLE, "A", "") == 3


def test_empty_file_becomes_a_ledger(path: Path) -> None:
    path.touch()
    with Ledger.open(path) as opened:
        decide(opened, "A")
    assert raw(path).execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID


def _digest(path: Path) -> bytes:
    return path.read_bytes()


def test_other_sqlite_files_are_refused_and_left_unchanged(tmp_path: Path) -> None:
    foreign = tmp_path / "crm.sqlite"
    con = raw(foreign)
    con.execute("CREATE TABLE customer (name TEXT)")
    con.execute("INSERT INTO customer VALUES ('x')")
    con.close()
    other_app = tmp_path / "other.sqlite"
    con = raw(other_app)
    con.execute("PRAGMA application_id = 42")
    con.execute("CREATE TABLE t (x INTEGER)")
    con.close()
    for file, words in ((foreign, "another program"), (other_app, "application id 0x2a")):
        before = _digest(file)
        with pytest.raises(LedgerError, match=words) as caught:
            Ledger.open(file)
        assert "left unchanged" in str(caught.value)
        assert _digest(file) == before


def test_newer_schema_is_refused(path: Path) -> None:
    Ledger.open(path).close()
    con = raw(path)
    con.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    con.close()
    before = _digest(path)
    with pytest.raises(LedgerError, match="newer triage"):
        Ledger.open(path)
    assert _digest(path) == before


def test_read_only_on_request(path: Path) -> None:
    with Ledger.open(path) as writable:
        decide(writable, "A")
    with Ledger.open(path, read_only=True) as viewer:
        assert viewer.read_only and viewer.notice is None
        assert [d.item for d in viewer.current(CYCLE)] == ["A"]
        with pytest.raises(LedgerReadOnlyError, match="NOT saved"):
            decide(viewer, "B")
    with pytest.raises(LedgerError, match="no decision ledger"):
        Ledger.open(path.with_name("absent.sqlite"), read_only=True)


def test_read_only_open_leaves_no_wal_or_shm_behind(path: Path) -> None:
    with Ledger.open(path) as writable:
        decide(writable, "A")
    assert sorted(p.name for p in path.parent.iterdir()) == [path.name]
    before = path.read_bytes()
    with Ledger.open(path, read_only=True) as viewer:
        assert [d.item for d in viewer.current(CYCLE)] == ["A"]
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            viewer._con.execute("CREATE TABLE x (y)")
    assert sorted(p.name for p in path.parent.iterdir()) == [path.name]
    assert path.read_bytes() == before
    # While a review session is open, a reader closing does not take its WAL away.
    with Ledger.open(path) as session:
        decide(session, "B")
        with Ledger.open(path, read_only=True) as viewer:
            assert sorted(d.item for d in viewer.current(CYCLE)) == ["A", "B"]
        decide(session, "C")
    with Ledger.open(path, read_only=True) as viewer:
        assert sorted(d.item for d in viewer.current(CYCLE)) == ["A", "B", "C"]
    assert sorted(p.name for p in path.parent.iterdir()) == [path.name]


# ---- schema 2: migration, ends of adjustments, worst-set snapshots ----------------------------

V1_FIXTURE = Path(__file__).with_name("data") / "ledger-v1.sqlite"


def _rows(file: Path) -> dict[str, list[tuple]]:
    con = sqlite3.connect(f"file:{file}?mode=ro", uri=True)
    try:
        return {
            "event": con.execute("SELECT * FROM event ORDER BY id").fetchall(),
            "event_line": con.execute("SELECT * FROM event_line ORDER BY 1, 2").fetchall(),
        }
    finally:
        con.close()


def _user_version(file: Path) -> int:
    con = sqlite3.connect(f"file:{file}?mode=ro", uri=True)
    try:
        return int(con.execute("PRAGMA user_version").fetchone()[0])
    finally:
        con.close()


@pytest.fixture
def v1(tmp_path: Path) -> Path:
    """A copy of a schema-1 ledger written by the code of commit e0e2877 (tests/core/data)."""
    copy = tmp_path / "week47.ledger.sqlite"
    copy.write_bytes(V1_FIXTURE.read_bytes())
    assert _user_version(copy) == 1
    return copy


def test_v1_ledger_is_read_as_it_is_when_opened_read_only(v1: Path) -> None:
    before = v1.read_bytes()
    with Ledger.open(v1, read_only=True) as viewer:
        assert viewer.schema_version == 1
        assert [e.kind for e in viewer.history()] == ["decision", "decision", "undo", "decision"]
        assert viewer.ends() == [] and viewer.standing_ends() == {} and viewer.worst_sets() == {}
        assert [d.outcome for d in viewer.current(CYCLE)] == ["adjusted", "deferred"]
    # Not migrated, not touched, and no -wal / -shm left behind.
    assert v1.read_bytes() == before
    assert sorted(p.name for p in v1.parent.iterdir()) == [v1.name]


def test_v1_ledger_is_migrated_in_place_keeping_every_row(v1: Path) -> None:
    before = _rows(v1)
    with Ledger.open(v1) as opened:
        assert opened.schema_version == SCHEMA_VERSION == 3
        history = opened.history()
        assert [e.id for e in history] == [1, 2, 3, 4]
        assert history[1].note == "=1+2 \x1b[31m"
        assert history[0].lines == (
            Line("2026-11-30", 100.0, 110.0),
            Line("2026-12-07", None, None),
        )
        # The new journal continues the positions of the old one.
        end = opened.end_adjustment(
            NEXT_CYCLE, "A-100", "Lyon", target=1, reviewer="ana", **PORTFOLIO
        )
        assert end.id == 5
        later = decide(opened, "C", cycle=NEXT_CYCLE)
        assert later.id == 6
    assert _user_version(v1) == SCHEMA_VERSION
    after = _rows(v1)
    # Schema 3 adds one column to ``event`` (group_id), NULL in every existing row.
    assert [r[:-1] for r in after["event"][:4]] == before["event"]
    assert [r[-1] for r in after["event"]] == [None] * 5
    assert after["event_line"] == before["event_line"]
    con = raw(v1)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert con.execute("PRAGMA foreign_key_check").fetchall() == []
    con.close()


def test_v1_migration_is_one_transaction(v1: Path, monkeypatch) -> None:
    from triage.core import ledger as ledger_mod

    def half_then_fail(con: sqlite3.Connection) -> None:
        ledger_mod._migrate_to_v2(con)
        raise sqlite3.OperationalError("disk I/O error (simulated, after the new tables)")

    monkeypatch.setattr(ledger_mod, "MIGRATIONS", [ledger_mod.MIGRATIONS[0], half_then_fail])
    before = _rows(v1)
    with pytest.raises(LedgerError):
        Ledger.open(v1)
    assert _user_version(v1) == 1
    assert _rows(v1) == before
    con = raw(v1)
    tables = {r[0] for r in con.execute("SELECT name FROM sqlite_schema WHERE type = 'table'")}
    con.close()
    assert tables == {"event", "event_line"}
    monkeypatch.undo()
    with Ledger.open(v1) as opened:
        assert opened.schema_version == SCHEMA_VERSION and len(opened.history()) == 4


def _adjust(ledger: Ledger, item: str = "A", *, cycle: str = CYCLE, version: int = 0):
    return decide(
        ledger,
        item,
        cycle=cycle,
        version=version,
        outcome="adjusted",
        adjustment="+10",
        lines=[("2026-12-07", 100, 110), ("2026-12-14", 100, 110)],
    )


def test_ending_an_earlier_adjustment_is_an_append_only_event(path: Path, ledger: Ledger) -> None:
    made = _adjust(ledger)
    end = ledger.end_adjustment(
        NEXT_CYCLE, "A", "", target=made.id, reviewer="Bob", note="promo cancelled", **PORTFOLIO
    )
    assert (end.kind, end.target, end.cycle, end.reviewer) == ("end", made.id, NEXT_CYCLE, "Bob")
    assert end.recorded_at.endswith("Z") and end.note == "promo cancelled"
    assert ledger.standing_ends() == {made.id: end}
    # As of the cycle of the adjustment itself, the end is not yet in force.
    assert ledger.standing_ends(CYCLE) == {}
    assert ledger.standing_ends(NEXT_CYCLE) == {made.id: end}
    with pytest.raises(DecisionError, match="already ended by 'Bob'"):
        ledger.end_adjustment(NEXT_CYCLE, "A", "", target=made.id, reviewer="ana", **PORTFOLIO)
    with raw(path) as con:
        for statement in ("UPDATE adjustment_end SET note = 'x'", "DELETE FROM adjustment_end"):
            with pytest.raises(sqlite3.IntegrityError, match="append-only"):
                con.execute(statement)
    back = ledger.restore_adjustment(NEXT_CYCLE, "A", "", end=end.id, reviewer="Bob", **PORTFOLIO)
    assert back.kind == "restore" and back.reverts == end.id
    assert ledger.standing_ends() == {}
    assert [e.id for e in ledger.ends()] == [end.id, back.id]
    # The decision itself never changed.
    assert ledger.history() == [made]


@pytest.mark.parametrize(
    ("case", "message"),
    [
        ("same_cycle", "only an earlier cycle's adjustment"),
        ("not_adjusted", "is not an adjustment"),
        ("other_series", "not of 'B'"),
        ("replaced", "undone or replaced"),
        ("unknown", "is not an adjustment"),
    ],
)
def test_only_an_earlier_effective_adjustment_can_be_ended(
    ledger: Ledger, case: str, message: str
) -> None:
    made = _adjust(ledger)
    plain = decide(ledger, "C")
    target, item, cycle = made.id, "A", NEXT_CYCLE
    if case == "same_cycle":
        cycle = CYCLE
    elif case == "not_adjusted":
        target, item = plain.id, "C"
    elif case == "other_series":
        item = "B"
    elif case == "replaced":
        decide(ledger, "A", version=1, note="no adjustment after all")
    elif case == "unknown":
        target = 999
    with pytest.raises(DecisionError, match=message):
        ledger.end_adjustment(cycle, item, "", target=target, reviewer="ana", **PORTFOLIO)
    assert ledger.ends() == []


def test_worst_set_snapshot_is_kept_once_per_cycle_in_list_order(
    path: Path, ledger: Ledger
) -> None:
    settings_ = {
        "reviewer": "ana",
        "portfolio_name": "week47.csv",
        "portfolio_fingerprint": "ab" * 32,
        "target_share": 0.8,
        "window": 13,
        "season": 1,
        "ranked_by": "value",
        "series": 40,
    }
    assert ledger.record_worst_set(CYCLE, ["B", "A", "00123"], ["x", "", "\t"], **settings_)
    assert not ledger.record_worst_set(CYCLE, ["Z"], [""], **settings_)
    stored = ledger.worst_sets()[CYCLE]
    assert stored.items == ("B", "A", "00123") and stored.locations == ("x", "", "\t")
    assert (stored.target_share, stored.window, stored.ranked_by, stored.series) == (
        0.8,
        13,
        "value",
        40,
    )
    with raw(path) as con:
        for statement in ("DELETE FROM worst_member", "UPDATE worst_snapshot SET series = 1"):
            with pytest.raises(sqlite3.IntegrityError, match="append-only"):
                con.execute(statement)


# ---- text fidelity ----------------------------------------------------------------------------

HOSTILE = [
    "=1+2",
    "[/]",
    "[bold red]x[/]",
    "\x1b]2;x\x07",
    "\x1b[31mred\x1b[0m",
    "Ünïcödé 🚚 ﷽ e\u0301",
    "line 1\nline 2\r\nline 3\rend",
    "tab\there",
    "nul\x00inside",
    "  padded  ",
    "'; DROP TABLE event; --",
]


@pytest.mark.parametrize("text", HOSTILE)
def test_text_is_stored_byte_exact(path: Path, ledger: Ledger, text: str) -> None:
    decide(ledger, text, text, note=text, reviewer=text, portfolio_name=text)
    with Ledger.open(path) as again:
        (event,) = again.history()
        assert (event.item, event.location, event.note, event.reviewer, event.portfolio_name) == (
            text,
        ) * 5
        assert again.version(CYCLE, text, text) == 1
    con = raw(path)
    stored = con.execute("SELECT CAST(note AS BLOB), CAST(item AS BLOB) FROM event").fetchone()
    assert stored == (text.encode("utf-8"), text.encode("utf-8"))
    con.close()


def test_note_limit_is_an_error_not_a_truncation(ledger: Ledger) -> None:
    long_ok = "é" * NOTE_MAX
    assert decide(ledger, "A", note=long_ok).note == long_ok
    with pytest.raises(DecisionError, match="10,001 characters long; the limit is 10,000"):
        decide(ledger, "B", note="x" * (NOTE_MAX + 1))
    assert ledger.version(CYCLE, "B", "") == 0


# ---- validation -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("fields", "words"),
    [
        ({"outcome": "fixed"}, "unknown outcome 'fixed'; use one of: no_change, adjusted, "),
        ({"root_cause": "aliens"}, "unknown root cause 'aliens'; use one of: promotion, "),
        ({"cycle": "23/11/2026"}, "not an ISO date"),
        ({"cycle": "2026-02-30"}, "not a calendar date"),
        ({"outcome": "adjusted"}, "adjustment goes with the outcome 'adjusted'"),
        ({"adjustment": "+5%"}, "adjustment goes with the outcome 'adjusted'"),
        ({"lines": [("2026-11-30", 1, 2)]}, "lines were given without an adjustment"),
        (
            {"outcome": "adjusted", "adjustment": "=1", "lines": [("2026-11-30", 1, 1)] * 2},
            "given twice",
        ),
        (
            {"outcome": "adjusted", "adjustment": "=1", "lines": [("2026-11-30", 1, float("inf"))]},
            "not a finite number",
        ),
        ({"reviewer": "  "}, "reviewer is blank"),
        ({"note": "bad \udcff byte"}, "not valid Unicode"),
    ],
)
def test_bad_fields_are_refused(ledger: Ledger, fields: dict, words: str) -> None:
    with pytest.raises(DecisionError, match=words.replace("(", r"\(")) as caught:
        decide(ledger, "A", **fields)
    assert isinstance(caught.value, TriageError)
    assert ledger.history() == []


def test_outcomes_and_root_causes_have_labels_and_shortcuts() -> None:
    assert [o.code for o in OUTCOMES] == ["no_change", "adjusted", "handed_off", "deferred"]
    assert all(o.label for o in OUTCOMES)
    assert [c.key for c in DEFAULT_ROOT_CAUSES] == list("1234567890")
    assert len({c.code for c in DEFAULT_ROOT_CAUSES}) == 10


def test_custom_root_causes_are_what_record_accepts(path: Path, tmp_path: Path) -> None:
    file = tmp_path / "config.toml"
    file.write_text('[root_causes]\nrecall = "Product recall"\nother = "Other"\n')
    causes = load_config(file).root_causes
    with Ledger.open(path, root_causes=causes) as custom:
        assert decide(custom, "A", root_cause="recall").root_cause == "recall"
        with pytest.raises(DecisionError, match="use one of: recall, other"):
            decide(custom, "B", root_cause="promotion")


def test_a_ledger_can_be_used_from_another_thread(ledger: Ledger) -> None:
    # The TUI saves from worker threads (DEVELOPERS.md, "Threading": slow work in workers).
    errors: list[BaseException] = []

    def work(n: int) -> None:
        try:
            for i in range(20):
                decide(ledger, f"T{n}-{i}")
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(n,)) for n in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == [] and len(ledger.current(CYCLE)) == 60


# ---- default location -------------------------------------------------------------------------


def test_every_file_in_a_folder_shares_the_folder_ledger(tmp_path: Path) -> None:
    week1, week2 = tmp_path / "erp_2025-10.csv", tmp_path / "erp_2025-11.csv"
    first, second = locate_ledger(week1), locate_ledger(week2)
    assert first.path == second.path == tmp_path / FOLDER_LEDGER
    assert not first.exists and not first.legacy
    # The first run says where the ledger is.
    assert any(str(first.path) in n for n in first.notices)
    assert default_ledger_path(week1)[0] == tmp_path / FOLDER_LEDGER
    Ledger.open(first.path).close()
    again = locate_ledger(week2)
    assert again.exists and again.notices == ()
    # The folder itself names the same ledger (``triage review FOLDER``, ``triage history``).
    assert locate_ledger(tmp_path).path == first.path
    reading = locate_ledger(tmp_path / "erp_2025-12.csv", for_writing=False)
    assert reading.path == first.path and reading.exists


def test_reading_a_folder_without_ledger_finds_none_and_says_nothing_new(tmp_path: Path) -> None:
    where = locate_ledger(tmp_path / "week47.csv", for_writing=False)
    assert where.path == tmp_path / FOLDER_LEDGER and not where.exists
    assert where.notices == ()
    assert not (tmp_path / FOLDER_LEDGER).exists()


def _seed(path: Path, item: str) -> None:
    with Ledger.open(path) as seeded:
        decide(seeded, item)


def test_a_per_file_ledger_of_the_older_layout_keeps_working(tmp_path: Path) -> None:
    old = tmp_path / "week47.ledger.sqlite"
    _seed(old, "A")
    own = locate_ledger(tmp_path / "week47.csv")
    assert own.path == old and own.exists and own.legacy
    assert any("rename it to " + FOLDER_LEDGER in n for n in own.notices)
    # Next week's file in the same folder carries on with the one older ledger there.
    nxt = locate_ledger(tmp_path / "week48.csv")
    assert nxt.path == old and nxt.legacy
    assert locate_ledger(tmp_path / "week48.csv", for_writing=False).path == old
    # Nothing was renamed or changed.
    assert sorted(p.name for p in tmp_path.iterdir()) == ["week47.ledger.sqlite"]


def test_several_older_ledgers_are_not_guessed_between(tmp_path: Path) -> None:
    _seed(tmp_path / "week47.ledger.sqlite", "A")
    _seed(tmp_path / "week48.ledger.sqlite", "B")
    assert locate_ledger(tmp_path / "week48.csv").path == tmp_path / "week48.ledger.sqlite"
    new = locate_ledger(tmp_path / "week49.csv")
    assert new.path == tmp_path / FOLDER_LEDGER and not new.exists
    listed = " ".join(new.notices)
    assert "week47.ledger.sqlite" in listed and "week48.ledger.sqlite" in listed


def test_the_folder_ledger_wins_over_an_older_one_and_says_so(tmp_path: Path) -> None:
    _seed(tmp_path / "week47.ledger.sqlite", "A")
    _seed(tmp_path / FOLDER_LEDGER, "B")
    where = locate_ledger(tmp_path / "week47.csv")
    assert where.path == tmp_path / FOLDER_LEDGER and not where.legacy
    assert any("week47.ledger.sqlite" in n and "not read" in n for n in where.notices)


def test_configured_ledger_name_or_path(tmp_path: Path) -> None:
    portfolio = tmp_path / "week47.csv"
    assert locate_ledger(portfolio, name="plan.sqlite").path == tmp_path / "plan.sqlite"
    elsewhere = tmp_path / "shared" / "team.sqlite"
    where = locate_ledger(portfolio, name=str(elsewhere))
    assert where.path == elsewhere and not where.exists
    # A configured name is never swapped for an older per-file ledger of another file.
    _seed(tmp_path / "week46.ledger.sqlite", "A")
    assert locate_ledger(portfolio, name="plan.sqlite").path == tmp_path / "plan.sqlite"


def test_unwritable_folder_falls_back_to_user_data_one_per_folder(
    tmp_path: Path, monkeypatch
) -> None:
    # The real unprivileged run is in test_ledger_faults.py; here the folder check is forced.
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "data"))
    locked = tmp_path / "a" / "shared"
    twin = tmp_path / "b" / "shared"
    for folder in (locked, twin):
        folder.mkdir(parents=True)
    real = __import__("triage.core.ledger", fromlist=["_dir_writable"])._dir_writable
    monkeypatch.setattr(
        "triage.core.ledger._dir_writable",
        lambda folder: folder not in (locked, twin) and real(folder),
    )
    where, notice = default_ledger_path(locked / "week47.csv")
    assert where.name == FOLDER_LEDGER
    assert where.parent.parent == tmp_path / "data" / "triage" / "folders"
    assert where.parent.name.startswith("shared-") and where.parent.is_dir()
    assert notice is not None and str(locked) in notice and str(where) in notice
    # Two read-only folders with the same name never share a ledger.
    assert default_ledger_path(twin / "week47.csv")[0] != where
    # Reading finds what a review of the locked folder recorded.
    _seed(where, "A")
    assert locate_ledger(locked / "week48.csv", for_writing=False).path == where
    # The older per-file fallback is still used when it is all there is.
    older = tmp_path / "data" / "triage" / "week50.ledger.sqlite"
    _seed(older, "B")
    other = default_ledger_path(twin / "week50.csv")
    assert other[0] == older and other[1] is not None and "earlier triage" in other[1]


# ---- config -----------------------------------------------------------------------------------


def test_config_file_values(tmp_path: Path) -> None:
    file = tmp_path / "config.toml"
    file.write_text(
        'reviewer = "Ana Ruiz"\ntarget_share = 0.9\nledger = "planning.sqlite"\n'
        '[root_causes]\npromo = "Promotion"\nweather = "Weather"\n',
        encoding="utf-8",
    )
    cfg = load_config(file)
    assert cfg.reviewer == "Ana Ruiz" and cfg.target_share == 0.9 and cfg.path == file
    assert cfg.ledger == "planning.sqlite"
    assert [(c.code, c.label, c.key) for c in cfg.root_causes] == [
        ("promo", "Promotion", "1"),
        ("weather", "Weather", "2"),
    ]
    assert default_reviewer(cfg) == "Ana Ruiz"


def test_config_defaults_and_user_folder(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path))
    assert load_config() == config_mod.Config()
    (tmp_path / "triage").mkdir()
    (tmp_path / "triage" / "config.toml").write_text('reviewer = "Lee"\n')
    assert load_config().reviewer == "Lee"
    monkeypatch.setattr(config_mod.getpass, "getuser", lambda: "login-name")
    assert default_reviewer(config_mod.Config()) == "login-name"

    def no_user() -> str:
        raise OSError("no user")

    monkeypatch.setattr(config_mod.getpass, "getuser", no_user)
    assert default_reviewer(None) == "unknown"


@pytest.mark.parametrize(
    ("text", "key", "words"),
    [
        ("reviewr = 'x'\n", "reviewr", "not a known setting"),
        ("target_share = 1.5\n", "target_share", "at most 1"),
        ("target_share = 'high'\n", "target_share", "must be a number"),
        ("reviewer = ''\n", "reviewer", "non-empty"),
        ("root_causes = ['a']\n", "root_causes", "table"),
        ("[root_causes]\n'Bad Code' = 'x'\n", "root_causes.Bad Code", "not a usable code"),
        ("[root_causes]\nok = ''\n", "root_causes.ok", "non-empty text label"),
        ("[root_causes]\n", "root_causes", "is empty"),
        ("reviewer = \n", None, "not valid TOML"),
        ("ledger = ''\n", "ledger", "must name a ledger file"),
        ("ledger = 3\n", "ledger", "must name a ledger file"),
        ("ledger = 'team/'\n", "ledger", "must name a ledger file"),
        ('ledger = "a\\nb"\n', "ledger", "must name a ledger file"),
    ],
)
def test_bad_config_names_file_and_key(tmp_path: Path, text: str, key, words: str) -> None:
    file = tmp_path / "config.toml"
    file.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError, match=words) as caught:
        load_config(file)
    assert str(file) in str(caught.value) and caught.value.key == key
    if key:
        assert f"key '{key}'" in str(caught.value)


def test_named_config_must_exist(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="no such configuration file"):
        load_config(tmp_path / "missing.toml")


# ---- model check: derived state equals a plain fold over the history --------------------------


def fold(history) -> dict[tuple[str, str, str], int]:
    """Per-series fold in Python: the reference for the set-based SQL in ``current``."""
    alive: dict[tuple[str, str, str], list[int]] = {}
    undone: set[int] = set()
    for event in history:
        key = (event.cycle, event.item, event.location)
        if event.kind == "undo":
            undone.add(event.undoes)
            alive[key] = [i for i in alive[key] if i != event.undoes]
        else:
            alive.setdefault(key, []).append(event.id)
    return {k: ids[-1] for k, ids in alive.items() if ids}


class LedgerModel(RuleBasedStateMachine):
    """Random record/undo/stale/reopen runs against an in-memory model (docs/sources.md §4.5)."""

    series = st.tuples(
        st.sampled_from([CYCLE, NEXT_CYCLE]),
        st.sampled_from(["A", "B", "=C"]),
        st.sampled_from(["", "X"]),
    )

    def __init__(self) -> None:
        super().__init__()
        import tempfile

        self.dir = tempfile.TemporaryDirectory()
        self.path = Path(self.dir.name) / "m.ledger.sqlite"
        self.ledger = Ledger.open(self.path)
        self.versions: dict[tuple[str, str, str], int] = {}
        self.effective: dict[tuple[str, str, str], list[str]] = {}

    @rule(key=series, note=st.text(max_size=20))
    def record(self, key, note) -> None:
        version = self.versions.get(key, 0)
        decide(self.ledger, key[1], key[2], cycle=key[0], version=version, note=note)
        self.versions[key] = version + 1
        self.effective.setdefault(key, []).append(note)

    @rule(key=series)
    def undo(self, key) -> None:
        version = self.versions.get(key, 0)
        if not self.effective.get(key):
            with pytest.raises(DecisionError):
                take_back(self.ledger, key[1], key[2], cycle=key[0], version=version)
            return
        take_back(self.ledger, key[1], key[2], cycle=key[0], version=version)
        self.versions[key] = version + 1
        self.effective[key].pop()

    @precondition(lambda self: bool(self.versions))
    @rule(data=st.data())
    def stale(self, data) -> None:
        key = data.draw(st.sampled_from(sorted(self.versions)))
        with pytest.raises(StaleDecisionError):
            decide(self.ledger, key[1], key[2], cycle=key[0], version=self.versions[key] - 1)

    @rule()
    def reopen(self) -> None:
        self.ledger.close()
        self.ledger = Ledger.open(self.path)

    @invariant()
    def derived_state_matches(self) -> None:
        for cycle in (CYCLE, NEXT_CYCLE):
            got = {(cycle, d.item, d.location): d.note for d in self.ledger.current(cycle)}
            want = {k: v[-1] for k, v in self.effective.items() if k[0] == cycle and v}
            assert got == want
            ids = {(cycle, d.item, d.location): d.event_id for d in self.ledger.current(cycle)}
            assert ids == {k: v for k, v in fold(self.ledger.history()).items() if k[0] == cycle}
        for key, version in self.versions.items():
            assert self.ledger.version(*key) == version

    def teardown(self) -> None:
        self.ledger.close()
        self.dir.cleanup()


TestLedgerModel = LedgerModel.TestCase
TestLedgerModel.settings = settings(
    max_examples=25,
    stateful_step_count=25,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
