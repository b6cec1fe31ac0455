"""JavaScript: function declarations, classes, methods, and arrow functions or
function expressions bound to a name (``const refund = (...) => ...``,
``exports.x = function``).

Doc rule: a JSDoc ``/** ... */`` block directly above the declaration or its
``export``. Anonymous callbacks are not units; they stay inside their parent.
"""

from __future__ import annotations

from codeseek.languages import LanguageSpec
from codeseek.languages.comments import leading_doc_rule

WRAPPERS = frozenset({"export_statement", "lexical_declaration", "variable_declaration",
                      "expression_statement", "assignment_expression", "variable_declarator"})

jsdoc = leading_doc_rule(
    accept=lambda text: text.startswith("/**") and not text.startswith("/***"),
    wrapper_types=WRAPPERS,
)

SPECS = (
    LanguageSpec(
        name="javascript",
        extensions=(".js", ".mjs", ".cjs", ".jsx"),
        grammar_module="tree_sitter_javascript",
        grammar_function="language",
        query_file="javascript.scm",
        doc_rule=jsdoc,
        class_scopes=frozenset({"class_declaration", "class"}),
        wrapper_types=WRAPPERS,
    ),
)
