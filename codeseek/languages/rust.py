"""Rust: functions, methods in ``impl`` and ``trait`` blocks (qualified by the
type: ``Peak::price``), structs, enums and traits.

Doc rule: outer doc comments, ``///`` lines or ``/** */``, directly above the
item, with attributes (``#[...]``) allowed in between. Closures are not units.
"""

from __future__ import annotations

from codeseek.languages import LanguageSpec
from codeseek.languages.comments import leading_doc_rule

SPECS = (
    LanguageSpec(
        name="rust",
        extensions=(".rs",),
        grammar_module="tree_sitter_rust",
        grammar_function="language",
        query_file="rust.scm",
        doc_rule=leading_doc_rule(
            accept=lambda text: (text.startswith("///") and not text.startswith("////"))
            or (text.startswith("/**") and not text.startswith("/***")),
            comment_types=("line_comment", "block_comment"),
            skip_types=("attribute_item",),
        ),
        class_scopes=frozenset({"impl_item", "trait_item"}),
        separator="::",
    ),
)
