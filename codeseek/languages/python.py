"""Python: functions (async too), methods, nested functions and classes.

Doc rule: the docstring, as Python itself defines it (``ast.get_docstring``):
the first statement of the body, when it is a plain string literal (not an
f-string, not bytes), evaluated and cleaned with ``inspect.cleandoc``.
Nested functions are units too, qualified by their enclosing function
(``plan_route.score``); lambdas stay inside their parent.
"""

from __future__ import annotations

import ast
import inspect
from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec

if TYPE_CHECKING:
    import tree_sitter


def python_docstring(node: tree_sitter.Node, source: bytes) -> tuple[str, tuple[int, int] | None]:
    """The docstring of a function or class node and its byte span."""
    body = node.child_by_field_name("body")
    if body is None:
        return "", None
    first = next((c for c in body.named_children if c.type != "comment"), None)
    if first is None or first.type != "expression_statement" or first.named_child_count != 1:
        return "", None
    literal = first.named_children[0]
    if literal.type not in ("string", "concatenated_string"):
        return "", None
    text = source[literal.start_byte : literal.end_byte].decode("utf-8", "replace")
    try:
        value = ast.literal_eval(text)
    except (ValueError, SyntaxError, MemoryError, RecursionError):
        return "", None  # an f-string or a broken literal is no docstring
    if not isinstance(value, str):
        return "", None
    return inspect.cleandoc(value), (first.start_byte, first.end_byte)


SPECS = (
    LanguageSpec(
        name="python",
        extensions=(".py", ".pyi"),
        grammar_module="tree_sitter_python",
        grammar_function="language",
        query_file="python.scm",
        doc_rule=python_docstring,
        class_scopes=frozenset({"class_definition"}),
        wrapper_types=frozenset({"decorated_definition"}),
    ),
)
