"""The review screens: work through the weekly worst-offender list at the keyboard."""

from __future__ import annotations

import asyncio
import gc
import math
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager, suppress
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
from rich.text import Text
from textual import events, on, work
from textual.app import App, ComposeResult, SystemCommand
from textual.binding import Binding, BindingType
from textual.containers import Container, Vertical
from textual.css.query import NoMatches
from textual.timer import Timer
from textual.widgets import Footer, ProgressBar, Static
from textual.worker import Worker, WorkerState

from triage.core import cache, schema, vocabulary, words
from triage.core import groups as groups_mod
from triage.core import ledger as ledger_mod
from triage.core.cycle import ReviewCycle
from triage.core.dialect import FileOptions
from triage.core.errors import TriageError
from triage.core.group_review import GroupReview, outcome_words
from triage.core.ledger import GroupRecord
from triage.core.on_demand import Histories, NotFetched
from triage.core.review import FILTER_FIELDS, ActiveAdjustment, ReviewSession, StillComputing
from triage.core.settings import CACHE_LIMIT_MB, ScoreSettings
from triage.core.text import visible
from triage.core.vocabulary import DEFAULT_ROOT_CAUSES, Choice
from triage.tui import format as fmt
from triage.tui.keyorder import KeyOrder
from triage.tui.messages import (
    BackgroundDone,
    BackgroundNote,
    BackgroundStep,
    Ended,
    Exported,
    Fetched,
    GroupsReady,
    Loaded,
    LoadStep,
    Saved,
    SaveFailed,
)
from triage.tui.screens.decision import UNCHANGED, DecisionScreen, Draft, draft_of
from triage.tui.screens.dialogs import (
    ChooseScreen,
    ConfirmScreen,
    HelpScreen,
    PromptScreen,
    WaitScreen,
)
from triage.tui.screens.group_decision import GroupDecisionScreen, GroupDraft
from triage.tui.screens.overrides import OverridesScreen
from triage.tui.widgets.chart import SeriesChart
from triage.tui.widgets.series_list import GroupList, SeriesList

#: Seconds the cursor must rest on a series before its chart is drawn.
CHART_SETTLE = 0.08
#: Histories fetched from the dataset in one read (``--scorecard``): about a screen of rows.
FETCH_BATCH = 64

CAUTION = (
    "Decisions and adjusted forecasts are advisory: check them in the planning system "
    "before they move stock or money."
)


@dataclass
class Options:
    """How the app was started."""

    portfolio: Path
    ledger: Path | None = None
    reviewer: str = ""
    settings: ScoreSettings = field(default_factory=ScoreSettings)
    """Window, season, target share, repeat offenders and lag (``triage.core.settings``)."""
    columns: dict[str, str] | None = None
    sheet: str | None = None
    file_options: FileOptions | None = None
    """How the file writes its cells (``--sep``, ``--decimal``, ``--date-format``,
    ``--header-row``)."""
    root_causes: tuple[Choice, ...] = DEFAULT_ROOT_CAUSES
    auto_advance: bool = False
    notices: list[str] = field(default_factory=list)
    group: str | None = None
    """``--group``: the columns the group view rolls series up by (checked once loaded)."""
    cache: bool = True
    """Open from the reopen cache and keep the load there (``--no-cache``: neither)."""
    cache_limit_mb: int = CACHE_LIMIT_MB.default
    """The reopen cache's bound (``--cache-limit``)."""
    cache_folder: Path | None = None
    """Where the reopen cache is (None: ``cache.default_folder()``)."""
    scorecard: Path | None = None
    """``--scorecard DIR``: review the dataset ``portfolio`` on its stored scorecard, the
    histories fetched on demand (``triage.core.on_demand``)."""


#: Actions on one series, unavailable (dimmed) while the group view is shown.
SERIES_ACTIONS = frozenset(
    {
        "quick",
        "take_suggestion",
        "next_unreviewed",
        "end_adjustment",
        "jump",
        "filter_text",
        "filter_field",
    }
)


def _stale(exc: TriageError) -> bool:
    return isinstance(exc, ledger_mod.StaleDecisionError)


def _freeze_heap() -> None:
    """Keep the session's long-lived objects out of the cyclic collector's full passes.

    A million-series session holds object arrays of a million references each, and every full
    collection walked them all: pauses of tens of milliseconds on random keystrokes. Objects
    frozen by ``gc.freeze`` (Python documentation, module ``gc``) are not scanned again and are
    still freed by reference counting. Collected first, so that no garbage is frozen; once the
    session is complete (the background pieces in), on the UI thread after a frame.
    """
    gc.collect()
    gc.freeze()


