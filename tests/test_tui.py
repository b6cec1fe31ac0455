"""The terminal UI, headless: searching as you type, reading, filters, the editor, indexing.

Apps run with ``App.run_test()`` and are driven by a ``Pilot``; the searcher is
a copy of sample_repo/ indexed with the fake embedder, or a scripted fake
searcher where timing must be controlled. Snapshot tests (pytest-textual-snapshot)
keep the look of the main screen, an empty state and the key list.
"""

from __future__ import annotations

import asyncio
import dataclasses
import functools
import io
import os
import sqlite3
import stat
import threading
import time
from collections.abc import Awaitable, Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from textual.pilot import Pilot
from textual.widgets import Static

from codeseek import FakeEmbedder, SearchHit
from codeseek.api import Index, IndexStatus
from codeseek.errors import InvalidQuery
from codeseek.query import Filters, Query
from codeseek.tui.app import WARM_UP_QUERY, CodeseekApp, Request, _ProgressReport, _Stopped
from codeseek.tui.backend import LocalIndexer, neighbour_hits
from codeseek.tui.editor import editor_command
from codeseek.tui.filters import FilterSet, query_words, take_chips
from codeseek.tui.keys import KEYS
from codeseek.tui.render import (
    SourceCache,
    matching_lines,
    scope_chain,
    score_bar,
    score_cells,
    when,
)
from codeseek.tui.screens import KeyList
from codeseek.tui.widgets import FilterStrip, HitList, Notice, QueryLine, Reader

REFUND_PATH = "python/kestrune/billing/payments.py"
REFUND_LINE = 104
SETTLE_SECONDS = 10.0


# -- helpers ---------------------------------------------------------------------------


class Recording(CodeseekApp):
    """The app, keeping the notifications it shows."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.messages: list[str] = []

    def notify(self, message: str, **kwargs: Any) -> None:  # type: ignore[override]
        self.messages.append(message)
        super().notify(message, **kwargs)


def in_loop(test: Callable[..., Awaitable[None]]) -> Callable[..., None]:
    """Run an async test in its own event loop (pytest sees a plain test function)."""

    @functools.wraps(test)
    def run(*args: Any, **kwargs: Any) -> None:
        asyncio.run(test(*args, **kwargs))

    return run


def make_app(searcher: Any, repo: Path | None, **kwargs: Any) -> Recording:
    kwargs.setdefault("debounce", 0.0)
    kwargs.setdefault("env", {})
    return Recording(searcher, repo=repo, **kwargs)


async def wait_until(pilot: Pilot[Any], condition: Callable[[], bool],
                     timeout: float = SETTLE_SECONDS) -> None:
    """Let the app run until ``condition`` holds (fails the test after ``timeout``)."""
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError("the app did not reach the expected state in time")
        await pilot.pause(0.02)
    await pilot.pause()


async def answered(pilot: Pilot[Any], app: CodeseekApp, label: str) -> None:
    """Wait until the hits for ``label`` are on screen."""
    await wait_until(pilot, lambda: app.shown is not None and app.shown.label == label
                     and app.shown.serial == app._serial)


async def ask(pilot: Pilot[Any], app: CodeseekApp, text: str) -> None:
    """Put ``text`` in the query line at once (as a paste would) and wait for its hits."""
    app.query_one(QueryLine).value = text
    await answered(pilot, app, text)


def plain(widget: Any) -> str:
    """The text a Static shows."""
    return str(widget.render())


def code_text(app: CodeseekApp, width: int = 120) -> str:
    """The reader's code as plain text (line numbers and marks included)."""
    from rich.console import Console

    console = Console(width=width, color_system=None, record=True, file=io.StringIO())
    console.print(app.query_one("#reader-code", Static).content)
    return console.export_text()


def reader_text(app: CodeseekApp) -> str:
    return plain(app.query_one("#reader-head"))


def option_texts(app: CodeseekApp) -> list[str]:
    hit_list = app.query_one(HitList)
    return [str(hit_list.get_option_at_index(i).prompt) for i in range(hit_list.option_count)]


@pytest.fixture
def index(fake_index: Index) -> Index:
    return fake_index


@pytest.fixture
def repo(sample_copy: Path) -> Path:
    return sample_copy


# -- searching as you type -----------------------------------------------------------------


