"""How sure a hit is: its cosine set against what off-topic questions get.

A cosine on its own says little: one model's 0.45 is a close match, another's
a loose one, and an index of many units gives every question some near unit.
So each index gets a baseline: the best cosine that each of a fixed set of
off-topic questions (cooking, weather, sport, gardening: phrases far from any
code, written for codeseek) finds in it. A hit's confidence is the empirical
CDF of that baseline at the hit's cosine: the fraction of off-topic questions
whose best hit is less close to them than this hit is to its query, i.e.
``#{baseline < cosine} / #baseline``. 0 means no better than the
worst off-topic question's best hit, 1 means better than every one of them.

The baseline is computed lazily, once per index state (the store's generation,
the vector index object and the query adapter), and kept in memory on the
:class:`~codeseek.search.Searcher`; nothing is written to disk.
"""

from __future__ import annotations

from bisect import bisect_left
from collections.abc import Sequence
from dataclasses import dataclass

OFF_TOPIC_QUERIES: tuple[str, ...] = (
    "how long to simmer a tomato soup",
    "recipe for a lemon cake with poppy seeds",
    "will it rain tomorrow afternoon",
    "the warmest month of the year at the seaside",
    "who scored the winning goal in the final",
    "rules of a penalty shootout",
    "best time to plant tulip bulbs in autumn",
    "how often should I water a cactus",
    "a poem about the autumn leaves falling",
    "the history of medieval castles",
    "how to knit a wool scarf for winter",
    "training plan for a first marathon",
    "what do owls eat at night",
    "how to brew a strong cup of tea",
    "the tallest mountains on the continent",
    "how to fold a paper crane",
    "painting a watercolour landscape at sunset",
    "folk songs sung at a village wedding",
    "how to tie a sailing knot",
    "why is the sky blue in the afternoon",
    "a cheap holiday by the lake in summer",
    "the migration of whales along the coast",
    "how to bake sourdough bread at home",
    "symptoms of a cold and a sore throat",
)
"""Phrases far from any code, written for codeseek (no names of people or brands)."""

WEAK_QUANTILE = 0.9
"""A best hit whose confidence is below this is a weak match: its cosine does not beat
the off-topic questions' 90th percentile, so one off-topic question in ten would find
something at least as close (a one-in-ten false-alarm rate, a common practice choice of
level; the real-model tests on sample_repo check it separates a nonsense question from
a real one)."""


@dataclass(frozen=True)
class Baseline:
    """The best cosines off-topic questions get on one index state, sorted ascending."""

    cosines: tuple[float, ...]

    @classmethod
    def of(cls, best: Sequence[float]) -> Baseline:
        """The baseline of these best cosines (any order)."""
        return cls(tuple(sorted(float(c) for c in best)))

    def confidence(self, cosine: float | None) -> float | None:
        """The empirical CDF of the baseline at ``cosine``: the fraction of off-topic best
        cosines strictly below it, in [0, 1]; None for no cosine or an empty baseline."""
        if cosine is None or not self.cosines:
            return None
        return bisect_left(self.cosines, float(cosine)) / len(self.cosines)


def is_weak(confidence: float | None) -> bool:
    """Whether a hit of this confidence is no better than off-topic questions'
    (None, no evidence either way, is not called weak)."""
    return confidence is not None and confidence < WEAK_QUANTILE


WEAK_NOTE = ("note: weak match: the best hit is no closer than what off-topic questions "
             "find in this index; try other words")
"""The one line plain output and the TUI show for a weak answer."""


def weak_note(confidences: Sequence[float | None]) -> str | None:
    """:data:`WEAK_NOTE` when even the surest hit of an answer is weak, else None (also
    when no hit carries a confidence, as neighbours answers do not)."""
    known = [c for c in confidences if c is not None]
    return WEAK_NOTE if known and is_weak(max(known)) else None
