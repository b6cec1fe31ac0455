"""The query path: embed the query, take HNSW and BM25 candidates, fuse, filter.

Dense candidates come from the HNSW index (or, when filters narrow the pool,
from an exact search over the filtered units' vectors); lexical candidates
from SQLite FTS5 BM25 over identifier-split text (when filters narrow the
pool, its own best matches among all of them). :func:`fuse` combines the two
candidate lists (by default a weighted sum of each side's standardised
scores; weighted reciprocal rank fusion and scaled scores are the
alternatives); it is the one ranking rule of served search. The recall checks
(:mod:`codeseek.evaluate`) take their candidates by the same rules (the same
HNSW search, the same exact search over a pool's vectors, a pool's own keyword
matches) and call the same :func:`fuse`; ``tests/test_evaluate.py`` holds their
served rank of every answer to :meth:`Searcher.ranked` on every pool. A
query-side adapter (:mod:`codeseek.adapter`), when the index holds one, maps
the query vector before the dense search.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import pathspec

from codeseek.adapter import QueryAdapter
from codeseek.client import MAX_K
from codeseek.confidence import OFF_TOPIC_QUERIES, Baseline
from codeseek.embed import Embedder
from codeseek.errors import InvalidQuery
from codeseek.hits import SearchHit
from codeseek.locks import ReadWriteLock
from codeseek.query import Filters
from codeseek.store import Store, StoredUnit
from codeseek.tiers import tier_of
from codeseek.units import CodeUnit, split_identifier
from codeseek.vectors import VectorIndex, exact_search

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
EXACT_FILTER_LIMIT = 50_000
SNIPPET_LINES = 8
NEIGHBOURS_OF = "neighbours of "
"""How a neighbours answer names what it answers: ``neighbours of QUALNAME``."""
# common practice: drop the most frequent English function words from lexical queries
STOPWORDS = frozenset({
    "a", "an", "and", "are", "as", "at", "be", "by", "can", "do", "does", "for", "from",
    "how", "i", "in", "is", "it", "of", "on", "or", "our", "that", "the", "this", "to",
    "we", "what", "when", "where", "which", "who", "why", "with", "you", "your",
})


def lexical_match(query: str) -> str:
    """An FTS5 MATCH expression: the query's words (identifiers split), OR-ed."""
    words: list[str] = []
    for token in re.findall(r"[A-Za-z0-9_]+", query):
        for word in [token.lower(), *split_identifier(token)]:
            if word not in STOPWORDS and word not in words and len(word) > 1:
                words.append(word)
    return " OR ".join(f'"{w}"' for w in words)


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


def snippet_of(unit: CodeUnit, lines: int = SNIPPET_LINES) -> str:
    """The first lines of a unit's code."""
    return "\n".join(unit.code.splitlines()[:lines])


