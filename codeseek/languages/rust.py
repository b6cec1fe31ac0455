"""Rust: functions (nested ``fn`` items too), methods in ``impl`` and ``trait``
blocks, structs, enums, unions and traits; inline ``mod`` blocks qualify names.

Qualified names: a method of an inherent impl is qualified by its type without
generic arguments (``Peak::price``); a method of a trait impl by the impl
header as written, minus the impl's own generic parameters and where clause
(``impl Tariff for Peak::price``), so the same method name from two traits
stays apart.

Doc rule: outer doc comments, ``///`` lines or ``/** */``, directly above the
item, with attributes (``#[...]``) allowed in between. Plain ``//`` comments
are never docs. Closures are anonymous and stay inside their parent.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec, Naming
from codeseek.languages.comments import leading_doc_rule

if TYPE_CHECKING:
    import tree_sitter


def rust_naming(
    node: tree_sitter.Node, name_node: tree_sitter.Node | None, source: bytes
) -> Naming | None:
    """Item names as written; an ``impl`` block named by its type or its header."""
    if node.type == "impl_item":
        return _impl_naming(node, source)
    if name_node is None:
        return None
    return Naming(_text(name_node, source))


def _impl_naming(node: tree_sitter.Node, source: bytes) -> Naming | None:
    self_type = node.child_by_field_name("type")
    if self_type is None:
        return None
    trait = node.child_by_field_name("trait")
    if trait is None:
        return Naming(_without_generics(self_type, source))
    negative = "!" if any(child.type == "!" for child in node.children) else ""
    return Naming(f"impl {negative}{_text(trait, source)} for {_text(self_type, source)}")


def _without_generics(node: tree_sitter.Node, source: bytes) -> str:
    if node.type == "generic_type":
        base = node.child_by_field_name("type")
        if base is not None:
            return _text(base, source)
    return _text(node, source)


def _text(node: tree_sitter.Node, source: bytes) -> str:
    return " ".join(source[node.start_byte : node.end_byte].decode("utf-8", "replace").split())


def _outer_doc(text: str) -> bool:
    if text.startswith("///"):
        return not text.startswith("////")
    return text.startswith("/**") and not text.startswith(("/***", "/**/"))


SPECS = (
    LanguageSpec(
        name="rust",
        extensions=(".rs",),
        grammar_module="tree_sitter_rust",
        grammar_function="language",
        query_file="rust.scm",
        doc_rule=leading_doc_rule(
            accept=_outer_doc,
            comment_types=("line_comment", "block_comment"),
            skip_types=("attribute_item",),
        ),
        class_scopes=frozenset({"impl_item"}),
        separator="::",
        name_rule=rust_naming,
    ),
)
