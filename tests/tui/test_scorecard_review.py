"""The review screens on a dataset's stored scorecard (``triage review DATASET --scorecard DIR``).

The list opens from the scorecard; each series' history is fetched from the dataset on a worker
when a row, the detail pane or the decision dialog needs it. The fetch is held back by a gate
here, so the screens are certainly seen before a history is in: keys never wait for it.
"""

from __future__ import annotations

import threading
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from tests.core.datasets import generated, stored_scorecard, write_layout
from tests.tui.conftest import burst, wait_for, wait_listed
from triage.core import card_folder, on_demand, vocabulary
from triage.core.ledger import Ledger
from triage.tui.app import Options, TriageApp
from triage.tui.screens.decision import DecisionScreen
from triage.tui.screens.dialogs import WaitScreen
from triage.tui.screens.overrides import OverridesScreen
from triage.tui.widgets.series_list import SeriesList


@pytest.fixture(scope="module")
def lake(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    base = tmp_path_factory.mktemp("scorecard-review")
    rows = pq.read_table(generated(base, 60)).to_pandas()
    folder = write_layout(rows, base / "by-month", "period")
    return folder, stored_scorecard(folder, base / "card")


@pytest.fixture
def gate(monkeypatch: pytest.MonkeyPatch) -> threading.Event:
    """Holds ``Histories.fetch`` until set (set at the end in any case)."""
    opened = threading.Event()
    original = on_demand.Histories.fetch

    def held(self, series):
        opened.wait(timeout=60)
        return original(self, series)

    monkeypatch.setattr(on_demand.Histories, "fetch", held)
    yield opened
    opened.set()


def app_on(lake: tuple[Path, Path], tmp_path: Path) -> TriageApp:
    folder, card = lake
    return TriageApp(
        Options(portfolio=folder, scorecard=card, ledger=tmp_path / "ledger.sqlite", reviewer="ana")
    )


def detail(app: TriageApp) -> str:
    return str(app.query_one("#detail-text").render())


async def test_the_list_comes_first_and_histories_fill_in(
    lake: tuple[Path, Path], gate: threading.Event, tmp_path: Path
) -> None:
    app = app_on(lake, tmp_path)
    async with app.run_test(size=(170, 48)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
        series_list = app.query_one(SeriesList)
        assert len(series_list.order) == session.portfolio.n_series
        top = int(series_list.order[0])
        await wait_for(pilot, lambda: "fetching from the dataset" in detail(app), "the pane")
        assert app._format_row(top)["spark"] == ("…", "dim")
        # A decision dialog asked for before the history is in opens once it is, with what
        # was typed meanwhile; no key typed meanwhile acts on the list (digits pick a cause).
        cause = app.cause
        burst(app, ["a", "=", "7", "5", "ctrl+s"])
        await wait_for(pilot, lambda: isinstance(app.screen, WaitScreen), "the wait")
        await pilot.pause(0.2)
        assert app.cause == cause and session.outcome[top] == ""
        gate.set()
        await wait_for(
            pilot, lambda: session.outcome[top] == vocabulary.ADJUSTED, "the adjustment saved"
        )
        decision = Ledger.open(tmp_path / "ledger.sqlite").history()[-1]
        assert (decision.item, decision.location) == session.key(top)
        assert decision.adjustment == "=75"
        assert not isinstance(app.screen, (WaitScreen, DecisionScreen))
        assert app._format_row(top)["spark"][0] != "…"
        assert "fetching" not in detail(app)
        assert "forecasts on the same" in detail(app)


async def test_decisions_at_full_speed_are_saved_with_the_dataset(
    lake: tuple[Path, Path], tmp_path: Path
) -> None:
    app = app_on(lake, tmp_path)
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
        series_list = app.query_one(SeriesList)
        first, second = (int(s) for s in series_list.order[:2])
        burst(app, ["c", "down", "h"])
        await wait_for(
            pilot,
            lambda: (
                session.outcome[first] == vocabulary.NO_CHANGE
                and session.outcome[second] == vocabulary.HANDED_OFF
            ),
            "both decisions",
        )
        for key, words in (("x", "Exporting is not available"), ("G", "group view is not")):
            burst(app, [key])
            await wait_for(pilot, lambda w=words: w in app.status_text, f"the answer to {key}")
        # The value of past overrides opens (fetching what it needs on its worker), without
        # the portfolio's FVA, which needs every history.
        burst(app, ["v"])
        await wait_for(pilot, lambda: isinstance(app.screen, OverridesScreen), "the overrides")
        await pilot.pause(0.2)
        shown = " ".join(str(p) for p in app.screen.parts())
        assert "not shown in a review on a stored scorecard" in shown
    ledger = Ledger.open(tmp_path / "ledger.sqlite")
    events = ledger.history()
    stored = card_folder.open_card_folder(lake[1], lake[0])
    assert [(e.item, e.location) for e in events] == [session.key(first), session.key(second)]
    assert {e.portfolio_fingerprint for e in events} == {on_demand.fingerprint(stored)}


async def test_a_part_rewritten_after_opening_is_reported_and_keys_go_on(
    lake: tuple[Path, Path], tmp_path: Path
) -> None:
    import shutil

    folder = tmp_path / "lake"
    shutil.copytree(lake[0], folder)
    card = stored_scorecard(folder, tmp_path / "card")
    app = TriageApp(
        Options(portfolio=folder, scorecard=card, ledger=tmp_path / "l.sqlite", reviewer="ana")
    )
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_listed(app, pilot)
        session = app.session
        series_list = app.query_one(SeriesList)
        # A part rewritten after the review opened: its histories would not be those scored,
        # so the next fetch refuses to read it, and says to make the scorecard again.
        await wait_for(pilot, lambda: not app._fetch_running and not app._wanted, "first rows")
        part = sorted(folder.glob("*.parquet"))[2]
        part.write_bytes(b"not parquet any more")
        burst(app, ["end"])
        await wait_for(pilot, lambda: "error:" in app.status_text, "the error")
        assert "has changed since this scorecard was made" in app.status_text
        last = int(series_list.order[-1])
        burst(app, ["c"])
        await wait_for(
            pilot, lambda: session.outcome[last] == vocabulary.NO_CHANGE, "a decision after it"
        )


async def test_a_failed_fetch_ends_the_wait_and_enter_tries_again(
    lake: tuple[Path, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from triage.core.errors import LoadError

    original = on_demand.Histories.fetch
    failing = threading.Event()
    failing.set()

    def flaky(self, series):
        if failing.is_set():
            raise LoadError(lake[0], "the share is [bold]gone\x1b[2J for now.")
        return original(self, series)

    monkeypatch.setattr(on_demand.Histories, "fetch", flaky)
    app = app_on(lake, tmp_path)
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_listed(app, pilot)
        top = int(app.query_one(SeriesList).order[0])
        await wait_for(pilot, lambda: "could not be read" in detail(app), "the pane to say so")
        burst(app, ["enter"])
        await wait_for(pilot, lambda: "error:" in app.status_text, "the error")
        await wait_for(pilot, lambda: not isinstance(app.screen, WaitScreen), "the wait to end")
        # Shown as text: no markup parsed, no terminal escape.
        assert "[bold]gone" in app.status_text and "\x1b" not in app.status_text
        failing.clear()
        burst(app, ["enter"])
        await wait_for(pilot, lambda: isinstance(app.screen, DecisionScreen), "the dialog")
        assert app.histories is not None and app.histories.has(top)


async def test_a_reopen_maps_the_scorecard_from_the_reopen_cache(
    lake: tuple[Path, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import pyarrow.parquet

    folder, card = lake
    cache = tmp_path / "cache"

    def opened() -> TriageApp:
        return TriageApp(
            Options(
                portfolio=folder,
                scorecard=card,
                ledger=tmp_path / "ledger.sqlite",
                reviewer="ana",
                cache_folder=cache,
            )
        )

    app = opened()
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_listed(app, pilot)
        await wait_for(pilot, lambda: any(cache.glob("*/scorecard.arrow")), "the scorecard kept")
        first = app.session.ranked.copy()

    # The second open does not read the scorecard's files: it maps the kept table.
    def refused(*args, **kwargs):
        raise AssertionError("the scorecard's files were read again")

    monkeypatch.setattr(pyarrow.parquet, "read_table", refused)
    app = opened()
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_listed(app, pilot)
        import pandas as pd

        pd.testing.assert_frame_equal(app.session.ranked, first)
