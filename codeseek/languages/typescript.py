"""TypeScript and TSX: as JavaScript, plus interfaces (their method signatures
are methods), abstract classes and methods, enums, and namespaces, which
qualify the names inside them (``Billing.refund``). TSX components are
functions or arrow functions bound to a name, like any other.

Doc rule: TSDoc/JSDoc ``/** ... */`` directly above the declaration, its
``export`` or its decorators. Overloads: the signatures before an
implementation are not units; the implementation takes its own doc, or when it
has none, the doc of the nearest overload signature above it that has one.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec
from codeseek.languages.javascript import CLASS_SCOPES, WRAPPERS, js_naming, jsdoc

if TYPE_CHECKING:
    import tree_sitter

_SCOPES = CLASS_SCOPES | {"abstract_class_declaration", "interface_declaration"}
_OVERLOADS = {"function_declaration": "function_signature", "method_definition": "method_signature"}


def tsdoc(node: tree_sitter.Node, source: bytes) -> tuple[str, tuple[int, int] | None]:
    """The TSDoc of a definition, or of its overload signatures."""
    doc, span = jsdoc(node, source)
    signature = _previous_overload(node, source)
    while not doc and signature is not None:
        doc, span = jsdoc(signature, source)
        signature = _previous_overload(signature, source)
    return doc, span


def _previous_overload(node: tree_sitter.Node, source: bytes) -> tree_sitter.Node | None:
    """The overload signature of the same name right above ``node`` (comments aside)."""
    wanted = _OVERLOADS.get(node.type, node.type)
    if wanted not in _OVERLOADS.values():
        return None
    anchor = node.parent if node.parent is not None and node.parent.type in WRAPPERS else node
    sibling = anchor.prev_named_sibling
    while sibling is not None and sibling.type == "comment":
        sibling = sibling.prev_named_sibling
    if sibling is not None and sibling.type == "export_statement":
        sibling = sibling.child_by_field_name("declaration")
    if sibling is None or sibling.type != wanted or not _same_name(sibling, node, source):
        return None
    return sibling


def _same_name(a: tree_sitter.Node, b: tree_sitter.Node, source: bytes) -> bool:
    name_a, name_b = a.child_by_field_name("name"), b.child_by_field_name("name")
    if name_a is None or name_b is None:
        return False
    first = source[name_a.start_byte : name_a.end_byte]
    return first == source[name_b.start_byte : name_b.end_byte]


def _spec(name: str, extensions: tuple[str, ...], function: str) -> LanguageSpec:
    return LanguageSpec(
        name=name,
        extensions=extensions,
        grammar_module="tree_sitter_typescript",
        grammar_function=function,
        query_file="typescript.scm",
        doc_rule=tsdoc,
        class_scopes=_SCOPES,
        wrapper_types=WRAPPERS,
        name_rule=js_naming,
    )


SPECS = (
    _spec("typescript", (".ts", ".mts", ".cts"), "language_typescript"),
    _spec("tsx", (".tsx",), "language_tsx"),
)