class TriageApp(App[None]):
    """Review one portfolio's worst offenders and record decisions in the ledger.

    | Key | Action |
    | --- | --- |
    | enter | open the decision dialog |
    | c / h / l | quick decision: no change / hand off / later |
    | a | adjust the forward forecast |
    | s | take the suggested adjustment |
    | 1-9, 0 | root cause for quick decisions |
    | u | undo the series' last decision |
    | n | next unreviewed series |
    | / | filter by text; f: by field; escape: clear |
    | b | switch order: error / bias / fva (error added by the last process step) |
    | g | go to a series by key |
    | x | export decisions and the adjusted forecast |
    | ? | help |
    | q | quit |
    """

    CSS_PATH = "triage.tcss"
    TITLE = "triage"

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding(
            "enter",
            "decide",
            "Decide",
            id="review.decide",
            tooltip="Open the decision dialog for the highlighted series",
        ),
        Binding(
            "c",
            f"quick('{vocabulary.NO_CHANGE}')",
            "No change",
            id=f"review.{vocabulary.NO_CHANGE}",
            tooltip="Record 'no change needed' with the chosen root cause",
        ),
        Binding(
            "a",
            "adjust",
            "Adjust",
            id="review.adjust",
            tooltip="Open the decision dialog on the adjustment field (in the group view: one "
            "decision for the whole group, its adjustment split to the series)",
        ),
        Binding(
            "n",
            "next_unreviewed",
            "Next",
            id="review.next",
            tooltip="Jump to the next series without a decision this cycle",
        ),
        Binding(
            "u",
            "undo",
            "Undo",
            id="review.undo",
            tooltip="Undo the highlighted series' last decision (a new ledger event)",
        ),
        Binding(
            "slash",
            "filter_text",
            "Filter",
            id="find.text",
            tooltip="Show only series whose key or attributes contain a text",
        ),
        Binding("question_mark", "help", "Help", id="app.help", tooltip="List every key"),
        Binding(
            "q", "quit", "Quit", id="app.quit", tooltip="Quit (every decision is already saved)"
        ),
        Binding(
            "ctrl+c",
            "quit",
            "Quit",
            show=False,
            priority=True,
            id="app.quit_anywhere",
            tooltip="Quit from anywhere (asks first when a decision is being typed)",
        ),
        Binding(
            "h",
            f"quick('{vocabulary.HANDED_OFF}')",
            "Hand off",
            show=False,
            id=f"review.{vocabulary.HANDED_OFF}",
            tooltip="Record 'handed to someone else'",
        ),
        Binding(
            "l",
            f"quick('{vocabulary.DEFERRED}')",
            "Later",
            show=False,
            id=f"review.{vocabulary.DEFERRED}",
            tooltip="Record 'put off to a later cycle'",
        ),
        Binding(
            "s",
            "take_suggestion",
            "Take suggestion",
            show=False,
            id="review.suggestion",
            tooltip="Open the dialog with the suggested adjustment filled in",
        ),
        *fmt.digit_bindings(
            "cause",
            "review",
            "Root cause of the quick decisions (kept until changed; shown in the header)",
        ),
        Binding(
            "f",
            "filter_field",
            "Filter by field",
            show=False,
            id="find.field",
            tooltip="Filter by an attribute, pattern, bias flag or review outcome",
        ),
        Binding(
            "escape",
            "clear_filter",
            "Clear filter",
            show=False,
            id="find.clear",
            tooltip="Remove every filter",
        ),
        Binding(
            "b",
            "toggle_order",
            "Error/bias/FVA order",
            show=False,
            id="find.order",
            tooltip="Order by share of error, by persistent bias, or by the error the last "
            "process step added (fva loss)",
        ),
        Binding(
            "g",
            "jump",
            "Go to series",
            show=False,
            id="find.jump",
            tooltip="Jump to a series by its item (and location)",
        ),
        Binding(
            "x",
            "export",
            "Export",
            show=False,
            id="app.export",
            tooltip="Export decisions and the adjusted forward forecast",
        ),
        Binding(
            "e",
            "end_adjustment",
            "End carried adjustment",
            show=False,
            id="review.end_adjustment",
            tooltip="Stop carrying an earlier cycle's adjustment into exports (or restore one)",
        ),
        Binding(
            "N",
            "toggle_advance",
            "Auto-advance",
            show=False,
            id="review.auto_advance",
            tooltip="After each decision, go to the next series without one: on / off",
        ),
        Binding(
            "z",
            "chart_zoom",
            "Whole history",
            show=False,
            id="chart.zoom",
            tooltip="Chart: the whole history, or the recent 26 periods and the forward horizon",
        ),
        Binding(
            "p",
            "chart_clip",
            "Clip spikes",
            show=False,
            id="chart.clip",
            tooltip="Chart: cut spikes that dwarf the rest (cut points marked), or show them whole",
        ),
        Binding(
            "o",
            "chart_others",
            "Other forecasts",
            show=False,
            id="chart.others",
            tooltip="Chart: overlay the file's competing forecasts (forecast_<name>), or hide them",
        ),
        Binding(
            "G",
            "groups",
            "Groups",
            show=False,
            id="find.groups",
            tooltip="Group view: the series rolled up by attribute or location, ranked; enter "
            "opens a group's series, escape goes back",
        ),
        Binding(
            "v",
            "override_value",
            "Override value",
            show=False,
            id="app.overrides",
            tooltip=(
                "Did past overrides help? Realised value by direction, size, reviewer, cause, cycle"
            ),
        ),
    ]

    def __init__(self, options: Options) -> None:
        super().__init__()
        self.options = options
        self.session: ReviewSession | None = None
        self.histories: Histories | None = None
        """``--scorecard``: the histories fetched from the dataset on demand; None when every
        history is in memory."""
        self._wanted: dict[int, None] = {}
        """Series whose histories the screens asked for and no fetch has taken yet."""
        self._fetch_running = False
        self._fetch_scheduled = False
        self._failed: set[int] = set()
        """Series whose fetch failed (not asked for again: the message said why)."""
        self._open_after_fetch: tuple[int, str, str, WaitScreen] | None = None
        """(series, outcome, adjustment, the wait screen) of a decision dialog that opens once
        the series' history is in."""
        self.by = vocabulary.BY_ERROR
        self.text_filter = ""
        self.field_filters: dict[str, str] = {}
        self.cause = "unknown"
        self.groups: GroupReview | None = None
        """The ranked groups, once asked for (``G``)."""
        self.group_by: tuple[str, ...] | None = None
        self.in_groups = False
        """The group view is shown instead of the series list."""
        self.drill: int | None = None
        """The group whose series the series list shows (entered from the group view)."""
        self._outer_filters: tuple[str, dict[str, str]] = ("", {})
        self._group_spark: tuple[np.ndarray, np.ndarray] = (np.zeros((0, 0)), np.zeros((0, 0)))
        self.auto_advance = options.auto_advance
        """Move to the next unreviewed series after each decision."""
        """Root cause of the quick decisions; picked with a digit, kept until changed."""
        self._turn = threading.Condition()
        self._issued = 0
        self._served = 0
        self._written: dict[int, int] = {}
        """Series -> version of this app's latest committed write (worker threads write it)."""
        self._quit_forced = False
        self.crashed: BaseException | None = None
        self._unsaved: str | None = None
        """A fault that closed the app, for the command line to report (None when none)."""
        self._queued: dict[int, int] = {}
        """Series -> saves asked for and not yet answered (UI thread)."""
        self.drafts: dict[int, Draft] = {}
        self.status_text = ""
        self._arrays: dict[str, Any] = {}
        self._pattern: Any = None
        self._computing = ""
        """What the background worker is computing (``ReviewSession.background``), shown in
        the summary line; empty once done."""
        self._load_status = ""
        self._stop_cache = threading.Event()
        """Set when the app closes: a cache write still going stops (its scratch is removed)."""
        """The status line as loading left it (background notices join it, if still shown)."""
        self._order_waits = False
        """A filter waits for a background piece (the list is empty until it is in)."""
        self._chart_timer: Timer | None = None
        self.key_order = KeyOrder(self, lambda event: App.on_event(self, event))
        """Hands keys on one at a time, in the order typed (see ``triage.tui.keyorder``)."""

    # -- faults -------------------------------------------------------------------------------

    def _handle_exception(self, error: Exception) -> None:
        """A fault in the app: keep it for the command line's one-line report and crash log."""
        if self.crashed is None:
            self.crashed = error
            try:
                self._unsaved = self.unsaved_entries()  # now, while the dialog still exists
            except Exception:  # reporting must not fail on a half-broken app
                self._unsaved = ""
        super()._handle_exception(error)

    def _fatal_error(self) -> None:
        """Close without drawing Textual's traceback over the terminal (the crash log has it)."""
        self.bell()
        self._close_messages_no_wait()

    def unsaved_entries(self) -> str:
        """What the reviewer typed and had not saved, for the crash log (nothing is lost)."""
        if self.crashed is not None and self._unsaved is not None:
            return self._unsaved
        drafts = dict(self.drafts)
        for screen in self.screen_stack:
            if isinstance(screen, DecisionScreen):
                try:
                    draft = screen.current_draft()
                except Exception:  # the dialog may be half gone; the kept drafts still count
                    continue
                drafts[draft.series] = draft
        if not drafts or self.session is None:
            return ""
        lines = ["Unsaved entries (type them again in triage review):"]
        for draft in drafts.values():
            key = " @ ".join(k for k in self.session.key(draft.series) if k)
            lines.append(
                f"  {key!r}: outcome {draft.outcome}, root cause {draft.root_cause}, "
                f"adjustment {draft.adjustment!r}, note {draft.note!r}"
            )
        return "\n".join(lines)

    async def on_event(self, event: events.Event) -> None:
        """Keys and pastes from the terminal go through ``key_order``; the rest as usual."""
        if isinstance(event, (events.Key, events.Paste)) and not event.is_forwarded:
            await self.key_order.key(event)
            return
        await super().on_event(event)

    # -- layout -------------------------------------------------------------------------------

    def compose(self) -> ComposeResult:
        yield Static(Text("loading…"), id="summary")
        with Vertical(id="loading"):
            yield Static(
                Text(f"Loading {fmt.plain(str(self.options.portfolio))}"), id="loading-label"
            )
            yield ProgressBar(total=5, show_eta=False, id="loading-bar")
        with Container(id="main"):
            yield SeriesList(fmt.LIST_COLUMNS, self._format_row, id="list")
            yield GroupList(fmt.GROUP_COLUMNS, self._format_group, id="groups")
            with Vertical(id="detail"):
                yield Static(Text(""), id="detail-title")
                yield SeriesChart(id="chart")
                yield Static(Text(""), id="detail-text")
        yield Static(Text(""), id="status")
        yield Footer()

    def _q(self, selector, expect_type=None):
        """Query the main screen, whatever dialog is on top of it."""
        base = self.screen_stack[0] if self.screen_stack else self.screen
        if expect_type is None:
            return base.query_one(selector)
        return base.query_one(selector, expect_type)

    def on_mount(self) -> None:
        self._q("#main").display = False
        self._q(GroupList).display = False
        self._fit_layout(self.size.width)
        self.load()

    def on_resize(self, event) -> None:
        self._fit_layout(event.size.width)

    def _fit_layout(self, width: int) -> None:
        narrow = width < 140
        if narrow != self.has_class("-narrow"):
            self.set_class(narrow, "-narrow")
            self._refresh_summary()

    # -- loading ------------------------------------------------------------------------------

    @work(thread=True, exclusive=True, exit_on_error=False, group="load", name="load")
    def load(self) -> None:
        """Read, score and open the ledger off the UI thread, posting progress."""
        from triage.core.ranking import require_scorable
        from triage.core.read import read_portfolio

        opts = self.options
        steps = 4
        if opts.scorecard is not None:
            self._load_scorecard(steps)
            return
        self.post_message(LoadStep(0, steps, f"reading {opts.portfolio.name}"))
        found, hit = self._from_cache()
        portfolio = (
            hit.portfolio
            if hit is not None
            else read_portfolio(
                opts.portfolio,
                columns=opts.columns,
                sheet=opts.sheet,
                lag=opts.settings.lag,
                options=opts.file_options,
            )
        )
        require_scorable(portfolio, opts.settings.window)
        self.post_message(LoadStep(1, steps, "opening the ledger"))
        notices = list(opts.notices) + list(portfolio.notices)
        ledger = self._open_ledger(notices)
        self.post_message(LoadStep(2, steps, "scoring every series"))
        window, season = opts.settings.window, opts.settings.season
        card = cache.load_card(hit.entry, window, season) if hit is not None else None
        cycle = ReviewCycle(portfolio, ledger, opts.settings, card=card)
        # Suggestions, repeat offenders and the search index come later (``_background``).
        session = ReviewSession(cycle, reviewer=opts.reviewer, defer=True)
        self.post_message(LoadStep(3, steps, "drawing"))
        notices.extend(session.notices)
        keep: Callable[[], None] | None = None
        if found is not None and hit is None:

            def keep() -> None:
                cache.store(
                    found,
                    portfolio,
                    {(window, season): cycle.card},
                    self._cache_folder(),
                    opts.cache_limit_mb << 20,
                    cancelled=self._stop_cache.is_set,
                )

        elif hit is not None and card is None:

            def keep() -> None:
                cache.store_card(hit.entry, window, season, cycle.card)

        self.post_message(Loaded(session, tuple(notices), keep))

    def _open_ledger(self, notices: list[str]) -> ledger_mod.Ledger | None:
        """The review's ledger (None when it cannot be opened: the notice says why)."""
        opts = self.options
        path = opts.ledger
        try:
            if path is None:
                path, note = ledger_mod.default_ledger_path(opts.portfolio)
                if note:
                    notices.append(note)
            ledger = ledger_mod.Ledger.open(path, root_causes=opts.root_causes)
        except TriageError as exc:
            notices.append(f"{exc} Decisions cannot be saved in this session.")
            return None
        if ledger.notice:
            notices.append(ledger.notice)
        return ledger

    def _load_scorecard(self, steps: int) -> None:
        """``--scorecard``: the list from the stored scorecard; histories fetched later."""
        from triage.core.on_demand import open_review

        opts = self.options
        assert opts.scorecard is not None
        self.post_message(LoadStep(0, steps, f"reading the scorecard {opts.scorecard.name}"))
        use_cache = opts.cache and opts.cache_limit_mb > 0
        review = open_review(
            opts.portfolio,
            opts.scorecard,
            opts.settings,
            columns=opts.columns,
            cache_folder=self._cache_folder() if use_cache else None,
            cache_limit=opts.cache_limit_mb << 20,
        )
        self.post_message(LoadStep(1, steps, "opening the ledger"))
        notices = list(opts.notices) + list(review.notices)
        ledger = self._open_ledger(notices)
        self.post_message(LoadStep(2, steps, "ordering the list"))
        cycle = ReviewCycle.on_scorecard(review, ledger)
        session = ReviewSession(cycle, reviewer=opts.reviewer, defer=True)
        self.histories = review.histories
        self.post_message(LoadStep(3, steps, "drawing"))
        notices.extend(session.notices)
        keep = None
        if review.keep is not None:
            stored = review.keep

            def keep() -> None:
                stored(self._stop_cache.is_set)

        self.post_message(Loaded(session, tuple(notices), keep))

    def _cache_folder(self) -> Path:
        return self.options.cache_folder or cache.default_folder()

    def _from_cache(self) -> tuple[cache.Stamp | None, cache.Hit | None]:
        """The file's cache stamp and its cached load (None, None with ``--no-cache``)."""
        opts = self.options
        if not opts.cache or opts.cache_limit_mb <= 0:
            return None, None
        read_options = {
            "columns": opts.columns,
            "sheet": opts.sheet,
            "lag": opts.settings.lag,
            "file_options": opts.file_options,
        }
        try:
            found = cache.stamp(opts.portfolio, read_options)
        except OSError:
            return None, None  # the read names the problem
        try:
            return found, cache.load(found, self._cache_folder())
        except OSError:
            return found, None  # an unreadable cache folder: read the file

    @work(thread=True, exclusive=True, exit_on_error=False, group="background", name="background")
    def _background(self, session: ReviewSession, keep: Callable[[], None] | None) -> None:
        """What the list shows later (``ReviewSession.background``), off the UI thread; then
        the load goes to the reopen cache (``keep``), when it came from the file."""

        def step(done: int, total: int, label: str) -> None:
            self.post_message(BackgroundStep(session, done, total, label))

        self.post_message(BackgroundDone(session, session.background(step)))
        if keep is None or self._stop_cache.is_set():
            return
        try:
            keep()
        except (OSError, TriageError) as exc:
            # The cache only saves time: the next open reads the file, as this one did.
            self.post_message(BackgroundNote(f"The reopen cache was not written: {exc}"))

    def _main_screen_live(self) -> bool:
        """Whether the main screen's widgets are there to update: not before the first screen
        and not while the app closes (a worker's last message can come after they are gone)."""
        if not self.screen_stack:
            return False
        try:
            # query_one, not query: Textual caches its answer, and this runs on every cursor move.
            self.screen_stack[0].query_one(SeriesList)
        except NoMatches:
            return False
        return True

    @on(BackgroundStep)
    def _background_step(self, message: BackgroundStep) -> None:
        if message.session is self.session and self._main_screen_live():
            self._computing = f"{message.label} ({message.step + 1}/{message.total})"
            self._refresh_summary()

    @on(BackgroundNote)
    def _background_note(self, message: BackgroundNote) -> None:
        if self._main_screen_live():
            self._status(message.text)

    def on_unmount(self) -> None:
        self._stop_cache.set()
        # What was frozen goes back to the collector (several apps may run in one process).
        gc.unfreeze()

    @on(BackgroundDone)
    def _background_done(self, message: BackgroundDone) -> None:
        session = message.session
        if session is not self.session or not self._main_screen_live():
            return  # another session's, or the app is closing
        session.finish(message.done)
        self._computing = ""
        for note in message.done.notices:
            fmt.toast(self, note, severity="warning", timeout=10)
        if message.done.notices and self.status_text == self._load_status:
            # Beside the loading notices, unless something newer took the status line.
            self._status(" | ".join(filter(None, [self._load_status, *message.done.notices])))
        series_list = self._q(SeriesList)
        series_list.invalidate()
        if self._order_waits:
            self._order_waits = False
            self._apply_order()
        self._refresh_summary()
        self._show_detail(series_list.current)
        for screen in self.screen_stack:
            if isinstance(screen, DecisionScreen):
                screen.suggestion_ready()
        self.call_after_refresh(_freeze_heap)

    @on(LoadStep)
    def _load_step(self, message: LoadStep) -> None:
        self._q("#loading-bar", ProgressBar).update(total=message.total, progress=message.step)
        self._q("#loading-label", Static).update(Text(f"Loading: {visible(message.label)}…"))

    @on(Loaded)
    def _loaded(self, message: Loaded) -> None:
        session = message.session
        self.session = session
        cycle = session.review_cycle
        keys = session.portfolio.keys
        # Text columns stay Arrow-backed: a row is read when it is drawn (no million objects).
        self._arrays = {
            "rank": cycle.by_position("rank"),
            "item": keys["item"].array,
            "location": keys["location"].array
            if "location" in keys
            else np.full(session.portfolio.n_series, "", dtype=object),
            "share": cycle.by_position("error_share"),
            "cum": cycle.by_position("cum_share"),
            "error": session.error,
            "bias_pct": cycle.by_position("bias_pct"),
            "ts": cycle.by_position("tracking_signal"),
        }
        self._pattern = session.ranked["pattern"].array
        """The pattern column in review order (row ``session.position[series]``)."""
        self._q("#loading").display = False
        self._q("#main").display = True
        series_list = self._q(SeriesList)
        series_list.set_order(session.order(self.by))
        series_list.focus()
        self._computing = "starting"
        self._refresh_summary()
        # After the first frame with the list: the worker would compete with drawing it.
        self.call_after_refresh(self._background, session, message.keep)
        for note in message.notices:
            fmt.toast(self, note, severity="warning", timeout=10)
        if message.notices:
            self._status(" | ".join(message.notices))
        if self.options.group:
            # --group: open on the groups (ranked in a worker; the series list is ready first).
            try:
                self.group_by = groups_mod.parse_group_columns(
                    session.portfolio, self.options.group
                )
            except TriageError as exc:
                self._status(str(exc))
                fmt.toast(self, str(exc), severity="error", timeout=15)
            else:
                self._build_groups(self.group_by)
        self._load_status = self.status_text

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        """Show every worker failure; none is swallowed."""
        if event.state != WorkerState.ERROR:
            return
        error = event.worker.error
        text = str(error) if isinstance(error, TriageError) else f"{type(error).__name__}: {error}"
        if event.worker.name == "background":
            self._computing = "stopped: repeat offenders, suggestions and search are missing"
            self._refresh_summary()
        if event.worker.name == "load":
            self._q("#loading-label", Static).update(
                Text(f"Cannot open the portfolio:\n{text}\n\nPress q to quit.", style="bold")
            )
        self._status(f"error: {text}")
        fmt.toast(self, text, severity="error", timeout=15)

    # -- list and detail ----------------------------------------------------------------------

    def _format_row(self, series: int) -> dict[str, fmt.Cell]:
        a = self._arrays
        session = self.session
        assert session is not None
        pattern = str(self._pattern[int(session.position[series])])
        flag = int(session.flag[series])
        outcome = session.outcome[series]
        cols = session.window_cols[-fmt.SPARK_PERIODS :]
        return {
            "rank": (str(a["rank"][series]), None),
            "item": (fmt.key_text(a["item"][series], 40), None),
            "location": (fmt.key_text(a["location"][series], 40), None),
            "share": (fmt.pct(a["share"][series]), None),
            "cum": (fmt.pct(a["cum"][series], 0), "dim"),
            "bshare": (fmt.pct(session.bias_share[series]), None),
            "bcum": (fmt.pct(session.bias_cum[series], 0), "dim"),
            "bsize": (fmt.compact(session.bias_size[series]), None),
            "error": (fmt.compact(a["error"][series]), None),
            "fvaloss": (fmt.compact(session.fva_loss[series], signed=True), None),
            "bias": fmt.signed_pct(a["bias_pct"][series]),
            "ts": ("" if math.isnan(a["ts"][series]) else f"{a['ts'][series]:+.1f}", None),
            "flag": (
                ("▲ over" if flag > 0 else "▼ under") if flag else "",
                "flag" if flag else None,
            ),
            "pattern": (fmt.PATTERN_SHORT.get(pattern, pattern), "dim"),
            "outcome": self._review_cell(series, outcome),
            "worst": (
                "…"
                if not session.ready
                else f"{'R ' if session.repeat[series] else ''}"
                f"{session.times_in_worst[series]}/{session.cycles_scored}"
                if session.cycles_scored
                else "",
                "flag" if session.repeat[series] else "dim",
            ),
            "spark": self._spark(series, cols),
        }

    def _spark(self, series: int, cols: np.ndarray) -> fmt.Cell:
        """The row's sparkline of demand against forecast over the window's last periods;
        ``…`` while the history is being fetched (``--scorecard``)."""
        assert self.session is not None
        p = self.session.portfolio
        try:
            return (fmt.sparkline(p.demand[series, cols], p.forecast[series, cols]), None)
        except NotFetched:
            if series in self._failed:
                return ("not read", "dim")
            self._want(series)
            return ("…", "dim")

    def _review_cell(self, series: int, outcome: str) -> fmt.Cell:
        """This cycle's outcome, else an earlier adjustment still carried, else a marker of the
        latest earlier decision."""
        assert self.session is not None
        if outcome:
            return (fmt.OUTCOME_TINY[outcome], "done")
        if self.session.carries[series]:
            return (fmt.CARRIED_TINY, "flag")
        past = self.session.past_outcome[series]
        if past:
            return (fmt.PAST_TINY.get(past, "↺"), "flag" if self.session.carried[series] else "dim")
        return ("·", "dim")

    @on(SeriesList.Highlighted)
    def _highlighted(self, message: SeriesList.Highlighted) -> None:
        if not self.in_groups:
            # The list's highlight and the title go out in the key's own frame; the measures
            # follow in the next one (a cursor held down skips those it has already left).
            self._show_detail(message.series, body_later=True)

    def _show_detail(self, series: int | None, *, body_later: bool = False) -> None:
        session = self.session
        if session is None or not self._main_screen_live():
            return  # not loaded yet, or closing (a last cursor message arrives after the screens)
        if self.in_groups:
            return  # the pane shows the highlighted group (a late save must not replace it)
        title = self._q("#detail-title", Static)
        body = self._q("#detail-text", Static)
        if series is None:
            title.update(Text("no series matches the filter"), layout=False)
            self._q("#chart", SeriesChart).show(None)
            body.update(Text(""), layout=False)
            return
        card = session.card_row(series)
        key = fmt.key_text(session.key(series))
        title.update(
            Text.assemble(
                (key, "bold"), f"   rank {int(card['rank'])} of {session.portfolio.n_series:,}"
            ),
            layout=False,
        )
        # The chart is the slow part of a repaint: draw it once the cursor settles.
        if self._chart_timer is not None:
            self._chart_timer.stop()
        self._chart_timer = self.set_timer(CHART_SETTLE, lambda: self._draw_chart(series))
        if body_later:
            self.call_after_refresh(self._detail_body_if_current, series)
        else:
            self._detail_body(series)

    def _detail_body_if_current(self, series: int) -> None:
        if (
            self.session is not None
            and self._main_screen_live()
            and not self.in_groups
            and self._q(SeriesList).current == series
        ):
            self._detail_body(series)

    def _detail_body(self, series: int) -> None:
        """The detail pane's measures, earlier cycles and decisions of one series."""
        session = self.session
        assert session is not None
        body = self._q("#detail-text", Static)
        card = session.card_row(series)
        value = f" (value {fmt.compact(card['abs_error_value'])})" if session.priced else ""
        per = " a week" if session.portfolio.calendar.freq == schema.WEEKLY else " a month"
        # What to act on first (earlier cycles, carried adjustments, the suggestion), then the
        # measures: a short pane at 80x24 still shows the first lines.
        lines = [session.describe(series), *session.across_cycles(series)]
        if self.histories is not None and not self.histories.has(series):
            if series in self._failed:
                lines.append(
                    "history: could not be read from the dataset (the status line says why); "
                    "enter tries again"
                )
            else:
                lines.append("history: fetching from the dataset…")
                self._want(series, first=True)
        spec, reason = session.suggest_spec[series], session.suggest_reason[series]
        if not session.ready:
            lines.append("suggested adjustment: still computing…")
        elif spec:
            lines.append(f"suggested: {spec} ({reason}); press s to take it")
        lines += [
            f"abs error {fmt.compact(card['abs_error'])}{value} · WAPE {fmt.pct(card['wape'])} · "
            f"MAE {card['mae']:.1f} · RMSE {card['rmse']:.1f}"
            if card["periods"]
            else "no counted period in the window",
            *filter(None, [session.forecasts_line(series)]),
            f"tracking signal {card['tracking_signal']:+.1f} · run {int(card['bias_run']):+d} · "
            f"{card['pattern']} demand (ADI {card['adi']:.2f}, CV² {card['cv2']:.2f})",
            f"{words.against_naive(card['fva'], per)} (FVA)",
            f"MASE {card['mase']:.2f}: {words.MEANINGS['MASE']}",
            f"sign test p {card['bias_pvalue']:.3f}: {words.MEANINGS['sign test p']}",
        ]
        attrs = [
            f"{fmt.plain(name)}: {fmt.clip(str(session.portfolio.keys[name].iat[series]))}"
            for name in session.portfolio.attributes
        ]
        text = Text("\n".join(visible(line) for line in lines))
        if attrs:
            text.append("\n" + " · ".join(attrs), style="dim")
        text.append("\n")
        text.append_text(self._history_text(series))
        # Fixed-size panes: no layout pass on every cursor move.
        body.update(text, layout=False)

    def _draw_chart(self, series: int) -> None:
        session = self.session
        if (
            session is not None
            and self._main_screen_live()
            and not self.in_groups
            and self._q(SeriesList).current == series
        ):
            try:
                shown = session.chart(series)
            except NotFetched:
                self._q("#chart", SeriesChart).show(None)
                self._want(series, first=True)
                return
            self._q("#chart", SeriesChart).show(shown)

    # -- histories fetched on demand (--scorecard) ----------------------------------------------

    def _not_on_scorecard(self, what: str, why: str) -> None:
        """Say that ``what`` is not available in a review on a stored scorecard, and why."""
        ledger = self.session.ledger if self.session is not None else None
        where = f" in {ledger.path}" if ledger is not None else ""
        text = (
            f"{what} is not available in a review on a stored scorecard: {why}, and only the "
            f"histories shown are fetched. Your decisions are saved{where}."
        )
        self._status(visible(text))
        fmt.toast(self, visible(text), severity="warning", timeout=10)

    def _want(self, series: int, *, first: bool = False) -> None:
        """Ask for a series' history (a list row or the detail pane needs it); fetched on a
        worker, a batch at a time. ``first``: before the rows asked for earlier."""
        histories = self.histories
        if histories is None or histories.has(series) or series in self._failed:
            return
        if first:
            self._wanted = {series: None, **self._wanted}
        else:
            self._wanted.setdefault(series, None)
        if not self._fetch_running and not self._fetch_scheduled:
            self._fetch_scheduled = True
            self.call_after_refresh(self._start_fetch)

    def _start_fetch(self) -> None:
        self._fetch_scheduled = False
        if self._fetch_running or not self._wanted:
            return
        current = self._q(SeriesList).current if self._main_screen_live() else None
        # The series under the cursor alone first (the pane, the chart, a dialog wait for it),
        # then the rows on screen together.
        batch = [current] if current in self._wanted else list(self._wanted)[:FETCH_BATCH]
        for series in batch:
            del self._wanted[series]
        self._fetch_running = True
        self._fetch_histories(tuple(batch))

    @work(thread=True, exit_on_error=False, group="fetch", name="fetch")
    def _fetch_histories(self, batch: tuple[int, ...]) -> None:
        """Read a batch of histories from the dataset, off the UI thread."""
        histories = self.histories
        assert histories is not None
        try:
            histories.fetch(batch)
        except TriageError as exc:
            self.post_message(Fetched(batch, str(exc)))
            return
        except BaseException as exc:
            folder = visible(str(histories.plan.dataset.folder))
            what = f"{type(exc).__name__}: {exc}"
            self.post_message(Fetched(batch, f"{folder}: the histories could not be read ({what})"))
            raise
        self.post_message(Fetched(batch))

    @on(Fetched)
    def _fetched(self, message: Fetched) -> None:
        self._fetch_running = False
        if message.error is not None:
            self._failed |= set(message.series)
        if not self._main_screen_live():
            return  # closing: a last fetch can end after the screens are gone
        if message.error is not None:
            self._status(f"error: {message.error}")
            fmt.toast(self, message.error, severity="error", timeout=15)
        series_list = self._q(SeriesList)
        for series in message.series:
            series_list.invalidate(series)
        current = series_list.current
        if current in message.series and not self.in_groups:
            self._detail_body(current)
            if message.error is None:
                self._draw_chart(current)

        pending = self._open_after_fetch
        if pending is not None and pending[0] in message.series and pending[3].is_attached:
            if message.error is None:
                pending[3].ready()
            else:
                pending[3].action_cancel()
        if self._wanted:
            self._start_fetch()

    def _waited(self, ready: bool | None) -> None:
        """The wait for a decision dialog's history ended: open it and give it what was typed."""
        pending, self._open_after_fetch = self._open_after_fetch, None
        if not ready or pending is None:
            return
        series, outcome, adjustment, wait = pending
        self.call_later(self._open_and_type, series, outcome, adjustment, wait.typed)

    async def _open_and_type(
        self, series: int, outcome: str, adjustment: str, typed: list[events.Event]
    ) -> None:
        await self._open_dialog(series, outcome=outcome, adjustment=adjustment)
        if not isinstance(self.screen, DecisionScreen):
            # The dialog did not open (the ledger could not be read: the status says why):
            # what was typed for it must not act on the list.
            return
        self._status("")

        def replay() -> None:
            for event in typed:
                event.set_sender(self)
                self.post_message(event)

        self.call_after_refresh(replay)

    def _history_text(self, series: int) -> Text:
        assert self.session is not None
        events = self.session.history(series)
        if not events:
            return Text("no earlier decisions", style="dim")
        text = Text("decisions:\n", style="bold")
        for e in events[-8:]:
            who = visible(e.reviewer)
            if e.kind == ledger_mod.UNDO:
                text.append(f"  {e.cycle}  undo by {who} at {fmt.when(e.recorded_at)}\n")
                continue
            adj = f" {visible(e.adjustment)}" if e.adjustment else ""
            note = visible(e.note.splitlines()[0])[:200] if e.note else ""
            outcome = fmt.OUTCOME_SHORT.get(e.outcome or "", fmt.outcome_label(e.outcome))
            if e.group_id:
                outcome += f" (group #{e.group_id})"
            cause = fmt.cause_label(e.root_cause, self.options.root_causes)
            text.append(
                f"  {e.cycle}  {outcome}{adj} ({cause}) by {who} at {fmt.when(e.recorded_at)}"
            )
            text.append(f"  {note}\n" if note else "\n")
        return text

    def _refresh_summary(self) -> None:
        session = self.session
        if session is None:
            return
        tot = session.totals()
        prog = session.progress()
        p = session.portfolio
        value = f" (value {fmt.compact(tot['abs_error_value'])})" if session.priced else ""
        filt = []
        if self.text_filter:
            filt.append(f'"{self.text_filter}"')
        if self.drill is None:
            filt.extend(f"{k}={v}" for k, v in self.field_filters.items())
        shown = len(self._q(SeriesList).order)
        where, context = f" · {shown:,} shown", ""
        if self.in_groups and self.groups is not None:
            where = ""
            context = (
                f"{self.groups.n_groups:,} groups by {', '.join(self.groups.by)} (enter: a group's "
                "series)"
            )
        elif self.drill is not None and self.groups is not None:
            context = f"group {self.groups.label(self.drill)} (escape: back to groups)"
        target = f"target {prog.target * 100:.0f}%" + (
            f", {prog.to_target} more" if prog.to_target else " reached"
        )
        error = (
            ""
            if self.has_class("-narrow")
            else f" · abs err {fmt.compact(tot['abs_error'])}{value}"
        )
        summary = Text.assemble(
            (fmt.clip(visible(p.path.name), 40), "bold"),
            # A price column that cannot value errors (portfolio.value_or_units): said up front,
            # so no one reads the shares as value.
            (" · in units: no price above 0", "bold") if p.units_reason else "",
            f" · {p.n_series:,} series · cycle {p.cycle}{error}"
            f" · bias {fmt.signed_pct(tot['bias_pct'])[0] or 'n/a'}"
            f" · WAPE {fmt.pct(tot['wape']) or 'n/a'}\n",
            # Where the reviewer is (groups, or one group's series) comes first: it must show
            # at 80 columns.
            (visible(context) + " · ", "bold") if context else "",
            (
                f"reviewed {prog.reviewed:,} ({fmt.pct(prog.covered) or '0%'} of error; {target})",
                "bold",
            ),
            f" · handed off {prog.handed_off:,} · later {prog.deferred:,}"
            if prog.handed_off or prog.deferred
            else "",
            f" · cause {fmt.cause_label(self.cause, self.options.root_causes)}"
            + (" · auto-advance" if self.auto_advance else "")
            + f" · {self.by} order"
            + (
                f" ({fmt.plain(' → '.join(session.fva_steps))})"
                if self.by == vocabulary.BY_FVA
                else ""
            )
            + where
            + (f" · filter: {fmt.plain(', '.join(filt))}" if filt else "")
            + (" (waiting)" if filt and self._order_waits else "")
            + (f" · computing {self._computing}" if self._computing else ""),
        )
        summary.no_wrap = True
        summary.overflow = "ellipsis"
        self._q("#summary", Static).update(summary)

    def _status(self, text: str) -> None:
        self.status_text = text
        # One line: a message's own line breaks (before "What to do") become spaces.
        self._q("#status", Static).update(Text(visible(" ".join(text.split()))))

    def _apply_order(self) -> None:
        session = self.session
        if session is None:
            return
        series_list = self._q(SeriesList)
        current = series_list.current
        try:
            order = session.order(self.by, text=self.text_filter, filters=self.field_filters)
        except StillComputing as exc:
            # Never the unfiltered list under a filter: empty until the piece is in, then
            # applied (``_background_done``).
            self._order_waits = True
            order = np.zeros(0, dtype=np.int64)
            self._status(f"{exc} The filter applies as soon as it is ready.")
        else:
            self._order_waits = False
        series_list.set_order(order, keep=current)
        self._refresh_summary()

    # -- actions: finding ---------------------------------------------------------------------

    def action_toggle_order(self) -> None:
        orders = vocabulary.ORDERS
        self.by = orders[(orders.index(self.by) + 1) % len(orders)]
        self._q(SeriesList).set_columns(fmt.ORDER_COLUMNS[self.by])
        self._apply_order()
        if self.groups is not None:
            group_list = self._q(GroupList)
            group_list.set_order(self.groups.order(self.by), keep=group_list.current)

    def action_filter_text(self) -> None:
        def done(value: str | None) -> None:
            if value is not None:
                self.text_filter = value.strip()
                self._apply_order()

        self.push_screen(
            PromptScreen(
                "Filter: show series whose key or attributes contain", value=self.text_filter
            ),
            done,
        )

    def action_filter_field(self) -> None:
        session = self.session
        if session is None:
            return

        def chose_value(field: str, value: str | None) -> None:
            if value is not None:
                self.field_filters[field] = value
                self._apply_order()

        def chose_field(field_name: str | None) -> None:
            if field_name is None:
                return
            try:
                values = session.filter_values(field_name)
            except StillComputing as exc:
                self._status(f"{exc} Choose the filter again then.")
                return
            self.push_screen(
                ChooseScreen(
                    f"Show only {fmt.plain(field_name)} =",
                    [(v, fmt.plain(v)) for v in values[:500]],
                ),
                lambda v: chose_value(field_name, v),
            )

        fields = [(f, fmt.plain(f)) for f in session.filter_fields()]
        self.push_screen(ChooseScreen("Filter by", fields), chose_field)

    def action_clear_filter(self) -> None:
        if self.drill is not None:
            self._back_to_groups()
            return
        if self.text_filter or self.field_filters:
            self.text_filter = ""
            self.field_filters = {}
            self._apply_order()

    def action_jump(self) -> None:
        session = self.session
        if session is None:
            return

        def go(series: int) -> None:
            series_list = self._q(SeriesList)
            hits = np.flatnonzero(series_list.order == series)
            if not len(hits):
                self.action_clear_filter()
                hits = np.flatnonzero(series_list.order == series)
            series_list.cursor = int(hits[0])

        def done(value: str | None) -> None:
            if not value or not value.strip():
                return
            # The whole text as an item first ("sku@site"), then "item @ location" split at
            # the last "@" (an item may hold "@" itself).
            found = session.find_all(value)
            if not len(found) and "@" in value:
                item, _, location = value.rpartition("@")
                found = session.find_all(item, location)
            if not len(found):
                self._status(f"no series {value.strip()!r} in this portfolio (case is ignored)")
                return
            self._status("")  # found: an earlier "no series" message goes
            if len(found) == 1:
                go(int(found[0]))
                return
            choices = [(str(i), fmt.key_text(session.key(int(i)))) for i in found[:500]]
            self.push_screen(
                ChooseScreen(f"{len(found)} series match; go to", choices),
                lambda picked: go(int(picked)) if picked is not None else None,
            )

        self.push_screen(PromptScreen("Go to series: item (or item @ location)"), done)

    def action_next_unreviewed(self) -> None:
        session = self.session
        if session is None:
            return
        series_list = self._q(SeriesList)
        position = session.next_unreviewed(series_list.order, series_list.cursor)
        if position is None:
            self._status("every series shown has a decision this cycle")
            return
        series_list.cursor = position

    def action_toggle_advance(self) -> None:
        self.auto_advance = not self.auto_advance
        self._status(
            "auto-advance on: after each decision, the next series without one"
            if self.auto_advance
            else "auto-advance off"
        )
        self._refresh_summary()

    def _advance(self) -> None:
        """With auto-advance on, go to the next series without a decision this cycle."""
        if self.auto_advance:
            self.action_next_unreviewed()

    def action_chart_zoom(self) -> None:
        chart = self._q("#chart", SeriesChart)
        chart.set_view(whole=not chart.whole, clip=chart.clip, others=chart.others)
        self._status("chart: whole history" if chart.whole else "chart: recent periods")

    def action_chart_clip(self) -> None:
        chart = self._q("#chart", SeriesChart)
        chart.set_view(whole=chart.whole, clip=not chart.clip, others=chart.others)
        self._status("chart: spikes clipped" if chart.clip else "chart: spikes shown whole")

    def action_chart_others(self) -> None:
        chart = self._q("#chart", SeriesChart)
        if self.session is not None and not self.session.portfolio.competing:
            self._status("chart: the file has no other forecasts (forecast_<name> columns)")
            return
        chart.set_view(whole=chart.whole, clip=chart.clip, others=not chart.others)
        self._status(
            "chart: other forecasts shown" if chart.others else "chart: other forecasts hidden"
        )

    # -- actions: deciding --------------------------------------------------------------------

    def action_cause(self, index: int) -> None:
        """Pick the root cause the quick decisions use; it stays picked until changed."""
        causes = self.options.root_causes
        if index >= len(causes):
            return
        self.cause = causes[index].code
        self._status(f"root cause for quick decisions: {causes[index].label}")
        self._refresh_summary()
        series = self._q(SeriesList).current
        if series is not None:
            self._show_detail(series)

    async def _open_dialog(self, series: int, *, outcome: str, adjustment: str = "") -> None:
        """Open the decision dialog on what the ledger holds for the series now.

        Waits for this session's own pending saves first, so the dialog never opens on a
        decision that is about to be replaced by one the reviewer already made.
        """
        session = self.session
        assert session is not None
        if self.histories is not None and not self.histories.has(series):
            # The dialog's chart and preview need the history: it opens once that is in, with
            # what was typed meanwhile (the wait screen keeps it from the list below).
            text = (
                f"fetching the history of {fmt.key_text(session.key(series))} from the "
                "dataset; the dialog opens when it is in"
            )
            wait = WaitScreen(text)
            self._open_after_fetch = (series, outcome, adjustment, wait)
            self._status(text)
            self.push_screen(wait, self._waited)
            # Asked for again after a failed fetch: try once more.
            self._failed.discard(series)
            self._want(series, first=True)
            return
        await self._writes_settled()
        try:
            base, version = session.current_decision(series)
        except TriageError as exc:
            self._status(f"cannot read the ledger: {exc}")
            fmt.toast(self, f"Cannot read the ledger: {exc}", severity="error", timeout=15)
            return
        kept = self.drafts.get(series)
        if kept is not None:
            draft = replace(kept, expected_version=version)
        elif base is not None:
            draft = draft_of(base, series, version)
            if outcome == vocabulary.ADJUSTED:
                # a (or s) means "adjust": the dialog opens on the adjustment field.
                draft = replace(
                    draft,
                    outcome=vocabulary.ADJUSTED,
                    adjustment=draft.adjustment or adjustment,
                )
        else:
            draft = Draft(
                series=series,
                outcome=outcome,
                root_cause=self.cause,
                note="",
                adjustment=adjustment,
                expected_version=version,
            )

        def done(result: Draft | str | None) -> None:
            if result == UNCHANGED:
                self._status("nothing changed: nothing recorded")
            elif isinstance(result, Draft):
                self.drafts[result.series] = result
                self._submit(result)
                self._advance()

        self.push_screen(
            DecisionScreen(
                session, draft, self.options.root_causes, base=base, kept=kept is not None
            ),
            done,
        )

    async def action_decide(self) -> None:
        if self.in_groups:
            self._drill_down()
            return
        series = self._q(SeriesList).current
        if series is not None and self.session is not None:
            await self._open_dialog(series, outcome=vocabulary.OUTCOMES[0].code)

    async def action_adjust(self) -> None:
        if self.in_groups:
            self._open_group_dialog()
            return
        series = self._q(SeriesList).current
        if series is not None and self.session is not None:
            await self._open_dialog(series, outcome=vocabulary.ADJUSTED)

    async def action_take_suggestion(self) -> None:
        session = self.session
        series = self._q(SeriesList).current
        if series is None or session is None:
            return
        spec = session.suggest_spec[series]
        if not session.ready:
            self._status("Suggested adjustments are still being computed: press s again soon.")
            return
        if not spec:
            self._status("no suggested adjustment for this series")
            return
        await self._open_dialog(series, outcome=vocabulary.ADJUSTED, adjustment=spec)

    def _confirm_other_reviewer(self, series: int, what: str, then: Callable[[], None]) -> None:
        """Run ``then`` at once, or after a yes when another reviewer's decision would change."""
        session = self.session
        assert session is not None
        other = session.decided_by[series]
        if not other or other == session.reviewer:
            then()
            return
        question = Text.assemble(
            f"{what} the decision recorded by ",
            (fmt.plain(other), "bold"),
            f" ({fmt.outcome_label(session.outcome[series])})?",
        )
        self.push_screen(ConfirmScreen(question), lambda yes: then() if yes else None)

    def action_quick(self, outcome: str) -> None:
        series = self._q(SeriesList).current
        if series is None or self.session is None:
            return
        draft = Draft(series=series, outcome=outcome, root_cause=self.cause, note="", adjustment="")

        def record() -> None:
            self._submit(draft)
            self._advance()

        self._confirm_other_reviewer(series, "Replace", record)

    def action_undo(self) -> None:
        if self.in_groups:
            self._undo_group()
            return
        series = self._q(SeriesList).current
        if series is None or self.session is None:
            return
        if not self.session.outcome[series] and not self._queued.get(series):
            self._status("nothing to undo: the series has no decision in this cycle")
            return
        self._confirm_other_reviewer(series, "Undo", lambda: self._submit_undo(series))

    # -- saving: one write at a time, in the order decided -------------------------------------

    def action_end_adjustment(self) -> None:
        """End an earlier cycle's adjustment still carried for the series, or restore one."""
        session = self.session
        series = self._q(SeriesList).current
        if session is None or series is None:
            return
        found = session.active_adjustments(series)
        live = [a for a in found if a.active or a.in_forecast]
        ended = [a for a in found if a.ended is not None]
        if not live and not ended:
            self._status("no earlier adjustment reaches into this cycle for this series")
            return

        def describe(a: ActiveAdjustment) -> str:
            spec, who = fmt.plain(a.adjustment), fmt.plain(a.reviewer)
            return f"the adjustment from {a.cycle} ({spec}, by {who})"

        def ask(a: ActiveAdjustment) -> None:
            if a.ended is None:
                question = Text(
                    f"End {describe(a)}? Its periods will no longer be carried into exports."
                )
                job = lambda: self._submit_end(series, a.event_id, restore=False)  # noqa: E731
            else:
                question = Text(f"Restore {describe(a)}, ended by {fmt.plain(a.ended.reviewer)}?")
                end_id = a.ended.id
                job = lambda: self._submit_end(series, end_id, restore=True)  # noqa: E731
            self.push_screen(ConfirmScreen(question), lambda yes: job() if yes else None)

        choices = live or ended
        if len(choices) == 1:
            ask(choices[0])
            return
        by_id = {str(a.event_id): a for a in choices}
        self.push_screen(
            ChooseScreen(
                "End which adjustment?" if live else "Restore which adjustment?",
                [(k, describe(a)) for k, a in by_id.items()],
            ),
            lambda picked: ask(by_id[picked]) if picked is not None else None,
        )

    def _submit_end(self, series: int, target: int, *, restore: bool) -> None:
        self._status("saving…")
        self._queued[series] = self._queued.get(series, 0) + 1
        self.end_adjustment(series, target, restore, self._take_ticket())

    @work(thread=True, exit_on_error=False, group="ledger")
    def end_adjustment(self, series: int, target: int, restore: bool, ticket: int) -> None:
        """Record the end (or restore) of an earlier adjustment off the UI thread."""
        session = self.session
        assert session is not None
        with self._my_turn(ticket):
            try:
                if restore:
                    record = session.commit_restore_adjustment(series, target)
                else:
                    record = session.commit_end_adjustment(series, target)
            except TriageError as exc:
                self.post_message(SaveFailed(series, str(exc), stale=_stale(exc)))
                return
        self.post_message(Ended(record))

    @on(Ended)
    def _ended(self, message: Ended) -> None:
        session = self.session
        assert session is not None
        self._written_for(session.apply_end(message.record))
        what = "restored" if message.record.kind == ledger_mod.RESTORE else "ended"
        self._status(
            f"saved: adjustment {what} (ledger entry {message.record.id}); "
            "exports of this cycle follow it"
        )

    def _take_ticket(self) -> int:
        with self._turn:
            ticket = self._issued
            self._issued += 1
        return ticket

    def _submit(self, draft: Draft) -> None:
        self._status("saving…")
        self._queued[draft.series] = self._queued.get(draft.series, 0) + 1
        self.save(draft, self._take_ticket())

    def _submit_undo(self, series: int) -> None:
        self._status("saving…")
        self._queued[series] = self._queued.get(series, 0) + 1
        self.undo(series, self._take_ticket())

    def _dequeue(self, series: int) -> None:
        left = self._queued.get(series, 0) - 1
        if left > 0:
            self._queued[series] = left
        else:
            self._queued.pop(series, None)

    @contextmanager
    def _my_turn(self, ticket: int) -> Iterator[None]:
        """Writes commit in the order they were made, one at a time (worker threads)."""
        with self._turn:
            while self._served != ticket:
                self._turn.wait()
        try:
            yield
        finally:
            with self._turn:
                self._served += 1
                self._turn.notify_all()

    def _expected(self, series: int, draft_version: int | None) -> int:
        """The version a write expects: what the reviewer saw, else the latest this app knows."""
        assert self.session is not None
        if draft_version is not None:
            return max(draft_version, self._written.get(series, 0))
        return max(int(self.session.version[series]), self._written.get(series, 0))

    @work(thread=True, exit_on_error=False, group="ledger")
    def save(self, draft: Draft, ticket: int) -> None:
        """Commit a decision off the UI thread; the screen says saved only after COMMIT."""
        session = self.session
        assert session is not None
        with self._my_turn(ticket):
            try:
                event = session.commit_decision(
                    draft.series,
                    outcome=draft.outcome,
                    root_cause=draft.root_cause,
                    note=draft.note,
                    adjustment=draft.adjustment or None,
                    expected_version=self._expected(draft.series, draft.expected_version),
                )
            except TriageError as exc:
                self.post_message(SaveFailed(draft.series, str(exc), stale=_stale(exc)))
                return
            self._written[draft.series] = event.version
        self.post_message(Saved(event, fmt.outcome_label(draft.outcome).lower()))

    @work(thread=True, exit_on_error=False, group="ledger")
    def undo(self, series: int, ticket: int) -> None:
        """Append an undo event off the UI thread."""
        session = self.session
        assert session is not None
        with self._my_turn(ticket):
            try:
                event = session.commit_undo(series, expected_version=self._expected(series, None))
            except TriageError as exc:
                self.post_message(SaveFailed(series, str(exc), stale=_stale(exc)))
                return
            self._written[series] = event.version
        self.post_message(Saved(event, "undone"))

    @property
    def writes_pending(self) -> int:
        """Saves asked for and not yet committed or refused."""
        with self._turn:
            return self._issued - self._served

    async def _writes_settled(self, timeout: float = 10.0) -> bool:
        """Wait (without blocking the event loop) until every asked-for save has finished."""
        for _ in range(int(timeout / 0.005)):
            if not self.writes_pending:
                return True
            await asyncio.sleep(0.005)
        return False

    async def action_quit(self) -> None:
        """Quit once every save asked for has reached the ledger (they take milliseconds)."""
        if isinstance(self.screen, DecisionScreen) and not self._quit_forced:

            def answered(yes: bool | None) -> None:
                if yes:
                    self._quit_forced = True
                    self.call_later(self.action_quit)

            self.push_screen(
                ConfirmScreen(Text("Quit without saving the decision being typed?")), answered
            )
            return
        if self.writes_pending and not self._quit_forced:
            self._status("finishing saves before quitting…")
            if not await self._writes_settled():
                self._status("a save is still running: quit again to leave anyway")
                fmt.toast(self, "A save is still running; press q again to quit anyway.")
                self._quit_forced = True
                return
        self.exit()

    def _written_for(self, series: int | None) -> None:
        """A write of the series reached the ledger: redraw its row and, if shown, its detail."""
        if series is None:
            return
        self._dequeue(series)
        self._q(SeriesList).invalidate(series)
        if self.groups is not None:
            self.groups.forget()
            self._q(GroupList).invalidate(int(self.groups.codes[series]))
        if series == self._q(SeriesList).current:
            self._show_detail(series)

    @on(Saved)
    def _saved(self, message: Saved) -> None:
        session = self.session
        assert session is not None
        series = session.apply_event(message.event)
        if series is not None:
            self.drafts.pop(series, None)
        self._written_for(series)
        key = fmt.key_text((message.event.item, message.event.location))
        self._status(f"saved: {key} {message.what} (ledger event {message.event.id})")
        self._refresh_summary()

    @on(SaveFailed)
    def _save_failed(self, message: SaveFailed) -> None:
        self._dequeue(message.series)
        self._written.pop(message.series, None)
        if message.stale and self.session is not None:
            # Another session wrote the series: show what it holds now, so the next try
            # replaces it knowingly (and asks, naming the other reviewer).
            with suppress(TriageError):
                self.session.refresh_series(message.series)
            self._q(SeriesList).invalidate(message.series)
            if message.series == self._q(SeriesList).current:
                self._show_detail(message.series)
        self._status(f"NOT saved: {message.error} (your entry is kept: press enter to retry)")
        fmt.toast(self, f"Not saved: {message.error}", severity="error", timeout=15)

    # -- groups -------------------------------------------------------------------------------

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """In the group view the actions on one series are shown dimmed and do nothing."""
        if self.in_groups and action in SERIES_ACTIONS:
            return None
        return True

    def action_groups(self) -> None:
        session = self.session
        if session is None:
            return
        if self.histories is not None:
            self._not_on_scorecard("The group view", "groups add up every series' history")
            return
        if self.in_groups:
            self._leave_groups()
        elif self.drill is not None:
            self._back_to_groups()
        elif self.groups is not None:
            self._show_groups()
        elif self.group_by is not None:
            self._status(f"grouping {session.portfolio.n_series:,} series…")
            self._build_groups(self.group_by)
        else:
            self._ask_grouping()

    def _ask_grouping(self) -> None:
        session = self.session
        assert session is not None
        p = session.portfolio
        allowed = [c for c in p.key_columns if c != schema.ITEM] + list(p.attributes)
        if not allowed:
            self._status("the file has no location or attribute column to group by")
            return

        def done(value: str | None) -> None:
            if value is None or not value.strip():
                return
            try:
                by = groups_mod.parse_group_columns(p, value, option="group by")
            except TriageError as exc:
                self._status(str(exc))
                return
            self._status(f"grouping {p.n_series:,} series…")
            self._build_groups(by)

        self.push_screen(
            PromptScreen(
                "Group by: one or more columns, separated by commas",
                value=allowed[0],
                note=f"Columns: {fmt.plain(', '.join(allowed))}",
            ),
            done,
        )

    @work(thread=True, exclusive=True, exit_on_error=False, group="groups", name="groups")
    def _build_groups(self, by: tuple[str, ...]) -> None:
        """Rank the groups off the UI thread (a bincount per measure over every series)."""
        session = self.session
        assert session is not None
        review = GroupReview(session, by)
        cols = session.window_cols[-fmt.SPARK_PERIODS :]
        self._group_spark = review.period_totals(cols)
        self.post_message(GroupsReady(review))

    @on(GroupsReady)
    def _groups_ready(self, message: GroupsReady) -> None:
        if message.review is None:
            self._status(message.error)
            return
        self.groups = message.review
        self.group_by = message.review.by
        self._status("")
        group_list = self._q(GroupList)
        group_list.set_order(self.groups.order(self.by))
        self._show_groups()

    def _show_groups(self) -> None:
        assert self.groups is not None
        self.in_groups = True
        self.drill = None
        self._q(SeriesList).display = False
        group_list = self._q(GroupList)
        group_list.display = True
        group_list.focus()
        self._show_group_detail(group_list.current)
        self._refresh_summary()
        self.refresh_bindings()

    def _leave_groups(self) -> None:
        self.in_groups = False
        self._q(GroupList).display = False
        series_list = self._q(SeriesList)
        series_list.display = True
        series_list.focus()
        self._show_detail(series_list.current)
        self._refresh_summary()
        self.refresh_bindings()

    def _drill_down(self) -> None:
        review = self.groups
        group = self._q(GroupList).current
        if review is None or group is None:
            return
        self._outer_filters = (self.text_filter, dict(self.field_filters))
        self.text_filter, self.field_filters = "", review.filters(group)
        self.drill = group
        self.in_groups = False
        self._q(GroupList).display = False
        series_list = self._q(SeriesList)
        series_list.display = True
        series_list.focus()
        self._apply_order()
        series_list.cursor = 0
        self._show_detail(series_list.current)
        self.refresh_bindings()

    def _back_to_groups(self) -> None:
        self.text_filter, self.field_filters = self._outer_filters
        self._apply_order()
        self._show_groups()

    def _open_group_dialog(self) -> None:
        """The decision dialog of the highlighted group (one decision, split to its series)."""
        review = self.groups
        group = self._q(GroupList).current
        if review is None or group is None:
            return

        def done(draft: GroupDraft | None) -> None:
            if draft is not None:
                self._save_group(draft)

        self.push_screen(GroupDecisionScreen(review, group, self.options.root_causes), done)

    def _save_group(self, draft: GroupDraft) -> None:
        """Record a group decision (one ledger transaction) off the UI thread."""
        review, session = self.groups, self.session
        assert review is not None and session is not None
        members = review.members(draft.group)
        self._status(
            f"saving the decision for {review.label(draft.group)} ({len(members)} series)…"
        )
        self._commit_group(review, draft)

    @work(thread=True, exit_on_error=False, group="save-group", name="save-group")
    def _commit_group(self, review: GroupReview, draft: GroupDraft) -> None:
        """One ledger transaction for the whole group; the state follows on the UI thread."""
        session = review.session
        try:
            record = session.commit_group_decision(
                review.members(draft.group),
                by=review.by,
                key_values=tuple(review.filters(draft.group).values()),
                outcome=draft.outcome,
                root_cause=draft.root_cause,
                note=draft.note,
                spec=draft.adjustment or None,
                basis=draft.basis,
            )
        except TriageError as exc:
            self.call_from_thread(self._group_not_saved, draft, str(exc))
            return
        self.call_from_thread(self._group_saved, draft, record)

    def _apply_group(self, record: GroupRecord) -> GroupReview:
        """A group decision or group undo is in the ledger: the session, the review state and
        every row shown follow it."""
        review, session = self.groups, self.session
        assert review is not None and session is not None
        session.apply_group(record)
        review.forget()
        self._q(GroupList).invalidate()
        self._q(SeriesList).invalidate()
        if self.in_groups:
            self._show_group_detail(self._q(GroupList).current)
        self._refresh_summary()
        return review

    def _group_saved(self, draft: GroupDraft, record: GroupRecord) -> None:
        review = self._apply_group(record)
        self._status(
            f"saved: the group {review.label(draft.group)}: "
            f"{fmt.outcome_label(draft.outcome).lower()} for {int(review.size[draft.group])} "
            f"series (ledger group decision {record.id})"
        )

    def _undo_group(self) -> None:
        """Undo the highlighted group's latest group decision of this cycle, whole."""
        review, session = self.groups, self.session
        group = self._q(GroupList).current
        if review is None or session is None or group is None:
            return
        ids = session.group_of[review.members(group)]
        if not (ids > 0).any():
            self._status("nothing to undo: the group has no group decision standing in this cycle")
            return
        group_id = int(ids.max())

        def answered(yes: bool | None) -> None:
            if yes:
                self._status(f"undoing group decision {group_id}…")
                self._commit_group_undo(group_id)

        standing = int((ids == group_id).sum())
        self.push_screen(
            ConfirmScreen(
                Text(
                    f"Undo the group decision {group_id} on {fmt.plain(review.label(group))}? "
                    f"Its {standing:,} series part(s) still standing go back to their decision "
                    "before it."
                )
            ),
            answered,
        )

    @work(thread=True, exit_on_error=False, group="save-group", name="undo-group")
    def _commit_group_undo(self, group_id: int) -> None:
        session = self.session
        assert session is not None
        try:
            record = session.commit_group_undo(group_id)
        except TriageError as exc:
            self.call_from_thread(self._status, f"NOT undone: {exc}")
            return
        self.call_from_thread(self._group_undone, record)

    def _group_undone(self, record: GroupRecord) -> None:
        self._apply_group(record)
        self._status(f"undone: group decision (ledger group undo {record.id})")

    def _group_not_saved(self, draft: GroupDraft, error: str) -> None:
        review = self.groups
        label = review.label(draft.group) if review is not None else "the group"
        self._status(f"NOT saved: the decision for {label}: {error}")
        fmt.toast(self, f"Not saved: {error}", severity="error", timeout=15)

    @on(GroupList.Highlighted)
    def _group_highlighted(self, message: GroupList.Highlighted) -> None:
        if self.in_groups:
            self._show_group_detail(message.series)

    def _format_group(self, group: int) -> dict[str, fmt.Cell]:
        review = self.groups
        assert review is not None
        t = review.table
        flag = int(review.flag[group])
        demand, forecast = self._group_spark
        decided = int(review.decided()[group])
        size = int(review.size[group])
        return {
            "rank": (str(int(t["rank"].iat[group])), None),
            "group": (fmt.plain(review.label(group), 60), None),
            "series": (f"{size:,}", None),
            "share": (fmt.pct(t["error_share"].iat[group]), None),
            "cum": (fmt.pct(t["cum_share"].iat[group], 0), "dim"),
            "error": (fmt.compact(review.error[group]), None),
            "total": (fmt.compact(t["aggregate_abs_error"].iat[group]), "dim"),
            "bias": fmt.signed_pct(t["bias_pct"].iat[group]),
            "flag": (
                ("▲ over" if flag > 0 else "▼ under") if flag else "",
                "flag" if flag else None,
            ),
            "decided": (outcome_words(decided, size), "done" if decided >= size else None),
            "spark": (fmt.sparkline(demand[group], forecast[group]), None),
        }

    def _show_group_detail(self, group: int | None) -> None:
        review = self.groups
        if review is None:
            return
        title = self._q("#detail-title", Static)
        body = self._q("#detail-text", Static)
        if group is None:
            title.update(Text("no group"), layout=False)
            body.update(Text(""), layout=False)
            return
        title.update(
            Text.assemble(
                (fmt.plain(review.label(group), 80), "bold"),
                f"   group rank {int(review.table['rank'].iat[group])} of {review.n_groups:,}",
            ),
            layout=False,
        )
        if self._chart_timer is not None:
            self._chart_timer.stop()
        self._chart_timer = self.set_timer(CHART_SETTLE, lambda: self._draw_group_chart(group))
        session = self.session
        assert session is not None
        lines = list(review.describe(group))
        lines.append("largest contributors:")
        for c in review.contributors(group):
            lines.append(f"  {fmt.key_text(session.key(c.series))}  {fmt.pct(c.share)}")
        flagged = review.flagged(group)
        if len(flagged):
            shown = ", ".join(fmt.key_text(session.key(int(s))) for s in flagged[:5])
            more = f" and {len(flagged) - 5:,} more" if len(flagged) > 5 else ""
            lines.append(f"flagged: {shown}{more}")
        body.update(Text("\n".join(visible(line) for line in lines)), layout=False)

    def _draw_group_chart(self, group: int) -> None:
        if (
            self.groups is not None
            and self.is_running
            and self.in_groups
            and self._q(GroupList).current == group
        ):
            self._q("#chart", SeriesChart).show(self.groups.chart(group))

    # -- export and help ----------------------------------------------------------------------

    def action_export(self) -> None:
        session = self.session
        if session is None:
            return
        if self.histories is not None:
            self._not_on_scorecard(
                "Exporting", "the export holds every series' adjusted forward forecast"
            )
            return
        p = session.portfolio
        # Shown in an input field, so no control character (a folder named with an ESC).
        default = visible(str(p.path.with_name(f"{p.path.stem}-review-{session.cycle}.xlsx")))

        def done(value: str | None) -> None:
            if value:
                self.export(Path(value).expanduser())

        self.push_screen(
            PromptScreen(
                "Export decisions and adjusted forecast to (.xlsx, .csv or .json)",
                value=default,
                note=CAUTION,
            ),
            done,
        )

    @work(thread=True, exclusive=True, exit_on_error=False, group="export")
    def export(self, target: Path) -> None:
        """Write the export off the UI thread (same core function as ``triage export``)."""
        from triage.render.export import export_review

        session = self.session
        assert session is not None
        if session.ledger is None:
            raise TriageError("no ledger is open, so there are no decisions to export.")
        self.call_from_thread(self._status, f"exporting to {target}…")
        # The long layout and the default precision; the file's own headers, as on the command
        # line.
        # A cycle read afresh on this thread: the decisions saved until now, every one of them.
        result = export_review(
            session.review_cycle.reread(), target, force=False, headers=self.options.columns
        )
        written = ", ".join(str(p) for p in result.paths)
        self.post_message(Exported(f"exported: {written}. {CAUTION}"))

    def action_override_value(self) -> None:
        if self.session is not None:
            self._status("computing the realised value of past overrides…")
            self.override_value()

    @work(thread=True, exclusive=True, exit_on_error=False, group="history")
    def override_value(self) -> None:
        """Join past overrides with the actuals that have arrived since, off the UI thread."""
        session = self.session
        assert session is not None
        tables, fva = session.override_value()
        self.call_from_thread(self._show_override_value, tables, fva)

    def _show_override_value(self, tables, fva) -> None:
        assert self.session is not None
        self._status("")
        self.push_screen(
            OverridesScreen(
                tables,
                fva,
                self.session.priced,
                self.options.root_causes,
                stat_name=self.session.review_cycle.settings.stat_name,
            )
        )

    @on(Exported)
    def _exported(self, message: Exported) -> None:
        self._status(message.summary)
        fmt.toast(self, message.summary, timeout=10)

    def help_rows(self) -> list[tuple[str, str, str]]:
        """(keys, description, tooltip) for every binding of the main screen and the list."""
        rows = []
        for binding in [*SeriesList.BINDINGS, *self.BINDINGS]:
            assert isinstance(binding, Binding)
            rows.append((binding.key, binding.description, binding.tooltip))
        rows.append(("ctrl+s", "Save (decision dialog)", "Save the decision to the ledger"))
        rows.append(("ctrl+p", "Command palette", "Search every action by name"))
        return rows

    def action_help(self) -> None:
        self.push_screen(HelpScreen(self.help_rows(), words.MEANINGS))

    def get_system_commands(self, screen):
        """The main review actions, searchable in the command palette (ctrl+p)."""
        yield from super().get_system_commands(screen)
        for binding in self.BINDINGS:
            assert isinstance(binding, Binding)
            if binding.show or binding.id in {
                "review.suggestion",
                "find.field",
                "find.order",
                "find.jump",
                "app.export",
                "app.overrides",
            }:
                yield SystemCommand(
                    binding.description,
                    f"{binding.tooltip} (key: {binding.key})",
                    lambda action=binding.action: self.run_action(action),
                )


__all__ = ["CAUTION", "FILTER_FIELDS", "Options", "TriageApp"]
