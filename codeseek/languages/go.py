"""Go: functions, methods (qualified by receiver: ``(*Ledger).Post``,
``Ledger.Total``, type parameters dropped), named struct and interface types,
and the methods an interface declares (``Reader.Read``).

Doc rule (Go doc comment convention): the ``//`` lines (or a ``/* */`` block)
directly above the declaration, with no blank line between; directives such
as ``//go:noinline`` are not doc text. A type in a ``type ( ... )`` group takes
the comment above its own line, else the group's. A run of ``//`` lines that is
mostly commented-out code is not a doc.

Nesting: function literals (``func() { ... }`` values, goroutine bodies) are
anonymous and stay inside their parent, even when assigned to a variable.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec, Naming
from codeseek.languages.comments import leading_doc_rule

if TYPE_CHECKING:
    import tree_sitter


def go_naming(
    node: tree_sitter.Node, name_node: tree_sitter.Node | None, source: bytes
) -> Naming | None:
    """The name, and for a method its receiver as qualifier."""
    if name_node is None:
        return None
    name = source[name_node.start_byte : name_node.end_byte].decode("utf-8", "replace")
    if node.type != "method_declaration":
        return Naming(name)
    receiver = _receiver(node, source)
    return Naming(name, (receiver,) if receiver else (), is_method=True)


def _receiver(node: tree_sitter.Node, source: bytes) -> str | None:
    """``(*Ledger)`` or ``Ledger`` for a method declaration."""
    receiver = node.child_by_field_name("receiver")
    if receiver is None:
        return None
    for param in receiver.named_children:
        rtype = param.child_by_field_name("type")
        if rtype is None:
            continue
        text = source[rtype.start_byte : rtype.end_byte].decode("utf-8", "replace")
        text = "".join(text.split()).split("[", 1)[0]  # drop type parameters
        return f"({text})" if text.startswith("*") else text
    return None


SPECS = (
    LanguageSpec(
        name="go",
        extensions=(".go",),
        grammar_module="tree_sitter_go",
        grammar_function="language",
        query_file="go.scm",
        doc_rule=leading_doc_rule(
            accept=lambda text: text.startswith(("//", "/*")),
            plain=lambda text: text.startswith("//"),
            wrapper_types=frozenset({"type_declaration"}),
        ),
        wrapper_types=frozenset({"type_declaration"}),
        name_rule=go_naming,
    ),
)
