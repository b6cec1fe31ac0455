"""Source text -> :class:`~codeseek.units.CodeUnit` records, with tree-sitter.

One engine serves every language: the spec's query captures definitions
(``@function``, ``@class``), name-giving scopes (``@scope``) and containers
whose definitions stay inside their parent (``@inline``), with their
``@name``; the engine qualifies each name by the captured definitions around
it, asks the spec's doc rule for the doc, and cuts the signature at the body.
A file with syntax errors still yields what tree-sitter recovered.

Each file has a parse time budget: a pathological file (tree-sitter's error
recovery can take very long on some inputs) is abandoned with
:class:`ParseBudgetExceeded`, a :class:`~codeseek.scan.SkipFile` whose reason
is counted like any other file left out. Definitions nested deeper than
:data:`MAX_NESTING` captured definitions stay inside their ancestor, so
deeply nested input cannot make the unit list grow with the square of its size.
"""

from __future__ import annotations

import re
import threading
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from functools import cache
from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec, Naming
from codeseek.scan import REASON_PARSE_BUDGET, SkipFile
from codeseek.units import CodeUnit

if TYPE_CHECKING:
    import tree_sitter

MAX_SIGNATURE_CHARS = 400
PARSE_BUDGET_SECONDS = 5.0
"""Wall-clock seconds one file may take; a 1 MiB file normally parses in well under one."""
MAX_NESTING = 32
_CAPTURE_KINDS = ("function", "class", "scope")
_COMMENT_TYPES = frozenset({"comment", "line_comment", "block_comment"})
_LONE_CR = re.compile(rb"\r(?!\n)")
_BOM = b"\xef\xbb\xbf"
_READ_CHUNK = 1 << 16

Clock = Callable[[], float]


class ParseBudgetExceeded(SkipFile):
    """A file took longer than its parse budget; ``args[0]`` is the skip reason."""


@dataclass(frozen=True)
class ParseResult:
    """The units of one file, and whether tree-sitter met syntax errors."""

    units: tuple[CodeUnit, ...]
    has_errors: bool


@dataclass(frozen=True)
class _Definition:
    node: tree_sitter.Node
    capture: str  # function, class or scope
    naming: Naming

    @property
    def parts(self) -> tuple[str, ...]:
        """What this definition adds to the names inside it."""
        return (*self.naming.qualifier, self.naming.name)


def _key(node: tree_sitter.Node) -> tuple[int, int, int]:
    return (node.start_byte, node.end_byte, node.kind_id)


_PARSERS = threading.local()  # a tree-sitter parser is not safe to share between threads


def _parser(spec: LanguageSpec) -> tree_sitter.Parser:
    """This thread's parser for the language (two daemons' watchers, or a watcher and
    a build, parse at once; one shared parser crashed the process)."""
    import tree_sitter

    parsers: dict[LanguageSpec, tree_sitter.Parser] = _PARSERS.__dict__.setdefault("by", {})
    parser = parsers.get(spec)
    if parser is None:
        parser = parsers[spec] = tree_sitter.Parser(spec.language())
    return parser


@cache
def _query(spec: LanguageSpec) -> tree_sitter.Query:
    import tree_sitter

    return tree_sitter.Query(spec.language(), spec.query_source())


class _Deadline:
    """The file's time budget, checked by tree-sitter's progress callback and between stages."""

    def __init__(self, path: str, budget: float, clock: Clock) -> None:
        self.path = path
        self.clock = clock
        self.until = clock() + budget

    def passed(self, *_: object) -> bool:
        return self.clock() > self.until

    def check(self) -> None:
        if self.passed():
            raise ParseBudgetExceeded(REASON_PARSE_BUDGET, self.path)


def parse_source(
    path: str,
    source: bytes,
    spec: LanguageSpec,
    *,
    budget: float | None = None,
    clock: Clock = time.monotonic,
) -> ParseResult:
    """Extract the units of one file's bytes (``path`` is stored, not read).

    Raises :class:`ParseBudgetExceeded` when the file takes longer than
    ``budget`` seconds (default :data:`PARSE_BUDGET_SECONDS`) by ``clock``.
    """
    import tree_sitter

    if spec.cr_newlines and b"\r" in source:
        source = _LONE_CR.sub(b"\n", source)  # same length: byte offsets still hold
    deadline = _Deadline(path, PARSE_BUDGET_SECONDS if budget is None else budget, clock)
    readable = spec.prepare(source) if spec.prepare is not None else source
    root = _parse_tree(spec, readable, deadline).root_node
    deadline.check()
    captures, inline = _collect(tree_sitter.QueryCursor(_query(spec)), root)
    deadline.check()
    namer = _Namer(spec, source, deadline)
    units: list[CodeUnit] = []
    seen: Counter[str] = Counter()
    for capture, chain in _nest(captures, inline):
        definition = namer.definition(capture) if capture.kind != "scope" else None
        if definition is None:
            continue
        outer = [d for d in map(namer.definition, chain) if d is not None]
        unit = _build_unit(path, source, spec, definition, outer)
        ordinal = seen[unit.qualname]
        seen[unit.qualname] += 1
        if ordinal:
            unit = CodeUnit(**{**unit.__dict__, "ordinal": ordinal})
        units.append(unit)
    return ParseResult(tuple(units), root.has_error)


