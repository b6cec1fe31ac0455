"""Filters as the UI holds them: an ordered set of chips, typed as words of the query.

Typing ``language=go``, ``unit=method``, ``files=billing/`` or ``since=3d`` in
the query line followed by a space turns the word into a chip (the same filters
as ``codeseek search --language/--unit/--files/--since``; an age counts back
from each search). Chips keep the order they were
added in, so "remove the last one" means what the user expects.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

from codeseek.filtering import since_time
from codeseek.query import Filters
from codeseek.units import KINDS

LANGUAGE = "language"
FILES = "files"
UNIT = "unit"
SINCE = "since"
FIELDS = (LANGUAGE, UNIT, FILES, SINCE)
"""Chip names, as typed in the query line (``NAME=VALUE``)."""

_NAMES = "|".join(FIELDS)
_TOKEN = re.compile(rf"(?<!\S)({_NAMES})=(\S+)(?=\s)")
_PARTIAL = re.compile(rf"(?<!\S)({_NAMES})=\S*$")

Chip = tuple[str, str]
"""(field, value), e.g. ("language", "go")."""


@dataclass(frozen=True)
class FilterSet:
    """The active filters, in the order they were added."""

    chips: tuple[Chip, ...] = ()

    def _values(self, field: str) -> tuple[str, ...]:
        return tuple(value for name, value in self.chips if name == field)

    @property
    def languages(self) -> tuple[str, ...]:
        """Language names."""
        return self._values(LANGUAGE)

    @property
    def kinds(self) -> tuple[str, ...]:
        """Unit kinds."""
        return self._values(UNIT)

    @property
    def paths(self) -> tuple[str, ...]:
        """Gitignore-style path patterns."""
        return self._values(FILES)

    @property
    def since(self) -> float | None:
        """The time the last ``since`` chip names (None without one)."""
        values = self._values(SINCE)
        return since_time(values[-1]) if values else None

    def as_filters(self) -> Filters:
        """The library's filter record."""
        return Filters(self.languages, self.paths, self.kinds, self.since)

    def added(self, chip: Chip) -> FilterSet:
        """With one more chip (checked first: raises CodeseekError when unknown)."""
        if chip in self.chips:
            return self
        field, value = chip
        if field not in FIELDS:
            raise ValueError(f"unknown filter field {field!r}")
        candidate = FilterSet((*self.chips, chip))
        candidate.as_filters().validate()
        return candidate

    def removed(self, position: int) -> FilterSet:
        """Without the chip at ``position`` (negative counts from the end)."""
        if not self.chips:
            return self
        chips = list(self.chips)
        del chips[position]
        return FilterSet(tuple(chips))

    def cycled(self, field: str, choices: Sequence[str]) -> FilterSet:
        """The field's next choice: none -> first -> ... -> last -> none."""
        current = self._values(field)
        others = tuple(chip for chip in self.chips if chip[0] != field)
        if not choices:
            return FilterSet(others)
        if not current or current[-1] not in choices:
            return FilterSet((*others, (field, choices[0])))
        position = list(choices).index(current[-1]) + 1
        if position == len(choices):
            return FilterSet(others)
        return FilterSet((*others, (field, choices[position])))


def take_chips(text: str) -> tuple[str, list[Chip]]:
    """Complete filter words (each followed by white space) taken out of the query text."""
    chips = [(m.group(1), m.group(2)) for m in _TOKEN.finditer(text)]
    if not chips:
        return text, []
    rest = _TOKEN.sub("", text)
    rest = re.sub(r"\s{2,}", " ", rest).lstrip()
    return rest, chips


def query_words(text: str) -> str:
    """The query to search for: the text without a filter word still being typed."""
    return _PARTIAL.sub("", text).strip()


def chip_text(chip: Chip) -> str:
    """A chip as typed: ``language=go``."""
    return f"{chip[0]}={chip[1]}"


def kind_choices() -> tuple[str, ...]:
    """The kinds a chip may name."""
    return KINDS
