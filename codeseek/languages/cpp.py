"""C++: function definitions (free, member, out-of-line ``Dock::release``,
operators, constructors and destructors), classes, structs, unions and enums
with a body; namespaces qualify the names inside them (``fleet::Dock::release``).

A definition written with a qualified name (``void Dock::release() {}``) is
taken to be a member function: C++ syntax alone cannot tell a class from a
namespace there. Member functions declared in a class but defined elsewhere
are units where they are defined. Templates: the unit is the definition; the
``template <...>`` header belongs to it (doc above it, shown in the signature).

Doc rule: as C (``/** */``, ``/*! */``, ``///``, ``//!``, or plain ``//`` lines
or a ``/* */`` block directly above), inside class bodies too. ``.h`` files are read as C++
(a C header is almost always valid C++; Universal Ctags maps ``.h`` the same way).

Nesting: lambdas are anonymous and stay inside their parent; local classes are
units qualified by their function.
"""

from __future__ import annotations

from codeseek.languages import LanguageSpec
from codeseek.languages.c import blank_macros, c_naming, doc_marker, plain_line
from codeseek.languages.comments import leading_doc_rule

_WRAPPERS = frozenset({"template_declaration"})

SPECS = (
    LanguageSpec(
        name="cpp",
        extensions=(".cpp", ".cc", ".cxx", ".c++", ".hpp", ".hh", ".hxx", ".h++", ".h",
                    ".inl", ".ipp", ".tpp"),
        grammar_module="tree_sitter_cpp",
        grammar_function="language",
        query_file="cpp.scm",
        doc_rule=leading_doc_rule(accept=doc_marker, plain=plain_line, wrapper_types=_WRAPPERS),
        wrapper_types=_WRAPPERS,
        separator="::",
        name_rule=c_naming,
        prepare=blank_macros,
    ),
)
