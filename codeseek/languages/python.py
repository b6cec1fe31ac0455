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
import warnings
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
    if first is None or first.type != "expression_statement" or first.child_count != 1:
        return "", None  # not one expression alone ("doc", is a tuple)
    literal = first.named_children[0]
    while literal.type == "parenthesized_expression" and literal.named_child_count == 1:
        literal = literal.named_children[0]  # ("doc") is a docstring too
    if literal.type not in ("string", "concatenated_string"):
        return "", None
    value = _string_value(source[literal.start_byte : literal.end_byte])
    if value is None:
        return "", None
    return inspect.cleandoc(value), (first.start_byte, first.end_byte)


def _string_value(literal: bytes) -> str | None:
    """The value of a string literal, or None for f-strings, bytes and broken literals."""
    text = literal.decode("utf-8", "replace")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # invalid escapes warn; the value stands
            value = ast.literal_eval(f"(\n{text}\n)")  # parts may span lines
    except (ValueError, TypeError, SyntaxError, MemoryError, RecursionError):
        return None
    return value if isinstance(value, str) else None


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
        cr_newlines=True,
    ),
)
