"""The :class:`CodeUnit` record, its stable id and its text views.

A unit is one function, method or class. Three views of its text matter:
what is *shown* (``code``, with line numbers from ``start_line``), what is
*embedded* (:meth:`CodeUnit.embed_text`: the name in words, the doc, the code
without the doc) and what is *matched lexically* (:meth:`CodeUnit.lexical_fields`,
identifiers split into words).
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from functools import cached_property, lru_cache

KINDS = ("function", "method", "class")

_CAMEL = re.compile(r"[A-Z]+(?=[A-Z][a-z])|[A-Z]?[a-z]+|[A-Z]+|\d+")
_NON_WORD = re.compile(r"[^A-Za-z0-9]+")
_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_TAG_LINE = re.compile(r"^\s*(@\w+|:(param|type|return|returns|rtype|raises)\b)")
_SECTION = re.compile(
    r"^\s*(Args|Arguments|Parameters|Returns|Return|Raises|Yields|Examples?|Notes?|"
    r"See Also|Attributes|Keyword Arguments|# Arguments|# Returns|# Errors|# Panics|"
    r"# Examples)\s*:?\s*$"
)


@dataclass(frozen=True)
class CodeUnit:
    """One function, method or class extracted from a source file.

    Attributes:
        path: file path relative to the repository root, with ``/`` separators.
        language: the language name in the registry (``python``, ``go``, ...).
        kind: ``function``, ``method`` or ``class``.
        name: the unit's own name.
        qualname: the name qualified by its enclosing classes and functions
            (``Fleet.rebalance``, ``plan_route.score``).
        signature: the declaration line(s) up to the body, as written.
        doc: the docstring or doc comment, cleaned of markers ("" when none).
        start_line: first line of the definition, 1-based.
        end_line: last line of the definition, 1-based, inclusive.
        code: the definition's source text.
        doc_span: character offsets of the doc inside ``code`` when the doc is
            part of the body (a Python docstring), else None.
        ordinal: 0 for the first unit of this qualname in the file, 1 for the
            next (a redefinition), and so on; keeps ids unique.
    """

    path: str
    language: str
    kind: str
    name: str
    qualname: str
    signature: str
    doc: str
    start_line: int
    end_line: int
    code: str
    doc_span: tuple[int, int] | None = None
    ordinal: int = 0

    @property
    def uid(self) -> str:
        """Stable id: path, qualified name and ordinal."""
        suffix = f"#{self.ordinal}" if self.ordinal else ""
        return f"{self.path}::{self.qualname}{suffix}"

    @property
    def code_without_doc(self) -> str:
        """The code with an in-body docstring removed (the code alone)."""
        if self.doc_span is None:
            return self.code
        start, end = self.doc_span
        head, tail = self.code[:start], self.code[end:]
        # drop the now-empty line the docstring stood on
        head = head.rstrip(" \t")
        if head.endswith("\n") and tail.startswith("\n"):
            tail = tail[1:]
        return head + tail

    @property
    def doc_summary(self) -> str:
        """The doc's first paragraph, without parameter sections or tags."""
        return summarize_doc(self.doc)

    def embed_text(self) -> str:
        """The text the embedding model reads for this unit."""
        words = " ".join(split_identifier(self.qualname))
        parts = [f"{self.kind} {self.qualname} ({words})"]
        if self.doc:
            parts.append(self.doc)
        parts.append(self.code_without_doc)
        return "\n".join(parts)

    @cached_property
    def content_hash(self) -> str:
        """Hash of what is embedded: equal hashes share one stored vector."""
        return hashlib.sha256(self.embed_text().encode("utf-8", "surrogatepass")).hexdigest()[
            :32
        ]

    def lexical_fields(self) -> dict[str, str]:
        """The fields of the lexical (BM25) index, identifiers split into words."""
        return {
            "names": " ".join(split_identifier(self.qualname)),
            "signature": split_words(self.signature),
            "doc": self.doc,
            "code": split_words(self.code_without_doc),
        }


def split_identifier(identifier: str) -> list[str]:
    """Split ``pushBatch_withBackoff`` into ``['push', 'batch', 'with', 'backoff']``."""
    words: list[str] = []
    for part in _NON_WORD.split(identifier):
        if part:
            words.extend(_split_part(part))
    return words


@lru_cache(maxsize=200_000)
def _split_part(part: str) -> tuple[str, ...]:
    return tuple(w.lower() for w in _CAMEL.findall(part))


def split_words(text: str) -> str:
    """Text with every identifier followed by its split words (when they differ)."""
    out: list[str] = []
    for ident in _IDENT.findall(text):
        out.append(ident)
        pieces = split_identifier(ident)
        if len(pieces) > 1:
            out.extend(pieces)
    return " ".join(out)


def summarize_doc(doc: str) -> str:
    """The first paragraph of a doc, stopping at tags and parameter sections."""
    lines: list[str] = []
    for line in doc.strip().splitlines():
        if not line.strip():
            if lines:
                break
            continue
        if _TAG_LINE.match(line) or _SECTION.match(line):
            break
        lines.append(line.strip())
    return " ".join(lines)
