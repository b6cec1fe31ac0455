"""TypeScript and TSX: as JavaScript, plus interfaces, abstract classes, enums
and type-annotated arrow functions. Doc rule: TSDoc/JSDoc ``/** ... */``.
"""

from __future__ import annotations

from codeseek.languages import LanguageSpec
from codeseek.languages.javascript import WRAPPERS, jsdoc

_SCOPES = frozenset({"class_declaration", "abstract_class_declaration", "class",
                     "interface_declaration"})

SPECS = (
    LanguageSpec(
        name="typescript",
        extensions=(".ts", ".mts", ".cts"),
        grammar_module="tree_sitter_typescript",
        grammar_function="language_typescript",
        query_file="typescript.scm",
        doc_rule=jsdoc,
        class_scopes=_SCOPES,
        wrapper_types=WRAPPERS,
    ),
    LanguageSpec(
        name="tsx",
        extensions=(".tsx",),
        grammar_module="tree_sitter_typescript",
        grammar_function="language_tsx",
        query_file="typescript.scm",
        doc_rule=jsdoc,
        class_scopes=_SCOPES,
        wrapper_types=WRAPPERS,
    ),
)
