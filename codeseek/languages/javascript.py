"""JavaScript: function declarations (nested ones too), classes, methods, and
arrow functions or function expressions bound to a name: a variable
(``const refund = (...) => ...``), a property (``exports.x = function``,
``Dock.prototype.release = function``, ``res.send = function``), a class
field (``onClick = () => ...``) or a key of an object literal
(``{ charge: function () {} }``); an anonymous ``export default`` function or
class is named ``default``. A component wrapped in ``memo`` or ``forwardRef``
is a unit named by its variable.

Qualified names: methods by their class; ``res.send = function`` as
``res.send`` and ``Dock.prototype.release`` as ``Dock.release`` (methods);
``exports.x`` and ``module.exports.x`` as plain ``x`` (functions of the
module); functions in an object literal bound to a variable by that variable
(``api.charge``).

Doc rule: a JSDoc ``/** ... */`` block directly above the declaration or its
``export``. Nesting: anonymous functions (callbacks, IIFEs) are not units;
named functions inside them are, and so is a named function expression
anywhere (``on('mount', function onmount() {...})``, ``return function proxy()``),
qualified by the units around it. A function assigned to a computed property
(``proto[method] = function``) has no name of its own and stays inside its parent.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from codeseek.languages import LanguageSpec, Naming
from codeseek.languages.comments import leading_doc_rule

if TYPE_CHECKING:
    import tree_sitter

WRAPPERS = frozenset({"export_statement", "lexical_declaration", "variable_declaration",
                      "expression_statement", "assignment_expression", "variable_declarator"})
CLASS_SCOPES = frozenset({"class_declaration", "class", "variable_declarator"})
_MODULE_OBJECTS = frozenset({"exports", "module.exports"})
_BINDINGS = frozenset({"variable_declarator", "assignment_expression", "pair", "field_definition",
                       "public_field_definition"})
_COMPONENT_WRAPPERS = frozenset({"memo", "forwardRef", "React.memo", "React.forwardRef"})


def _jsdoc_marker(text: str) -> bool:
    return text.startswith("/**") and not text.startswith(("/***", "/**/"))


jsdoc = leading_doc_rule(
    accept=_jsdoc_marker,
    skip_types=("decorator",),
    wrapper_types=WRAPPERS,
)


def js_naming(
    node: tree_sitter.Node, name_node: tree_sitter.Node | None, source: bytes
) -> Naming | None:
    """Names of JavaScript and TypeScript units (see the module docstring)."""
    if node.type == "assignment_expression":
        return _assignment_naming(node, source)
    if node.type in ("function_expression", "generator_function") and _is_bound(node, source):
        return None  # the binding (declarator, assignment, key, field) is the unit
    if name_node is None:  # export default function () {}
        own = node.child_by_field_name("name")
        return Naming(_text(own, source) if own is not None else "default")
    name = _text(name_node, source)
    if name_node.type == "string":
        name = name.strip("'\"`")
    return Naming(name)


def _is_bound(node: tree_sitter.Node, source: bytes) -> bool:
    """Whether a function expression is the value of a binding the query captures."""
    parent = node.parent
    if parent is None:
        return False
    if parent.type in _BINDINGS:
        return True
    call = parent.parent if parent.type == "arguments" else None
    if call is None or call.parent is None or call.parent.type != "variable_declarator":
        return False
    callee = call.child_by_field_name("function")
    return callee is not None and _text(callee, source) in _COMPONENT_WRAPPERS


def _assignment_naming(node: tree_sitter.Node, source: bytes) -> Naming | None:
    left = node.child_by_field_name("left")
    if left is None or left.type != "member_expression":
        return None
    target = _text(left, source)
    if target == "module.exports":  # the module's own function: named by itself
        right = node.child_by_field_name("right")
        own = right.child_by_field_name("name") if right is not None else None
        return Naming(_text(own, source) if own is not None else "exports", is_method=False)
    *path, name = target.split(".")
    owner = ".".join(path)
    if owner in _MODULE_OBJECTS:
        return Naming(name, is_method=False)
    if path and path[-1] == "prototype":
        path = path[:-1]
    if path and path[0] == "this":
        path = path[1:]  # this.x = function: qualified by the enclosing definition
    return Naming(name, tuple(path), is_method=True)


def _text(node: tree_sitter.Node, source: bytes) -> str:
    return "".join(source[node.start_byte : node.end_byte].decode("utf-8", "replace").split())


SPECS = (
    LanguageSpec(
        name="javascript",
        extensions=(".js", ".mjs", ".cjs", ".jsx"),
        grammar_module="tree_sitter_javascript",
        grammar_function="language",
        query_file="javascript.scm",
        doc_rule=jsdoc,
        class_scopes=CLASS_SCOPES,
        wrapper_types=WRAPPERS,
        name_rule=js_naming,
    ),
)
