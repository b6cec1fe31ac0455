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

ReceiverRule = Callable[["tree_sitter.Node", bytes], "str | None"]
"""(definition node, source) -> a qualifier that is not an enclosing node (Go receivers)."""


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
            Rust ``impl`` block that qualifies names without being a unit),
            each with a ``@name``.
        doc_rule: finds the doc of a definition node.
        body_field: the field that holds the body (the signature ends there).
        class_scopes: node types whose functions are methods.
        wrapper_types: parent node types that belong to the definition
            (decorators, ``export``): the signature and doc search start there.
        separator: joins a qualified name.
        receiver_rule: a qualifier taken from the definition itself (Go receivers).
        method_types: node types that are always methods.
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
    receiver_rule: ReceiverRule | None = None
    method_types: frozenset[str] = field(default_factory=frozenset)
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
    return tree_sitter.Language(getattr(module, function_name)())


_SPEC_MODULES = ("python", "javascript", "typescript", "go", "rust")


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
