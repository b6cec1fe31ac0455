"""Doc comments written *above* a definition (every language but Python).

A doc is the run of comments directly above the definition, each on the line
right above the next, with no blank line between the run and the definition.
The search starts at the definition itself and then at each wrapper around it
(``export``, ``template<...>``, a Go ``type`` group), so a doc above an
``export`` belongs to the function it exports. Which comments count is the
language's convention (``/**`` for JSDoc, ``//`` for Go, ``///`` for Rust);
attribute-like nodes between the doc and the definition (Rust ``#[...]``, TS
decorators) are stepped over, and so are tool directives (``//go:noinline``,
``// eslint-disable-next-line``, ``# rubocop:disable``), which are never doc
text. Never a doc: a comment that ends code on its line, a licence header at
the top of the file, a banner (``/* ---- helpers ---- */``), and a run of
plain comments that is mostly commented-out code.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Collection
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import tree_sitter

_BLOCK_OPEN = re.compile(r"^/\*+!?")
_BLOCK_CLOSE = re.compile(r"\*+/$")
_LINE_MARK = re.compile(r"^(///?!?|#+)\s?")
_STAR = re.compile(r"^\s*\*(?!/) ?")
_PLAIN_MARK = re.compile(r"^(?://|#) ?")
_BANNER = re.compile(r"^[-=*#~_/+]{3,}|[-=*#~_/+]{3,}$")

_LICENCE = re.compile(
    r"copyright|\(c\)\s*\d{4}|\blicen[cs]ed?\b|spdx-license-identifier|all rights reserved",
    re.IGNORECASE,
)
_DIRECTIVE = re.compile(
    r"""^(?:
        //go:\w | //line\s | //export\s | //extern\s | //\s*\+build\s
      | //\s*(?:nolint|NOLINT|eslint-|@ts-|prettier-ignore|istanbul\s|c8\s|biome-ignore
               |noinspection|NOSONAR|clang-format\s|IWYU\s)
      | /\*\s*(?:eslint|istanbul\s|c8\s|global\s|jshint|prettier-ignore|@__PURE__)
      | \#\s*(?:rubocop:|frozen_string_literal:|typed:|encoding:|coding[:=]|-\*-|warn_indent:
               |shareable_constant_value:|:nocov:|:nodoc:)
      | \#!
    )""",
    re.VERBOSE,
)
# A line of a plain comment that reads as code rather than prose.
_CODE_LINE = re.compile(
    r"""(
        [;{}]\s*$                                         # ends a statement or opens a block
      | ^\s*[}{)\]]                                       # closes a block
      | ^\s*(?:end|else|begin|rescue|ensure)\s*$          # Ruby block keywords alone
      | ^\s*(?:def|fn|func)\s+[\w.?!=]+\s*(?:\(.*)?$      # a definition header
      | ^\s*(?:class|module|struct)\s+[A-Z]\w*\s*(?:[<{:(].*)?$
      | ^\s*(?:return|if|for|while|switch|elif|elsif|unless)\b.*[);:{]\s*$
      | ^\s*\#\s*(?:include|define|if|ifdef|ifndef|endif)\b   # preprocessor lines
      | ^\s*[A-Za-z_][\w.\[\]>-]*\s*(?::=|[-+*/|&]?=)\s*[^=\s].*$  # an assignment
      | ^\s*[A-Za-z_][\w.]*\([^)]*\)\s*;?\s*$             # a bare call
    )""",
    re.VERBOSE,
)


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


def is_directive(text: str) -> bool:
    """Whether a comment is a tool directive (``//go:build``, ``# rubocop:disable``)."""
    return _DIRECTIVE.match(text.strip()) is not None


def looks_like_code(texts: list[str]) -> bool:
    """Whether plain comment lines are mostly commented-out code.

    Only lines at the comment's own margin count: docs indent their code
    examples (a Go doc's tab-indented block), while commented-out code starts
    at the margin, its nested lines indented below its first.
    """
    margin = [line for line in _comment_lines(texts) if line.strip() and line == line.lstrip()]
    code = sum(1 for line in margin if _CODE_LINE.search(line))
    return code * 2 > len(margin)


def _comment_lines(texts: list[str]) -> list[str]:
    """The lines of plain comments with their markers (and one following space) removed."""
    lines: list[str] = []
    for text in texts:
        if text.lstrip().startswith("/*"):
            lines.extend(clean_comment(text).splitlines())
            continue
        for line in text.splitlines():
            lines.append(_PLAIN_MARK.sub("", line.strip(), count=1).rstrip())
    return lines


def is_banner(text: str) -> bool:
    """Whether a comment is a decoration (``/* ---- helpers ---- */``), not prose."""
    return _BANNER.search(clean_comment(text).strip()) is not None


@dataclass(frozen=True)
class _Piece:
    """A comment of a run: its text and where it starts."""

    text: str
    start_byte: int


@dataclass(frozen=True)
class DocStyle:
    """One language's doc-comment convention.

    Attributes:
        accept: whether a comment's text is a doc comment of this language.
        plain: whether an accepted comment is a plain one (Go ``//``, C ``//``,
            Ruby ``#``) that may be commented-out code, not an explicit doc
            marker (``/**``, ``///``).
        comment_types: node types of comments in the grammar.
        skip_types: nodes allowed between the doc and the definition.
        wrapper_types: parents that belong to the definition.
    """

    accept: Callable[[str], bool]
    plain: Callable[[str], bool]
    comment_types: frozenset[str]
    skip_types: frozenset[str]
    wrapper_types: frozenset[str]


def leading_doc_rule(
    accept: Callable[[str], bool],
    comment_types: Collection[str] = ("comment",),
    skip_types: Collection[str] = (),
    wrapper_types: Collection[str] = (),
    plain: Callable[[str], bool] = lambda text: False,
) -> Callable[[tree_sitter.Node, bytes], tuple[str, tuple[int, int] | None]]:
    """A doc rule that reads the accepted comments directly above a definition."""
    style = DocStyle(accept, plain, frozenset(comment_types), frozenset(skip_types),
                     frozenset(wrapper_types))

    def rule(node: tree_sitter.Node, source: bytes) -> tuple[str, tuple[int, int] | None]:
        return leading_doc(node, source, style), None

    return rule


def leading_doc(node: tree_sitter.Node, source: bytes, style: DocStyle) -> str:
    """The cleaned doc above ``node`` (or above a wrapper of it), or ``""``."""
    for anchor in _anchors(node, style.wrapper_types):
        run = _comment_run(anchor, source, style)
        if run:
            texts = _drop_licence(run, source)
            plain = [text for text in texts if style.plain(text)]
            if not texts or (plain and looks_like_code(plain)):
                return ""
            return "\n".join(clean_comment(text) for text in texts).strip()
    return ""


def _anchors(node: tree_sitter.Node, wrapper_types: frozenset[str]) -> list[tree_sitter.Node]:
    """The definition, then each wrapper around it, innermost first.

    A parent that starts where its first child starts (a Ruby body holding the
    class) is a wrapper too: comments above it are above the child.
    """
    anchors = [node]
    current = node
    while current.parent is not None and (
        current.parent.type in wrapper_types or current.parent.start_byte == current.start_byte
    ):
        current = current.parent
        anchors.append(current)
    return anchors


def _comment_run(anchor: tree_sitter.Node, source: bytes, style: DocStyle) -> list[_Piece]:
    """The accepted comments directly above ``anchor``, top first (directives left out)."""
    top_row = anchor.start_point.row
    sibling = anchor.prev_sibling
    while sibling is not None and sibling.type in style.skip_types:
        top_row = sibling.start_point.row
        sibling = sibling.prev_sibling
    run: list[_Piece] = []
    while sibling is not None and sibling.type in style.comment_types:
        if sibling.end_point.row < top_row - 1 or not _starts_line(sibling, source):
            break  # a blank line, or a comment that ends a line of code
        text = _text(sibling, source)
        if not is_directive(text):
            if not style.accept(text) or is_banner(text):
                break
            run.append(_Piece(text, sibling.start_byte))
        top_row = sibling.start_point.row
        sibling = sibling.prev_sibling
    run.reverse()
    return run


def _drop_licence(run: list[_Piece], source: bytes) -> list[str]:
    """The texts of a run without a licence header that opens the file."""
    texts = [piece.text for piece in run]
    for index, piece in enumerate(run):
        if _LICENCE.search(piece.text) and _only_comments_before(source, piece.start_byte):
            texts = [p.text for p in run[index + 1 :]]
    return texts


_COMMENT_OR_SPACE = re.compile(
    rb"(?:\s+|//[^\n]*|/\*.*?\*/|\#[^\n]*|--[^\n]*)*", re.DOTALL
)


def _only_comments_before(source: bytes, offset: int) -> bool:
    """Whether nothing but comments and blank space comes before ``offset``."""
    head = source[:offset]
    match = _COMMENT_OR_SPACE.match(head)
    return match is not None and match.end() == len(head)


def _starts_line(node: tree_sitter.Node, source: bytes) -> bool:
    line_start = source.rfind(b"\n", 0, node.start_byte) + 1
    return not source[line_start : node.start_byte].strip()


def _text(node: tree_sitter.Node, source: bytes) -> str:
    return source[node.start_byte : node.end_byte].decode("utf-8", "replace")
