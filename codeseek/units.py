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
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property, lru_cache

KINDS = ("function", "method", "class")
WORDS_FROM = 800  # characters of code from which the embedded text gives identifier words
# How lexical entries are made; an index whose manifest records another value has them
# rewritten on its next update. "members-folded-3": inner units folded to their signatures,
# a member's doc comment with it.
LEXICAL_TEXT = "members-folded-3"
# The lexical field the words of a unit's path go to (None: not indexed); measured in
# scripts/bench_quality.py (stage 3d).
PATH_WORDS_IN: str | None = None

_CAMEL = re.compile(r"[A-Z]+(?=[A-Z][a-z])|[A-Z]?[a-z]+|[A-Z]+|\d+")
_NON_WORD = re.compile(r"[^A-Za-z0-9]+")
_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_TOKEN = re.compile(r"[^\W\d]\w*")
_TAG_LINE = re.compile(r"^\s*([@\\]\w+|:(param|type|return|returns|rtype|raises)\b)")
_SUMMARY_TAG = re.compile(r"^\s*[@\\](brief|short|summary)\b\s*")
_SECTION = re.compile(
    r"^\s*(Args|Arguments|Parameters|Returns|Return|Raises|Yields|Examples?|Notes?|"
    r"See Also|Attributes|Keyword Arguments|#{1,3} [A-Z][\w ]*)\s*:?\s*$"
)
_INLINE_TAG = re.compile(r"\{@(?:link|linkplain|linkcode|code|literal|see)\s+([^{}]*)\}")


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
        """The text the embedding model reads for this unit.

        The kind and qualified name (also in words), then the doc, then the
        code. The model reads 256 word pieces, about :data:`WORDS_FROM`
        characters of code: longer code is given as the signature and then
        its identifiers' words, which pack more of it into the window. Chosen
        on the training splits of the recall checks (``scripts/bench_quality.py``).
        """
        words = " ".join(split_identifier(self.qualname))
        code = self.code_without_doc
        parts = [f"{self.kind} {self.qualname} ({words})"]
        long_code = len(code) >= WORDS_FROM
        if long_code:
            parts.append(self.signature)
        if self.doc:
            parts.append(self.doc)
        parts.append(code_words(code) if long_code else code)
        return "\n".join(parts)

    @cached_property
    def content_hash(self) -> str:
        """Hash of what is embedded: equal hashes share one stored vector."""
        return hashlib.sha256(self.embed_text().encode("utf-8", "surrogatepass")).hexdigest()[
            :32
        ]

    def lexical_fields(self, code: str | None = None,
                       path_in: str | None = PATH_WORDS_IN) -> dict[str, str]:
        """The fields of the lexical (BM25) index, identifiers split into words.

        ``code`` is the code to match (default: the code without the doc); the
        index passes the :func:`lexical_codes` text, in which a class's
        methods are folded to their signatures. ``path_in`` names the field the
        words of the unit's path (:func:`path_words`) are added to, or None for
        none (default :data:`PATH_WORDS_IN`; ``scripts/bench_quality.py`` measures
        each placement). A method's enclosing class is already in ``names``: it is
        part of the qualified name.
        """
        fields = {
            "names": " ".join(split_identifier(self.qualname)),
            "signature": split_words(self.signature),
            "doc": self.doc,
            "code": split_words(self.code_without_doc if code is None else code),
        }
        if path_in is not None:
            fields[path_in] = " ".join(filter(None, (fields[path_in], path_words(self.path))))
        return fields


def path_words(path: str) -> str:
    """The words of a repository path: each folder's and the file name's (without its
    extension) identifier words, in order (``email/_header_value_parser.py`` ->
    ``email header value parser``)."""
    parts = [part for part in path.split("/") if part not in ("", ".", "..")]
    if parts:
        stem, dot, _ = parts[-1].rpartition(".")
        if dot and stem.strip("."):
            parts[-1] = stem
    return " ".join(word for part in parts for word in split_identifier(part))


def lexical_codes(units: Sequence[CodeUnit]) -> list[str]:
    """The code each unit's lexical entry matches: its code without its doc, with
    every unit directly inside it folded to that unit's signature.

    Inner units are indexed on their own, so a class whose entry also held its
    methods' bodies would outrank the very method a query's words come from
    (chosen on the training splits of ``scripts/bench_quality.py``). ``units``
    may mix files; the result follows their order.
    """
    codes = [unit.code[_own_start(unit):] if unit.doc_span is None else unit.code_without_doc
             for unit in units]
    by_path: dict[str, list[int]] = {}
    for position, unit in enumerate(units):
        by_path.setdefault(unit.path, []).append(position)
    for positions in by_path.values():
        for outer, members in _direct_members(units, positions).items():
            codes[outer] = _folded(codes[outer], [units[m] for m in members])
    return codes


