"""The query path: embed the query, take HNSW and BM25 candidates, fuse, filter.

Dense candidates come from the HNSW index (or, when filters narrow the pool,
from an exact search over the filtered units' vectors); lexical candidates
from SQLite FTS5 BM25 over identifier-split text. The two rankings are fused
by reciprocal rank fusion: score = sum over rankings of 1 / (RRF_K + rank).
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pathspec

from codeseek.embed import Embedder
from codeseek.errors import InvalidQuery
from codeseek.languages import spec_by_name
from codeseek.locks import ReadWriteLock
from codeseek.store import Store, StoredUnit
from codeseek.units import KINDS, CodeUnit, split_identifier
from codeseek.vectors import VectorIndex, exact_search

RRF_K = 60  # the constant of the original reciprocal rank fusion paper (from memory)
CANDIDATES = 100
EXACT_FILTER_LIMIT = 50_000
SNIPPET_LINES = 8
# common practice: drop the most frequent English function words from lexical queries
STOPWORDS = frozenset({
    "a", "an", "and", "are", "as", "at", "be", "by", "can", "do", "does", "for", "from",
    "how", "i", "in", "is", "it", "of", "on", "or", "our", "that", "the", "this", "to",
    "we", "what", "when", "where", "which", "who", "why", "with", "you", "your",
})


@dataclass(frozen=True)
class Filters:
    """Restrictions on results; an empty tuple means no restriction."""

    languages: tuple[str, ...] = ()
    paths: tuple[str, ...] = ()
    kinds: tuple[str, ...] = ()

    def validate(self) -> None:
        """Raise a clear error for an unknown language or kind."""
        for language in self.languages:
            spec_by_name(language)
        for kind in self.kinds:
            if kind not in KINDS:
                raise InvalidQuery(f"unknown kind {kind!r}; choose one of: {', '.join(KINDS)}")

    @property
    def active(self) -> bool:
        """Whether any filter is set."""
        return bool(self.languages or self.paths or self.kinds)


@dataclass(frozen=True)
class SearchHit:
    """One ranked result.

    Attributes:
        query: the query text.
        rank: 1 for the best hit.
        score: the fused score (higher is better; comparable within one query).
        similarity: cosine similarity of query and unit (None if not a dense candidate).
        path, start_line, end_line, language, kind, name, qualname, signature:
            where the unit is and what it is.
        doc_summary: the first paragraph of its doc.
        snippet: the first lines of its code.
        unit_id: the unit's row id in the index.
    """

    query: str
    rank: int
    score: float
    similarity: float | None
    path: str
    start_line: int
    end_line: int
    language: str
    kind: str
    name: str
    qualname: str
    signature: str
    doc_summary: str
    snippet: str
    unit_id: int

    def to_json(self) -> dict[str, object]:
        """The JSON Lines record of this hit."""
        return {
            "query": self.query, "rank": self.rank, "score": round(self.score, 6),
            "similarity": None if self.similarity is None else round(self.similarity, 6),
            "path": self.path, "start_line": self.start_line, "end_line": self.end_line,
            "language": self.language, "kind": self.kind, "name": self.name,
            "qualname": self.qualname, "signature": self.signature,
            "doc_summary": self.doc_summary, "snippet": self.snippet,
        }


def lexical_match(query: str) -> str:
    """An FTS5 MATCH expression: the query's words (identifiers split), OR-ed."""
    words: list[str] = []
    for token in re.findall(r"[A-Za-z0-9_]+", query):
        for word in [token.lower(), *split_identifier(token)]:
            if word not in STOPWORDS and word not in words and len(word) > 1:
                words.append(word)
    return " OR ".join(f'"{w}"' for w in words)


def rrf(rankings: Sequence[Sequence[int]], k: int = RRF_K) -> dict[int, float]:
    """Reciprocal rank fusion of several rankings of ids (best first)."""
    fused: dict[int, float] = {}
    for ranking in rankings:
        for rank, item in enumerate(ranking, 1):
            fused[item] = fused.get(item, 0.0) + 1.0 / (k + rank)
    return fused


def snippet_of(unit: CodeUnit, lines: int = SNIPPET_LINES) -> str:
    """The first lines of a unit's code."""
    return "\n".join(unit.code.splitlines()[:lines])


class Searcher:
    """Answers queries over one store, its vector index and its embedder."""

    def __init__(self, store: Store, vectors: VectorIndex, embedder: Embedder,
                 model_id: str, lock: ReadWriteLock | None = None) -> None:
        self.store = store
        self.vectors = vectors
        self.embedder = embedder
        self.model_id = model_id
        self.lock = lock or ReadWriteLock()

    def search(self, query: str, k: int = 10, filters: Filters | None = None) -> list[SearchHit]:
        """The k best units for one query."""
        return self.search_many([query], k, filters)[0]

    def search_many(self, queries: Sequence[str], k: int = 10,
                    filters: Filters | None = None) -> list[list[SearchHit]]:
        """The k best units for each query (queries are embedded in one batch)."""
        filters = filters or Filters()
        filters.validate()
        if k <= 0:
            raise InvalidQuery(f"-k must be at least 1, not {k}")
        for query in queries:
            if not query.strip():
                raise InvalidQuery("the query is empty; type what you are looking for")
        matrix = self.embedder.encode(list(queries))
        with self.lock.read():  # one committed state for the whole answer
            pool = self._filtered_pool(filters)
            return [self._answer(q, matrix[i], k, filters, pool) for i, q in enumerate(queries)]

    def _filtered_pool(self, filters: Filters) -> set[int] | None:
        if not filters.active:
            return None
        ids = self.store.filtered_ids(filters.languages, filters.kinds)
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
        """(unit id, BM25) of the n best lexical matches, within the pool if given."""
        limit = n if pool is None else n * 20
        hits = self.store.lexical_search(lexical_match(query), limit)
        if pool is not None:
            hits = [h for h in hits if h[0] in pool]
        return hits[:n]

    def _answer(self, query: str, vector: np.ndarray, k: int, filters: Filters,
                pool: set[int] | None) -> list[SearchHit]:
        n = max(CANDIDATES, k * 3)
        dense = self.dense(vector, n, pool)
        lexical = self.lexical(query, n, pool)
        fused = rrf([[i for i, _ in dense], [i for i, _ in lexical]])
        similarity = dict(dense)
        ranked = sorted(fused, key=lambda i: (-fused[i], -similarity.get(i, -2.0), i))[:k]
        units = self.store.units_by_ids(ranked)
        hits: list[SearchHit] = []
        for unit_id in ranked:
            stored = units.get(unit_id)
            if stored is None:
                continue
            hits.append(_hit(query, len(hits) + 1, fused[unit_id], similarity.get(unit_id),
                             stored))
        return hits


def _hit(query: str, rank: int, score: float, similarity: float | None,
         stored: StoredUnit) -> SearchHit:
    unit = stored.unit
    return SearchHit(
        query=query, rank=rank, score=score, similarity=similarity, path=unit.path,
        start_line=unit.start_line, end_line=unit.end_line, language=unit.language,
        kind=unit.kind, name=unit.name, qualname=unit.qualname, signature=unit.signature,
        doc_summary=unit.doc_summary, snippet=snippet_of(unit), unit_id=stored.id,
    )