class Searcher:
    """Answers queries over one store, its vector index and its embedder.

    ``adapter`` (a query-side linear map made by ``codeseek tune``) is applied
    to every query vector; ``fusion`` is the ranking rule (:func:`fuse`).
    """

    def __init__(self, store: Store, vectors: VectorIndex, embedder: Embedder,
                 model_id: str, lock: ReadWriteLock | None = None, *,
                 adapter: QueryAdapter | None = None, fusion: Fusion | None = None) -> None:
        self.store = store
        self.vectors = vectors
        self.embedder = embedder
        self.model_id = model_id
        self.lock = lock or ReadWriteLock()
        self.adapter = adapter
        self.fusion = fusion or DEFAULT_FUSION
        self.tier = tier_of(model_id)  # every stored vector searched is of this tier
        self._baseline: tuple[object, Baseline] | None = None

    def baseline(self) -> Baseline:
        """The off-topic questions' best cosines on this index state (computed once per
        store generation, vector index and adapter; the caller holds the read lock)."""
        key = (self.store.generation(), id(self.vectors), id(self.adapter))
        if self._baseline is None or self._baseline[0] != key:
            matrix = self.query_vectors(OFF_TOPIC_QUERIES)
            best = [hits[0][1] for hits in (self.vectors.search(v, 1) for v in matrix) if hits]
            self._baseline = (key, Baseline.of(best))
        return self._baseline[1]

    def search(self, query: str, k: int = 10, filters: Filters | None = None) -> list[SearchHit]:
        """The k best units for one query."""
        return self.search_many([query], k, filters)[0]

    def search_many(self, queries: Sequence[str], k: int = 10,
                    filters: Filters | None = None) -> list[list[SearchHit]]:
        """The k best units for each query (queries are embedded in one batch)."""
        filters = (filters or Filters()).normalised()
        if k <= 0:
            raise InvalidQuery(f"-k must be at least 1, not {k}")
        for query in queries:
            if not query.strip():
                raise InvalidQuery("the query is empty; type what you are looking for")
        matrix = self.query_vectors(queries)
        with self.lock.read():  # one committed state for the whole answer
            pool = self._filtered_pool(filters)
            return [self._answer(q, matrix[i], k, pool) for i, q in enumerate(queries)]

    def query_vectors(self, queries: Sequence[str]) -> np.ndarray:
        """The query vectors dense search uses (the adapter applied, if any)."""
        matrix = self.embedder.encode(list(queries))
        return matrix if self.adapter is None else self.adapter.apply(matrix)

    def _filtered_pool(self, filters: Filters) -> set[int] | None:
        if not filters.active:
            return None
        ids = self.store.filtered_ids(filters)
        if filters.paths:
            spec = pathspec.GitIgnoreSpec.from_lines(filters.paths)
            paths = self.store.paths_of(ids)
            ids = [i for i in ids if spec.match_file(paths.get(i, ""))]
        return set(ids)

    def dense(self, vector: np.ndarray, n: int, pool: set[int] | None) -> list[tuple[int, float]]:
        """(unit id, cosine) of the n nearest units, within the pool if given."""
        if pool is None:
            return self.vectors.search(vector, n)
        if len(pool) <= EXACT_FILTER_LIMIT:
            labels, matrix = self.store.unit_vectors(self.model_id, self.vectors.dim,
                                                     sorted(pool))
            return exact_search(vector, labels, matrix, n)
        hits = self.vectors.search(vector, n * 20)
        return [h for h in hits if h[0] in pool][:n]

    def lexical(self, query: str, n: int, pool: set[int] | None) -> list[tuple[int, float]]:
        """(unit id, BM25) of the n best lexical matches, within the pool if given (every
        match is looked at, so a narrow pool keeps its own best n however far down the
        whole index's order they are; the recall checks rank pools the same way)."""
        if pool is None:
            return self.store.lexical_search(lexical_match(query), n)
        hits = self.store.lexical_search(lexical_match(query), -1)  # -1: SQLite's no limit
        return [h for h in hits if h[0] in pool][:n]

    def ranked(self, query: str, vector: np.ndarray, k: int,
               pool: set[int] | None = None) -> tuple[list[tuple[int, float]], dict[int, float]]:
        """The served ranking's best k (unit id, fused score), and the dense cosines seen."""
        k = min(k, MAX_K)  # beyond every unit of any index; SQLite's integers stop at 2**63
        n = max(CANDIDATES, k * 3)
        dense = self.dense(vector, n, pool)
        lexical = self.lexical(query, n, pool)
        return fuse(dense, lexical, self.fusion)[:k], dict(dense)

    def _answer(self, query: str, vector: np.ndarray, k: int,
                pool: set[int] | None) -> list[SearchHit]:
        ranked, similarity = self.ranked(query, vector, k, pool)
        units = self.store.units_by_ids([unit_id for unit_id, _ in ranked])
        cosines = self._cosines(vector, [unit_id for unit_id, _ in ranked], similarity)
        baseline = self.baseline()
        hits: list[SearchHit] = []
        for unit_id, score in ranked:
            stored = units.get(unit_id)
            if stored is None:
                continue
            hit = _hit(query, len(hits) + 1, score, similarity.get(unit_id), stored)
            hits.append(replace(hit, confidence=baseline.confidence(cosines.get(unit_id)),
                                tier=self.tier))
        return hits

    def _cosines(self, vector: np.ndarray, ids: list[int],
                 similarity: dict[int, float]) -> dict[int, float]:
        """Each unit's cosine to the query: the dense side's, else (a keyword-only hit)
        from its stored vector, so its confidence rests on the same evidence; a unit with
        no stored vector has none (its confidence is None)."""
        cosines = {i: similarity[i] for i in ids if i in similarity}
        missing = [i for i in ids if i not in similarity]
        if missing:
            labels, matrix = self.store.unit_vectors(self.model_id, self.vectors.dim, missing)
            cosines.update(exact_search(vector, labels, matrix, len(labels)))
        return cosines


def _hit(query: str, rank: int, score: float, similarity: float | None,
         stored: StoredUnit) -> SearchHit:
    unit = stored.unit
    return SearchHit(
        query=query, rank=rank, score=score, similarity=similarity, path=unit.path,
        start_line=unit.start_line, end_line=unit.end_line, language=unit.language,
        kind=unit.kind, name=unit.name, qualname=unit.qualname, signature=unit.signature,
        doc_summary=unit.doc_summary, snippet=snippet_of(unit), unit_id=stored.id,
    )


def neighbour_units(searcher: Searcher, unit_id: int, k: int,
                    filters: Filters | None = None) -> list[SearchHit]:
    """The unit's neighbours: the k units whose meaning is nearest its own (nearest to
    its stored vector), within filters. Each hit's query reads ``neighbours of NAME``."""
    filters = (filters or Filters()).normalised()
    if k <= 0:
        raise InvalidQuery(f"-k must be at least 1, not {k}")
    with searcher.lock.read():
        own = searcher.store.units_by_ids([unit_id]).get(unit_id)
        labels, matrix = searcher.store.unit_vectors(searcher.model_id, searcher.vectors.dim,
                                                     [unit_id])
        if own is None or len(labels) == 0:
            raise InvalidQuery("that unit is no longer in the index (its file changed); "
                               "search again")
        pool = searcher._filtered_pool(filters)
        k = min(k, MAX_K)  # beyond every unit of any index (see Searcher.ranked)
        nearest = searcher.dense(matrix[0], max(CANDIDATES, k * 3) + 1, pool)
        ranked = [(other, cosine) for other, cosine in nearest if other != unit_id][:k]
        units = searcher.store.units_by_ids([other for other, _ in ranked])
        label = f"{NEIGHBOURS_OF}{own.unit.qualname}"
        hits: list[SearchHit] = []
        for other, cosine in ranked:
            if other in units:
                hits.append(replace(_hit(label, len(hits) + 1, cosine, cosine, units[other]),
                                    tier=searcher.tier))
        return hits
