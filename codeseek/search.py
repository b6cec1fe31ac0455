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
from dataclasses import replace

import numpy as np
import pathspec

from codeseek import bm25
from codeseek.adapter import QueryAdapter
from codeseek.bm25 import CorpusStats
from codeseek.confidence import OFF_TOPIC_QUERIES, Baseline
from codeseek.embed import Embedder
from codeseek.errors import InvalidQuery
from codeseek.fusion import (  # noqa: F401 - the fusion names search has always given
    CANDIDATES,
    DEFAULT_FUSION,
    DENSE_WEIGHT,
    FUSION_KIND,
    FUSION_KINDS,
    RRF_K,
    Candidates,
    Fusion,
    fuse,
)
from codeseek.hits import SearchHit
from codeseek.locks import ReadWriteLock
from codeseek.multi import Pick, Sides
from codeseek.query import MAX_K, Filters
from codeseek.store import Store, StoredUnit
from codeseek.tiers import tier_of
from codeseek.units import CodeUnit, split_identifier
from codeseek.vectors import VectorIndex, exact_search

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


def lexical_phrases(query: str) -> list[str]:
    """The query's words (identifiers split) as quoted FTS5 phrases, in order."""
    words: list[str] = []
    for token in re.findall(r"[A-Za-z0-9_]+", query):
        for word in [token.lower(), *split_identifier(token)]:
            if word not in STOPWORDS and word not in words and len(word) > 1:
                words.append(word)
    return [f'"{w}"' for w in words]


