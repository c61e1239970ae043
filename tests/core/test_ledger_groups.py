"""Group decisions in the ledger: one decision, one event per series, undo whole, precedence,
the schema-3 migration on a file the schema-2 code wrote, and an older triage's refusal.

The rules checked are the ones docs/ledger.md states ("Group decisions"); the expected states
are worked out by hand or by the plain model in ``_model_effective`` (common practice: a
reference model of the journal replayed in Python).
"""

from __future__ import annotations

import sqlite3
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from triage.core import ledger as ledger_mod
from triage.core.ledger import (
    SCHEMA_VERSION,
    DecisionError,
    Ledger,
    LedgerError,
    Line,
    StaleDecisionError,
)

CYCLE = "2026-11-23"
NEXT_CYCLE = "2026-11-30"
PORTFOLIO = {"portfolio_name": "week47.csv", "portfolio_fingerprint": "ab" * 32}
V2_FIXTURE = Path(__file__).with_name("data") / "ledger-v2.sqlite"
PERIODS = ("2026-11-30", "2026-12-07")


def group(
    ledger: Ledger,
    items: list[str],
    *,
    versions: list[int] | None = None,
    cycle: str = CYCLE,
    adjusted: bool = True,
    **fields,
) -> ledger_mod.GroupRecord:
    """A group decision on ``items`` (location ""): ``x1.1`` over two periods when adjusted."""
    k = len(items)
    lines: dict[str, object] = {}
    if adjusted:
        lines = {
            "adjustment": "x1.1",
            "basis": "forecasts",
            "periods": PERIODS,
            "original": [[10.0 * (i + 1), None] for i in range(k)],
            "adjusted": [[11.0 * (i + 1), None] for i in range(k)],
        }
    values = {
        "columns": ("family",),
        "key_values": ("garden",),
        "outcome": "adjusted" if adjusted else "deferred",
        "root_cause": "promotion",
        "note": "spring",
        "reviewer": "ana",
        **PORTFOLIO,
        **lines,
        **fields,
    }
    return ledger.record_group(
        cycle,
        items=items,
        locations=[""] * k,
        expected_versions=versions if versions is not None else [0] * k,
        **values,  # type: ignore[arg-type]
    )


def decide(ledger: Ledger, item: str, *, version: int, **fields) -> ledger_mod.Event:
    values = {"outcome": "no_change", "root_cause": "unknown", "note": "", "reviewer": "bob"}
    values.update(fields)
    cycle = values.pop("cycle", CYCLE)
    return ledger.record(cycle, item, "", expected_version=version, **PORTFOLIO, **values)


def effective(ledger: Ledger, cycle: str = CYCLE) -> dict[str, tuple[str, int | None]]:
    return {d.item: (d.outcome, d.group_id) for d in ledger.current(cycle)}


@pytest.fixture
def ledger(tmp_path: Path):
    with Ledger.open(tmp_path / "week47.ledger.sqlite") as opened:
        yield opened


def test_a_group_decision_is_one_row_and_one_event_per_series_with_its_lines(
    ledger: Ledger,
) -> None:
    decide(ledger, "B", version=0)
    record = group(ledger, ["A", "B", "C"], versions=[0, 1, 0])
    assert record.id == 2 and record.event_ids == (3, 4, 5) and record.versions == (1, 2, 1)
    assert (record.columns, record.key_values) == (("family",), ("garden",))
    now = {d.item: d for d in ledger.current(CYCLE)}
    # Every member shows the group decision as its effective decision, B's own is replaced.
    assert {k: (d.outcome, d.group_id, d.adjustment) for k, d in now.items()} == {
        "A": ("adjusted", 2, "x1.1"),
        "B": ("adjusted", 2, "x1.1"),
        "C": ("adjusted", 2, "x1.1"),
    }
    assert now["B"].lines == (Line("2026-11-30", 20.0, 22.0), Line("2026-12-07", None, None))
    (stored,) = ledger.group_decisions(CYCLE)
    assert stored == record
    assert ledger.versions(CYCLE) == {("A", ""): 1, ("B", ""): 2, ("C", ""): 1}
    # The journal positions stay one sequence: a later series decision follows the group.
    assert decide(ledger, "D", version=0).id == 6