def _parse_tree(spec: LanguageSpec, source: bytes, deadline: _Deadline) -> tree_sitter.Tree:
    """The syntax tree, or ParseBudgetExceeded when tree-sitter runs past the deadline."""
    parser = _parser(spec)

    def read(offset: int, _point: object) -> bytes:
        return source[offset : offset + _READ_CHUNK]

    try:
        tree = parser.parse(read, progress_callback=deadline.passed)
    except ValueError:  # py-tree-sitter reports a halted parse as "Parsing failed"
        tree = None
    if tree is None:
        parser.reset()  # else the next parse would resume this one
        raise ParseBudgetExceeded(REASON_PARSE_BUDGET, deadline.path)
    return tree


@dataclass(frozen=True)
class _Capture:
    node: tree_sitter.Node
    kind: str  # function, class or scope
    name_node: tree_sitter.Node | None


def _collect(
    cursor: tree_sitter.QueryCursor, root: tree_sitter.Node
) -> tuple[list[_Capture], list[tree_sitter.Node]]:
    """The captured definitions in source order (outer first), and the @inline containers."""
    found: dict[tuple[int, int, int], _Capture] = {}
    inline: list[tree_sitter.Node] = []
    for _pattern, captures in cursor.matches(root):
        inline.extend(captures.get("inline", []))
        names = captures.get("name")
        name_node = names[0] if names else None
        for kind in _CAPTURE_KINDS:
            for node in captures.get(kind, []):
                found.setdefault(_key(node), _Capture(node, kind, name_node))
    ordered = sorted(found.values(), key=lambda c: (c.node.start_byte, -c.node.end_byte))
    return ordered, inline


class _Namer:
    """Names captured definitions once each (a name rule may walk up the tree).

    Asking a node for its parent costs time in proportion to its depth, so the
    deadline is checked for every definition named.
    """

    def __init__(self, spec: LanguageSpec, source: bytes, deadline: _Deadline) -> None:
        self.spec = spec
        self.source = source
        self.deadline = deadline
        self.named: dict[tuple[int, int, int], _Definition | None] = {}

    def definition(self, capture: _Capture) -> _Definition | None:
        key = _key(capture.node)
        if key not in self.named:
            self.deadline.check()
            naming = _naming(self.spec, capture.node, capture.name_node, self.source)
            self.named[key] = (
                _Definition(capture.node, capture.kind, naming)
                if naming is not None and naming.name else None
            )
        return self.named[key]


def _naming(
    spec: LanguageSpec, node: tree_sitter.Node, name_node: tree_sitter.Node | None, source: bytes
) -> Naming | None:
    if spec.name_rule is not None:
        return spec.name_rule(node, name_node, source)
    if name_node is None:
        return None
    return Naming(source[name_node.start_byte : name_node.end_byte].decode("utf-8", "replace"))


def _nest(
    captures: list[_Capture], inline: list[tree_sitter.Node]
) -> list[tuple[_Capture, list[_Capture]]]:
    """Each capture with the captures around it (innermost first), in source order.

    One sweep with a stack of open captures: captured nodes nest as their byte
    ranges do. Captures inside an ``@inline`` container, or nested deeper than
    MAX_NESTING, are left out.
    """
    inline_spans = sorted((n.start_byte, n.end_byte) for n in inline)
    result: list[tuple[_Capture, list[_Capture]]] = []
    stack: list[_Capture] = []
    span_index = 0
    open_spans: list[int] = []  # end bytes of the inline containers we are inside
    for capture in captures:
        start, end = capture.node.start_byte, capture.node.end_byte
        while stack and stack[-1].node.end_byte <= start:
            stack.pop()
        while span_index < len(inline_spans) and inline_spans[span_index][0] <= start:
            open_spans.append(inline_spans[span_index][1])
            span_index += 1
        open_spans = [span_end for span_end in open_spans if span_end >= end]
        if open_spans or len(stack) >= MAX_NESTING:
            continue
        result.append((capture, stack[::-1]))
        stack.append(capture)
    return result


