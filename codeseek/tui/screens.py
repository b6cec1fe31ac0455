"""The key list screen, made from the key table."""

from __future__ import annotations

from typing import ClassVar

from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Grid, VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Static

from codeseek.tui.keys import (
    MOUSE_HELP,
    PLACES,
    SCREEN_HELP,
    TYPED_FILTERS,
    bindings_for,
    keys_for,
)

Section = tuple[str, list[tuple[str, str]]]
"""A heading and its (keys, what they do) rows."""


class KeyList(ModalScreen[None]):
    """Every key, grouped by where it works; the typed filters; the marks; the mouse."""

    BINDINGS: ClassVar[list[BindingType]] = bindings_for("help")

    def compose(self) -> ComposeResult:
        with VerticalScroll(id="key-list") as frame:
            frame.border_title = "codeseek keys"
            frame.border_subtitle = "esc to close"
            for title, rows in self.sections():
                yield Static(title, classes="key-heading")
                with Grid(classes="key-grid"):
                    for keys, text in rows:
                        yield Static(keys, classes="key-name", markup=False)
                        yield Static(text, classes="key-what", markup=False)

    def sections(self) -> list[Section]:
        """The whole list: keys by place, typed filters, the screen's marks, the mouse."""
        sections: list[Section] = []
        for where, title in PLACES.items():
            rows = [(" ".join(self._display(name) for name in key.keys.split(",")), key.help)
                    for key in keys_for(where)]
            sections.append((title, rows))
        sections.append(("Typed in the query line", list(TYPED_FILTERS)))
        sections.append(("On the screen", list(SCREEN_HELP)))
        sections.append(("Mouse", list(MOUSE_HELP)))
        return sections

    def _display(self, key: str) -> str:
        return self.app.get_key_display(Binding(key, ""))

    def action_close(self) -> None:
        """Close the key list."""
        self.dismiss(None)