def test_group_text_is_kept_exactly(ledger: Ledger) -> None:
    odd = ("=1+2", "\x1b[31m[/]", "")
    record = group(ledger, ["A"], columns=("f", "g", "location"), key_values=odd, note="a\nb \x00")
    (stored,) = ledger.group_decisions()
    assert stored.key_values == odd and stored.note == "a\nb \x00"
    assert stored.columns == ("f", "g", "location") and stored == record


def test_a_stale_member_refuses_the_whole_group(ledger: Ledger) -> None:
    decide(ledger, "B", version=0)
    with pytest.raises(StaleDecisionError, match="'B'"):
        group(ledger, ["A", "B", "C"])  # B expected at 0, is at 1
    assert effective(ledger) == {"B": ("no_change", None)}
    assert ledger.group_decisions() == []


@pytest.mark.parametrize(
    ("fields", "words"),
    [
        ({"outcome": "no_change"}, "only with it"),
        ({"basis": "evenly"}, "split basis"),
        ({"columns": ("family", "size"), "key_values": ("garden",)}, "one key value"),
        ({"periods": ("2026-11-30", "2026-11-30")}, "twice"),
        ({"original": [[1.0, 2.0]]}, "rows of original"),
        ({"root_cause": "weather"}, "unknown root cause"),
    ],
)
def test_bad_group_fields_save_nothing(ledger: Ledger, fields: dict, words: str) -> None:
    with pytest.raises(DecisionError, match=words):
        group(ledger, ["A", "B"], **fields)
    assert ledger.history() == [] and ledger.group_decisions() == []


def test_a_series_twice_in_a_group_is_refused(ledger: Ledger) -> None:
    with pytest.raises(DecisionError, match="twice"):
        group(ledger, ["A", "A"])


def test_undo_of_a_group_reverts_every_member_to_its_decision_before(ledger: Ledger) -> None:
    decide(ledger, "A", version=0, outcome="handed_off")
    record = group(ledger, ["A", "B"], versions=[1, 0])
    undo = ledger.undo_group(CYCLE, record.id, reviewer="carl", note="wrong family", **PORTFOLIO)
    assert (undo.kind, undo.undoes, undo.items) == ("undo", record.id, ("A", "B"))
    assert undo.key_values == ("garden",) and undo.versions == (3, 2)
    # A is back to its own decision, B has none.
    assert effective(ledger) == {"A": ("handed_off", None)}
    events = ledger.history(CYCLE)
    assert [(e.kind, e.undoes, e.group_id) for e in events[-2:]] == [
        ("undo", record.event_ids[0], undo.id),
        ("undo", record.event_ids[1], undo.id),
    ]
    with pytest.raises(DecisionError, match="already undone by 'carl'"):
        ledger.undo_group(CYCLE, record.id, reviewer="carl", **PORTFOLIO)
    with pytest.raises(DecisionError, match="not a group decision"):
        ledger.undo_group(NEXT_CYCLE, record.id, reviewer="carl", **PORTFOLIO)
    with pytest.raises(DecisionError, match="not a group decision"):
        ledger.undo_group(CYCLE, 1, reviewer="carl", **PORTFOLIO)