def _direct_members(units: Sequence[CodeUnit], positions: list[int]) -> dict[int, list[int]]:
    """outer position -> the positions of the units directly inside it (one file)."""
    order = sorted(positions, key=lambda p: (units[p].start_line, -units[p].end_line, p))
    members: dict[int, list[int]] = {}
    stack: list[int] = []
    for position in order:
        unit = units[position]
        while stack and not _inside(unit, units[stack[-1]]):
            stack.pop()
        if stack:
            members.setdefault(stack[-1], []).append(position)
        stack.append(position)
    return members


def _inside(inner: CodeUnit, outer: CodeUnit) -> bool:
    return (outer.start_line <= inner.start_line and inner.end_line <= outer.end_line
            and (inner.start_line, inner.end_line) != (outer.start_line, outer.end_line))


def _folded(code: str, members: list[CodeUnit]) -> str:
    """``code`` with each member's code (found in order) replaced by its signature, and
    a doc comment written above the member dropped with it (it is the member's doc)."""
    parts: list[str] = []
    at = 0
    for member in members:
        own = member.code[_own_start(member):]  # without other code sharing its first line
        found = code.find(own, at) if own else -1
        if found < 0:
            continue  # not verbatim inside (it should be): leave the text as it is
        begin = found
        if member.doc and member.doc_span is None:
            begin = _doc_above(code, found, at, member.doc)
        parts.extend((code[at:begin], member.signature))
        at = found + len(own)
    parts.append(code[at:])
    return "".join(parts)


def _own_start(unit: CodeUnit) -> int:
    """Where a unit's own text starts in its ``code``, which begins at the start of its
    first line: after other code on that line (``} h() {``, ``class A { f() {``), found as
    the first place the line reads as the signature's first two words; 0 when only
    indentation precedes it or the signature cannot be placed."""
    first_line = unit.code.split("\n", 1)[0]
    words = unit.signature.split()[:2]
    if not words:
        return 0
    for match in re.finditer(rf"(?<![\w$@#]){re.escape(words[0])}", first_line):
        at = match.start()
        if first_line[at:].split()[: len(words)] == words:
            return at if first_line[:at].strip() else 0
    return 0


_BLANK_LINE = re.compile(r"\n[ \t]*\r?\n")
_BLOCK_OPENERS = ("/**", "/*!", "/*")


def _doc_above(code: str, found: int, floor: int, doc: str) -> int:
    """Where the doc comment written above ``code[found]`` starts (the start of the line
    holding the doc's first line, or of a lone ``/**`` line just above it); ``found``
    itself when the doc's text is not there with no blank line before the member."""
    first = next((line.strip() for line in doc.splitlines() if line.strip()), "")
    at = code.rfind(first, floor, found) if first else -1
    if at < 0 or _BLANK_LINE.search(code, at, found):
        return found
    start = max(floor, code.rfind("\n", floor, at) + 1)
    if start > floor:
        above = max(floor, code.rfind("\n", floor, start - 1) + 1)
        if code[above : start - 1].strip() in _BLOCK_OPENERS:
            start = above
    return start


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
    """Text's identifiers, each camelCase one followed by its split words.

    The lexical index's tokenizer already splits ``snake_case`` at the
    underscores, so only identifiers with a case change need their words added.
    """
    out: list[str] = []
    for ident in _IDENT.findall(text):
        out.append(ident)
        if any(len(_split_part(part)) > 1 for part in ident.split("_") if part):
            out.extend(split_identifier(ident))
    return " ".join(out)


def code_words(text: str) -> str:
    """Code as the words of its identifiers (and of its comments and strings), in order."""
    out: list[str] = []
    for token in _TOKEN.findall(text):
        if token.isascii():
            out.extend(split_identifier(token) or [token.lower()])
        else:
            out.append(token.lower())
    return " ".join(out)


def summarize_doc(doc: str) -> str:
    """The first paragraph of a doc, stopping at tags and parameter sections.

    Tags (``@param``, ``\\param``, ``:returns:``) and section headings (``Args:``,
    Rust's ``# Arguments``) end the summary; a ``@brief``/``\\brief`` tag gives it;
    inline tags (``{@link Dock#release}``, ``{@code x}``) keep their text only.
    """
    lines: list[str] = []
    for line in doc.strip().splitlines():
        if not line.strip():
            if lines:
                break
            continue
        brief = _SUMMARY_TAG.match(line)
        if brief is not None:
            if lines:
                break
            line = line[brief.end() :]
        elif _TAG_LINE.match(line) or _SECTION.match(line):
            break
        lines.append(line.strip())
    return _INLINE_TAG.sub(lambda m: m.group(1).strip(), " ".join(lines))