@in_loop
async def test_typing_a_query_shows_the_expected_top_hit(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        assert app.focused is app.query_one(QueryLine)
        await pilot.press(*"issue refund")
        await answered(pilot, app, "issue refund")
        top = app.hits[0]
        assert (top.qualname, top.path, top.start_line) == (
            "PaymentService.issue_refund", REFUND_PATH, REFUND_LINE)
        first = option_texts(app)[0]
        assert "PaymentService.issue_refund" in first
        assert f"{REFUND_PATH}:{REFUND_LINE}" in first
        assert "method · python" in first
        assert "Give money back to a rider" in first
        assert app.query_one(HitList).highlighted == 0
        assert "PaymentService.issue_refund" in reader_text(app)
        assert "billing › payments.py › PaymentService" in reader_text(app)
        # the same answer the library gives
        expected = index.search("issue refund", app.k)
        assert [h.unit_id for h in app.hits] == [h.unit_id for h in expected]


@in_loop
async def test_reader_shows_numbered_code_with_query_lines_marked(index: Index,
                                                                  repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "issue refund")
        text = code_text(app)
        assert f"❱ {REFUND_LINE}     def issue_refund(" in text
        assert f"  {REFUND_LINE + 2}" in text  # a blank line: numbered, not marked
        assert f"❱ {REFUND_LINE + 2}" not in text


@in_loop
async def test_clearing_the_query_shows_the_start_notice(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await ask(pilot, app, "refund")
        for _ in "refund":
            await pilot.press("backspace")
        await wait_until(pilot, lambda: app.query_one(Notice).display)
        assert app.hits == []
        assert "Ask in plain words" in plain(app.query_one("#notice-text"))


@in_loop
async def test_debounce_coalesces_fast_typing(repo: Path) -> None:
    searcher = ScriptedSearcher()
    app = make_app(searcher, repo, debounce=1.0)
    async with app.run_test() as pilot:
        await pilot.press(*"abcd")
        await answered(pilot, app, "abcd")
        # the first key searches at once; the rest wait for a quiet spell
        assert searcher.queries() == ["a", "abcd"]
        assert list(app.shown_log)[-1] == "abcd"
        assert "ab" not in app.shown_log and "abc" not in app.shown_log


# -- stale answers -------------------------------------------------------------------------


class ScriptedSearcher:
    """A fake searcher: one hit per query, named after it; chosen queries wait for a gate."""

    def __init__(self, slow: Sequence[str] = ()) -> None:
        self.slow = set(slow)
        self.gate = threading.Event()
        self.calls: list[str] = []
        self.finished: list[str] = []

    def search(self, query: Query) -> list[SearchHit]:
        text = str(query.text)
        self.calls.append(text)
        if text in self.slow:
            assert self.gate.wait(SETTLE_SECONDS), "the test never opened the gate"
        self.finished.append(text)
        return [fake_hit(text)]

    def search_many(self, queries: Sequence[Query]) -> list[list[SearchHit]]:
        return [self.search(query) for query in queries]

    def neighbours(self, query: Query) -> list[SearchHit]:
        return [fake_hit(f"near {query.unit_id}")]

    def daemon_status(self) -> dict[str, Any] | None:
        return None  # in process

    def close(self) -> None:
        return None  # holds nothing

    def queries(self) -> list[str]:
        """The searches the user's typing asked for (not the start-up warm-up)."""
        return [query for query in self.calls if query != WARM_UP_QUERY]

    def status(self) -> IndexStatus:
        return frozen_status("/nowhere/scripted")


def fake_hit(query: str) -> SearchHit:
    return SearchHit(query=query, rank=1, score=0.03, similarity=0.5, path="src/answers.py",
                     start_line=1, end_line=2, language="python", kind="function",
                     name=f"answer_{query}", qualname=f"answer_{query}", signature="",
                     doc_summary=f"The answer to {query}.", snippet="def answer():\n    pass",
                     unit_id=len(query))


def frozen_status(repo: str, units: int = 3, files: int = 1) -> IndexStatus:
    return IndexStatus(repo=repo, index_dir=f"{repo}/.codeseek", files=files, units=units,
                       languages={"python": units}, skipped={}, files_with_syntax_errors=0,
                       model_id="fake", dim=256, generation=1, vectors_in_sync=True,
                       updated_at=1_704_164_640.0, bytes_on_disk=0)


@in_loop
async def test_a_slow_stale_answer_is_never_shown(repo: Path) -> None:
    searcher = ScriptedSearcher(slow=["a"])
    app = make_app(searcher, repo)
    async with app.run_test() as pilot:
        await pilot.press("a")
        await wait_until(pilot, lambda: searcher.queries() == ["a"])  # "a" is now in flight
        await pilot.press("b", "c")
        searcher.gate.set()
        await answered(pilot, app, "abc")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert "a" in searcher.finished  # the slow search did answer, late
        assert list(app.shown_log) == ["abc"]  # and its answer was dropped
        assert [h.qualname for h in app.hits] == ["answer_abc"]
        assert "answer_abc" in option_texts(app)[0]


@in_loop
async def test_an_answer_arriving_after_a_new_keystroke_is_dropped(repo: Path) -> None:
    searcher = ScriptedSearcher()
    app = make_app(searcher, repo)
    async with app.run_test() as pilot:
        await pilot.press(*"ab")
        await answered(pilot, app, "ab")
        before = app._serial
        await pilot.press("c")
        stale = Request(before, "ab", FilterSet())
        app._deliver(stale, [fake_hit("stale")])  # an old answer turning up now
        await answered(pilot, app, "abc")
        assert "answer_stale" not in [h.qualname for h in app.hits]
        assert list(app.shown_log)[-2:] == ["ab", "abc"]
        assert list(app.shown_log).count("ab") == 1


# -- moving around -------------------------------------------------------------------------


@in_loop
async def test_navigation_changes_the_reader(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await ask(pilot, app, "issue refund")
        hits = app.hits
        await pilot.press("down")
        await wait_until(pilot, lambda: app.focused is app.query_one(HitList))
        await pilot.press("j")
        assert app.query_one(HitList).highlighted == 1
        assert hits[1].qualname in reader_text(app)
        assert f"{hits[1].path}:{hits[1].start_line}" in reader_text(app)
        await pilot.press("j", "k", "k")
        assert app.query_one(HitList).highlighted == 0
        assert hits[0].qualname in reader_text(app)
        await pilot.press("end")
        assert app.query_one(HitList).highlighted == len(hits) - 1
        assert hits[-1].qualname in reader_text(app)
        await pilot.press("home", "pagedown")
        assert app.query_one(HitList).highlighted > 1
        await pilot.press("escape")
        assert app.focused is app.query_one(QueryLine)


@in_loop
async def test_clicking_a_hit_reads_it(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "issue refund")
        await pilot.click(HitList, offset=(10, 4))  # two lines per hit: the third hit
        await pilot.pause()
        assert app.query_one(HitList).highlighted == 2
        assert app.hits[2].qualname in reader_text(app)


@in_loop
async def test_double_clicking_a_hit_opens_it(index: Index, repo: Path, tmp_path: Path) -> None:
    script, record = fake_editor(tmp_path, "nano")
    app = make_app(index, repo, env={"EDITOR": str(script)})
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "issue refund")
        await pilot.click(HitList, offset=(10, 2))  # one click: the second hit, read only
        await pilot.pause()
        assert app.query_one(HitList).highlighted == 1 and not record.exists()
        await pilot.double_click(HitList, offset=(10, 2))
        await wait_until(pilot, record.exists)
        second = app.hits[1]
        assert record.read_text(encoding="utf-8").splitlines() == [
            f"+{second.start_line}", str(repo / second.path)]


@in_loop
async def test_enter_before_the_hits_come_lands_in_the_hit_list(repo: Path) -> None:
    searcher = ScriptedSearcher(slow=["slow"])
    app = make_app(searcher, repo)
    async with app.run_test() as pilot:
        app.query_one(QueryLine).value = "slow"
        await wait_until(pilot, lambda: searcher.queries() == ["slow"])
        await pilot.press("enter")
        assert app.focused is None
        searcher.gate.set()
        await answered(pilot, app, "slow")
        await wait_until(pilot, lambda: app.focused is app.query_one(HitList))


# -- filters -------------------------------------------------------------------------------


@in_loop
async def test_typed_filters_become_chips_and_narrow_the_hits(index: Index,
                                                             repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "decode packet")
        assert {h.language for h in app.hits} > {"go"}
        await pilot.press(*" language=go ")  # typed: the word becomes a chip at the space
        await answered(pilot, app, "decode packet")
        assert app.query_one(QueryLine).value == "decode packet "
        assert app.filter_set.languages == ("go",)
        assert "[language=go ✕]" in plain(app.query_one(FilterStrip))
        assert app.hits and {h.language for h in app.hits} == {"go"}
        assert len(app.hits) < app.k
        await pilot.press("f5")  # next unit kind: function
        await answered(pilot, app, "decode packet")
        assert {(h.language, h.kind) for h in app.hits} == {("go", "function")}
        expected = index.search("decode packet", app.k, languages=["go"], kinds=["function"])
        assert [h.unit_id for h in app.hits] == [h.unit_id for h in expected]
        await pilot.press("ctrl+g")
        await answered(pilot, app, "decode packet")
        assert app.filter_set.chips == ()
        assert {h.language for h in app.hits} > {"go"}


@in_loop
async def test_a_chip_is_removed_by_click_and_by_backspace(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        app.query_one(QueryLine).value = "language=python unit=method files=billing/ "
        await pilot.pause()
        assert app.filter_set.chips == (("language", "python"), ("unit", "method"),
                                        ("files", "billing/"))
        assert app.query_one(QueryLine).value == ""
        await pilot.press("backspace")  # empty line: drops the newest chip
        assert app.filter_set.chips == (("language", "python"), ("unit", "method"))
        strip = plain(app.query_one(FilterStrip))
        column = strip.index("[unit=method")
        await pilot.click(FilterStrip, offset=(1 + column + 2, 0))  # padding 1
        await pilot.pause()
        assert app.filter_set.chips == (("language", "python"),)


@in_loop
async def test_filters_that_match_nothing_suggest_removing_one(index: Index,
                                                              repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        app.query_one(QueryLine).value = "refund files=nowhere/ "
        await answered(pilot, app, "refund")
        assert app.hits == []
        notice = plain(app.query_one("#notice-text"))
        assert "No matches for “refund”." in notice
        assert "Filters in use: files=nowhere/. Remove one to widen the search" in notice
        assert app.query_one(Notice).display and not app.query_one(HitList).display


@in_loop
async def test_an_unknown_language_is_a_one_line_message(index: Index, repo: Path) -> None:
    from codeseek.languages import language_names

    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await pilot.press(*"language=cobol ")
        assert app.filter_set.chips == ()
        names = ", ".join(language_names())
        assert app.messages == [f"unknown language 'cobol'; choose one of: {names}"]


@in_loop
async def test_language_cycling_follows_the_index(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await wait_until(pilot, lambda: app.index_status is not None)
        counts = index.status().languages
        order = sorted(counts, key=lambda name: (-counts[name], name))
        seen = []
        for _ in order:
            await pilot.press("f4")
            seen.append(app.filter_set.languages)
        await pilot.press("f4")
        assert seen == [(name,) for name in order]
        assert app.filter_set.languages == ()


@in_loop
async def test_clearing_the_query_drops_the_hit_count_from_the_title(index: Index,
                                                                     repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await ask(pilot, app, "issue refund")
        pane = app.query_one("#hits-pane")
        assert pane.border_title == f"hits · {len(app.hits)}"
        app.query_one(QueryLine).value = ""
        await wait_until(pilot, lambda: app.query_one(Notice).display)
        assert pane.border_title == "hits"


# -- acting on a hit -----------------------------------------------------------------------


def fake_editor(folder: Path, name: str) -> tuple[Path, Path]:
    """An executable named ``name`` that writes its arguments, one per line, to a file."""
    record = folder / f"{name}-args.txt"
    script = folder / name
    script.write_text(f'#!/bin/sh\nprintf "%s\\n" "$@" > "{record}"\n', encoding="utf-8")
    script.chmod(script.stat().st_mode | stat.S_IXUSR)
    return script, record


async def open_top_hit(app: CodeseekApp, pilot: Pilot[Any]) -> None:
    await ask(pilot, app, "issue refund")
    await pilot.press("ctrl+o")
    await pilot.pause()


@in_loop
async def test_the_editor_gets_plus_line_and_the_path(index: Index, repo: Path,
                                                      tmp_path: Path) -> None:
    script, record = fake_editor(tmp_path, "vi")
    app = make_app(index, repo, env={"VISUAL": str(script), "EDITOR": "nano"})
    async with app.run_test() as pilot:
        await open_top_hit(app, pilot)
        await wait_until(pilot, record.exists)
        assert record.read_text(encoding="utf-8").splitlines() == [
            f"+{REFUND_LINE}", str(repo / REFUND_PATH)]
        assert app.locations == []


@in_loop
async def test_the_editor_never_opens_a_planted_path_outside_the_repository(
        index: Index, repo: Path, tmp_path: Path) -> None:
    # a planted index names a file outside the repository: the editor is not started
    script, record = fake_editor(tmp_path, "vi")
    db = sqlite3.connect(repo / ".codeseek" / "index.sqlite3")
    with db:
        db.execute("UPDATE files SET path=? WHERE path=?", ("../secret.py", REFUND_PATH))
    db.close()
    app = make_app(index, repo, env={"VISUAL": str(script)})
    async with app.run_test() as pilot:
        await open_top_hit(app, pilot)
        await wait_until(pilot, lambda: app.locations != [])
        assert app.locations[0].startswith("../secret.py:")
        assert not record.exists()


@in_loop
async def test_an_editor_with_arguments_and_no_line_flag(index: Index, repo: Path,
                                                         tmp_path: Path) -> None:
    script, record = fake_editor(tmp_path, "some-editor")
    app = make_app(index, repo, env={"EDITOR": f"{script} --wait"})
    async with app.run_test() as pilot:
        await open_top_hit(app, pilot)
        await wait_until(pilot, record.exists)
        assert record.read_text(encoding="utf-8").splitlines() == [
            "--wait", str(repo / REFUND_PATH)]


@in_loop
async def test_without_an_editor_the_place_is_kept_for_printing(index: Index,
                                                                repo: Path) -> None:
    app = make_app(index, repo, env={})
    async with app.run_test() as pilot:
        await open_top_hit(app, pilot)
        assert app.locations == [f"{REFUND_PATH}:{REFUND_LINE}"]
        assert app.messages == [f"no $VISUAL or $EDITOR set; {REFUND_PATH}:{REFUND_LINE} "
                                "is printed when you quit"]


@in_loop
async def test_a_missing_editor_falls_back_to_the_place(index: Index, repo: Path,
                                                        tmp_path: Path) -> None:
    missing = tmp_path / "no-such-editor"
    app = make_app(index, repo, env={"VISUAL": str(missing)})
    async with app.run_test() as pilot:
        await open_top_hit(app, pilot)
        assert app.locations == [f"{REFUND_PATH}:{REFUND_LINE}"]
        assert app.messages[0].startswith(f"cannot start {missing}: ")


@in_loop
async def test_copy_puts_path_and_line_on_the_clipboard(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await ask(pilot, app, "issue refund")
        await pilot.press("f2")
        assert app.clipboard == f"{REFUND_PATH}:{REFUND_LINE}"
        await wait_until(pilot, lambda: bool(app.messages))
        assert app.messages == [f"copied {REFUND_PATH}:{REFUND_LINE} through the terminal "
                                "(OSC 52)"]


def test_osc52_and_its_wrappings_for_a_multiplexer() -> None:
    import base64

    from codeseek.tui.clipboard import copy_commands, osc52, passthrough

    # xterm's control sequences: OSC 52 ; Pc ; Pd BEL, Pd the base64 of the text
    encoded = base64.b64encode("src/ä.py:3".encode()).decode()
    assert osc52("src/ä.py:3") == f"\x1b]52;c;{encoded}\x07"
    # tmux hands on a DCS "tmux;" string with every ESC inside doubled; screen a plain DCS
    assert passthrough("x", {"TMUX": "/tmp/tmux-1/default,7,0"}) == (
        "\x1bPtmux;\x1b\x1b]52;c;eA==\x07\x1b\\")
    assert passthrough("x", {"STY": "12.pts-0.host"}) == "\x1bP\x1b]52;c;eA==\x07\x1b\\"
    assert passthrough("x", {}) is None
    assert copy_commands({"TMUX": "t"}, "linux")[0] == ["tmux", "load-buffer", "-w", "-"]
    assert copy_commands({"DISPLAY": ":0"}, "linux")[0][0] == "xclip"
    assert copy_commands({}, "darwin") == [["pbcopy"]]
    assert copy_commands({}, "linux") == []


@in_loop
async def test_copy_also_runs_the_desktops_copy_command(index: Index, repo: Path,
                                                        tmp_path: Path) -> None:
    tools = tmp_path / "bin"
    tools.mkdir()
    record = tmp_path / "copied.txt"
    fake = tools / "xclip"  # a stand-in: keeps what it reads and its arguments
    fake.write_text(f'#!/bin/sh\necho "$@" > "{record}.args"\ncat > "{record}"\n',
                    encoding="utf-8")
    fake.chmod(0o755)
    app = make_app(index, repo, env={"DISPLAY": ":0", "PATH": f"{tools}:/usr/bin:/bin"})
    async with app.run_test() as pilot:
        await ask(pilot, app, "issue refund")
        await pilot.press("f2")
        await wait_until(pilot, lambda: bool(app.messages))
        assert app.messages == [f"copied {REFUND_PATH}:{REFUND_LINE} (with xclip)"]
    assert record.read_text(encoding="utf-8") == f"{REFUND_PATH}:{REFUND_LINE}"
    assert Path(f"{record}.args").read_text(encoding="utf-8") == "-selection clipboard\n"


@in_loop
async def test_neighbours_search_by_the_units_own_vector(index: Index,
                                                         repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "issue refund")
        source = app.hits[0]
        await pilot.press("f3")
        await answered(pilot, app, f"neighbours of {source.qualname}")
        assert f"[near={source.qualname} ✕]" in plain(app.query_one(FilterStrip))
        # reference: brute-force cosine over every stored vector
        model = index.searcher().embedder
        labels, matrix = index.store.unit_vectors(model.model_id, model.dim)
        own = matrix[list(labels).index(source.unit_id)]
        cosines = matrix @ own
        order = [int(labels[i]) for i in np.argsort(-cosines, kind="stable")
                 if labels[i] != source.unit_id]
        got = [h.unit_id for h in app.hits]
        assert source.unit_id not in got
        assert got[:5] == order[:5]
        assert [h.similarity for h in app.hits] == sorted(
            (h.similarity for h in app.hits), reverse=True)
        await pilot.press("x")  # in the hit list: drop every filter and the neighbours
        await answered(pilot, app, "issue refund")


def test_neighbours_respect_filters(fake_index: Index) -> None:
    hit = fake_index.search("issue refund", 1)[0]
    found = neighbour_hits(fake_index, hit, 10, Filters(("go",), (), ()))
    assert found and {h.language for h in found} == {"go"}
    assert all(h.query == f"neighbours of {hit.qualname}" for h in found)


HOSTILE = "\x1b]0;owned\x07\x1b[2J"
"""What a cloned repository may hold in a name, a doc or code: set the title, clear."""


class HostileSearcher(ScriptedSearcher):
    """Answers with one unit whose name, path, doc and code hold terminal escapes."""

    def __init__(self, path: str) -> None:
        super().__init__()
        self.path = path

    def search(self, query: Query) -> list[SearchHit]:
        hit = fake_hit(str(query.text))
        return [dataclasses.replace(
            hit, path=self.path, qualname=f"Dock{HOSTILE}.unlock", name="unlock",
            doc_summary=f"Unlock a dock{HOSTILE}. Then more.", start_line=2, end_line=3)]


@in_loop
async def test_repository_text_is_shown_escaped_never_obeyed(tmp_path: Path) -> None:
    name = f"dock{HOSTILE}\u202e.py"
    (tmp_path / name).write_text(f"# header\ndef unlock():\n    return '{HOSTILE}'\n",
                                 encoding="utf-8")
    app = make_app(HostileSearcher(name), tmp_path)
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "unlock")
        shown = {
            "hit": option_texts(app)[0],
            "head": reader_text(app),
            "code": code_text(app),
            "title": str(app.query_one(Reader).border_title),
            "chips": plain(app.query_one(FilterStrip)),
        }
        escaped = HOSTILE.replace("\x1b", "\\x1b").replace("\x07", "\\x07")
        for where, text in shown.items():
            assert "\x1b" not in text and "\x07" not in text and "\u202e" not in text, where
        for where in ("hit", "head", "code", "title"):
            assert escaped in shown[where], where
        assert "\\u202e.py:2" in shown["hit"]
        assert "def unlock():" in shown["code"]  # the code's own lines, numbered from 2
        await pilot.press("f3")  # the neighbours chip names the unit, escaped too
        await wait_until(pilot, lambda: app.shown is not None
                         and app.shown.label.startswith("neighbours of "))
        assert escaped in plain(app.query_one(FilterStrip))
        assert "\x1b" not in plain(app.query_one(FilterStrip))


def test_the_reader_counts_lines_as_the_parser_does(tmp_path: Path) -> None:
    # a form feed, a file separator and a line separator end no line for tree-sitter
    # (it counts "\n" only; Python's str.splitlines would break at each of them)
    (tmp_path / "m.py").write_text("a = 1\f\n\x1c b = 2\n# \u2028 c\ndef run():\n    pass\n",
                                   encoding="utf-8")
    hit = dataclasses.replace(fake_hit("x"), path="m.py", start_line=4, end_line=5)
    source = SourceCache(tmp_path).unit(hit)
    assert source.code == "def run():\n    pass"
    from codeseek.languages import spec_for_path
    from codeseek.parse import parse_source

    path = tmp_path / "m.py"
    spec = spec_for_path("m.py")
    assert spec is not None
    parsed = parse_source("m.py", path.read_bytes(), spec)
    assert [(u.qualname, u.start_line) for u in parsed.units] == [("run", 4)]
    # a lone carriage return ends a Python line (as Python's own tokenizer says)
    path.write_bytes(b"a = 1\rb = 2\ndef run():\n    pass\n")
    parsed = parse_source("m.py", path.read_bytes(), spec)
    assert [(u.qualname, u.start_line) for u in parsed.units] == [("run", 3)]
    hit = dataclasses.replace(hit, start_line=3, end_line=4)
    assert SourceCache(tmp_path).unit(hit).code == "def run():\n    pass"


# -- the index line and building ---------------------------------------------------------


class GatedEmbedder(FakeEmbedder):
    """The fake model; on the index thread it waits for a gate before encoding."""

    def __init__(self) -> None:
        super().__init__()
        self.gate = threading.Event()
        self.waiting = threading.Event()

    def encode(self, texts: Sequence[str], progress: Any = None) -> np.ndarray:
        if threading.current_thread().name == "codeseek-index":
            self.waiting.set()
            assert self.gate.wait(SETTLE_SECONDS), "the test never opened the gate"
        return super().encode(texts, progress)


@in_loop
async def test_the_ui_stays_usable_while_the_index_is_rebuilt(fake_index: Index,
                                                              repo: Path) -> None:
    before = fake_index.status()
    fake_index.close()
    (repo / "python" / "kestrune" / "lost_items.py").write_text(
        'def shelve_forgotten_helmet(dock_id):\n    """Log a helmet left behind at a dock."""\n'
        "    return dock_id\n", encoding="utf-8")
    embedder = GatedEmbedder()
    builder = LocalIndexer(repo, embedder=embedder)
    app = make_app(builder.open_searcher(), repo, builder=builder)
    async with app.run_test() as pilot:
        await pilot.press("ctrl+r")
        await wait_until(pilot, embedder.waiting.is_set)  # the build is now stuck in the model
        assert app.indexing
        assert app.query_one("#index-progress").display
        assert plain(app.query_one("#index-text")).startswith("indexing: ")
        await pilot.press(*"issue refund")  # keys, searches and screens still work
        await answered(pilot, app, "issue refund")
        assert app.hits[0].qualname == "PaymentService.issue_refund"
        await pilot.press("f1")
        assert isinstance(app.screen, KeyList)
        await pilot.press("escape")
        assert not isinstance(app.screen, KeyList)
        assert app.indexing and app._index_thread is not None
        assert app._index_thread.is_alive()
        embedder.gate.set()
        await wait_until(pilot, lambda: not app.indexing)
        files = before.files + 1
        assert app.messages[-1].startswith(f"indexed {files} files, ")
        await wait_until(pilot, lambda: f"{files} files" in plain(app.query_one("#index-text")))
        await ask(pilot, app, "helmet left behind")
        assert app.hits[0].qualname == "shelve_forgotten_helmet"
    app.close_searcher()


class StubApp:
    """Just what an index build's progress report calls on the app."""

    def __init__(self) -> None:
        self._stop = threading.Event()
        self.now = 0.0
        self.reported: list[tuple[object, ...]] = []
        self.reopened: list[float] = []

    def clock(self) -> float:
        return self.now

    def _to_screen(self, callback: object, *args: object) -> None:
        self.reported.append(args)

    def show_progress(self, stage: str, done: int, total: int) -> None:
        raise AssertionError("only reached through _to_screen")

    def reopen(self) -> None:
        self.reopened.append(self.now)


def test_a_first_build_reopens_its_searcher_less_and_less_often() -> None:
    app = StubApp()
    report = _ProgressReport(app, reopen=True, clock=app.clock)  # type: ignore[arg-type]
    for moment in (0.5, 1.0, 2.0, 3.0, 5.9, 6.0, 13.9, 14.0):
        app.now = moment
        report("embed", 1, 10)
    assert app.reopened == [2.0, 6.0, 14.0]


def test_progress_reaches_the_screen_now_and_then() -> None:
    app = StubApp()
    report = _ProgressReport(app, reopen=False, clock=app.clock)  # type: ignore[arg-type]
    for moment, done in ((0.0, 0), (0.05, 1), (0.2, 2), (0.21, 3), (0.22, 4)):
        app.now = moment
        report("embed", done, 4)
    app.now = 0.23
    report("write", 1, 1)
    assert app.reported == [("embed", 0, 4), ("embed", 2, 4), ("embed", 4, 4), ("write", 1, 1)]
    assert app.reopened == []
    app._stop.set()
    with pytest.raises(_Stopped):
        report("write", 1, 1)


@in_loop
async def test_without_an_index_the_ui_offers_to_build_it(repo: Path) -> None:
    builder = LocalIndexer(repo, embedder=FakeEmbedder())
    app = make_app(None, repo, builder=builder)
    async with app.run_test() as pilot:
        notice = plain(app.query_one("#notice-text"))
        assert notice.startswith(f"No index for {repo} yet.")
        assert "press ctrl+r or the button" in notice
        app.query_one(QueryLine).value = "issue refund"
        await pilot.pause()
        assert app.query_one("#build-button").display
        await pilot.click("#build-button")
        await wait_until(pilot, lambda: not app.indexing and app.searcher is not None)
        await answered(pilot, app, "issue refund")
        assert app.hits[0].qualname == "PaymentService.issue_refund"
        assert (repo / ".codeseek").is_dir()
    app.close_searcher()


@in_loop
async def test_the_index_line_shows_counts_and_freshness(index: Index, repo: Path) -> None:
    app = make_app(FrozenStatus(index), repo)
    async with app.run_test() as pilot:
        await wait_until(pilot, lambda: app.index_status is not None)
        text = plain(app.query_one("#index-text"))
        status = index.status()
        assert text == (f"repo · {status.units} units · {status.files} files · "
                        "updated 2024-01-02 · in-process · not watching")
        assert not app.query_one("#index-progress").display


@in_loop
async def test_reindex_without_a_builder_says_why(repo: Path) -> None:
    app = make_app(ScriptedSearcher(), repo)
    async with app.run_test() as pilot:
        await pilot.press("ctrl+r")
        assert app.messages == ["a running `codeseek watch` keeps this index up to date by "
                                "itself; nothing to rebuild here"]
        assert not app.indexing


# -- help and quitting -----------------------------------------------------------------------


@in_loop
async def test_help_lists_every_bound_key(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        await pilot.press("f1")
        screen = app.screen
        assert isinstance(screen, KeyList)
        shown = {keys for _, rows in screen.sections() for keys, _ in rows}
        listed = " ".join(shown)
        for owner in (CodeseekApp, QueryLine, HitList, Reader, KeyList):
            for binding in owner.BINDINGS:
                for key in binding.key.split(","):  # type: ignore[union-attr]
                    assert app.get_key_display(_binding(key)) in listed, (owner, key)
        await pilot.press("escape")
        assert not isinstance(app.screen, KeyList)
        await pilot.press("question_mark")  # on an empty query line
        assert isinstance(app.screen, KeyList)
        await pilot.press("q")
        assert not isinstance(app.screen, KeyList)
        assert app.query_one(QueryLine).value == ""


@in_loop
async def test_help_explains_the_marks_on_the_screen(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        await pilot.press("f1")
        assert isinstance(app.screen, KeyList)
        sections = dict(app.screen.sections())
    rows = dict(sections["On the screen"])
    marks = " ".join(rows)
    assert score_bar(0.6) in marks and "words" in rows and "❱ 104" in rows
    assert "near=NAME" in rows
    assert "how near its meaning is to the query" in rows[score_bar(0.6)]
    assert "matched the query's words only" in rows["words"]
    assert "shares a word with the query" in rows["❱ 104"]


# Line-editing keys of a terminal's line editor (GNU readline's emacs mode, from its
# manual's "Commands For Moving", "Commands For Manipulating The History", "Commands For
# Changing Text" and "Killing And Yanking"; the list is from memory).
LINE_EDITING_KEYS = {"ctrl+a", "ctrl+b", "ctrl+d", "ctrl+e", "ctrl+f", "ctrl+h", "ctrl+k",
                     "ctrl+l", "ctrl+n", "ctrl+p", "ctrl+t", "ctrl+u", "ctrl+w", "ctrl+y"}


def test_keys_that_reach_the_query_line_leave_line_editing_alone() -> None:
    from textual.widgets import Input

    reaching = {name for key in KEYS if key.where in ("anywhere", "query")
                for name in key.keys.split(",")}
    input_keys = {name for binding in Input.BINDINGS
                  for name in binding.key.split(",")}  # type: ignore[union-attr]
    assert reaching & LINE_EDITING_KEYS == set()
    assert reaching & input_keys <= {"enter", "backspace"}  # taken over on purpose, in KEYS


@in_loop
async def test_line_editing_keys_in_the_query_line_run_no_action(index: Index,
                                                                 repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "issue refund")
        app.query_one(QueryLine).focus()
        for key in ("ctrl+y", "ctrl+n", "ctrl+l", "ctrl+t"):
            await pilot.press(key)
        await pilot.pause()
        assert app.clipboard == "" and app.messages == []
        assert app._near is None and app.filter_set.chips == ()
        assert app.query_one(QueryLine).value == "issue refund"
        # their actions live on function keys and on letters of the hit list
        await pilot.press("f4")
        assert app.filter_set.languages != ()
        await pilot.press("ctrl+g", "down")
        await wait_until(pilot, lambda: app.focused is app.query_one(HitList))
        await pilot.press("u")
        assert app.filter_set.kinds == ("function",)
        await pilot.press("x")
        await answered(pilot, app, "issue refund")
        selected = app.selected_hit
        assert selected is not None
        await pilot.press("n")
        await answered(pilot, app, f"neighbours of {selected.qualname}")


def _binding(key: str) -> Any:
    from textual.binding import Binding

    return Binding(key, "")


def test_every_key_of_the_table_is_bound_somewhere() -> None:
    owners = {"anywhere": CodeseekApp, "query": QueryLine, "hits": HitList, "reader": Reader,
              "help": KeyList}
    for key in KEYS:
        bound = {b.key for b in owners[key.where].BINDINGS}  # type: ignore[union-attr]
        assert key.keys in bound, key


@in_loop
async def test_q_types_in_the_query_line_and_quits_outside_it(index: Index,
                                                              repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await pilot.press("q", "?")
        assert app.query_one(QueryLine).value == "q?"
        assert app.is_running
        await pilot.press("escape", "q")
        await wait_until(pilot, lambda: not app.is_running)
    assert app.return_code == 0


@in_loop
async def test_ctrl_q_quits_from_the_query_line(index: Index, repo: Path) -> None:
    app = make_app(index, repo)
    async with app.run_test() as pilot:
        await pilot.press(*"refund")
        await pilot.press("ctrl+q")
        await wait_until(pilot, lambda: not app.is_running)
    assert app.return_code == 0


# -- the pieces, without the app ---------------------------------------------------------------


def test_take_chips_only_takes_finished_words() -> None:
    assert take_chips("retry language=go ") == ("retry ", [("language", "go")])
    assert take_chips("unit=method retry upload") == ("retry upload", [("unit", "method")])
    assert take_chips("retry language=go") == ("retry language=go", [])
    assert take_chips("files=a/b/ language=rust x") == (
        "x", [("files", "a/b/"), ("language", "rust")])
    assert take_chips("catalog=go ") == ("catalog=go ", [])
    assert query_words("retry language=g") == "retry"
    assert query_words("retry language=go now") == "retry language=go now"
    # the colon words of other tools are plain query words here
    assert take_chips("lang:go kind:method path:src/ x") == (
        "lang:go kind:method path:src/ x", [])


def test_filter_set_cycles_and_removes() -> None:
    filters = FilterSet().added(("unit", "class"))
    filters = filters.cycled("language", ["go", "rust"])
    assert filters.chips == (("unit", "class"), ("language", "go"))
    filters = filters.cycled("language", ["go", "rust"])
    assert filters.languages == ("rust",)
    assert filters.cycled("language", ["go", "rust"]).languages == ()
    assert filters.removed(0).chips == (("language", "rust"),)
    assert filters.added(("unit", "class")) == filters
    assert filters.kinds == ("class",)
    with pytest.raises(InvalidQuery, match="unknown unit 'macro'"):
        filters.added(("unit", "macro"))


def test_score_cells() -> None:
    assert score_bar(0.0) == "▱▱▱▱▱"
    assert score_bar(0.01) == "▰▱▱▱▱"
    assert score_bar(0.62) == "▰▰▰▱▱"
    assert score_bar(1.7) == "▰▰▰▰▰"
    hit = fake_hit("x")
    assert score_cells(dataclasses.replace(hit, similarity=None)) == "words"
    assert score_cells(dataclasses.replace(hit, similarity=0.8)) == "▰▰▰▰▱"


def test_update_times_are_short(utc: None) -> None:
    moment = 1_704_164_640.0  # 2024-01-02 03:04 UTC
    assert when(moment, now=moment + 3600) == "03:04"
    assert when(moment, now=moment + 86_400) == "2024-01-02"
    assert when(None) == "never"


def test_scope_chain_reads_every_language() -> None:
    hit = fake_hit("x")
    go = dataclasses.replace(hit, path="go/dockd/service.go",
                             qualname="(*AlertNotifier).NotifyLowBattery")
    assert scope_chain(go) == ["go", "dockd", "service.go", "(*AlertNotifier)"]
    rust = dataclasses.replace(hit, path="rust/fares/src/lib.rs", qualname="DailyCap::adjust")
    assert scope_chain(rust) == ["rust", "fares", "src", "lib.rs", "DailyCap"]
    nested = dataclasses.replace(hit, path="a.py", qualname="plan_van_route.nearest_unvisited")
    assert scope_chain(nested) == ["a.py", "plan_van_route"]


def test_matching_lines_use_words_and_identifier_parts() -> None:
    code = "def issue_refund(self):\n    # nothing here\n    return self.refunds\n"
    assert matching_lines(code, 10, "refund the rider") == {10, 12}
    assert matching_lines(code, 10, "the of a") == set()


def test_source_cache_falls_back_to_the_indexed_lines(tmp_path: Path) -> None:
    (tmp_path / "m.py").write_text("a = 1\n", encoding="utf-8")
    hit = dataclasses.replace(fake_hit("x"), path="m.py", start_line=1, end_line=5,
                              snippet="indexed text")
    source = SourceCache(tmp_path).unit(hit)
    assert source.code == "indexed text"
    assert source.note.startswith("the file changed or is gone")
    short = dataclasses.replace(hit, end_line=1)
    assert SourceCache(tmp_path).unit(short).code == "a = 1"


@pytest.mark.parametrize(("env", "expected"), [
    ({"VISUAL": "nvim", "EDITOR": "nano"}, ["nvim", "+7", "/r/f.py"]),
    ({"EDITOR": "emacsclient -t"}, ["emacsclient", "-t", "+7", "/r/f.py"]),
    ({"EDITOR": "/opt/bin/micro"}, ["/opt/bin/micro", "+7", "/r/f.py"]),
    ({"VISUAL": " ", "EDITOR": "gedit"}, ["gedit", "/r/f.py"]),
    ({}, None),
])
def test_editor_command(env: dict[str, str], expected: list[str] | None) -> None:
    assert editor_command(env, Path("/r/f.py"), 7) == expected


def test_a_badly_quoted_editor_is_a_clear_error() -> None:
    from codeseek.errors import ConfigError

    with pytest.raises(ConfigError, match=r"^\$EDITOR cannot be read as a command: "):
        editor_command({"EDITOR": "vim 'unclosed"}, Path("f.py"), 1)


# -- the command --------------------------------------------------------------------------------


def test_ui_without_a_terminal_is_a_one_line_error(sample_copy: Path) -> None:
    import io

    from codeseek.cli import main

    out, err = io.StringIO(), io.StringIO()
    code = main(["ui", str(sample_copy), "--backend", "fake"], out=out, err=err)
    assert code == 1
    assert err.getvalue() == ("error: codeseek ui needs a terminal; in scripts use "
                              "`codeseek search --json`\n")


def test_ui_refuses_two_different_repositories(sample_copy: Path, tmp_path: Path) -> None:
    import io

    from codeseek.cli import main

    err = io.StringIO()
    code = main(["ui", str(sample_copy), "--repo", str(tmp_path)], out=io.StringIO(), err=err)
    assert code == 1
    assert err.getvalue() == "error: name the repository once: PATH or --repo, not both\n"


# -- snapshots ------------------------------------------------------------------------------------


class FrozenStatus:
    """An index whose status has a fixed update time, so screenshots do not change."""

    def __init__(self, index: Index) -> None:
        self.index = index

    def search(self, query: Query) -> list[SearchHit]:
        return self.index.search(query)

    def search_many(self, queries: Sequence[Query]) -> list[list[SearchHit]]:
        return self.index.search_many(queries)

    def neighbours(self, query: Query) -> list[SearchHit]:
        return self.index.neighbours(query)

    def daemon_status(self) -> dict[str, Any] | None:
        return None  # in process

    def close(self) -> None:
        return None  # the test closes its index

    def searcher(self) -> Any:
        return self.index.searcher()

    def status(self) -> IndexStatus:
        return dataclasses.replace(self.index.status(), updated_at=1_704_164_640.0)


@pytest.fixture
def utc(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TZ", "UTC")
    time.tzset()


def still(wait: Callable[[Pilot[Any]], Awaitable[None]] | None = None,
          ) -> Callable[[Pilot[Any]], Awaitable[None]]:
    """A run_before for snapshots: no blinking cursor, then wait for the app to settle."""

    async def run_before(pilot: Pilot[Any]) -> None:
        pilot.app.query_one(QueryLine).cursor_blink = False
        if wait is not None:
            await wait(pilot)
        await wait_until(pilot, lambda: pilot.app.index_status is not None  # type: ignore
                         or pilot.app.searcher is None)  # type: ignore[attr-defined]
        await pilot.pause()

    return run_before


async def _type_refund(pilot: Pilot[Any]) -> None:
    await ask(pilot, pilot.app, "issue refund")  # type: ignore[arg-type]


SIZES = [(80, 24), (120, 40)]


@pytest.mark.parametrize("size", SIZES, ids=["80x24", "120x40"])
def test_snapshot_main_screen(snap_compare: Any, fake_index: Index, sample_copy: Path,
                              utc: None, size: tuple[int, int]) -> None:
    app = CodeseekApp(FrozenStatus(fake_index), repo=sample_copy, debounce=0.0, env={})
    assert snap_compare(app, terminal_size=size, run_before=still(_type_refund))


@pytest.mark.parametrize("size", SIZES, ids=["80x24", "120x40"])
def test_snapshot_no_index_yet(snap_compare: Any, sample_copy: Path, utc: None,
                               monkeypatch: pytest.MonkeyPatch, size: tuple[int, int]) -> None:
    monkeypatch.chdir(sample_copy.parent)
    builder = LocalIndexer(Path(sample_copy.name), embedder=FakeEmbedder())
    app = CodeseekApp(None, repo=Path(sample_copy.name), builder=builder, env={})
    assert snap_compare(app, terminal_size=size, run_before=still())


@pytest.mark.parametrize("size", SIZES, ids=["80x24", "120x40"])
def test_snapshot_key_list(snap_compare: Any, fake_index: Index, sample_copy: Path,
                           utc: None, size: tuple[int, int]) -> None:
    app = CodeseekApp(FrozenStatus(fake_index), repo=sample_copy, debounce=0.0, env={})
    assert snap_compare(app, terminal_size=size, press=["f1"], run_before=still())


@in_loop
async def test_no_color_keeps_the_marks_visible(monkeypatch: pytest.MonkeyPatch,
                                                fake_index: Index, sample_copy: Path) -> None:
    monkeypatch.setenv("NO_COLOR", "1")
    app = make_app(fake_index, sample_copy)
    async with app.run_test(size=(120, 40)) as pilot:
        await _type_refund(pilot)
        assert app.no_color and app.screen.has_class("-nocolor")
        style = app.query_one(HitList).get_component_styles("option-list--option-highlighted")
        assert style.text_style.reverse
        assert f"❱ {REFUND_LINE}" in code_text(app)
        assert code_colours(app.query_one("#reader-code", Static).content) == {}


# -- the reader's colours ----------------------------------------------------------------


def code_colours(renderable: Any) -> dict[str, set[str]]:
    """The colours a renderable is drawn in (truecolor), with the text drawn in each."""
    from rich.console import Console

    console = Console(width=120, color_system="truecolor", file=io.StringIO())
    found: dict[str, set[str]] = {}
    for segment in console.render(renderable):
        color = segment.style.color if segment.style is not None else None
        if color is not None and segment.text.strip():
            found.setdefault(color.get_truecolor().hex, set()).add(segment.text.strip())
    return found


def _relative_luminance(colour: str) -> float:
    # WCAG 2.1, "relative luminance" (sRGB channels linearised, then weighted)
    channels = [int(colour.lstrip("#")[i:i + 2], 16) / 255 for i in (0, 2, 4)]
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


def contrast(first: str, second: str) -> float:
    """WCAG 2.1's contrast ratio, (L1 + 0.05) / (L2 + 0.05)."""
    high, low = sorted((_relative_luminance(first), _relative_luminance(second)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_the_code_style_is_codeseeks_own_and_no_shipped_one() -> None:
    from pygments.styles import get_all_styles, get_style_by_name

    from codeseek.tui.theme import (
        CODE_TOKENS,
        DARK_PALETTE,
        LIGHT_PALETTE,
        HarbourCodeDark,
        HarbourCodeLight,
    )

    for style, palette in ((HarbourCodeDark, DARK_PALETTE), (HarbourCodeLight, LIGHT_PALETTE)):
        assert style.__module__ == "codeseek.tui.theme"
        ours = {token: style.style_for_token(token)["color"] for token in CODE_TOKENS}
        assert {f"#{colour}" for colour in ours.values()} <= set(palette.values())
        for name in get_all_styles():  # every style pygments ships (and any installed)
            shipped = get_style_by_name(name)
            assert shipped is not style
            same = [token for token in CODE_TOKENS
                    if shipped.style_for_token(token)["color"] == ours[token]]
            assert len(same) <= 2, (name, same)
        for token, colour in ours.items():  # readable on its own background
            assert contrast(f"#{colour}", style.background_color) >= 4.5, token


def test_the_reader_draws_code_in_the_palette(tmp_path: Path) -> None:
    from codeseek.tui.render import UnitSource, reader_code
    from codeseek.tui.theme import DARK_PALETTE, LIGHT_PALETTE, code_look

    hit = dataclasses.replace(fake_hit("x"), path="m.py")
    source = UnitSource('def run(n):\n    """Doc."""\n    return n + 1  # one more\n', 1)
    for dark, palette in ((True, DARK_PALETTE), (False, LIGHT_PALETTE)):
        drawn = code_colours(reader_code(hit, source, "run", code_look(dark, no_color=False)))
        assert set(drawn) <= set(palette.values()), drawn
        assert "def" in drawn[palette["teal"]] and "# one more" in drawn[palette["grey"]]
        assert "❱" in drawn[palette["amber"]]  # the row marker too
    plain_look = code_look(True, no_color=True)
    assert code_colours(reader_code(hit, source, "run", plain_look)) == {}


@in_loop
async def test_a_light_terminal_gets_the_light_theme(index: Index, repo: Path) -> None:
    from codeseek.tui.theme import LIGHT_PALETTE

    app = make_app(index, repo, env={"COLORFGBG": "0;15"})
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "issue refund")
        assert app.theme == "codeseek-harbour-light" and not app.current_theme.dark
        drawn = code_colours(app.query_one("#reader-code", Static).content)
        assert drawn and set(drawn) <= set(LIGHT_PALETTE.values())
    dark = make_app(index, repo, env={"COLORFGBG": "15;0"})
    assert dark.theme == "codeseek-harbour"


# -- through a running daemon ---------------------------------------------------------------


@in_loop
async def test_the_ui_searches_through_a_running_daemon(index: Index, repo: Path) -> None:
    from codeseek.daemon import Daemon
    from codeseek.service import connect
    from codeseek.tui.backend import service_state

    daemon = Daemon(index, reconcile_seconds=3600)
    daemon.start()
    try:
        searcher = connect(repo, index_dir=index.settings.index_dir)
        assert searcher.daemon_status() is not None  # the daemon answers, not this process
        app = make_app(searcher, repo)
        async with app.run_test() as pilot:
            await ask(pilot, app, "issue refund")
            # the same answer the library gives in process
            assert [h.unit_id for h in app.hits] == [
                h.unit_id for h in index.search("issue refund", app.k)]
            assert daemon.queries_served >= 1
            near = searcher.neighbours(Query(unit_id=app.hits[0].unit_id, k=5))
            assert [h.unit_id for h in near] == [
                h.unit_id for h in index.neighbours(app.hits[0].unit_id, 5)]
            assert searcher.status().units == index.status().units
            assert service_state(searcher).startswith(f"daemon {os.getpid()} · watching")
    finally:
        daemon.stop()


def test_a_since_word_becomes_a_chip_and_a_time(monkeypatch: pytest.MonkeyPatch) -> None:
    assert take_chips("since=3d refund ") == ("refund ", [("since", "3d")])
    chips = FilterSet().added(("language", "go")).added(("since", "12h"))
    monkeypatch.setattr(time, "time", lambda: 1_800_000_000.0)  # an age counts back from now
    assert chips.as_filters() == Filters(("go",), (), (), 1_800_000_000.0 - 12 * 3600)
    with pytest.raises(InvalidQuery, match="--since wants an ISO date"):
        FilterSet().added(("since", "soon"))


@in_loop
async def test_several_repositories_each_hit_names_its_own(tmp_path: Path) -> None:
    """``ui --repo A --repo B``: the hits of both, each tagged with its repository's
    folder, read and opened from that repository; the index line sums the two."""
    from test_multi import _split_sample

    from codeseek import open_index
    from codeseek.multi import MultiService

    first, second = _split_sample(tmp_path)
    searcher = MultiService([(str(repo.resolve()), open_index(repo, embedder=FakeEmbedder()))
                             for repo in (first, second)])
    script, record = fake_editor(tmp_path, "vi")
    app = make_app(searcher, None, env={"VISUAL": str(script)}, k=40)
    async with app.run_test(size=(120, 40)) as pilot:
        await ask(pilot, app, "issue refund")
        top = app.hits[0]
        assert (top.qualname, top.path, top.repo) == (
            "PaymentService.issue_refund", REFUND_PATH, str(first.resolve()))
        texts = option_texts(app)
        assert f"[first] {REFUND_PATH}:{REFUND_LINE}" in texts[0]
        assert f"[first] {REFUND_PATH}:{REFUND_LINE}-" in reader_text(app)
        # the reader read the file from the hit's own repository (no repo was given)
        assert f"❱ {REFUND_LINE}     def issue_refund(" in code_text(app)
        await ask(pilot, app, "fare for a ride")  # words of both repositories
        assert {h.repo for h in app.hits} == {str(first.resolve()), str(second.resolve())}
        for hit, text in zip(app.hits, option_texts(app), strict=True):
            assert f"[{Path(str(hit.repo)).name}] {hit.path}:{hit.start_line}" in text
        await ask(pilot, app, "issue refund")
        await wait_until(pilot, lambda: app.index_status is not None)
        units = sum(open_index(r, embedder=FakeEmbedder()).status().units
                    for r in (first, second))
        assert plain(app.query_one("#index-text")).startswith(
            f"first + second · {units} units ·")
        await pilot.press("ctrl+o")
        await wait_until(pilot, record.exists)
        assert record.read_text(encoding="utf-8").splitlines() == [
            f"+{REFUND_LINE}", str(first.resolve() / REFUND_PATH)]
        # f3: the neighbours come from the hit's own repository, each naming it
        source = app.hits[0]
        await pilot.press("f3")
        await answered(pilot, app, f"neighbours of {source.qualname}")
        alone = searcher.services[0][1].neighbours(Query(unit_id=source.unit_id, k=40))
        assert [h.unit_id for h in app.hits] == [h.unit_id for h in alone]
        assert {h.repo for h in app.hits} == {str(first.resolve())}
    searcher.close()
