"""Ruby: methods (``def``), singleton methods (``def self.build``, methods in a
``class << self`` block), classes and modules.

Qualified names follow Ruby's own notation: modules and classes joined by
``::`` (``Kestrune::Dock``), instance methods by ``#`` (``Kestrune::Dock#release``)
and singleton methods by ``.`` (``Kestrune::Dock.build``). A method defined at
the top level is a function.

Doc rule: the ``#`` lines directly above the ``def``, ``class`` or ``module``
(or above a ``private def ...`` call), no blank line between; magic comments
(``# frozen_string_literal: true``) and ``# rubocop:`` directives are not doc
text, and a run that is mostly commented-out code is not a doc.

Nesting: blocks, lambdas and procs are anonymous and stay inside their parent;
methods made by ``define_method`` or ``attr_reader`` are not units.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec, Naming
from codeseek.languages.comments import leading_doc_rule

if TYPE_CHECKING:
    import tree_sitter

_WRAPPERS = frozenset({"argument_list", "call"})


def ruby_naming(
    node: tree_sitter.Node, name_node: tree_sitter.Node | None, source: bytes
) -> Naming | None:
    """Names of Ruby units, with the member separator of their kind of method."""
    if name_node is None:
        return None
    *scope, name = _text(name_node, source).split("::")
    if node.type == "singleton_method":
        receiver = node.child_by_field_name("object")
        owner = _text(receiver, source) if receiver is not None else "self"
        qualifier = tuple(scope) if owner == "self" else (*scope, *owner.split("::"))
        return Naming(name, qualifier, member_separator=".", is_method=True)
    if node.type == "method":
        singleton = _in_singleton_class(node)
        return Naming(name, tuple(scope), member_separator="." if singleton else "#")
    return Naming(name, tuple(scope))


def _in_singleton_class(node: tree_sitter.Node) -> bool:
    """Whether the nearest enclosing class-like node is a ``class << self`` block."""
    parent = node.parent
    while parent is not None:
        if parent.type == "singleton_class":
            return True
        if parent.type in ("class", "module", "method", "singleton_method"):
            return False
        parent = parent.parent
    return False


def _text(node: tree_sitter.Node, source: bytes) -> str:
    return source[node.start_byte : node.end_byte].decode("utf-8", "replace").strip()


SPECS = (
    LanguageSpec(
        name="ruby",
        extensions=(".rb", ".rake", ".gemspec", ".ru"),
        grammar_module="tree_sitter_ruby",
        grammar_function="language",
        query_file="ruby.scm",
        doc_rule=leading_doc_rule(
            accept=lambda text: text.startswith("#") and not text.startswith("#!"),
            plain=lambda text: text.startswith("#"),
            wrapper_types=_WRAPPERS,
        ),
        class_scopes=frozenset({"module", "class"}),
        separator="::",
        name_rule=ruby_naming,
    ),
)
