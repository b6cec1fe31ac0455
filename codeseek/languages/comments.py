"""Doc comments written *above* a definition (every language but Python).

A doc is the run of comments directly above the definition (or above its
wrapper: ``export``, decorators), each on the line right above the next, with
no blank line between the run and the definition. Which comments count is the
language's convention (``/**`` for JSDoc, ``//`` for Go, ``///`` for Rust).
Attribute-like nodes between the doc and the definition (Rust ``#[...]``) are
stepped over.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Collection
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import tree_sitter

_BLOCK_OPEN = re.compile(r"^/\*+!?")
_BLOCK_CLOSE = re.compile(r"\*+/$")
_LINE_MARK = re.compile(r"^(///?!?|#+)\s?")
_STAR = re.compile(r"^\s*\*(?!/) ?")


def clean_comment(text: str) -> str:
    """A comment's text without its markers and the leading ``*`` of block lines."""
    text = text.strip()
    if text.startswith("/*"):
        body = _BLOCK_CLOSE.sub("", _BLOCK_OPEN.sub("", text))
        lines = [_STAR.sub("", line).rstrip() for line in body.splitlines()]
    else:
        lines = [_LINE_MARK.sub("", line.strip()).rstrip() for line in text.splitlines()]
    while lines and not lines[0].strip():
        lines.pop(0)
    while lines and not lines[-1].strip():
        lines.pop()
    return dedent_lines(lines)


def dedent_lines(lines: list[str]) -> str:
    """Join lines after removing their common indentation."""
    indents = [len(line) - len(line.lstrip()) for line in lines if line.strip()]
    cut = min(indents, default=0)
    return "\n".join(line[cut:] for line in lines)


def leading_doc_rule(
    accept: Callable[[str], bool],
    comment_types: Collection[str] = ("comment",),
    skip_types: Collection[str] = (),
    wrapper_types: Collection[str] = (),
) -> Callable[[tree_sitter.Node, bytes], tuple[str, tuple[int, int] | None]]:
    """A doc rule that reads the accepted comments directly above a definition."""

    def rule(node: tree_sitter.Node, source: bytes) -> tuple[str, tuple[int, int] | None]:
        anchor = node
        while anchor.parent is not None and anchor.parent.type in wrapper_types:
            anchor = anchor.parent
        top_row = anchor.start_point.row
        sibling = anchor.prev_sibling
        while sibling is not None and sibling.type in skip_types:
            top_row = sibling.start_point.row
            sibling = sibling.prev_sibling
        pieces: list[str] = []
        while sibling is not None and sibling.type in comment_types:
            if sibling.end_point.row < top_row - 1:
                break  # a blank line breaks the pairing
            if sibling.end_point.row == top_row and sibling.start_point.row == top_row:
                break  # a trailing comment on the line above's code, not a doc
            text = source[sibling.start_byte : sibling.end_byte].decode("utf-8", "replace")
            if not accept(text):
                break
            pieces.append(text)
            top_row = sibling.start_point.row
            sibling = sibling.prev_sibling
        if not pieces:
            return "", None
        pieces.reverse()
        cleaned = [clean_comment(p) for p in pieces]
        return "\n".join(c for c in cleaned if c is not None).strip(), None

    return rule
