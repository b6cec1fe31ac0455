"""The doc-less document index (in-memory store, BM25, vectors, HNSW) and its pools."""

from __future__ import annotations

import hashlib
import sqlite3
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path

import numpy as np

from codeseek.embed import Embedder
from codeseek.evaluate.cache import Progress, VectorCache, encode_cached
from codeseek.fusion import enclosing_map
from codeseek.search import lexical_match
from codeseek.store import MIGRATIONS, Store
from codeseek.units import CodeUnit, lexical_codes
from codeseek.vectors import VectorIndex

POOL_SIZES = (1000, 10000)
WHOLE = "all"

Pool = int | str
"""A protocol: a pool size, or :data:`WHOLE` for the whole index."""


def without_doc(unit: CodeUnit) -> CodeUnit:
    """The unit as the checks' documents see it: no doc anywhere."""
    return replace(unit, doc="", code=unit.code_without_doc, doc_span=None)


def memory_store() -> Store:
    """An empty store in memory, with the index's own schema (and so its BM25)."""
    db = sqlite3.connect(":memory:", isolation_level=None, check_same_thread=False)
    store = Store(db, Path(":memory:"))
    for version in sorted(MIGRATIONS):
        for statement in MIGRATIONS[version]:
            db.execute(statement)
    return store


class DocumentIndex:
    """The corpus without docs: an in-memory store (FTS5 BM25) and the doc-less vectors.

    Unit ``i`` of the corpus has row id ``row_ids[i]`` in the store, which is
    also its label in the HNSW index, so a :class:`~codeseek.search.Searcher`
    over ``store`` and :meth:`ann` answers exactly as served search would on a
    doc-less index. Everything else speaks of positions in the corpus.
    """

    def __init__(self, units: Sequence[CodeUnit], vectors: np.ndarray, model_id: str) -> None:
        self.units = [without_doc(u) for u in units]
        self.vectors = np.asarray(vectors, dtype=np.float32)
        self.model_id = model_id
        self.languages = np.array([u.language for u in units])
        self.store = memory_store()
        self._ann: VectorIndex | None = None
        self.row_ids = self._fill(lexical_codes(units))  # members folded as the index folds them
        self._positions = np.full(int(self.row_ids.max(initial=0)) + 1, -1, dtype=np.int64)
        self._positions[self.row_ids] = np.arange(len(self.row_ids))
        # nested helpers by position: what served search reads from the store (the same rule)
        self.enclosing = enclosing_map(enumerate(self.units))

    def __len__(self) -> int:
        return len(self.units)

    def _fill(self, codes: list[str]) -> np.ndarray:
        files: dict[str, int] = {}
        row_ids: list[int] = []
        with self.store.transaction():
            for unit, code in zip(self.units, codes, strict=True):
                if unit.path not in files:
                    files[unit.path] = self.store.upsert_file(unit.path, unit.language, 0, 0,
                                                              "", False)
                row_ids.append(self.store.insert_unit(files[unit.path], unit,
                                                      unit.content_hash, code))
            self.store.put_vectors(self.model_id, {u.content_hash: self.vectors[i]
                                                   for i, u in enumerate(self.units)})
        return np.array(row_ids, dtype=np.int64)

    def positions(self, row_ids: Sequence[int]) -> np.ndarray:
        """Corpus positions of store row ids (HNSW labels)."""
        return self._positions[np.asarray(row_ids, dtype=np.int64)]

    def lexical(self, query: str) -> np.ndarray:
        """Positions of every BM25 match, best first (the served BM25 and its order)."""
        return self.lexical_scored(query)[0]

    def lexical_scored(self, query: str) -> tuple[np.ndarray, np.ndarray]:
        """Positions and BM25 scores of every match, best first."""
        hits = self.store.lexical_search(lexical_match(query), len(self.units))
        positions = self.positions([row_id for row_id, _ in hits])
        return positions, np.array([score for _, score in hits], dtype=np.float64)

    def ann(self) -> VectorIndex:
        """An HNSW index of the doc-less vectors (built on first use), labels = row ids."""
        if self._ann is None:
            self._ann = VectorIndex.build(self.vectors.shape[1], self.row_ids, self.vectors)
        return self._ann


def build_documents(units: Sequence[CodeUnit], embedder: Embedder,
                    cache: VectorCache | None = None,
                    progress: Progress | None = None) -> DocumentIndex:
    """Embed the corpus without docs (cached) and index it."""
    texts = [without_doc(u).embed_text() for u in units]
    vectors = encode_cached(embedder, texts, cache, progress, "embed documents")
    return DocumentIndex(units, vectors, embedder.model_id)


# -- pools -----------------------------------------------------------------------------


class PoolSampler:
    """Draws each case's distractors from its own language, reproducibly."""

    def __init__(self, documents: DocumentIndex, seed: int) -> None:
        self.documents = documents
        self.seed = seed
        self.by_language = {str(lang): np.flatnonzero(documents.languages == lang)
                            for lang in np.unique(documents.languages)}

    def fits(self, position: int, size: int) -> bool:
        """Whether the case's language has enough units for this pool size."""
        return len(self.by_language[str(self.documents.languages[position])]) >= size

    def pool(self, position: int, size: int) -> np.ndarray:
        """The true position first, then size - 1 distinct same-language distractors."""
        members = self.by_language[str(self.documents.languages[position])]
        others = members[members != position]
        uid = self.documents.units[position].uid
        seed = int(hashlib.sha256(f"{self.seed}\0{size}\0{uid}".encode(
            "utf-8", "surrogatepass")).hexdigest()[:15], 16)
        chosen = np.random.default_rng(seed).choice(others, size - 1, replace=False)
        return np.concatenate(([position], chosen)).astype(np.int64)
