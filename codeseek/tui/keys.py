"""Every key of the UI in one table: the bindings and the help screen are made from it.

A key is bound in one place (``where``): ``anywhere``, the ``query`` line, the
``hits`` list, the ``reader`` or the ``help`` screen. The help screen lists
this table, so a key cannot be bound without being documented.

Keys bound ``anywhere`` also reach the query line, so they keep clear of the
usual line-editing keys of a terminal's line editor (``ctrl+a/e/b/f/n/p``,
``ctrl+d/h/k/u/w/y/t/l``): the actions of the UI that would have taken a
control key are on function keys (and single letters in the hit list).
"""

from __future__ import annotations

from dataclasses import dataclass

from textual.binding import Binding, BindingType

PLACES = {
    "anywhere": "Anywhere",
    "query": "In the query line",
    "hits": "In the hit list",
    "reader": "In the reader",
    "help": "On this screen",
}


@dataclass(frozen=True)
class Key:
    """One key: where it works, the action it runs, its footer label and its help line."""

    where: str
    keys: str
    action: str
    label: str
    help: str
    show: bool = False
    priority: bool = False

    def binding(self) -> Binding:
        """The textual binding."""
        return Binding(self.keys, self.action, self.label, show=self.show,
                       priority=self.priority)


KEYS: tuple[Key, ...] = (
    Key("anywhere", "ctrl+q", "quit", "quit", "quit codeseek", show=True, priority=True),
    Key("anywhere", "f1", "help", "help", "show this list of keys", show=True),
    Key("anywhere", "question_mark", "help", "help",
        "show this list of keys (in the query line: when it is empty)"),
    Key("anywhere", "q", "quit", "quit", "quit (outside the query line)"),
    Key("anywhere", "slash", "to_query", "query", "go to the query line (outside it)"),
    Key("anywhere", "ctrl+o", "open_hit", "open",
        "open the selected unit in $VISUAL or $EDITOR at its line", show=True),
    Key("anywhere", "f2", "copy_place", "copy",
        "copy path:line of the selected unit", show=True),
    Key("anywhere", "f3", "neighbours", "neighbours",
        "neighbours: the units whose meaning is nearest the selected one", show=True),
    Key("anywhere", "f4", "cycle_language", "language",
        "filter by the next language of the index (then none)", show=True),
    Key("anywhere", "f5", "cycle_unit", "unit",
        "filter by the next unit kind: function, method, class (then none)", show=True),
    Key("anywhere", "ctrl+g", "clear_filters", "unfilter", "remove every filter"),
    Key("anywhere", "ctrl+r", "reindex", "reindex",
        "build or refresh the index in the background", show=True),
    Key("query", "enter", "app.search_now", "search", "search now and go to the hit list"),
    Key("query", "down", "app.to_hits", "hits", "go to the hit list"),
    Key("query", "escape", "app.to_hits", "hits", "leave the query line (then q quits)"),
    Key("query", "backspace", "app.erase", "erase",
        "delete left; on an empty line, remove the last filter"),
    Key("hits", "down,j", "cursor_down", "down", "next hit"),
    Key("hits", "up,k", "cursor_up", "up", "previous hit"),
    Key("hits", "pagedown", "page_down", "page down", "a page of hits down"),
    Key("hits", "pageup", "page_up", "page up", "a page of hits up"),
    Key("hits", "home", "first", "first", "first hit"),
    Key("hits", "end", "last", "last", "last hit"),
    Key("hits", "enter,o", "app.open_hit", "open", "open the hit in your editor"),
    Key("hits", "y", "app.copy_place", "copy", "copy path:line"),
    Key("hits", "n", "app.neighbours", "neighbours", "the selected unit's neighbours"),
    Key("hits", "l", "app.cycle_language", "language", "next language filter"),
    Key("hits", "u", "app.cycle_unit", "unit", "next unit filter"),
    Key("hits", "x", "app.clear_filters", "unfilter", "remove every filter"),
    Key("hits", "tab", "app.focus_next", "reader", "go to the reader"),
    Key("hits", "escape,slash,i", "app.to_query", "query", "back to the query line"),
    Key("reader", "down,j", "scroll_down", "down", "scroll down"),
    Key("reader", "up,k", "scroll_up", "up", "scroll up"),
    Key("reader", "pagedown", "page_down", "page down", "scroll a page down"),
    Key("reader", "pageup", "page_up", "page up", "scroll a page up"),
    Key("reader", "home", "scroll_home", "top", "to the top"),
    Key("reader", "end", "scroll_end", "bottom", "to the bottom"),
    Key("reader", "escape,slash,i", "app.to_query", "query", "back to the query line"),
    Key("help", "escape,q,f1,question_mark", "close", "close", "close this screen"),
)

MOUSE_HELP: tuple[tuple[str, str], ...] = (
    ("click a hit", "read it in the reader"),
    ("double-click a hit", "open it in your editor"),
    ("click ✕ on a filter", "remove that filter"),
    ("wheel", "scroll the hit list or the reader"),
)

TYPED_FILTERS: tuple[tuple[str, str], ...] = (
    ("language=NAME ", "only this language, e.g. language=go"),
    ("unit=KIND ", "only functions, methods or classes, e.g. unit=method"),
    ("files=GLOB ", "only files matching a gitignore-style pattern, e.g. files=billing/"),
)

SCREEN_HELP: tuple[tuple[str, str], ...] = (
    ("▰▰▰▱▱", "the match bar of a hit: how near its meaning is to the query "
              "(the cosine of the two, one cell a fifth)"),
    ("words", "in place of the bar: the hit matched the query's words only, "
              "not its meaning"),
    ("❱ 104", "the row marker in the reader: this line shares a word with the query"),
    ("near=NAME", "the chip while the neighbours of NAME are listed (✕ or backspace "
                  "leaves them)"),
)


def bindings_for(where: str) -> list[BindingType]:
    """The bindings of one place."""
    return [key.binding() for key in KEYS if key.where == where]


def keys_for(where: str) -> list[Key]:
    """The table rows of one place."""
    return [key for key in KEYS if key.where == where]
