"""Go: functions, methods (qualified by receiver: ``(*Ledger).Post``,
``Ledger.Total``) and named struct and interface types.

Doc rule (Go doc comment convention): the ``//`` lines directly above the
declaration, with no blank line between. Function literals are not units.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec
from codeseek.languages.comments import leading_doc_rule

if TYPE_CHECKING:
    import tree_sitter


def go_receiver(node: tree_sitter.Node, source: bytes) -> str | None:
    """``(*Ledger)`` or ``Ledger`` for a method declaration, else None."""
    if node.type != "method_declaration":
        return None
    receiver = node.child_by_field_name("receiver")
    if receiver is None:
        return None
    for param in receiver.named_children:
        rtype = param.child_by_field_name("type")
        if rtype is None:
            continue
        text = source[rtype.start_byte : rtype.end_byte].decode("utf-8", "replace")
        text = text.split("[", 1)[0]  # drop type parameters
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
            accept=lambda text: text.startswith("//"),
            wrapper_types=frozenset({"type_declaration"}),
        ),
        wrapper_types=frozenset({"type_declaration"}),
        receiver_rule=go_receiver,
        method_types=frozenset({"method_declaration"}),
    ),
)
