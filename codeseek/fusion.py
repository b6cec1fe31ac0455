"""The one ranking rule of served search: how a dense and a lexical candidate list
become one ranking (:func:`fuse`), and how many candidates each side gives.

Light (numpy, nothing of the index): :mod:`codeseek.search` fuses one index's
candidates with it, and :mod:`codeseek.multi` fuses the pooled candidates of
several indexes with the same function, so a search across repositories ranks
exactly as one index of them all would. A nested helper's fused score is lowered
(``Fusion.nested``): callers pass which candidates are nested helpers (``enclosing``,
from :meth:`codeseek.store.Store.enclosing` or :func:`enclosing_map`).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Protocol

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

# What the ranking does with a nested helper (a function defined inside another function or
# method): its fused score lowered by a quarter of a standard deviation, so the function a
# question names ranks above the helpers inside it unless a helper is clearly the better
# match. Chosen on the same training splits plus the training half of the public question
# sets among no rule, the enclosing unit lifted above its helper, a factor and amounts
# (scripts/bench_quality.py --corpus nested, stage 3c): training 0.5141 against 0.5129 for
# no rule; the held-out figures do not fall (docstrings 0.5160 against 0.5158, questions
# MRR@10 0.4643 against 0.4642), within the noise.
NESTED_RULE = "lowered"
NESTED_AMOUNT = 0.25

Candidates = Sequence[tuple[int, float]]
"""(unit id, score) pairs, best first: cosines for the dense side, BM25 for the lexical."""
Enclosing = Mapping[int, int]
"""Nested helper's unit id -> the unit id of the function or method it is defined in
(:func:`enclosing_map`; in a store, :meth:`codeseek.store.Store.enclosing`)."""


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
        nested: what happens to a nested helper (:data:`NESTED_RULES`): ``none``;
            ``enclosing-first`` (when a helper and the unit it is defined in are
            both candidates, the enclosing unit ranks at least as high as its best
            helper, just above it); ``scaled`` (a helper's fused score times
            ``nested_amount``); ``lowered`` (a helper's fused score minus
            ``nested_amount``, in the fused score's units: standard deviations for
            ``zscore``).
        nested_amount: the factor of ``scaled`` or the amount of ``lowered``.
    """

    kind: str = FUSION_KIND
    dense_weight: float = DENSE_WEIGHT
    rrf_k: float = RRF_K
    nested: str = NESTED_RULE
    nested_amount: float = NESTED_AMOUNT

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"kind": self.kind, "dense_weight": self.dense_weight, "rrf_k": self.rrf_k,
                "nested": self.nested, "nested_amount": self.nested_amount}

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
        # a fusion saved before the nested-helper rule existed takes the served one
        nested = str(data.get("nested", NESTED_RULE))
        if nested not in NESTED_RULES:
            raise ValueError(f"unknown nested-helper rule {nested!r}")
        amount = data.get("nested_amount", NESTED_AMOUNT)
        if not isinstance(amount, int | float) or isinstance(amount, bool):
            raise ValueError("the nested-helper amount must be a number")
        return cls(kind, float(weight), float(rrf_k), nested, float(amount))


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
NESTED_RULES = ("none", "enclosing-first", "scaled", "lowered")
DEFAULT_FUSION = Fusion()


def _depths(fused: dict[int, float], enclosing: Enclosing) -> dict[int, int]:
    """How many enclosing candidates lie above each candidate (0: none is a candidate)."""
    depths: dict[int, int] = {}
    for item in fused:
        depth, at = 0, item
        while (parent := enclosing.get(at)) is not None and parent in fused \
                and depth < len(fused):
            depth, at = depth + 1, parent
        depths[item] = depth
    return depths


def _nested_prior(fused: dict[int, float], enclosing: Enclosing,
                  fusion: Fusion) -> tuple[dict[int, float], dict[int, int]]:
    """The fused scores after the nested-helper rule, and each candidate's nesting depth
    among the candidates (ties go to the shallower, so an enclosing unit lifted to its
    helper's score ranks just above it)."""
    if fusion.nested == "none" or not enclosing:
        return fused, {}
    if fusion.nested == "scaled":
        return {i: s * fusion.nested_amount if i in enclosing else s
                for i, s in fused.items()}, {}
    if fusion.nested == "lowered":
        return {i: s - fusion.nested_amount if i in enclosing else s
                for i, s in fused.items()}, {}
    lifted = dict(fused)
    depths = _depths(fused, enclosing)
    for item, score in fused.items():
        at = item
        for _ in range(depths[item]):
            at = enclosing[at]
            lifted[at] = max(lifted[at], score)
    return lifted, depths


def fuse(dense: Candidates, lexical: Candidates, fusion: Fusion = DEFAULT_FUSION,
         enclosing: Enclosing | None = None) -> list[tuple[int, float]]:
    """The served ranking: (unit id, fused score) of every candidate, best first.

    ``enclosing`` says which candidates are nested helpers and where they are defined
    (at least every candidate that is one: :meth:`codeseek.store.Store.enclosing`);
    ``fusion.nested`` says what that does to the ranking. Ties go to the unit with fewer
    enclosing candidates, then to the higher cosine, then to the lower id, so the order is
    total.
    """
    fused = _FUSERS[fusion.kind](dense, lexical, fusion)
    fused, depths = _nested_prior(fused, enclosing or {}, fusion)
    similarity = dict(dense)
    order = sorted(fused, key=lambda i: (-fused[i], depths.get(i, 0),
                                         -similarity.get(i, -2.0), i))
    return [(item, fused[item]) for item in order]


class Place(Protocol):
    """Where a unit sits: what :func:`enclosing_map` reads (a CodeUnit has it)."""

    @property
    def path(self) -> str: ...
    @property
    def kind(self) -> str: ...
    @property
    def name(self) -> str: ...
    @property
    def qualname(self) -> str: ...
    @property
    def start_line(self) -> int: ...
    @property
    def end_line(self) -> int: ...


def is_enclosed_by(inner: Place, outer: Place) -> bool:
    """Whether ``inner`` is a nested helper defined directly in ``outer``: a function
    (not a method) of the same file whose qualified name is ``outer``'s plus its own
    name, within ``outer``'s lines, ``outer`` being a function or a method."""
    return (inner.kind == "function" and outer.kind in ("function", "method")
            and inner.path == outer.path
            and inner.qualname == f"{outer.qualname}.{inner.name}"
            and outer.start_line <= inner.start_line and inner.end_line <= outer.end_line)


def enclosing_map(units: Iterable[tuple[int, Place]]) -> dict[int, int]:
    """Each nested helper's id -> the id of the unit it is defined in (the innermost
    when redefinitions leave several), over (id, unit) pairs: what
    :meth:`codeseek.store.Store.enclosing` finds in an index."""
    by_name: dict[tuple[str, str], list[tuple[int, Place]]] = {}
    items = list(units)
    for item, unit in items:
        by_name.setdefault((unit.path, unit.qualname), []).append((item, unit))
    found: dict[int, int] = {}
    for item, unit in items:
        if unit.kind != "function" or "." not in unit.qualname:
            continue
        outer_name = unit.qualname[: -len(unit.name) - 1]
        if not unit.qualname.endswith("." + unit.name):
            continue
        outers = [(o, u) for o, u in by_name.get((unit.path, outer_name), [])
                  if is_enclosed_by(unit, u)]
        if outers:
            found[item] = max(outers, key=lambda pair: (pair[1].start_line, pair[0]))[0]
    return found
