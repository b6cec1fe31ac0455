"""Java: classes, interfaces, enums, records and annotation types (nested ones
qualified by their outer types: ``Dock.Latch``), methods and constructors
(``Dock.release``, ``Dock.Dock``), interface and abstract methods included.

Doc rule: a Javadoc ``/** ... */`` block directly above the declaration; the
annotations and modifiers after it belong to the declaration. A unit starts at
the declaration itself, after its annotations (as a Python unit starts at its
``def``, after its decorators); the annotations show in its signature.

Nesting: lambdas and anonymous classes (``new Runnable() { ... }``, enum
constant bodies) are anonymous: they and the methods inside them stay inside
their parent. Local classes declared inside a method are units, qualified by
the method.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec
from codeseek.languages.comments import leading_doc_rule

if TYPE_CHECKING:
    import tree_sitter

_ANNOTATIONS = frozenset({"marker_annotation", "annotation"})


def java_start(node: tree_sitter.Node) -> tree_sitter.Node:
    """The first token of a declaration that is not one of its leading annotations."""
    for child in node.children:
        if child.type != "modifiers":
            return child
        for modifier in child.children:
            if modifier.type not in _ANNOTATIONS and modifier.type not in (
                "line_comment", "block_comment"
            ):
                return modifier
    return node


SPECS = (
    LanguageSpec(
        name="java",
        extensions=(".java",),
        grammar_module="tree_sitter_java",
        grammar_function="language",
        query_file="java.scm",
        doc_rule=leading_doc_rule(
            accept=lambda text: text.startswith("/**") and not text.startswith(("/***", "/**/")),
            comment_types=("line_comment", "block_comment"),
        ),
        start_rule=java_start,
    ),
)
