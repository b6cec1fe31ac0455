"""C: function definitions, and structs, unions and enums that have a body
(named by their tag, or by the typedef that names an anonymous one).

The name of a function is the identifier inside its declarator, however
wrapped in pointers and parentheses (``int *(*handler(int))(int)`` is
``handler``). Prototypes (declarations without a body) are not units.

Doc rule: a ``/** */`` or ``/*! */`` block, ``///`` or ``//!`` lines, or plain
comments (a run of ``//`` lines, a ``/* */`` block: much C is documented so)
directly above the definition, with no blank line between. Not a doc: a
licence header at the top of the file, a banner (``/* ---- helpers ---- */``),
and plain comments that are mostly commented-out code.

Nesting: C has no nested functions; GNU nested functions are units qualified
by their parent.
"""

from __future__ import annotations

import re
from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec, Naming
from codeseek.languages.comments import leading_doc_rule

if TYPE_CHECKING:
    import tree_sitter

# Macros the grammar cannot know, in the three places where they derail a parse:
# an export macro between ``class`` and the class name (``class API_EXPORT Dock {``),
# one that opens a declaration (``API_EXPORT Ledger* OpenLedger() {``) and
# annotation macros after a parameter list (``void Post() LOCKS_EXCLUDED(mu) {``).
_MACRO = rb"[A-Z](?=[A-Z0-9]*_)[A-Z0-9_]++(?![a-z])"  # ALL_CAPS with an underscore
_ARGS = rb"(?:[ \t]*+\((?:[^()]|\([^()]*+\))*+\))?+"
_CLASS_HEAD_MACRO = re.compile(
    rb"\b(?:class|struct|union)[ \t]++((?:[A-Z][A-Z0-9_]++(?:\([^()\n]*+\))?+[ \t]++)+)"
    rb"(?=[A-Za-z_][A-Za-z0-9_:]*+[ \t]*+(?:<[^<>{};\n]*+>[ \t]*+)?(?:final[ \t]*+)?[:{\n])"
)
_LEADING_MACRO = re.compile(
    rb"^[ \t]*+(?:(?:static|inline|extern|virtual)[ \t]++)*+(" + _MACRO + _ARGS + rb")[ \t]++"
    rb"(?=[A-Za-z_])",
    re.MULTILINE,
)
_TRAILING_MACRO = re.compile(
    rb"\)\s*+(?:(?:const|noexcept|override|final|volatile|&&?)\s*+)*+"
    rb"((?:\s*+" + _MACRO + _ARGS + rb")++)"
    rb"(?=\s*+(?:\{|;|=|:(?!:)))"
)
_NOT_NEWLINE = re.compile(rb"[^\n]")

_NO_BODY = frozenset({"default_method_clause", "delete_method_clause", "pure_virtual_clause"})
_NAME_TYPES = frozenset({"identifier", "field_identifier", "qualified_identifier",
                         "destructor_name", "operator_name", "operator_cast",
                         "template_function", "type_identifier"})


def doc_marker(text: str) -> bool:
    """A C/C++ doc comment: ``/**``, ``/*!``, ``///``, ``//!``, or a plain ``//`` or ``/* */``."""
    return text.startswith(("/*", "//")) and not text.startswith(("////", "/**/"))


def plain_line(text: str) -> bool:
    """A plain comment, which may be commented-out code rather than a doc."""
    if text.startswith("/*"):
        return not text.startswith(("/**", "/*!"))
    return not text.startswith(("///", "//!"))


def blank_macros(source: bytes) -> bytes:
    """The source with unknowable macro annotations replaced by spaces (offsets hold)."""
    if not (b"class" in source or b"struct" in source or b"union" in source or b")" in source):
        return source
    for pattern in (_CLASS_HEAD_MACRO, _LEADING_MACRO, _TRAILING_MACRO):
        source = pattern.sub(_blank_group, source)
    return source


def _blank_group(match: re.Match[bytes]) -> bytes:
    whole = match.group(0)
    start, end = match.span(1)
    offset = match.start(0)
    blanked = _NOT_NEWLINE.sub(b" ", whole[start - offset : end - offset])
    return whole[: start - offset] + blanked + whole[end - offset :]


def c_naming(
    node: tree_sitter.Node, name_node: tree_sitter.Node | None, source: bytes
) -> Naming | None:
    """Function names from their declarator; type names from their tag or typedef."""
    if node.type == "function_definition":
        if any(child.type in _NO_BODY for child in node.children):
            return None  # "= default" / "= delete": declared, not written here
        target = declared_name(node)
    else:
        target = name_node
    if target is None:
        return None
    *scope, name = split_qualified(target, source)
    return Naming(name, tuple(scope), is_method=True if scope else None)


def declared_name(node: tree_sitter.Node) -> tree_sitter.Node | None:
    """The name node inside a function definition's declarator."""
    current = node.child_by_field_name("declarator")
    while current is not None and current.type not in _NAME_TYPES:
        inner = current.child_by_field_name("declarator")
        if inner is None and current.type in ("parenthesized_declarator", "reference_declarator"):
            inner = current.named_children[-1] if current.named_children else None
        current = inner
    return current


def split_qualified(node: tree_sitter.Node, source: bytes) -> list[str]:
    """``ns::Dock::release`` as ``['ns', 'Dock', 'release']``, template arguments dropped."""
    parts: list[str] = []
    current: tree_sitter.Node | None = node
    while current is not None and current.type == "qualified_identifier":
        scope = current.child_by_field_name("scope")
        if scope is not None:
            parts.append(_base_name(scope, source))
        current = current.child_by_field_name("name")
    if current is not None:
        parts.append(_base_name(current, source))
    return [part for part in parts if part]


def _base_name(node: tree_sitter.Node, source: bytes) -> str:
    if node.type in ("template_type", "template_function"):
        base = node.child_by_field_name("name")
        if base is not None:
            node = base
    if node.type == "operator_cast":  # operator bool() const -> operator bool
        inner = node.child_by_field_name("declarator")
        end = inner.start_byte if inner is not None else node.end_byte
        return " ".join(source[node.start_byte : end].decode("utf-8", "replace").split())
    return "".join(source[node.start_byte : node.end_byte].decode("utf-8", "replace").split())


SPECS = (
    LanguageSpec(
        name="c",
        extensions=(".c",),
        grammar_module="tree_sitter_c",
        grammar_function="language",
        query_file="c.scm",
        doc_rule=leading_doc_rule(accept=doc_marker, plain=plain_line),
        name_rule=c_naming,
        prepare=blank_macros,
    ),
)