def _qualname(spec: LanguageSpec, definition: _Definition, chain: list[_Definition]) -> str:
    prefix = [part for outer in reversed(chain) for part in outer.parts]
    prefix.extend(definition.naming.qualifier)
    name = definition.naming.name
    if not prefix:
        return name
    joiner = definition.naming.member_separator or spec.separator
    return spec.separator.join(prefix) + joiner + name


def _kind(spec: LanguageSpec, definition: _Definition, chain: list[_Definition]) -> str:
    if definition.capture == "class":
        return "class"
    if definition.naming.is_method is not None:
        return "method" if definition.naming.is_method else "function"
    if chain and (
        chain[0].capture == "class"
        or (chain[0].capture == "scope" and chain[0].node.type in spec.class_scopes)
    ):
        return "method"
    return "function"


def _build_unit(
    path: str,
    source: bytes,
    spec: LanguageSpec,
    definition: _Definition,
    chain: list[_Definition],
) -> CodeUnit:
    node = definition.node
    first = spec.start_rule(node) if spec.start_rule else node
    start_byte = first.start_byte
    line_start = source.rfind(b"\n", 0, start_byte) + 1
    if line_start == 0 and source.startswith(_BOM):
        line_start = len(_BOM)  # the byte-order mark is no part of the code
    last = _content_end(node)
    end_byte = last.end_byte
    code = source[line_start:end_byte].decode("utf-8", "replace")
    doc, doc_bytes = spec.doc_rule(node, source)
    doc_span = None
    if doc_bytes is not None:
        start = len(source[line_start : doc_bytes[0]].decode("utf-8", "replace"))
        end = start + len(source[doc_bytes[0] : doc_bytes[1]].decode("utf-8", "replace"))
        doc_span = (start, end)
    return CodeUnit(
        path=path,
        language=spec.name,
        kind=_kind(spec, definition, chain),
        name=definition.naming.name,
        qualname=_qualname(spec, definition, chain),
        signature=_signature(node, source, spec),
        doc=doc,
        start_line=first.start_point.row + 1,
        end_line=_end_row(last) + 1,
        code=code,
        doc_span=doc_span,
    )


def _end_row(node: tree_sitter.Node) -> int:
    """The row of the node's last character (a node may end just after a line feed)."""
    row = node.end_point.row
    if node.end_point.column == 0 and row > node.start_point.row:
        row -= 1
    return row


def _content_end(node: tree_sitter.Node) -> tree_sitter.Node:
    """The node's last non-comment descendant (trailing comments excluded)."""
    current = node
    while True:
        children = [c for c in current.children if c.type not in _COMMENT_TYPES]
        if not children:
            return current
        current = children[-1]


def _signature(node: tree_sitter.Node, source: bytes, spec: LanguageSpec) -> str:
    start_node = node
    while start_node.parent is not None and start_node.parent.type in spec.wrapper_types:
        start_node = start_node.parent
    body = _body(node, spec)
    end = body.start_byte if body is not None and body.start_byte > node.start_byte else None
    comment = next((c for c in node.children if c.type in _COMMENT_TYPES), None)
    if comment is not None and end is not None and comment.start_byte < end:
        end = comment.start_byte  # a comment between the header and the body (Ruby)
    if end is None:
        end = source.find(b"\n", node.start_byte)
        end = node.end_byte if end == -1 else min(end, node.end_byte)
    text = source[start_node.start_byte : end].decode("utf-8", "replace")
    text = " ".join(line.strip() for line in text.splitlines() if line.strip())
    text = text.rstrip("{ ").rstrip()
    if len(text) > MAX_SIGNATURE_CHARS:
        text = text[: MAX_SIGNATURE_CHARS - 3] + "..."
    return text


def _body(node: tree_sitter.Node, spec: LanguageSpec) -> tree_sitter.Node | None:
    """The node's body, or the body of the function bound to it (``const f = () => {}``,
    ``const Card = memo(function Card() {...})``)."""
    candidates = [node, *node.named_children]
    for child in node.named_children:
        arguments = child.child_by_field_name("arguments")
        if arguments is not None:
            candidates.extend(arguments.named_children)
    for candidate in candidates:
        body = candidate.child_by_field_name(spec.body_field)
        if body is not None:
            return body
    return None