def lexical_match(query: str) -> str:
    """An FTS5 MATCH expression: the query's words (identifiers split), OR-ed."""
    return " OR ".join(lexical_phrases(query))


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
        self._baseline: tuple[object, list[float | None], Baseline] | None = None

    def baseline(self) -> Baseline:
        """The off-topic questions' best cosines on this index state (computed once per
        store generation, vector index and adapter; the caller holds the read lock)."""
        self.off_topic_best()
        assert self._baseline is not None
        return self._baseline[2]

    def off_topic_best(self) -> list[float | None]:
        """Each off-topic question's best cosine on this index state, in the order of
        :data:`~codeseek.confidence.OFF_TOPIC_QUERIES` (None: an empty index); the
        caller holds the read lock. A search across several indexes takes the best of
        each question over them all: the baseline of one index of their union."""
        key = (self.store.generation(), id(self.vectors), id(self.adapter))
        if self._baseline is None or self._baseline[0] != key:
            matrix = self.query_vectors(OFF_TOPIC_QUERIES)
            best = [hits[0][1] if hits else None
                    for hits in (self.vectors.search(v, 1) for v in matrix)]
            self._baseline = (key, best, Baseline.of([c for c in best if c is not None]))
        return list(self._baseline[1])

    def search(self, query: str, k: int = 10, filters: Filters | None = None) -> list[SearchHit]:
        """The k best units for one query."""
        return self.search_many([query], k, filters)[0]

    def search_many(self, queries: Sequence[str], k: int = 10,
                    filters: Filters | None = None) -> list[list[SearchHit]]:
        """The k best units for each query (queries are embedded in one batch)."""
        filters = _checked(queries, k, filters)
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

    def corpus_stats(self, query: str) -> CorpusStats:
        """This index's BM25 statistics for the query's phrases (the caller holds the
        read lock): what a search across several indexes sums to score them as one."""
        rows, tokens = self.store.lexical_totals()
        return CorpusStats(rows, tokens, tuple(self.store.phrase_count(phrase)
                                               for phrase in lexical_phrases(query)))

    def shared_lexical(self, query: str, stats: CorpusStats, n: int,
                       pool: set[int] | None) -> list[tuple[int, float]]:
        """(unit id, BM25 under ``stats``) of the n best lexical matches, within the pool
        if given: the keyword side of :meth:`lexical`, every score computed with the
        corpus statistics given (:mod:`codeseek.bm25`; with this index's own it gives
        FTS5's scores exactly). Ties go to the lower id."""
        phrases = lexical_phrases(query)
        if len(phrases) != len(stats.matches):
            raise InvalidQuery("the corpus statistics were made for another query")
        if not phrases or stats.rows == 0 or stats.tokens == 0:
            return []
        rows, tokens = self.store.lexical_totals()
        matches = [self.store.phrase_matches(phrase) for phrase in phrases]
        local = CorpusStats(rows, tokens, tuple(len(found) for found in matches))
        local_idf, local_avgdl = local.idf(), local.avgdl
        frequencies: dict[int, dict[int, float]] = {}
        lengths: dict[int, float] = {}
        for phrase, found in enumerate(matches):
            for unit_id, alone, length in found:
                if pool is not None and unit_id not in pool:
                    continue
                lengths[unit_id] = float(length)
                frequencies.setdefault(unit_id, {})[phrase] = bm25.frequency(
                    alone, local_idf[phrase], local_avgdl, float(length))
        idf, avgdl = stats.idf(), stats.avgdl
        scored = [(unit_id, bm25.score(idf, avgdl, found, lengths[unit_id]))
                  for unit_id, found in frequencies.items()]
        scored.sort(key=lambda pair: (-pair[1], pair[0]))
        return scored[:n]

    def sides(self, queries: Sequence[str], k: int, filters: Filters | None,
              stats: Sequence[CorpusStats]) -> list[Sides]:
        """Each query's candidates for a search across several indexes: the dense side
        as :meth:`ranked` takes it, the keyword side under the shared ``stats``
        (:meth:`shared_lexical`), and the cosine of each keyword candidate the dense
        side lacks (what its confidence rests on)."""
        filters = _checked(queries, k, filters)
        matrix = self.query_vectors(queries)
        n = max(CANDIDATES, min(k, MAX_K) * 3)
        answers: list[Sides] = []
        with self.lock.read():
            pool = self._filtered_pool(filters)
            for i, query in enumerate(queries):
                dense = self.dense(matrix[i], n, pool)
                lexical = self.shared_lexical(query, stats[i], n, pool)
                seen = dict(dense)
                cosines = self._cosines(matrix[i], [u for u, _ in lexical if u not in seen], {})
                # always: the merged fusion may be another index's or the default
                enclosing = self.store.enclosing(sorted(seen.keys() | {u for u, _ in lexical}))
                answers.append(Sides(dense, lexical, cosines, enclosing))
        return answers

    def picked(self, query: str, picks: Sequence[Pick],
               baseline: Baseline | None = None) -> list[SearchHit]:
        """The hits of the units a search across several indexes picked from this one,
        in the order given (a unit gone since is left out); confidences against
        ``baseline`` (default: this index's own)."""
        with self.lock.read():
            units = self.store.units_by_ids([pick.unit_id for pick in picks])
            baseline = baseline or self.baseline()
            hits: list[SearchHit] = []
            for pick in picks:
                stored = units.get(pick.unit_id)
                if stored is None:
                    continue
                hit = _hit(query, len(hits) + 1, pick.score, pick.similarity, stored)
                hits.append(replace(hit, confidence=baseline.confidence(pick.cosine)))
            return hits

    def ranked(self, query: str, vector: np.ndarray, k: int,
               pool: set[int] | None = None) -> tuple[list[tuple[int, float]], dict[int, float]]:
        """The served ranking's best k (unit id, fused score), and the dense cosines seen."""
        k = min(k, MAX_K)  # beyond every unit of any index; SQLite's integers stop at 2**63
        n = max(CANDIDATES, k * 3)
        dense = self.dense(vector, n, pool)
        lexical = self.lexical(query, n, pool)
        return fuse(dense, lexical, self.fusion, self.enclosing(dense, lexical))[:k], dict(dense)

    def enclosing(self, *sides: Candidates) -> dict[int, int]:
        """Which candidates are nested helpers and where each is defined (what the fusion's
        nested-helper rule reads; not looked up when the rule is ``none``)."""
        if self.fusion.nested == "none":
            return {}
        return self.store.enclosing(sorted({item for side in sides for item, _ in side}))

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


def _checked(queries: Sequence[str], k: int, filters: Filters | None) -> Filters:
    """The filters normalised, once k and every query are found sound."""
    filters = (filters or Filters()).normalised()
    if k <= 0:
        raise InvalidQuery(f"-k must be at least 1, not {k}")
    for query in queries:
        if not query.strip():
            raise InvalidQuery("the query is empty; type what you are looking for")
    return filters


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
