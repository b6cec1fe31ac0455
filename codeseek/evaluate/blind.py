"""Name-blind queries: a held-out doc with every name its unit's code uses taken out.

A doc often repeats the names of its code ("Drain the upload queue" above
``drain_upload_queue``), and keyword search rewards that repetition. The
name-blind protocol removes from the query every word that is an identifier
of the unit or a split word of one (``snake_case`` and ``camelCase`` parts),
compared without case, so what is left is what the doc says in its own words.

The identifiers are the unit's name, the parts of its qualified name, and the
identifier tokens of its code without the doc: the named leaves whose
tree-sitter type is an identifier (``identifier``, ``property_identifier``,
``type_identifier``, ...; Ruby's ``constant`` too), so keywords, strings and
comments are not names. A language without a grammar here, or code the
grammar cannot read, falls back to every identifier-like word of the code.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from typing import TYPE_CHECKING

from codeseek.errors import UnsupportedLanguage
from codeseek.units import CodeUnit, split_identifier

if TYPE_CHECKING:
    import tree_sitter

_IDENTIFIER_LIKE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_QUERY_TOKEN = re.compile(r"[A-Za-z0-9_]+")
_QUALIFIERS = re.compile(r"[^A-Za-z0-9_]+")
_NAME_TYPES = frozenset({"constant"})  # Ruby's class and constant names


def _tree_identifiers(unit: CodeUnit) -> list[str] | None:
    """The identifier tokens of the unit's doc-less code, or None without a grammar."""
    from codeseek.languages import spec_by_name
    from codeseek.parse import _parser

    try:
        spec = spec_by_name(unit.language)
    except UnsupportedLanguage:
        return None
    source = unit.code_without_doc.encode("utf-8", "surrogatepass")
    readable = spec.prepare(source) if spec.prepare is not None else source  # moves no byte
    try:
        tree = _parser(spec).parse(readable)
    except (ValueError, RuntimeError):
        return None
    return [source[node.start_byte:node.end_byte].decode("utf-8", "replace")
            for node in _leaves(tree.root_node)
            if node.is_named and (node.type.endswith("identifier") or node.type in _NAME_TYPES)]


def _leaves(root: tree_sitter.Node) -> Iterator[tree_sitter.Node]:
    stack = [root]
    while stack:
        node = stack.pop()
        children = node.children
        if not children:
            yield node
        stack.extend(reversed(children))


def unit_identifiers(unit: CodeUnit) -> set[str]:
    """Every identifier of a unit (name, qualified-name parts, code's identifier tokens)."""
    names = {unit.name, *_QUALIFIERS.split(unit.qualname)}
    tokens = _tree_identifiers(unit)
    if tokens is None:
        tokens = _IDENTIFIER_LIKE.findall(unit.code_without_doc)
    names.update(tokens)
    return {name for name in names if name}


def blind_words(unit: CodeUnit) -> frozenset[str]:
    """The lower-cased words a name-blind query must not hold: identifiers and split words."""
    words: set[str] = set()
    for name in unit_identifiers(unit):
        words.add(name.lower())
        words.update(split_identifier(name))
    return frozenset(words)


def name_blind_query(query: str, unit: CodeUnit) -> str:
    """The query without any word that names something in the unit's code.

    A compound word of the query (``upload_queue``) is removed when it is an
    identifier, and otherwise loses those of its split words that are.
    """
    banned = blind_words(unit)

    def keep(match: re.Match[str]) -> str:
        token = match.group()
        if token.lower() in banned:
            return ""
        parts = split_identifier(token)
        if len(parts) <= 1:
            return token
        return " ".join(part for part in parts if part not in banned)

    return " ".join(_QUERY_TOKEN.sub(keep, query).split())
