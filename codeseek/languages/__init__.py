"""The language registry: file extension -> :class:`LanguageSpec`.

A spec names its grammar wheel, the tree-sitter query (a ``.scm`` file in
``queries/``) that captures its units, and its rules for documentation and
signatures. Adding a language is one module here plus its query file, and one
line in :data:`_SPEC_MODULES`.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cache
from importlib import resources
from typing import TYPE_CHECKING

from codeseek.errors import UnsupportedLanguage

if TYPE_CHECKING:
    import tree_sitter

DocRule = Callable[["tree_sitter.Node", bytes], "tuple[str, tuple[int, int] | None]"]
"""(definition node, source) -> (cleaned doc, byte span of an in-body doc or None)."""


@dataclass(frozen=True)
class Naming:
    """How one captured definition is named, when its query capture alone cannot say.

    Attributes:
        name: the unit's own name (``release``, ``operator()``, ``default``).
        qualifier: qualifiers written in the definition itself, outermost first:
            a Go receiver ``(*Ledger)``, the ``Dock`` of a C++ ``Dock::release``,
            the ``res`` of a JavaScript ``res.send = function``.
        member_separator: joins the scope to the name instead of the spec's
            separator (Ruby: ``#`` for instance methods, ``.`` for singleton ones).
        is_method: forces the kind (True: method, False: function); None lets
            the enclosing scope decide.
    """

    name: str
    qualifier: tuple[str, ...] = ()
    member_separator: str | None = None
    is_method: bool | None = None


NameRule = Callable[["tree_sitter.Node", "tree_sitter.Node | None", bytes], "Naming | None"]
"""(definition node, its @name node or None, source) -> its naming, or None: not a unit."""

StartRule = Callable[["tree_sitter.Node"], "tree_sitter.Node"]
"""(definition node) -> the node where the unit's own code starts (after annotations)."""

Prepare = Callable[[bytes], bytes]
"""source -> the bytes tree-sitter reads: same length, same line breaks (offsets hold)."""


@dataclass(frozen=True)
class LanguageSpec:
    """How to find units in one language.

    Attributes:
        name: registry name, used by ``--lang`` and stored with every unit.
        extensions: file name endings, with the dot.
        grammar_module: the grammar wheel's module.
        grammar_function: the function in it that returns the language pointer.
        query_file: the ``.scm`` file in ``queries/`` that captures units as
            ``@function`` or ``@class`` (or ``@scope``: a container such as a
            Rust ``impl`` block or a C++ namespace that qualifies names without
            being a unit; or ``@inline``: a container, such as a Java anonymous
            class body, whose definitions stay inside their parent), each with
            a ``@name`` unless ``name_rule`` names it.
        doc_rule: finds the doc of a definition node.
        body_field: the field that holds the body (the signature ends there).
        class_scopes: ``@scope`` node types whose functions are methods (a Rust
            ``impl`` block); functions directly in an ``@class`` always are.
        wrapper_types: parent node types that belong to the definition
            (decorators, ``export``, ``template<...>``): the signature and doc
            search start there.
        separator: joins a qualified name.
        name_rule: names a definition when the ``@name`` capture is not enough
            (receivers, qualified declarators, trait impls).
        start_rule: where the unit's code starts, when not at its node (Java
            annotations, like Python decorators, are shown in the signature
            but the unit starts at the declaration itself).
        prepare: rewrites what tree-sitter reads without moving a byte (C/C++:
            macro annotations the grammar cannot know are blanked); names,
            docs and code are still read from the file's own bytes.
        cr_newlines: a lone carriage return ends a line (as in Python); the
            engine reads it as a line feed, which tree-sitter expects.
    """

    name: str
    extensions: tuple[str, ...]
    grammar_module: str
    grammar_function: str
    query_file: str
    doc_rule: DocRule
    body_field: str = "body"
    class_scopes: frozenset[str] = field(default_factory=frozenset)
    wrapper_types: frozenset[str] = field(default_factory=frozenset)
    separator: str = "."
    name_rule: NameRule | None = None
    start_rule: StartRule | None = None
    prepare: Prepare | None = None
    cr_newlines: bool = False

    def language(self) -> tree_sitter.Language:
        """The tree-sitter language, loaded from the grammar wheel."""
        return _load_language(self.grammar_module, self.grammar_function)

    def query_source(self) -> str:
        """The text of this language's unit query."""
        return resources.files(__package__).joinpath("queries", self.query_file).read_text(
            encoding="utf-8"
        )


@cache
def _load_language(module_name: str, function_name: str) -> tree_sitter.Language:
    import tree_sitter

    module = importlib.import_module(module_name)
    try:
        return tree_sitter.Language(getattr(module, function_name)())
    except ValueError as exc:  # the grammar's ABI is outside what this tree-sitter reads
        raise UnsupportedLanguage(
            f"the {module_name} grammar does not fit tree-sitter "
            f"(reads ABI {tree_sitter.MIN_COMPATIBLE_LANGUAGE_VERSION}-"
            f"{tree_sitter.LANGUAGE_VERSION}): {exc}; run scripts/setup.sh to reinstall"
        ) from exc


_SPEC_MODULES = ("python", "javascript", "typescript", "go", "rust", "java", "c", "cpp", "ruby")


@cache
def all_specs() -> tuple[LanguageSpec, ...]:
    """Every registered language spec."""
    specs: list[LanguageSpec] = []
    for module_name in _SPEC_MODULES:
        module = importlib.import_module(f"{__package__}.{module_name}")
        specs.extend(module.SPECS)
    return tuple(specs)


def language_names() -> list[str]:
    """The registered language names, sorted."""
    return sorted(spec.name for spec in all_specs())


def spec_by_name(name: str) -> LanguageSpec:
    """The spec of a language name; UnsupportedLanguage lists the valid names."""
    for spec in all_specs():
        if spec.name == name:
            return spec
    raise UnsupportedLanguage(
        f"unknown language {name!r}; choose one of: {', '.join(language_names())}"
    )


def spec_for_path(path: str) -> LanguageSpec | None:
    """The spec for a file name, or None when no language claims it."""
    lowered = path.lower()
    best: LanguageSpec | None = None
    best_len = 0
    for spec in all_specs():
        for ext in spec.extensions:
            if lowered.endswith(ext) and len(ext) > best_len:
                best, best_len = spec, len(ext)
    return best


def known_extensions() -> frozenset[str]:
    """Every file ending some language claims."""
    return frozenset(ext for spec in all_specs() for ext in spec.extensions)
