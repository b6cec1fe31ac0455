"""Source text -> :class:`~codeseek.units.CodeUnit` records, with tree-sitter.

One engine serves every language: the spec's query captures definitions
(``@function``, ``@class``) and name-giving scopes (``@scope``) with their
``@name``; the engine qualifies each name by the captured definitions around
it, asks the spec's doc rule for the doc, and cuts the signature at the body.
A file with syntax errors still yields what tree-sitter recovered.
"""

from __future__ import annotations

import re
from collections import Counter
from dataclasses import dataclass
from functools import cache
from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec
from codeseek.units import CodeUnit

if TYPE_CHECKING:
    import tree_sitter

MAX_SIGNATURE_CHARS = 400
_CAPTURE_KINDS = ("function", "class", "scope")
_COMMENT_TYPES = frozenset({"comment", "line_comment", "block_comment"})
_LONE_CR = re.compile(rb"\r(?!\n)")
_BOM = b"\xef\xbb\xbf"


@dataclass(frozen=True)
class ParseResult:
    """The units of one file, and whether tree-sitter met syntax errors."""

    units: tuple[CodeUnit, ...]
    has_errors: bool


@dataclass(frozen=True)
class _Definition:
    node: tree_sitter.Node
    capture: str  # function, class or scope
    name: str


def _key(node: tree_sitter.Node) -> tuple[int, int, int]:
    return (node.start_byte, node.end_byte, node.kind_id)


@cache
def _parser(spec: LanguageSpec) -> tree_sitter.Parser:
    import tree_sitter

    return tree_sitter.Parser(spec.language())


@cache
def _query(spec: LanguageSpec) -> tree_sitter.Query:
    import tree_sitter

    return tree_sitter.Query(spec.language(), spec.query_source())


def parse_source(path: str, source: bytes, spec: LanguageSpec) -> ParseResult:
    """Extract the units of one file's bytes (``path`` is stored, not read)."""
    import tree_sitter

    if spec.cr_newlines and b"\r" in source:
        source = _LONE_CR.sub(b"\n", source)  # same length: byte offsets still hold
    tree = _parser(spec).parse(source)
    root = tree.root_node
    definitions = _collect_definitions(tree_sitter.QueryCursor(_query(spec)), root, source)
    units: list[CodeUnit] = []
    seen: Counter[str] = Counter()
    for definition in sorted(definitions.values(), key=lambda d: d.node.start_byte):
        if definition.capture == "scope":
            continue
        unit = _build_unit(path, source, spec, definition, definitions)
        ordinal = seen[unit.qualname]
        seen[unit.qualname] += 1
        if ordinal:
            unit = CodeUnit(**{**unit.__dict__, "ordinal": ordinal})
        units.append(unit)
    return ParseResult(tuple(units), root.has_error)


def _collect_definitions(
    cursor: tree_sitter.QueryCursor, root: tree_sitter.Node, source: bytes
) -> dict[tuple[int, int, int], _Definition]:
    found: dict[tuple[int, int, int], _Definition] = {}
    for _pattern, captures in cursor.matches(root):
        names = captures.get("name")
        if not names:
            continue
        name_node = names[0]
        for capture in _CAPTURE_KINDS:
            for node in captures.get(capture, []):
                name = source[name_node.start_byte : name_node.end_byte].decode("utf-8", "replace")
                found.setdefault(_key(node), _Definition(node, capture, name))
    return found


def _enclosing(
    node: tree_sitter.Node, definitions: dict[tuple[int, int, int], _Definition]
) -> list[_Definition]:
    """The captured definitions around ``node``, innermost first."""
    chain: list[_Definition] = []
    parent = node.parent
    while parent is not None:
        found = definitions.get(_key(parent))
        if found is not None:
            chain.append(found)
        parent = parent.parent
    return chain


def _build_unit(
    path: str,
    source: bytes,
    spec: LanguageSpec,
    definition: _Definition,
    definitions: dict[tuple[int, int, int], _Definition],
) -> CodeUnit:
    node = definition.node
    chain = _enclosing(node, definitions)
    names = [d.name for d in reversed(chain)]
    receiver = spec.receiver_rule(node, source) if spec.receiver_rule else None
    if receiver:
        names.append(receiver)
    qualname = spec.separator.join([*names, definition.name])
    if definition.capture == "class":
        kind = "class"
    elif node.type in spec.method_types or (
        chain and (chain[0].node.type in spec.class_scopes or chain[0].capture == "class")
    ):
        kind = "method"
    else:
        kind = "function"

    line_start = source.rfind(b"\n", 0, node.start_byte) + 1
    if line_start == 0 and source.startswith(_BOM):
        line_start = len(_BOM)  # the byte-order mark is no part of the code
    end_byte = _content_end(node)
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
        kind=kind,
        name=definition.name,
        qualname=qualname,
        signature=_signature(node, source, spec),
        doc=doc,
        start_line=node.start_point.row + 1,
        end_line=_row_of(source, end_byte) + 1,
        code=code,
        doc_span=doc_span,
    )


def _row_of(source: bytes, end_byte: int) -> int:
    return source.count(b"\n", 0, max(end_byte - 1, 0)) if end_byte else 0


def _content_end(node: tree_sitter.Node) -> int:
    """End of the node's last non-comment descendant (trailing comments excluded)."""
    current = node
    while True:
        children = [c for c in current.children if c.type not in _COMMENT_TYPES]
        if not children:
            return current.end_byte
        current = children[-1]


def _signature(node: tree_sitter.Node, source: bytes, spec: LanguageSpec) -> str:
    start_node = node
    while start_node.parent is not None and start_node.parent.type in spec.wrapper_types:
        start_node = start_node.parent
    body = node.child_by_field_name(spec.body_field)
    if body is None:
        for child in node.named_children:  # an arrow function bound to a name
            body = child.child_by_field_name(spec.body_field)
            if body is not None:
                break
    end = body.start_byte if body is not None and body.start_byte > node.start_byte else None
    if end is None:
        end = source.find(b"\n", node.start_byte)
        end = node.end_byte if end == -1 else min(end, node.end_byte)
    text = source[start_node.start_byte : end].decode("utf-8", "replace")
    text = " ".join(line.strip() for line in text.splitlines() if line.strip())
    text = text.rstrip("{ ").rstrip()
    if len(text) > MAX_SIGNATURE_CHARS:
        text = text[: MAX_SIGNATURE_CHARS - 3] + "..."
    return text