def test_a_later_series_decision_overrides_the_group_and_survives_its_undo(
    ledger: Ledger,
) -> None:
    record = group(ledger, ["A", "B", "C"])
    # B: a later decision of its own replaces the group's part (every period of it).
    own = decide(
        ledger, "B", version=1, outcome="adjusted", adjustment="=5", lines=[(PERIODS[0], 20.0, 5.0)]
    )
    # C: a series-level undo of its part reverts C alone.
    ledger.undo(CYCLE, "C", "", reviewer="bob", expected_version=1, **PORTFOLIO)
    now = {d.item: d for d in ledger.current(CYCLE)}
    assert (now["B"].event_id, now["B"].group_id, now["B"].lines) == (
        own.id,
        None,
        (Line(PERIODS[0], 20.0, 5.0),),
    )
    assert set(now) == {"A", "B"} and now["A"].group_id == record.id
    undo = ledger.undo_group(CYCLE, record.id, reviewer="ana", **PORTFOLIO)
    # C's part was undone already, so the group undo writes for A and B only.
    assert undo.items == ("A", "B")
    assert effective(ledger) == {"B": ("adjusted", None)}
    # Undoing B's own decision afterwards does not bring the group's part back.
    ledger.undo(CYCLE, "B", "", reviewer="bob", expected_version=3, **PORTFOLIO)
    assert effective(ledger) == {}


def test_a_group_decision_without_adjustment_has_no_lines(ledger: Ledger) -> None:
    record = group(ledger, ["A", "B"], adjusted=False)
    assert (record.outcome, record.adjustment, record.basis) == ("deferred", None, None)
    assert all(not d.lines for d in ledger.current(CYCLE))
    assert effective(ledger) == {"A": ("deferred", record.id), "B": ("deferred", record.id)}


def test_group_decision_joins_a_batch(ledger: Ledger) -> None:
    with pytest.raises(StaleDecisionError), ledger.batch("two"):
        decide(ledger, "X", version=0)
        group(ledger, ["A", "X"])  # X is at 1 inside the batch: all of it is rolled back
    assert ledger.history() == []


def test_the_file_refuses_group_parts_that_do_not_match_their_group(
    ledger: Ledger, tmp_path: Path
) -> None:
    record = group(ledger, ["A"])
    con = sqlite3.connect(ledger.path, isolation_level=None)
    try:
        with pytest.raises(sqlite3.IntegrityError, match="must match its group decision"):
            con.execute(
                "INSERT INTO event (id, cycle, item, location, version, kind, outcome, "
                "root_cause, note, adjustment, reviewer, recorded_at, portfolio_name, "
                "portfolio_fingerprint, group_id) VALUES (9, ?, 'Z', '', 1, 'decision', "
                "'no_change', 'unknown', '', NULL, 'x', 't', 'p', 'f', ?)",
                (CYCLE, record.id),
            )
        with pytest.raises(sqlite3.IntegrityError, match="append-only"):
            con.execute("UPDATE group_decision SET note = 'x'")
        with pytest.raises(sqlite3.IntegrityError, match="append-only"):
            con.execute("DELETE FROM group_decision")
        with pytest.raises(sqlite3.IntegrityError, match="journal position"):
            con.execute(
                "INSERT INTO group_decision (id, kind, cycle, columns, key_values, outcome,"
                " root_cause, note, reviewer, recorded_at, portfolio_name, portfolio_fingerprint)"
                " VALUES (1, 'decision', ?, '[\"f\"]', '[\"g\"]', 'no_change', 'unknown', '',"
                " 'x', 't', 'p', 'f')",
                (CYCLE,),
            )
    finally:
        con.close()


# ---- schema 3: migration of a file the schema-2 code wrote, and the other way round ------------


