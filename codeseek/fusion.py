"""The one ranking rule of served search: how a dense and a lexical candidate list
become one ranking (:func:`fuse`), and how many candidates each side gives.

Light (numpy, nothing of the index): :mod:`codeseek.search` fuses one index's
candidates with it, and :mod:`codeseek.multi` fuses the pooled candidates of
several indexes with the same function, so a search across repositories ranks
exactly as one index of them all would.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

# The served fusion: each side's scores standardised over its candidates, then weighted
# 0.6 dense, 0.4 keywords. Kind and weight were chosen on the training splits of the recall
# checks of the standard library, sample_repo and three packaged repositories the tests read
# (scripts/bench_quality.py prints every rule's training and held-out figures); `codeseek
# tune` chooses the weight per repository. RRF_K is the rank offset of the ``rrf`` rule
# (the original reciprocal rank fusion paper used 60, from memory; 5 did better here).
FUSION_KIND = "zscore"
RRF_K = 5
DENSE_WEIGHT = 0.6
# Each side's best CANDIDATES are fused: 200 rather than 100 or 300 by the same training
# splits (scripts/bench_quality.py, stage "candidates").
CANDIDATES = 200

Candidates = Sequence[tuple[int, float]]
"""(unit id, score) pairs, best first: cosines for the dense side, BM25 for the lexical."""


@dataclass(frozen=True)
class Fusion:
    """How the dense and lexical candidate lists become one ranking.

    Attributes:
        kind: ``rrf`` (reciprocal rank fusion: a unit scores ``weight / (rrf_k +
            rank)`` on each side it appears in), ``zscore`` (each side's scores in
            standard deviations over its candidates, counted from the worst, then
            a weighted sum; a unit missing from a side gets 0 there) or
            ``linear`` (the same with scores scaled to [0, 1]).
        dense_weight: the dense side's weight in [0, 1]; the lexical side gets
            ``1 - dense_weight``.
        rrf_k: the rank offset of ``rrf``.
    """

    kind: str = FUSION_KIND
    dense_weight: float = DENSE_WEIGHT
    rrf_k: float = RRF_K

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"kind": self.kind, "dense_weight": self.dense_weight, "rrf_k": self.rrf_k}

    @classmethod
    def from_json(cls, data: dict[str, object]) -> Fusion:
        """The fusion a :meth:`to_json` dict describes."""
        kind = str(data.get("kind", FUSION_KIND))
        if kind not in FUSION_KINDS:
            raise ValueError(f"unknown fusion kind {kind!r}")
        weight = data.get("dense_weight", DENSE_WEIGHT)
        rrf_k = data.get("rrf_k", RRF_K)
        if not isinstance(weight, int | float) or not isinstance(rrf_k, int | float):
            raise ValueError("fusion weights must be numbers")
        return cls(kind, float(weight), float(rrf_k))


def _rrf_scores(dense: Candidates, lexical: Candidates, fusion: Fusion) -> dict[int, float]:
    fused: dict[int, float] = {}
    for weight, side in ((fusion.dense_weight, dense), (1.0 - fusion.dense_weight, lexical)):
        for rank, (item, _) in enumerate(side, 1):
            fused[item] = fused.get(item, 0.0) + weight / (fusion.rrf_k + rank)
    return fused


def _unit_scaled(side: Candidates) -> dict[int, float]:
    """Scores mapped to [0, 1] over one candidate list (best 1, worst 0)."""
    if not side:
        return {}
    scores = [score for _, score in side]
    low, high = min(scores), max(scores)
    span = high - low
    return {item: (score - low) / span if span > 0 else 1.0 for item, score in side}


def _standardised(side: Candidates) -> dict[int, float]:
    """Scores in standard deviations above the candidate list's worst (a flat list: 0)."""
    if not side:
        return {}
    scores = np.array([score for _, score in side], dtype=np.float64)
    spread = float(scores.std())
    if spread == 0:
        return {item: 0.0 for item, _ in side}
    values = (scores - scores.min()) / spread
    return {item: float(value) for (item, _), value in zip(side, values, strict=True)}


def _weighted_sum(dense: dict[int, float], lexical: dict[int, float],
                  fusion: Fusion) -> dict[int, float]:
    fused: dict[int, float] = {}
    for weight, side in ((fusion.dense_weight, dense), (1.0 - fusion.dense_weight, lexical)):
        for item, value in side.items():
            fused[item] = fused.get(item, 0.0) + weight * value
    return fused


def _linear_scores(dense: Candidates, lexical: Candidates, fusion: Fusion) -> dict[int, float]:
    return _weighted_sum(_unit_scaled(dense), _unit_scaled(lexical), fusion)


def _zscore_scores(dense: Candidates, lexical: Candidates, fusion: Fusion) -> dict[int, float]:
    return _weighted_sum(_standardised(dense), _standardised(lexical), fusion)


_FUSERS = {"rrf": _rrf_scores, "linear": _linear_scores, "zscore": _zscore_scores}
FUSION_KINDS = tuple(_FUSERS)
DEFAULT_FUSION = Fusion()


def fuse(dense: Candidates, lexical: Candidates,
         fusion: Fusion = DEFAULT_FUSION) -> list[tuple[int, float]]:
    """The served ranking: (unit id, fused score) of every candidate, best first.

    Ties go to the higher cosine, then to the lower id, so the order is total.
    """
    fused = _FUSERS[fusion.kind](dense, lexical, fusion)
    similarity = dict(dense)
    order = sorted(fused, key=lambda i: (-fused[i], -similarity.get(i, -2.0), i))
    return [(item, fused[item]) for item in order]
