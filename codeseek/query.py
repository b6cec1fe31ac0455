"""What a search asks: :class:`Filters` and :class:`Query`, and their JSON.

Light (no numpy): the daemon's client builds queries in a short-lived
``codeseek search`` process. A :class:`Query` is the one value every search
service takes (:class:`codeseek.service.SearchService`: the in-process
:class:`~codeseek.api.Index` and the daemon's client), and its JSON is what
the daemon's protocol carries. Adding a filter means a field of
:class:`Filters` (its JSON follows from the field), a condition in the store's
:meth:`~codeseek.store.Store.filtered_ids`, and an option in the parser.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, fields, replace
from typing import Any

from codeseek.errors import InvalidQuery

DEFAULT_K = 10
MAX_K = 2**31 - 1
"""The largest k any search takes: no index holds this many units, so a larger k has the
same answer (the daemon refuses more; SQLite's integers stop at 2**63)."""


@dataclass(frozen=True)
class Filters:
    """Restrictions on results; an empty tuple (or ``None``) means no restriction.

    Attributes:
        languages: language names (any case).
        paths: gitignore-style patterns, relative to the repository root.
        kinds: unit kinds or a language's word for a class (``struct``).
        since: only units of files modified at or after this time (seconds since
            1970, as ``time.time()``; :func:`codeseek.filtering.since_time` reads
            ``2026-11-30``, ``3d`` and the like).
    """

    languages: tuple[str, ...] = ()
    paths: tuple[str, ...] = ()
    kinds: tuple[str, ...] = ()
    since: float | None = None

    def validate(self) -> None:
        """Raise a clear error for an unknown language or unit, or an unusable pattern."""
        self.normalised()

    def normalised(self) -> Filters:
        """The same filters in the stored names: ``Python`` -> ``python``, ``struct`` ->
        ``class`` (:mod:`codeseek.filtering`); raises a clear error for a bad value."""
        from codeseek.filtering import check_files_pattern, language_name, unit_kind

        for pattern in self.paths:
            check_files_pattern(pattern)
        return replace(self, languages=tuple(dict.fromkeys(language_name(x)
                                                           for x in self.languages)),
                       kinds=tuple(dict.fromkeys(unit_kind(x) for x in self.kinds)))

    @property
    def active(self) -> bool:
        """Whether any filter is set."""
        return any(value not in ((), None) for value in self._values())

    def _values(self) -> list[object]:
        return [self.__dict__[f.name] for f in fields(self)]

    def to_json(self) -> dict[str, Any]:
        """A JSON-ready dict: lists for the tuples."""
        return {f.name: (list(value) if isinstance(value, tuple) else value)
                for f, value in zip(fields(self), self._values(), strict=True)}

    @classmethod
    def from_json(cls, data: object) -> Filters:
        """The filters of a JSON object; a missing field is no restriction. Raises
        ValueError naming the field for a value of the wrong type."""
        if not isinstance(data, dict):
            raise ValueError("'filters' must be an object")
        unknown = sorted(set(data) - {f.name for f in fields(cls)})
        if unknown:
            raise ValueError(f"unknown filter {unknown[0][:40]!r}")
        values: dict[str, Any] = {}
        for name in ("languages", "paths", "kinds"):
            value = data.get(name, [])
            if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
                raise ValueError(f"'{name}' must be a list of strings")
            values[name] = tuple(value)
        since = data.get("since")
        if since is not None and (isinstance(since, bool) or not isinstance(since, int | float)
                                  or not math.isfinite(since)):
            raise ValueError("'since' must be a time in seconds since 1970, or null")
        values["since"] = None if since is None else float(since)
        return cls(**values)


@dataclass(frozen=True)
class Query:
    """One search: a text (what the user is looking for) or a unit (its neighbours:
    the units whose meaning is nearest its own), the number of hits, the filters.

    Attributes:
        text: the words to search for (None for a unit's neighbours).
        unit_id: the unit whose neighbours are asked for (its row id in the index).
        k: how many hits at most.
        filters: the restrictions on the hits.
    """

    text: str | None = None
    unit_id: int | None = None
    k: int = DEFAULT_K
    filters: Filters = field(default_factory=Filters)

    def __post_init__(self) -> None:
        if (self.text is None) == (self.unit_id is None):
            raise ValueError("a query holds a text or a unit, one of them")

    def to_json(self) -> dict[str, Any]:
        """A JSON-ready dict (the daemon's wire format of a query)."""
        record: dict[str, Any] = ({"text": self.text} if self.text is not None
                                  else {"unit_id": self.unit_id})
        return {**record, "k": self.k, "filters": self.filters.to_json()}

    @classmethod
    def from_json(cls, data: object) -> Query:
        """The query of a JSON object; raises ValueError naming the field that is wrong."""
        if not isinstance(data, dict):
            raise ValueError("a query must be an object")
        unknown = sorted(set(data) - {"text", "unit_id", "k", "filters"})
        if unknown:
            raise ValueError(f"unknown query field {unknown[0][:40]!r}")
        text, unit_id = data.get("text"), data.get("unit_id")
        if text is not None and not isinstance(text, str):
            raise ValueError("'text' must be a string")
        if unit_id is not None and (not isinstance(unit_id, int) or isinstance(unit_id, bool)):
            raise ValueError("'unit_id' must be a whole number")
        if (text is None) == (unit_id is None):
            raise ValueError("a query holds 'text' or 'unit_id', one of them")
        k = data.get("k", DEFAULT_K)
        if not isinstance(k, int) or isinstance(k, bool):
            raise ValueError("'k' must be a whole number")
        return cls(text=text, unit_id=unit_id, k=k,
                   filters=Filters.from_json(data.get("filters", {})))


def as_queries(items: Sequence[str | Query], k: int, filters: Filters) -> list[Query]:
    """Queries for a batch: a text becomes a query with ``k`` and ``filters``; a
    :class:`Query` is taken as it is."""
    return [item if isinstance(item, Query) else Query(text=item, k=k, filters=filters)
            for item in items]


def filters_of(filters: Filters | None, languages: Sequence[str] = (),
               paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> Filters:
    """``filters``, or the filters the older keyword arguments spell out (not both)."""
    if filters is None:
        return Filters(tuple(languages), tuple(paths), tuple(kinds))
    if languages or paths or kinds:
        raise InvalidQuery("give filters or languages/paths/kinds, not both")
    return filters
