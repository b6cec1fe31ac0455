"""Queries from docs: the cleaned summary, the name stripped, and the keys that find duplicates."""

from __future__ import annotations

import hashlib
import re

from codeseek.units import CodeUnit, summarize_doc

MIN_QUERY_WORDS = 3

_MARKUP: tuple[tuple[re.Pattern[str], str], ...] = (
    (re.compile(r":[\w.:+-]+:`~?([^`<]*?)\s*(?:<[^>]*>)?`"), r"\1"),  # reST roles
    (re.compile(r"\{@\w+\s+([^}]*)\}"), r"\1"),  # JSDoc / Javadoc inline tags
    (re.compile(r"\[`?([^\]`]+)`?\]\([^)]*\)"), r"\1"),  # Markdown links
    (re.compile(r"\[`([^\]`]+)`\]"), r"\1"),  # rustdoc intra-doc links
    (re.compile(r"`+([^`]*)`+"), r"\1"),  # inline code
    (re.compile(r"(\*\*|__)(\S(?:.*?\S)?)\1"), r"\2"),  # strong
    (re.compile(r"(?<![\w*])\*(\S(?:.*?\S)?)\*(?![\w*])"), r"\1"),  # emphasis
    (re.compile(r"</?[A-Za-z][^>]*>"), ""),  # HTML tags
    (re.compile(r"^\s*(?:[-*+>#]+|\d+[.)])\s+"), ""),  # list, quote, heading markers
)
_WORD = re.compile(r"[A-Za-z]+")
_NOT_WORD = re.compile(r"[\W_]+")


def clean_summary(doc: str) -> str:
    """The doc's first paragraph without tags, parameter sections or markup."""
    text = summarize_doc(doc)
    for pattern, replacement in _MARKUP:
        text = pattern.sub(replacement, text)
    return " ".join(text.split())


def strip_leading_name(summary: str, unit: CodeUnit) -> tuple[str, bool]:
    """The summary without a leading copy of the unit's name; whether one was removed."""
    for name in dict.fromkeys((unit.qualname, unit.name)):
        if not name:
            continue
        match = re.match(rf"(?:the\s+|an?\s+)?`?{re.escape(name)}`?(?:\(\))?[\s:,-]+",
                         summary, flags=re.IGNORECASE)
        if match and match.end() < len(summary):
            return summary[match.end():], True
    return summary, False


def query_of(unit: CodeUnit) -> tuple[str, bool]:
    """The query a unit's doc makes, and whether a leading name was stripped from it."""
    return strip_leading_name(clean_summary(unit.doc), unit)


def word_count(text: str) -> int:
    """Words of letters in a text."""
    return len(_WORD.findall(text))


def doc_key(query: str) -> str:
    """A query normalised so that near-identical docs compare equal."""
    return _NOT_WORD.sub(" ", query.lower()).strip()


def body_key(unit: CodeUnit) -> str:
    """The unit's code without its doc, whitespace-insensitive."""
    return hashlib.sha256(" ".join(unit.code_without_doc.split()).encode(
        "utf-8", "surrogatepass")).hexdigest()
