"""The codeseek terminal UI: ask in plain words, read the code, jump to it.

Top to bottom: the query line, the filter strip, the body (the hit list beside
the reader, or above it in a narrow terminal), the index line and the footer.

Searching never blocks the screen. Each change of the query line makes every
answer still in flight stale (a serial number goes up); the search itself runs
in an exclusive thread worker, started at once after a quiet spell and
otherwise after a short debounce, and an answer is shown only if its serial is
still the latest. Index builds run on their own thread and report progress to
the index line; searches go on against what is already committed.
"""

from __future__ import annotations

import os
import subprocess
import threading
import time
from collections import deque
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, ClassVar

from textual import on, work
from textual.app import App, ComposeResult, SuspendNotSupported
from textual.binding import BindingType
from textual.containers import Horizontal, Vertical
from textual.content import Content
from textual.timer import Timer
from textual.widgets import Button, Footer, Input, Label, OptionList
from textual.widgets.option_list import Option
from textual.worker import get_current_worker

from codeseek.display import printable
from codeseek.errors import CodeseekError, ConfigError, IndexNotFound
from codeseek.languages import language_names
from codeseek.query import Query
from codeseek.search import NEIGHBOURS_OF, SearchHit
from codeseek.tui.backend import (
    IndexBuilder,
    SearchBackend,
    is_several,
    neighbour_hits,
    searcher_status,
    service_state,
)
from codeseek.tui.clipboard import copy_with_command, passthrough
from codeseek.tui.editor import editor_command
from codeseek.tui.filters import (
    LANGUAGE,
    UNIT,
    Chip,
    FilterSet,
    chip_text,
    kind_choices,
    query_words,
    take_chips,
)
from codeseek.tui.keys import bindings_for
from codeseek.tui.render import (
    SourceCache,
    hit_prompt,
    index_summary,
    reader_code,
    reader_header,
    repository_file,
)
from codeseek.tui.screens import KeyList
from codeseek.tui.theme import HARBOUR, HARBOUR_LIGHT, code_look, light_background
from codeseek.tui.widgets import FilterStrip, HitList, IndexLine, Notice, QueryLine, Reader

if TYPE_CHECKING:
    from codeseek.api import IndexStatus
    from codeseek.indexer import UpdateSummary

DEFAULT_K = 30
DEBOUNCE_SECONDS = 0.06
STATUS_EVERY_SECONDS = 10.0
PROGRESS_EVERY_SECONDS = 0.1
FIRST_REOPEN_SECONDS = 2.0
WARM_UP_QUERY = "warm up"
WIDE_FROM = 110
"""Terminal width from which the reader sits beside the hit list."""

STAGES = {"scan": "scanning files", "parse": "parsing", "embed": "embedding", "save": "saving"}

@dataclass(frozen=True)
class Request:
    """One search: the query text (or a unit whose neighbours to find), filters, serial."""

    serial: int
    query: str
    filters: FilterSet
    near: SearchHit | None = None

    @property
    def label(self) -> str:
        """What the hits answer: the query, or ``neighbours of NAME``."""
        return f"{NEIGHBOURS_OF}{self.near.qualname}" if self.near is not None else self.query


@dataclass(frozen=True)
class Shown:
    """The answer on screen: which request, how many hits, when it was shown."""

    serial: int
    label: str
    hits: int
    at: float


