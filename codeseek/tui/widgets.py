"""The panels of the UI: query line, filter strip, hit list, reader, notice and index line.

Widgets only show things and forward keys; the app owns the state and the
searcher. Their looks live in ``app.tcss``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, ClassVar

from textual import events
from textual.app import ComposeResult
from textual.binding import BindingType
from textual.containers import Horizontal, Vertical, VerticalScroll
from textual.content import Content
from textual.widgets import Button, Input, OptionList, ProgressBar, Static

from codeseek.display import printable
from codeseek.tui.filters import FilterSet, chip_text
from codeseek.tui.keys import bindings_for

if TYPE_CHECKING:
    from codeseek.search import SearchHit

PLACEHOLDER = "ask in plain words, e.g. where do we retry failed uploads"
FILTER_HINT = "type language=go  unit=method  files=src/  to filter"


class QueryLine(Input):
    """The one-line query at the top; filter words typed here become chips."""

    BINDINGS: ClassVar[list[BindingType]] = bindings_for("query")

    def __init__(self) -> None:
        super().__init__(placeholder=PLACEHOLDER, id="query", select_on_focus=False)


class FilterStrip(Static):
    """The active filters as chips, each with a ✕ that removes it."""

    def show(self, filters: FilterSet, near: SearchHit | None) -> None:
        """Render the chips (or a hint when there are none); ``near``: the unit whose
        neighbours are listed."""
        parts: list[Content | str | tuple[str, str]] = [("filters ", "$cs-meta")]
        if near is not None:
            parts.append(_chip(f"near={near.qualname}", "app.drop_near"))
        for position, chip in enumerate(filters.chips):
            parts.append(_chip(chip_text(chip), f"app.drop_filter({position})"))
        if len(parts) == 1:
            parts.append((FILTER_HINT, "$cs-meta italic"))
        self.update(Content.assemble(*parts))


def _chip(label: str, action: str) -> Content:
    chip = Content.assemble(("[", "$cs-meta"), (printable(label), "$cs-chip bold"), " ✕",
                            ("]", "$cs-meta"))
    return chip.stylize(f"@click={action}") + " "


class HitList(OptionList):
    """The ranked hits; a double click opens one."""

    BINDINGS: ClassVar[list[BindingType]] = bindings_for("hits")

    async def on_click(self, event: events.Click) -> None:
        """Open the hit on a double click (a single click only selects it)."""
        if event.chain == 2 and self.highlighted is not None:
            await self.app.run_action("open_hit")


class Notice(Vertical):
    """What to do next when there is nothing to list: start, no index, no matches, errors."""

    def compose(self) -> ComposeResult:
        yield Static(id="notice-text")
        yield Button("Build the index now", id="build-button", compact=True)

    def show(self, text: Content | str, *, offer_build: bool = False) -> None:
        """Show a message, with the build button if asked."""
        self.query_one("#notice-text", Static).update(text)
        self.query_one("#build-button", Button).display = offer_build


class Reader(VerticalScroll):
    """The selected unit: header, doc and highlighted code with line numbers."""

    BINDINGS: ClassVar[list[BindingType]] = bindings_for("reader")

    def compose(self) -> ComposeResult:
        yield Static(id="reader-head")
        yield Static(id="reader-code")


class IndexLine(Horizontal):
    """Counts, freshness, the service state, and a progress bar while indexing."""

    def compose(self) -> ComposeResult:
        yield Static(id="index-text")
        yield ProgressBar(id="index-progress", show_eta=False)

    def show(self, text: str | Content) -> None:
        """Replace the text."""
        self.query_one("#index-text", Static).update(text)

    def progress(self, done: int | None, total: int | None) -> None:
        """Show the bar (None hides it; a total of 0 makes it indeterminate)."""
        bar = self.query_one("#index-progress", ProgressBar)
        bar.display = done is not None
        if done is not None:
            bar.update(total=total or None, progress=done)