def _rows(file: Path) -> dict[str, list[tuple]]:
    con = sqlite3.connect(f"file:{file}?mode=ro", uri=True)
    try:
        return {
            table: con.execute(f"SELECT * FROM {table} ORDER BY 1, 2").fetchall()
            for table in ("event", "event_line", "adjustment_end", "worst_snapshot", "worst_member")
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
def v2(tmp_path: Path) -> Path:
    """A copy of the schema-2 ledger written by the code of commit f1b8af5 (tests/core/data)."""
    copy = tmp_path / "triage-ledger.sqlite"
    copy.write_bytes(V2_FIXTURE.read_bytes())
    assert _user_version(copy) == 2
    return copy


def test_v2_ledger_is_read_as_it_is_when_opened_read_only(v2: Path) -> None:
    before = v2.read_bytes()
    with Ledger.open(v2, read_only=True) as viewer:
        assert viewer.schema_version == 2
        assert viewer.group_decisions() == []
        assert [(e.kind, e.group_id) for e in viewer.history()] == [
            ("decision", None),
            ("decision", None),
            ("undo", None),
        ]
        assert [d.group_id for d in viewer.current("2026-11-23")] == [None]
        with pytest.raises(ledger_mod.LedgerReadOnlyError):
            group(viewer, ["A"])
    assert v2.read_bytes() == before
    assert sorted(p.name for p in v2.parent.iterdir()) == [v2.name]


def test_v2_ledger_is_migrated_in_place_keeping_every_row(v2: Path) -> None:
    before = _rows(v2)
    with Ledger.open(v2) as opened:
        assert opened.schema_version == SCHEMA_VERSION == 3
        assert opened.history()[1].note == "=1+2 \x1b[31m"
        assert set(opened.standing_ends()) == {1} and set(opened.worst_sets()) == {"2026-11-30"}
        # Positions continue the one journal (events 1-3, the end 4).
        record = group(opened, ["Z-900"], cycle="2026-11-30")
        assert record.id == 5 and record.event_ids == (6,)
        assert decide(opened, "C", version=0).id == 7
    assert _user_version(v2) == 3
    after = _rows(v2)
    # ``event`` gains one column, NULL in every row written before; nothing else moves.
    assert [r[:-1] for r in after["event"][:3]] == before["event"]
    assert [r[-1] for r in after["event"][:3]] == [None, None, None]
    for table in ("event_line", "adjustment_end", "worst_snapshot", "worst_member"):
        assert after[table][: len(before[table])] == before[table], table
    con = sqlite3.connect(v2)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert con.execute("PRAGMA foreign_key_check").fetchall() == []
    con.close()


def test_v2_migration_is_one_transaction(v2: Path, monkeypatch) -> None:
    def half_then_fail(con: sqlite3.Connection) -> None:
        ledger_mod._migrate_to_v3(con)
        raise sqlite3.OperationalError("disk I/O error (simulated, after the new table)")

    monkeypatch.setattr(ledger_mod, "MIGRATIONS", [*ledger_mod.MIGRATIONS[:2], half_then_fail])
    before = _rows(v2)
    with pytest.raises(LedgerError):
        Ledger.open(v2)
    assert _user_version(v2) == 2 and _rows(v2) == before
    con = sqlite3.connect(f"file:{v2}?mode=ro", uri=True)
    columns = [r[1] for r in con.execute("PRAGMA table_info(event)")]
    tables = {r[0] for r in con.execute("SELECT name FROM sqlite_schema WHERE type = 'table'")}
    con.close()
    assert "group_id" not in columns and "group_decision" not in tables


def test_a_schema_2_triage_refuses_a_schema_3_ledger(tmp_path: Path, monkeypatch) -> None:
    # The code that reads a ledger's version is the same before and after this change; an
    # older triage is this code with schema 2 as its newest (SCHEMA_VERSION and MIGRATIONS as
    # at commit f1b8af5). docs/ledger.md, "When something goes wrong": refused, not touched.
    path = tmp_path / "triage-ledger.sqlite"
    with Ledger.open(path) as current:
        group(current, ["A", "B"])
    before = path.read_bytes()
    monkeypatch.setattr(ledger_mod, "SCHEMA_VERSION", 2)
    monkeypatch.setattr(ledger_mod, "MIGRATIONS", ledger_mod.MIGRATIONS[:2])
    for read_only in (False, True):
        with pytest.raises(
            LedgerError, match=r"newer triage \(ledger schema 3; this version reads up to 2\)"
        ):
            Ledger.open(path, read_only=read_only)
    assert path.read_bytes() == before


# ---- a property: the effective decisions against a plain replay of the journal -------------


def _model_effective(ops: list[tuple]) -> dict[str, tuple[str, int | None]]:
    """Plain model: per series a stack of (event id, outcome, group); undo pops by id."""
    stacks: dict[str, list[tuple[int, str, int | None]]] = {}
    undone: set[int] = set()
    for op in ops:
        if op[0] == "decide":
            _, event_id, item, outcome = op
            stacks.setdefault(item, []).append((event_id, outcome, None))
        elif op[0] == "group":
            _, group_id, parts, outcome = op
            for event_id, item in parts:
                stacks.setdefault(item, []).append((event_id, outcome, group_id))
        elif op[0] == "undo":
            undone.add(op[1])
    out = {}
    for item, stack in stacks.items():
        standing = [s for s in stack if s[0] not in undone]
        if standing:
            out[item] = (standing[-1][1], standing[-1][2])
    return out


ITEMS = ["A", "B", "C", "D"]


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    steps=st.lists(
        st.tuples(
            st.sampled_from(["decide", "group", "undo", "undo_group"]),
            st.lists(st.sampled_from(ITEMS), min_size=1, max_size=4, unique=True),
            st.sampled_from(["no_change", "deferred", "handed_off"]),
        ),
        max_size=12,
    )
)
def test_effective_decisions_follow_a_plain_replay(tmp_path: Path, steps: list) -> None:
    # A fresh folder per example: a failing example leaves its file, and a replay of it (or any
    # later example) must not open that file again.
    path = Path(tempfile.mkdtemp(dir=tmp_path)) / "ledger.sqlite"
    ops: list[tuple] = []
    groups: list[int] = []
    with Ledger.open(path) as ledger:
        for kind, items, outcome in steps:
            versions = ledger.versions(CYCLE)
            v = [versions.get((i, ""), 0) for i in items]
            if kind == "decide":
                event = decide(ledger, items[0], version=v[0], outcome=outcome)
                ops.append(("decide", event.id, items[0], outcome))
            elif kind == "group":
                record = group(ledger, items, versions=v, adjusted=False, outcome=outcome)
                ops.append(
                    ("group", record.id, list(zip(record.event_ids, items, strict=True)), outcome)
                )
                groups.append(record.id)
            elif kind == "undo":
                try:
                    event = ledger.undo(
                        CYCLE, items[0], "", reviewer="x", expected_version=v[0], **PORTFOLIO
                    )
                except DecisionError:
                    continue
                ops.append(("undo", event.undoes))
            elif groups:
                try:
                    undo = ledger.undo_group(CYCLE, groups[-1], reviewer="x", **PORTFOLIO)
                except DecisionError:
                    continue
                ops.extend(("undo", e) for e in _parts_undone(ledger, undo))
            assert effective(ledger) == _model_effective(ops)
    path.unlink()


def test_a_decision_after_undoing_a_group_whose_members_were_undone_is_saved(
    tmp_path: Path,
) -> None:
    # Found by the replay above: the group's undo is then the journal's latest row with no event
    # after it, and the next decision took its position ("NOT saved").
    with Ledger.open(tmp_path / "ledger.sqlite") as ledger:
        first = group(ledger, ["A"], adjusted=False)
        ledger.undo(CYCLE, "A", "", reviewer="x", expected_version=1, **PORTFOLIO)
        undone = ledger.undo_group(CYCLE, first.id, reviewer="x", **PORTFOLIO)
        assert undone.id > first.id
        again = group(ledger, ["B"], adjusted=False)
        assert again.id > undone.id
        event = decide(ledger, "C", version=0)
        assert event.id > max(again.event_ids)


def _parts_undone(ledger: Ledger, undo: ledger_mod.GroupRecord) -> list[int]:
    by_id = {e.id: e for e in ledger.history(CYCLE)}
    return [by_id[i].undoes for i in undo.event_ids]  # type: ignore[misc]