class CodeseekApp(App[int]):
    """Search a repository by meaning, read the hits, open them in an editor.

    Args:
        searcher: what answers ``search`` and ``status`` (an open Index, a client of
            the background service), or None when there is no index yet.
        repo: the repository root, for reading the code the reader shows
            (default: the searcher's ``status().repo``).
        builder: builds or refreshes the index in the background (optional).
        k: hits per search.
        debounce: seconds of typing quiet before a search starts (0: every key).
        env: where ``$VISUAL`` and ``$EDITOR`` are looked up (default: os.environ).
    """

    CSS_PATH = Path(__file__).with_name("app.tcss")  # absolute: subclasses live elsewhere
    TITLE = "codeseek"
    ENABLE_COMMAND_PALETTE = False
    HORIZONTAL_BREAKPOINTS = [(0, "-narrow"), (WIDE_FROM, "-wide")]
    BINDINGS: ClassVar[list[BindingType]] = bindings_for("anywhere")

    def __init__(self, searcher: SearchBackend | None, *,
                 repo: str | os.PathLike[str] | None = None,
                 builder: IndexBuilder | None = None, k: int = DEFAULT_K,
                 debounce: float = DEBOUNCE_SECONDS,
                 env: Mapping[str, str] | None = None) -> None:
        super().__init__()
        self.searcher = searcher
        self.builder = builder
        self.repo = Path(repo) if repo is not None else None
        self.k = k
        self.debounce = debounce
        self.env = dict(os.environ if env is None else env)
        self.filter_set = FilterSet()
        self.hits: list[SearchHit] = []
        self.shown: Shown | None = None
        self.shown_log: deque[str] = deque(maxlen=500)
        self.locations: list[str] = []
        self.index_status: IndexStatus | None = None
        self.indexing = False
        self._near: SearchHit | None = None
        self._reading: tuple[SearchHit, str] | None = None
        self._hits_wanted = False  # the user left the query line before the hits came
        self._serial = 0
        self._timer: Timer | None = None
        self._last_change = 0.0
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._index_thread: threading.Thread | None = None
        self._sources = SourceCache(self.repo)
        self.register_theme(HARBOUR)
        self.register_theme(HARBOUR_LIGHT)
        self.theme = (HARBOUR_LIGHT if light_background(self.env) else HARBOUR).name

    # -- layout -------------------------------------------------------------------------

    def compose(self) -> ComposeResult:
        with Horizontal(id="query-bar"):
            yield Label("seek ›", id="query-prompt")
            yield QueryLine()
        yield FilterStrip(id="filter-strip")
        with Horizontal(id="body"):
            with Vertical(id="hits-pane"):
                yield HitList(id="hits")
                yield Notice(id="notice")
            yield Reader(id="reader")
        yield IndexLine(id="index-line")
        yield Footer(compact=True)

    def on_mount(self) -> None:
        if self.no_color:
            self.screen.add_class("-nocolor")
        self.query_one("#hits-pane").border_title = "hits"
        self.query_one(Reader).border_title = "reader"
        self.query_one(IndexLine).progress(None, None)
        self.query_one(FilterStrip).show(self.filter_set, None)
        self.query_one(QueryLine).focus()
        self._show_list(False)
        if self.searcher is None:
            self._notice_no_index()
            self.query_one(IndexLine).show("no index yet")
        else:
            self._notice_start()
            self.query_one(IndexLine).show("loading the model…")
            self._warm_up()
        self.set_interval(STATUS_EVERY_SECONDS, self._refresh_status)

    def on_unmount(self) -> None:
        # an index build stops at its next progress report; its commits are kept
        self._stop.set()
        if self._index_thread is not None:
            self._index_thread.join(timeout=0.5)

    def close_searcher(self) -> None:
        """Close the searcher (after the app has ended)."""
        with self._lock:
            searcher, self.searcher = self.searcher, None
        if searcher is not None:
            searcher.close()

    # -- what the screen shows ------------------------------------------------------------

    def _show_list(self, visible: bool) -> None:
        self.query_one(HitList).display = visible
        self.query_one(Notice).display = not visible
        self.query_one(Reader).display = visible

    def _notice_start(self) -> None:
        self.query_one(Notice).show(Content.assemble(
            ("Ask in plain words what the code does", "bold"),
            ", e.g. “where do we retry failed uploads” or “parse the config file”.\n",
            "Type ", ("language=go", "$cs-chip"), ", ", ("unit=method", "$cs-chip"), " or ",
            ("files=src/", "$cs-chip"), " and a space to filter. ",
            ("f1", "$cs-key"), " lists every key.",
        ))

    def _notice_no_index(self) -> None:
        where = str(self.repo) if self.repo is not None else "this repository"
        if self.builder is None:
            self.query_one(Notice).show(Content.assemble(
                (f"No index for {where} yet.", "bold"), "\n",
                "Build it with `codeseek index`, then start codeseek ui again.",
            ))
            return
        self.query_one(Notice).show(Content.assemble(
            (f"No index for {where} yet.", "bold"), "\n",
            "Build it now: press ", ("ctrl+r", "$cs-key"), " or the button. It runs in the "
            "background; you can search what is indexed as it goes.",
        ), offer_build=True)

    def _notice_no_hits(self, label: str) -> None:
        chips = [printable(chip_text(chip)) for chip in self.filter_set.chips]
        if self.indexing and self.index_status is None:
            advice = "The index is still being built; its units appear when they are stored."
        elif not chips:
            advice = "Try other words, or fewer of them."
        else:
            advice = (f"Filters in use: {'  '.join(chips)}. Remove one to widen the search: "
                      "click its ✕, press backspace on an empty query line, or ctrl+g for all.")
        self.query_one(Notice).show(Content.assemble(
            (f"No matches for “{printable(label)}”.", "bold"), "\n", advice))

    def _notice_error(self, error: Exception) -> None:
        self.query_one(Notice).show(Content.assemble(("⚠ ", "$error bold"),
                                                     printable(str(error))))

    # -- searching --------------------------------------------------------------------------

    @on(Input.Changed, "#query")
    def _query_changed(self, event: Input.Changed) -> None:
        if event.value == "?":
            event.input.value = ""
            self.action_help()
            return
        rest, chips = take_chips(event.value)
        if chips:
            self._add_chips(chips)
            event.input.value = rest
            return
        self._near = None
        self._schedule()

    def _schedule(self) -> None:
        """Make answers in flight stale; search now after a quiet spell, else after a pause."""
        self._serial += 1
        if self._timer is not None:
            self._timer.stop()
            self._timer = None
        now = time.monotonic()
        quiet = now - self._last_change >= self.debounce
        self._last_change = now
        if quiet:
            self._launch()
        else:
            self._timer = self.set_timer(self.debounce, self._launch)

    def _rerun(self) -> None:
        """Search again at once (filters or mode changed)."""
        self._serial += 1
        if self._timer is not None:
            self._timer.stop()
            self._timer = None
        self._launch()

    def _launch(self) -> None:
        self._timer = None
        query = query_words(self.query_one(QueryLine).value)
        request = Request(self._serial, query, self.filter_set, self._near)
        self.query_one(FilterStrip).show(self.filter_set, self._near)
        if self.searcher is None:
            self._notice_no_index()
            self._show_list(False)
            return
        if not query and self._near is None:
            self.hits = []
            self.shown = None
            self._title_hits(None)
            self._notice_start()
            self._show_list(False)
            return
        self._search_worker(request)

    @work(thread=True, exclusive=True, group="search", exit_on_error=False)
    def _search_worker(self, request: Request) -> None:
        worker = get_current_worker()
        with self._lock:
            if worker.is_cancelled or request.serial != self._serial:
                return  # a newer keystroke came in before this search began
            outcome = self._answer(request)
        self._to_screen(self._deliver, request, outcome)

    def _answer(self, request: Request) -> list[SearchHit] | Exception:
        """Run one request against the searcher (the caller holds the lock)."""
        searcher = self.searcher
        if searcher is None:
            return IndexNotFound("no index yet; press ctrl+r to build it")
        filters = request.filters
        try:
            if request.near is not None:
                return neighbour_hits(searcher, request.near, self.k, filters.as_filters())
            return searcher.search(Query(text=request.query, k=self.k,
                                         filters=filters.as_filters()))
        except (CodeseekError, OSError) as exc:
            return exc

    def _to_screen(self, callback: object, *args: object) -> None:
        """Hand a result from a thread to the screen, unless the app is ending."""
        if self._stop.is_set() or not callable(callback):
            return
        try:
            self.call_from_thread(callback, *args)
        except RuntimeError:
            return  # the app stopped meanwhile

    def _deliver(self, request: Request, outcome: list[SearchHit] | Exception) -> None:
        if request.serial != self._serial:
            return  # stale: the query changed while this search ran
        if isinstance(outcome, Exception):
            self.hits = []
            self.shown = None
            self._title_hits(None)
            if isinstance(outcome, IndexNotFound):
                self._notice_no_index()
            else:
                self._notice_error(outcome)
            self._show_list(False)
            return
        self._show_hits(request, outcome)

    def _show_hits(self, request: Request, hits: list[SearchHit]) -> None:
        self.hits = hits
        hit_list = self.query_one(HitList)
        hit_list.set_options([Option(hit_prompt(hit)) for hit in hits])
        self._title_hits(len(hits) if hits else None)
        self.shown = Shown(request.serial, request.label, len(hits), time.perf_counter())
        self.shown_log.append(request.label)
        if not hits:
            self._notice_no_hits(request.label)
            self._show_list(False)
            return
        self._show_list(True)
        hit_list.highlighted = 0
        self._show_reader(hits[0])
        if self._hits_wanted and self.focused is None:
            hit_list.focus()
        self._hits_wanted = False

    def _title_hits(self, count: int | None) -> None:
        """The hit pane's title: ``hits · N`` while N hits are listed, else ``hits``."""
        pane = self.query_one("#hits-pane")
        pane.border_title = f"hits · {count}" if count is not None else "hits"

    @on(OptionList.OptionHighlighted, "#hits")
    def _hit_highlighted(self, event: OptionList.OptionHighlighted) -> None:
        hit = self.selected_hit
        if hit is not None:
            self._show_reader(hit)

    def _show_reader(self, hit: SearchHit) -> None:
        reader = self.query_one(Reader)
        query = self.shown.label if self.shown is not None and self._near is None else ""
        if self._reading == (hit, query):
            return
        self._reading = (hit, query)
        source = self._sources.unit(hit)
        reader.query_one("#reader-head").update(reader_header(hit))  # type: ignore[attr-defined]
        look = code_look(dark=self.current_theme.dark, no_color=self.no_color)
        reader.query_one("#reader-code").update(  # type: ignore[attr-defined]
            reader_code(hit, source, query, look))
        reader.border_title = Content(f"reader · {self._place(hit)}")
        reader.scroll_home(animate=False)

    @property
    def selected_hit(self) -> SearchHit | None:
        """The hit under the cursor of the hit list."""
        index = self.query_one(HitList).highlighted
        if index is None or not 0 <= index < len(self.hits):
            return None
        return self.hits[index]

    # -- warming up and the index line -------------------------------------------------------

    @work(thread=True, group="warm-up", exit_on_error=False)
    def _warm_up(self) -> None:
        with self._lock:
            searcher = self.searcher
            outcome: Exception | None = None
            if searcher is not None:
                try:
                    searcher.search(Query(text=WARM_UP_QUERY, k=1))
                except (CodeseekError, OSError) as exc:
                    outcome = exc
        self._to_screen(self._warmed_up, outcome)

    def _warmed_up(self, error: Exception | None) -> None:
        self._refresh_status()
        if isinstance(error, IndexNotFound):
            self._notice_no_index()
            self._show_list(False)
        elif error is not None and not self.hits:
            self._notice_error(error)

    @work(thread=True, exclusive=True, group="status", exit_on_error=False)
    def _refresh_status(self) -> None:
        with self._lock:
            searcher = self.searcher
            outcome: IndexStatus | Exception | None = None
            if searcher is not None:
                try:
                    outcome = searcher_status(searcher)
                except (CodeseekError, OSError) as exc:
                    outcome = exc
            state = service_state(searcher) if searcher is not None else ""
        self._to_screen(self._show_status, outcome, state)

    def _show_status(self, status: IndexStatus | Exception | None, state: str) -> None:
        if self.indexing:
            return  # the progress report owns the line
        line = self.query_one(IndexLine)
        if status is None:
            line.show("no index yet")
        elif isinstance(status, Exception):
            line.show(Content.assemble(("⚠ ", "$error"), printable(str(status))))
        else:
            self.index_status = status
            if self.repo is None and not is_several(self.searcher):
                self.repo = Path(status.repo)
                self._sources.repo = self.repo
            line.show(index_summary(status, state))

    # -- the index build ---------------------------------------------------------------------

    def action_reindex(self) -> None:
        """Build or refresh the index on a background thread."""
        if self.builder is None:
            self.notify("a running `codeseek watch` keeps this index up to date by itself; "
                        "nothing to rebuild here", timeout=4)
            return
        if self.indexing:
            self.notify("the index is already being built", timeout=3)
            return
        self.indexing = True
        line = self.query_one(IndexLine)
        line.show("indexing: scanning files")
        line.progress(0, 0)
        # its own thread, not a worker: an index build must not hold up quitting
        self._index_thread = threading.Thread(target=self._build_index, name="codeseek-index",
                                              daemon=True)
        self._index_thread.start()

    @on(Button.Pressed, "#build-button")
    def _build_pressed(self) -> None:
        self.action_reindex()

    def _build_index(self) -> None:
        builder = self.builder
        assert builder is not None
        report = _ProgressReport(self, reopen=self.searcher is None)
        outcome: UpdateSummary | Exception
        try:
            outcome = builder.update(report)
        except _Stopped:
            return
        except (CodeseekError, OSError) as exc:
            outcome = exc
        if not isinstance(outcome, Exception):
            self.reopen()
        self._to_screen(self._index_done, outcome)

    def reopen(self) -> None:
        """Swap in a fresh searcher over what the index holds now (from a thread)."""
        builder = self.builder
        if builder is None or self._stop.is_set():
            return
        try:
            fresh = builder.open_searcher()
            fresh.search(Query(text=WARM_UP_QUERY, k=1))  # loads the vectors before any wait
        except (CodeseekError, OSError):
            return
        with self._lock:
            old, self.searcher = self.searcher, fresh
        if old is not None:
            old.close()
        self._to_screen(self._searcher_changed)

    def _searcher_changed(self) -> None:
        self._refresh_status()
        if query_words(self.query_one(QueryLine).value) or self._near is not None:
            self._rerun()
        elif not self.hits:
            self._notice_start()

    def show_progress(self, stage: str, done: int, total: int) -> None:
        """Report indexing progress in the index line."""
        line = self.query_one(IndexLine)
        label = STAGES.get(stage, stage)
        counts = f" {done:,}/{total:,}" if total else ""
        line.show(f"indexing: {label}{counts} · searching what is indexed so far")
        line.progress(done, total)

    def _index_done(self, outcome: UpdateSummary | Exception) -> None:
        self.indexing = False
        self.query_one(IndexLine).progress(None, None)
        if isinstance(outcome, Exception):
            self.notify(printable(str(outcome)), title="indexing failed", severity="error",
                        timeout=8, markup=False)
        else:
            self.notify(f"indexed {outcome.files:,} files, {outcome.units:,} units: "
                        f"{outcome.added:,} added, {outcome.changed:,} changed, "
                        f"{outcome.removed:,} removed in {outcome.seconds:.1f} s", timeout=5)
        self._refresh_status()

    # -- filters -----------------------------------------------------------------------------

    def _add_chips(self, chips: Sequence[Chip]) -> None:
        for chip in chips:
            try:
                self.filter_set = self.filter_set.added(chip)
            except CodeseekError as exc:
                self.notify(printable(str(exc)), severity="error", timeout=6, markup=False)
        self.query_one(FilterStrip).show(self.filter_set, self._near)

    def action_cycle_language(self) -> None:
        """Filter by the next language of the index."""
        if self.index_status is not None and self.index_status.languages:
            counts = self.index_status.languages
            choices = sorted(counts, key=lambda name: (-counts[name], name))
        else:
            choices = list(language_names())
        self._set_filters(self.filter_set.cycled(LANGUAGE, choices))

    def action_cycle_unit(self) -> None:
        """Filter by the next unit kind."""
        self._set_filters(self.filter_set.cycled(UNIT, kind_choices()))

    def action_clear_filters(self) -> None:
        """Remove every filter and leave the neighbours."""
        self._near = None
        self._set_filters(FilterSet())

    def action_drop_filter(self, position: int) -> None:
        """Remove one filter chip."""
        if 0 <= position < len(self.filter_set.chips):
            self._set_filters(self.filter_set.removed(position))

    def action_drop_near(self) -> None:
        """Leave the neighbours and search the query line again."""
        self._near = None
        self._rerun()

    def action_drop_last_filter(self) -> None:
        """Remove the newest filter (or leave the neighbours)."""
        if self._near is not None:
            self.action_drop_near()
        elif self.filter_set.chips:
            self._set_filters(self.filter_set.removed(-1))

    def _set_filters(self, filters: FilterSet) -> None:
        self.filter_set = filters
        self._rerun()

    # -- acting on the selected hit ------------------------------------------------------------

    def _place(self, hit: SearchHit) -> str:
        """``path:line``, safe to show and to paste (control characters escaped); under
        its repository's root when several are searched."""
        path = hit.path if hit.repo is None else str(Path(hit.repo) / hit.path)
        return f"{printable(path)}:{hit.start_line}"

    def _need_hit(self) -> SearchHit | None:
        hit = self.selected_hit
        if hit is None:
            self.notify("no hit selected; search first", timeout=3)
        return hit

    def action_copy_place(self) -> None:
        """Copy path:line of the selected hit: through the terminal (OSC 52, wrapped for
        tmux or screen), and with the multiplexer's or the desktop's copy command."""
        hit = self._need_hit()
        if hit is None:
            return
        place = self._place(hit)
        self.copy_to_clipboard(place)  # OSC 52 to the terminal, and the app's own clipboard
        wrapped = passthrough(place, self.env)
        driver = getattr(self, "_driver", None)
        if wrapped is not None and driver is not None:
            driver.write(wrapped)
        self._copy_worker(place)

    @work(thread=True, group="copy", exit_on_error=False)
    def _copy_worker(self, place: str) -> None:
        self._to_screen(self._copied, place, copy_with_command(place, self.env))

    def _copied(self, place: str, command: str | None) -> None:
        if command is not None:
            self.notify(f"copied {place} (with {command})", timeout=3, markup=False)
        else:
            self.notify(f"copied {place} through the terminal (OSC 52)", timeout=3,
                        markup=False)

    def action_neighbours(self) -> None:
        """The neighbours of the selected unit: the units whose meaning is nearest it."""
        hit = self._need_hit()
        if hit is not None:
            self._near = hit
            self._rerun()
            self.query_one(HitList).focus()

    def action_open_hit(self) -> None:
        """Open the selected hit in the user's editor at its line."""
        hit = self._need_hit()
        if hit is None:
            return
        place = self._place(hit)
        root = self.repo if hit.repo is None else Path(hit.repo)  # several: the hit's own
        path = repository_file(root, hit.path) if root is not None else None
        if path is None:  # a planted index may name a file outside the repository
            self._fall_back(place, "the hit's file is not inside the repository")
            return
        try:
            command = editor_command(self.env, path, hit.start_line)
        except ConfigError as exc:
            self._fall_back(place, str(exc))
            return
        if command is None:
            self._fall_back(place, "no $VISUAL or $EDITOR set")
            return
        try:
            status = self._run_editor(command)
        except OSError as exc:
            self._fall_back(place, f"cannot start {command[0]}: {exc.strerror or exc}")
            return
        if status != 0:
            self.notify(f"{printable(command[0])} ended with status {status}",
                        severity="warning", timeout=4, markup=False)

    def _run_editor(self, command: list[str]) -> int:
        try:
            with self.suspend():
                return subprocess.run(command, check=False).returncode
        except SuspendNotSupported:
            # no terminal to hand over (a headless run): start it detached from ours
            return subprocess.run(command, check=False, stdin=subprocess.DEVNULL,
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL).returncode

    def _fall_back(self, place: str, reason: str) -> None:
        """No editor: show the place now and print it when the UI ends."""
        self.locations.append(place)
        self.notify(f"{printable(reason)}; {place} is printed when you quit", timeout=6,
                    markup=False)

    # -- moving around -----------------------------------------------------------------------

    def action_search_now(self) -> None:
        """Enter in the query line: take a last filter word, search if needed, go to the hits."""
        line = self.query_one(QueryLine)
        rest, chips = take_chips(line.value + " ")
        if chips:
            self._add_chips(chips)
            line.value = rest.rstrip()  # the change searches again
        elif self._timer is not None:
            self._rerun()
        self.action_to_hits()

    def action_to_hits(self) -> None:
        """Leave the query line: to the hit list (now or when it fills), the build button,
        or nowhere (then q quits)."""
        hit_list = self.query_one(HitList)
        button = self.query_one("#build-button", Button)
        answered = self.shown is not None and self.shown.serial == self._serial
        if hit_list.display and self.hits and answered:
            hit_list.focus()
            return
        if self.query_one(Notice).display and button.display:
            button.focus()
            return
        self._hits_wanted = not answered
        self.screen.set_focus(None)

    def action_erase(self) -> None:
        """Backspace in the query line: delete left, or drop the last filter on an empty line."""
        line = self.query_one(QueryLine)
        if line.value:
            line.action_delete_left()
        else:
            self.action_drop_last_filter()

    def action_to_query(self) -> None:
        """Back to the query line."""
        self._hits_wanted = False
        self.query_one(QueryLine).focus()

    def action_help(self) -> None:
        """Show every key."""
        if not isinstance(self.screen, KeyList):
            self.push_screen(KeyList())


class _Stopped(Exception):
    """Raised inside an index build's progress report to stop it when the UI ends."""


class _ProgressReport:
    """The progress callback of an index build: forwards to the index line, now and then.

    For a first build (no searcher yet) it also swaps in a fresh searcher from time
    to time, waiting twice as long after each swap, so what is committed can be
    searched while the index grows, without reloading it too often.
    """

    def __init__(self, app: CodeseekApp, *, reopen: bool,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.app = app
        self.reopen = reopen
        self.clock = clock
        self.last = -PROGRESS_EVERY_SECONDS
        self.stage = ""
        self.wait = FIRST_REOPEN_SECONDS
        self.next_reopen = clock() + self.wait

    def __call__(self, stage: str, done: int, total: int) -> None:
        if self.app._stop.is_set():
            raise _Stopped
        now = self.clock()
        if stage != self.stage or now - self.last >= PROGRESS_EVERY_SECONDS or done == total:
            self.stage, self.last = stage, now
            self.app._to_screen(self.app.show_progress, stage, done, total)
        if self.reopen and now >= self.next_reopen:
            self.app.reopen()
            self.wait *= 2
            self.next_reopen = self.clock() + self.wait
