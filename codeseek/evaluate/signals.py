"""Signals: what each side (keyword, exact dense, HNSW) ranks per protocol; served fusion."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field, replace
from typing import Protocol

import numpy as np

from codeseek.evaluate.cache import Progress
from codeseek.evaluate.documents import POOL_SIZES, WHOLE, DocumentIndex, Pool, PoolSampler
from codeseek.evaluate.metrics import mean_reciprocal_rank, rank_in, rank_of_true
from codeseek.evaluate.split import Case
from codeseek.fusion import Enclosing
from codeseek.search import CANDIDATES, DEFAULT_FUSION, Fusion, fuse
from codeseek.vectors import exact_search

DENSE_CHUNK = 256
DEPTH = CANDIDATES
"""How many candidates of each side the signals keep unless asked; served search fuses the
best CANDIDATES of them (scripts/bench_quality.py asks for more, to try other depths)."""


Top = tuple[np.ndarray, np.ndarray]
"""Candidate positions and their scores, best first."""


@dataclass(frozen=True, eq=False)
class Signals:
    """One side's view of some cases under one protocol.

    Attributes:
        cases: indices (into the case list) this protocol measures.
        ranks: the true unit's rank among the protocol's pool (0: not ranked).
        tops: each case's best :data:`~codeseek.search.CANDIDATES` candidates.
    """

    cases: np.ndarray
    ranks: np.ndarray
    tops: list[Top]


def protocols_for(cases: Sequence[Case], sampler: PoolSampler,
                  sizes: Sequence[int] = POOL_SIZES) -> dict[Pool, np.ndarray]:
    """The case indices each protocol measures (pools only where the language is big enough)."""
    chosen: dict[Pool, np.ndarray] = {}
    for size in sizes:
        members = [i for i, c in enumerate(cases) if sampler.fits(c.position, size)]
        if members:
            chosen[size] = np.array(members, dtype=np.int64)
    chosen[WHOLE] = np.arange(len(cases), dtype=np.int64)
    return chosen


def _top_of(order: np.ndarray, scores: np.ndarray, n: int) -> Top:
    head = order[:n]
    return head, scores[head]


class KeywordScorer(Protocol):
    """What the keyword side of the checks needs (a :class:`DocumentIndex`, or a variant)."""

    def __len__(self) -> int:
        """Documents in the corpus."""
        ...

    def lexical_scored(self, query: str) -> tuple[np.ndarray, np.ndarray]:
        """Positions and scores of every match, best first."""
        ...


def lexical_signals(cases: Sequence[Case], documents: KeywordScorer, sampler: PoolSampler,
                    protocols: dict[Pool, np.ndarray],
                    progress: Progress | None = None,
                    depth: int = DEPTH) -> dict[Pool, Signals]:
    """BM25 ranks and candidates of each case under each protocol."""
    ranks: dict[Pool, list[int]] = {pool: [] for pool in protocols}
    tops: dict[Pool, list[Top]] = {pool: [] for pool in protocols}
    wanted = {pool: set(members.tolist()) for pool, members in protocols.items()}
    for index, case in enumerate(cases):
        if progress and index % 100 == 0:
            progress("keyword search", index, len(cases))
        order, found = documents.lexical_scored(case.query)
        scores = np.full(len(documents), -np.inf)
        scores[order] = found
        for pool in protocols:
            if index in wanted[pool]:
                rank, top = _lexical_case(order, scores, case.position, pool, sampler,
                                          depth)
                ranks[pool].append(rank)
                tops[pool].append(top)
    if progress:
        progress("keyword search", len(cases), len(cases))
    return {pool: Signals(protocols[pool], np.array(ranks[pool], dtype=np.int64), tops[pool])
            for pool in protocols}


def _lexical_case(order: np.ndarray, scores: np.ndarray, true: int, pool: Pool,
                  sampler: PoolSampler, depth: int) -> tuple[int, Top]:
    if pool == WHOLE:
        return rank_of_true(scores, true), _top_of(order, scores, depth)
    chosen = sampler.pool(true, int(pool))
    inside = np.zeros(len(scores), dtype=bool)
    inside[chosen] = True
    # the served path for a narrowed pool: BM25 matches in order, kept if inside the pool
    return rank_of_true(scores[chosen], 0), _top_of(order[inside[order]], scores, depth)


def dense_signals(cases: Sequence[Case], queries: np.ndarray, documents: DocumentIndex,
                  sampler: PoolSampler, protocols: dict[Pool, np.ndarray],
                  progress: Progress | None = None,
                  depth: int = DEPTH) -> dict[Pool, Signals]:
    """Exact cosine ranks and candidates of each case under each protocol."""
    ranks: dict[Pool, list[int]] = {pool: [] for pool in protocols}
    tops: dict[Pool, list[Top]] = {pool: [] for pool in protocols}
    wanted = {pool: set(members.tolist()) for pool, members in protocols.items()}
    matrix = documents.vectors
    for start in range(0, len(cases), DENSE_CHUNK):
        if progress:
            progress("dense search", start, len(cases))
        block = queries[start : start + DENSE_CHUNK] @ matrix.T
        for offset, scores in enumerate(block):
            index = start + offset
            true = cases[index].position
            for pool in protocols:
                if index not in wanted[pool]:
                    continue
                rank, top = _dense_case(scores, queries[index], documents, true, pool,
                                        sampler, depth)
                ranks[pool].append(rank)
                tops[pool].append(top)
    if progress:
        progress("dense search", len(cases), len(cases))
    return {pool: Signals(protocols[pool], np.array(ranks[pool], dtype=np.int64), tops[pool])
            for pool in protocols}


def _dense_case(scores: np.ndarray, query: np.ndarray, documents: DocumentIndex, true: int,
                pool: Pool, sampler: PoolSampler, depth: int) -> tuple[int, Top]:
    if pool == WHOLE:
        return rank_of_true(scores, true), (np.zeros(0, dtype=np.int64), np.zeros(0))
    chosen = sampler.pool(true, int(pool))
    # the served path for a narrowed pool: exact search over the pool's vectors in unit id
    # order (Searcher.dense; positions follow row ids), the same function on the same rows
    members = np.sort(chosen)
    hits = exact_search(query, members, documents.vectors[members], depth)
    top = (np.array([p for p, _ in hits], dtype=np.int64),
           np.array([score for _, score in hits], dtype=np.float64))
    return rank_of_true(scores[chosen], 0), top


def ann_signals(cases: Sequence[Case], queries: np.ndarray, documents: DocumentIndex,
                progress: Progress | None = None, depth: int = DEPTH) -> Signals:
    """HNSW candidates of each case over the whole index (rank 0 when not among them)."""
    index = documents.ann()
    ranks, tops = [], []
    for done, case in enumerate(cases):
        if progress and done % 200 == 0:
            progress("HNSW search", done, len(cases))
        hits = index.search(queries[done], depth)
        positions = documents.positions([label for label, _ in hits])
        ranks.append(rank_in(positions, case.position))
        tops.append((positions, np.array([score for _, score in hits])))
    return Signals(np.arange(len(cases)), np.array(ranks, dtype=np.int64), tops)


def served_ranks(cases: Sequence[Case], dense: Signals, lexical: Signals,
                 fusion: Fusion, candidates: int = CANDIDATES,
                 enclosing: Enclosing | None = None) -> np.ndarray:
    """Each case's rank in the served ranking (:func:`~codeseek.search.fuse`) of the
    best ``candidates`` of each side; ``enclosing`` (positions: nested helper -> the unit
    it is defined in, :func:`~codeseek.fusion.enclosing_map` of the documents' units) is
    what the fusion's nested-helper rule reads, as served search reads the store's."""
    ranks = []
    for slot, index in enumerate(dense.cases):
        d_ids, d_scores = (a[:candidates] for a in dense.tops[slot])
        l_ids, l_scores = (a[:candidates] for a in lexical.tops[slot])
        fused = fuse(list(zip(d_ids.tolist(), d_scores.tolist(), strict=True)),
                     list(zip(l_ids.tolist(), l_scores.tolist(), strict=True)), fusion,
                     enclosing)
        ranks.append(rank_in([item for item, _ in fused], cases[int(index)].position))
    return np.array(ranks, dtype=np.int64)


@dataclass(frozen=True, eq=False)
class CaseSignals:
    """Everything the methods need for a set of cases: lexical, exact dense and HNSW."""

    cases: tuple[Case, ...]
    lexical: dict[Pool, Signals]
    dense: dict[Pool, Signals]
    ann: Signals
    enclosing: Enclosing = field(default_factory=dict)
    """Nested helpers among the documents (positions), for the nested-helper rule."""

    def served_for(self, pool: Pool) -> tuple[Signals, Signals]:
        """The dense and lexical candidates served search would fuse under a protocol."""
        return (self.ann if pool == WHOLE else self.dense[pool]), self.lexical[pool]

    def served(self, pool: Pool, fusion: Fusion, candidates: int = CANDIDATES) -> np.ndarray:
        """The served ranks under a protocol: :func:`served_ranks` of its candidates."""
        return served_ranks(self.cases, *self.served_for(pool), fusion, candidates,
                            self.enclosing)

    def ranks(self, fusion: Fusion) -> Iterator[tuple[str, Pool, np.ndarray]]:
        """(method, protocol, ranks) for every method under every protocol."""
        for pool in self.lexical:
            yield "lexical", pool, self.lexical[pool].ranks
            yield "dense", pool, self.dense[pool].ranks
            if pool == WHOLE:
                yield "dense-ann", pool, self.ann.ranks
            yield "served", pool, self.served(pool, fusion)


def collect_signals(cases: Sequence[Case], query_vectors: np.ndarray,
                    documents: DocumentIndex, sampler: PoolSampler,
                    *, lexical: dict[Pool, Signals] | None = None,
                    sizes: Sequence[int] = POOL_SIZES,
                    progress: Progress | None = None) -> CaseSignals:
    """Signals of every side; pass ``lexical`` to reuse the keyword side (it has no vectors)."""
    protocols = protocols_for(cases, sampler, sizes)
    if lexical is None:
        lexical = lexical_signals(cases, documents, sampler, protocols, progress)
    dense = dense_signals(cases, query_vectors, documents, sampler, protocols, progress)
    ann = ann_signals(cases, query_vectors, documents, progress)
    return CaseSignals(tuple(cases), lexical, dense, ann, documents.enclosing)


FUSION_GRID = tuple(replace(DEFAULT_FUSION, dense_weight=weight / 10) for weight in range(3, 10))
"""The fusions :func:`choose_fusion` tries: the served rule, dense weight 0.3 to 0.9."""


def choose_fusion(signals: CaseSignals,
                  grid: Sequence[Fusion] = FUSION_GRID) -> tuple[Fusion, dict[Fusion, float]]:
    """The fusion with the best served MRR, summed over protocols, on these (training) cases."""
    scores = {fusion: sum(mean_reciprocal_rank(signals.served(pool, fusion))
                          for pool in signals.lexical)
              for fusion in grid}
    best = max(grid, key=lambda fusion: scores[fusion])
    return best, scores
