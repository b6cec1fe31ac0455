"""The split: which pairs are held out, which train, and what was left out."""

from __future__ import annotations

import hashlib
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from codeseek.errors import InvalidSplit
from codeseek.evaluate.queries import MIN_QUERY_WORDS, body_key, doc_key, query_of, word_count
from codeseek.units import CodeUnit

DEFAULT_HOLDOUT = 0.2
DEFAULT_SEED = 0


@dataclass(frozen=True)
class Split:
    """Which units are held out: a deterministic share by hash.

    Attributes:
        holdout: the share held out, in (0, 1].
        seed: changes which units fall on each side.
        by_file: split whole files, so no held-out unit shares a file with a training one.
    """

    holdout: float = DEFAULT_HOLDOUT
    seed: int = DEFAULT_SEED
    by_file: bool = False

    def validate(self) -> None:
        """Raise a clear error for a share outside (0, 1]."""
        if not 0.0 < self.holdout <= 1.0:
            raise InvalidSplit(
                f"--holdout must be a share above 0 and at most 1, not {self.holdout}")

    def fraction(self, unit: CodeUnit, salt: str = "") -> float:
        """A uniform number in [0, 1) fixed by the unit's split key and the seed."""
        key = unit.path if self.by_file else f"{unit.path}::{unit.qualname}"
        digest = hashlib.sha256(f"{self.seed}\0{salt}\0{key}".encode(
            "utf-8", "surrogatepass")).hexdigest()
        return int(digest[:13], 16) / float(16**13)

    def held_out(self, unit: CodeUnit) -> bool:
        """Whether the unit belongs to the held-out side."""
        return self.fraction(unit) < self.holdout

    def describe(self) -> str:
        """The split in words."""
        unit = "file" if self.by_file else "unit"
        return f"{self.holdout:.0%} held out by {unit}, seed {self.seed}"

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"holdout": self.holdout, "seed": self.seed, "by_file": self.by_file}

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> Split:
        """The split a :meth:`to_json` dict describes."""
        return cls(float(data["holdout"]), int(data["seed"]), bool(data["by_file"]))


@dataclass(frozen=True)
class Case:
    """One (query, unit) pair.

    Attributes:
        position: the unit's position in the corpus.
        query: the cleaned doc summary.
        held_out: on the held-out side of the split.
        name_stripped: a leading copy of the unit's name was removed from the query.
        unique: no other unit has a near-identical doc or the same body.
    """

    position: int
    query: str
    held_out: bool
    name_stripped: bool = False
    unique: bool = True


@dataclass(frozen=True)
class Selection:
    """The pairs the checks use, and what was left out.

    ``cases`` holds every held-out pair and every training pair; held-out
    pairs are always unique, training pairs may share a doc or a body with
    another pair (:mod:`codeseek.tune` keeps such pairs out of one batch).
    """

    cases: tuple[Case, ...]
    undocumented: int
    short: int
    duplicate_docs: int
    duplicate_bodies: int

    @property
    def held_out(self) -> list[Case]:
        """The held-out pairs."""
        return [c for c in self.cases if c.held_out]

    @property
    def training(self) -> list[Case]:
        """The training pairs."""
        return [c for c in self.cases if not c.held_out]


def select_cases(units: Sequence[CodeUnit], split: Split) -> Selection:
    """The held-out and training pairs of a corpus."""
    split.validate()
    queries = [query_of(unit) for unit in units]
    long_enough = [word_count(q) >= MIN_QUERY_WORDS for q, _ in queries]
    docs = Counter(doc_key(q) for (q, _), ok in zip(queries, long_enough, strict=True) if ok)
    bodies = Counter(body_key(unit) for unit in units)
    cases: list[Case] = []
    short = duplicate_docs = duplicate_bodies = 0
    for position, (unit, (query, stripped)) in enumerate(zip(units, queries, strict=True)):
        if not long_enough[position]:
            short += bool(unit.doc.strip())
            continue
        held = split.held_out(unit)
        same_doc = docs[doc_key(query)] > 1
        same_body = bodies[body_key(unit)] > 1
        if held and (same_doc or same_body):
            duplicate_docs += same_doc
            duplicate_bodies += same_body and not same_doc
            continue
        cases.append(Case(position, query, held, stripped, not (same_doc or same_body)))
    return Selection(tuple(cases), sum(1 for u in units if not u.doc.strip()), short,
                     duplicate_docs, duplicate_bodies)
