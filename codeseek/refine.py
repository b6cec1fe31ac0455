"""Searchable first, refined behind: an index built with the fast static tier, then
embedded again with the full tier in committed batches, most useful files first.

Opt-in (``codeseek index --refine``, ``codeseek watch --refine``). While a refinement
runs, the manifest names its target model (``refine_model_id``) and the index's own
model is the static tier's: every unit has a static vector, and a growing share of
them has a target vector too (vectors are keyed by model id, so both coexist).

* Order: files with the most documented units first, then by path and unit id; one
  vector per content hash, as a build embeds them. Each batch of vectors is one
  transaction, so a kill at any point loses at most the batch in flight, and the
  next run embeds only what still lacks a target vector.
* Searching (:class:`RefiningSearcher`): BM25 as always; the dense side takes each
  unit's score from the best tier it has: the target tier's cosine for refined
  units, the static tier's for the rest, each standardised over its own candidates
  (so the two spaces are never compared raw). Every fusion rule is unchanged by an
  increasing affine map of one side's scores, so at 0% refined the ranking is the
  static tier's and at 100% the full tier's (exact search over the refined units,
  where a full index searches its HNSW graph).
* Finishing (:meth:`Refiner.finish`): once no unit lacks a target vector, in one
  transaction, the static vectors and target vectors no unit uses are deleted and
  the target model becomes the index's model; the index then equals a fresh build
  with the target tier (units and vectors). The HNSW cache is rebuilt from them.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from codeseek.embed import Embedder
from codeseek.hits import SearchHit
from codeseek.indexer import REFINE_MODEL_KEY, WriteLock, _no_lock, bump_generation
from codeseek.query import MAX_K, Filters
from codeseek.search import CANDIDATES, Searcher, fuse
from codeseek.store import Store, StoredUnit, _stored_unit
from codeseek.tiers import tier_of
from codeseek.vectors import exact_search

__all__ = ["FIRST_TIER", "REFINE_MODEL_KEY", "Refinement", "Refiner", "RefiningSearcher",
           "pending_units", "refinement_of"]

FIRST_TIER = "static"
REFINE_DIM_KEY = "refine_dim"
REFINE_RATE_KEY = "refine_rate"  # target-tier units per second in the latest run
REFINE_STEP_KEY = "refine_step"  # bumped by every committed batch: searchers reload
REFINE_KEYS = (REFINE_MODEL_KEY, REFINE_DIM_KEY, REFINE_RATE_KEY, REFINE_STEP_KEY)
UNITS_PER_REFINE_BATCH = 256


@dataclass(frozen=True)
class Refinement:
    """How far a refinement is: ``refined`` of ``total`` units have a target vector."""

    tier: str
    model_id: str
    refined: int
    total: int
    units_per_second: float | None

    @property
    def seconds_left(self) -> float | None:
        """The time left at the latest run's rate (None before a batch was timed)."""
        if not self.units_per_second:
            return None
        return (self.total - self.refined) / self.units_per_second

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict (``seconds_left`` included)."""
        return {"tier": self.tier, "model_id": self.model_id, "refined": self.refined,
                "total": self.total, "units_per_second": self.units_per_second,
                "seconds_left": self.seconds_left}


def refinement_of(store: Store) -> Refinement | None:
    """The refinement under way in this index, None when there is none."""
    manifest = store.manifest()
    target = manifest.get(REFINE_MODEL_KEY)
    if target is None:
        return None
    refined = store._query(
        "SELECT COUNT(*) FROM units u WHERE EXISTS (SELECT 1 FROM vectors v WHERE "
        "v.content_hash=u.content_hash AND v.model_id=?)", (target,))[0][0]
    rate = manifest.get(REFINE_RATE_KEY)
    return Refinement(tier=tier_of(target) or "full", model_id=target, refined=int(refined),
                      total=store.counts()["units"],
                      units_per_second=float(rate) if rate else None)


def pending_units(store: Store, model_id: str, limit: int) -> list[StoredUnit]:
    """Up to ``limit`` units (one per content hash) without a vector of ``model_id``, most
    useful first: files with the most documented units, then path, then unit id."""
    rows = store._query(
        f"SELECT {Store._UNIT_COLUMNS} FROM units u JOIN files f ON f.id=u.file_id "
        "JOIN (SELECT file_id, SUM(doc != '') AS documented FROM units GROUP BY file_id) d "
        "ON d.file_id=u.file_id "
        "WHERE NOT EXISTS (SELECT 1 FROM vectors v WHERE v.content_hash=u.content_hash "
        "AND v.model_id=?) GROUP BY u.content_hash "
        "ORDER BY MAX(d.documented) DESC, MIN(f.path), MIN(u.id) LIMIT ?",
        (model_id, limit),
    )
    return [_stored_unit(row) for row in rows]


def begin_refinement(store: Store, target: Embedder, write_lock: WriteLock = _no_lock) -> None:
    """Record that this index is to be refined toward ``target``'s model."""
    if store.manifest().get(REFINE_MODEL_KEY) == target.model_id:
        return
    with write_lock(), store.transaction():
        store.set_manifest(**{REFINE_MODEL_KEY: target.model_id,
                              REFINE_DIM_KEY: str(target.dim), REFINE_STEP_KEY: "0"})


class Refiner:
    """Embeds an index's units with the target tier, batch by committed batch."""

    def __init__(self, store: Store, embedder: Embedder,
                 write_lock: WriteLock | None = None) -> None:
        self.store = store
        self.embedder = embedder
        self.write_lock = write_lock or _no_lock
        self._seconds = 0.0  # spent embedding in this run
        self._done = 0

    def step(self, limit: int = UNITS_PER_REFINE_BATCH) -> int:
        """Embed and commit the next ``limit`` units' target vectors; how many."""
        pending = pending_units(self.store, self.embedder.model_id, limit)
        if not pending:
            return 0
        texts = {s.content_hash: s.unit.embed_text() for s in pending}
        order = sorted(texts, key=lambda digest: len(texts[digest]))  # less padding
        started = time.perf_counter()
        matrix = self.embedder.encode([texts[digest] for digest in order])
        self._seconds += time.perf_counter() - started
        self._done += len(order)
        rate = self._done / self._seconds if self._seconds > 0 else 0.0
        with self.write_lock(), self.store.transaction():
            step = int(self.store.manifest().get(REFINE_STEP_KEY, "0")) + 1
            self.store.put_vectors(self.embedder.model_id,
                                   {digest: matrix[i] for i, digest in enumerate(order)})
            self.store.set_manifest(**{REFINE_RATE_KEY: f"{rate:.3f}" if rate else "",
                                       REFINE_STEP_KEY: str(step)})
        return len(order)

    def finish(self) -> bool:
        """Make the target model the index's own once every unit has its vector (in one
        transaction); whether the refinement is over."""
        target = self.embedder.model_id
        with self.write_lock(), self.store.transaction():
            if self.store.manifest().get(REFINE_MODEL_KEY) != target:
                return False
            if pending_units(self.store, target, 1):
                return False
            self.store.drop_other_models(target)
            self.store.prune_vectors(target)
            self.store.set_manifest(model_id=target, dim=str(self.embedder.dim))
            self.store.delete_manifest(*REFINE_KEYS)
            bump_generation(self.store)
        return True


def _standardised(side: Sequence[tuple[int, float]]) -> list[tuple[int, float]]:
    """Scores in standard deviations above the list's worst (the search module's rule)."""
    if not side:
        return []
    scores = np.array([score for _, score in side], dtype=np.float64)
    spread = float(scores.std())
    values = (scores - scores.min()) / spread if spread > 0 else np.zeros_like(scores)
    return [(item, float(value)) for (item, _), value in zip(side, values, strict=True)]


def merge_tiers(full: Sequence[tuple[int, float]], static: Sequence[tuple[int, float]],
                refined: set[int]) -> list[tuple[int, float]]:
    """One dense candidate list: refined units scored by the full tier, the others by the
    static tier, each standardised over its own candidates; best first."""
    merged = _standardised(full)
    merged += [(item, score) for item, score in _standardised(static) if item not in refined]
    return sorted(merged, key=lambda pair: (-pair[1], pair[0]))


class RefiningSearcher(Searcher):
    """A searcher over an index under refinement: BM25, the full tier over the refined
    units and the static tier over the rest (module docstring)."""

    def __init__(self, *args: object, full: Embedder, **kwargs: object) -> None:
        super().__init__(*args, **kwargs)  # type: ignore[arg-type]
        self.full = full
        self.full_tier = tier_of(full.model_id)
        self._step: str | None = None
        self._labels = np.zeros(0, dtype=np.int64)
        self._matrix = np.zeros((0, full.dim), dtype=np.float32)
        self._rows: dict[int, int] = {}
        self._queries: dict[str, np.ndarray] = {}

    def _reload(self) -> None:
        """Follow the refinement's committed batches (call under the read lock)."""
        manifest = self.store.manifest()
        step = f"{self.store.generation()}:{manifest.get(REFINE_STEP_KEY)}"
        if step != self._step:
            self._labels, self._matrix = self.store.unit_vectors(self.full.model_id,
                                                                 self.full.dim)
            self._rows = {int(label): i for i, label in enumerate(self._labels)}
            self._step = step

    def _full_query(self, query: str) -> np.ndarray:
        vector = self._queries.get(query)
        if vector is None:
            if len(self._queries) > 256:
                self._queries.clear()
            vector = self._queries[query] = self.full.encode([query])[0]
        return vector

    def search_many(self, queries: Sequence[str], k: int = 10,
                    filters: Filters | None = None) -> list[list[SearchHit]]:
        fresh = [q for q in dict.fromkeys(queries) if q.strip() and q not in self._queries]
        if fresh:
            if len(self._queries) > 256:
                self._queries.clear()
            self._queries.update(zip(fresh, self.full.encode(fresh), strict=True))
        return super().search_many(queries, k, filters)

    def ranked(self, query: str, vector: np.ndarray, k: int,
               pool: set[int] | None = None) -> tuple[list[tuple[int, float]], dict[int, float]]:
        self._reload()
        k = min(k, MAX_K)
        n = max(CANDIDATES, k * 3)
        static = self.dense(vector, n, pool)
        labels, matrix = self._labels, self._matrix
        if pool is not None:
            keep = np.array([int(label) in pool for label in labels], dtype=bool)
            labels, matrix = labels[keep], matrix[keep]
        full = exact_search(self._full_query(query), labels, matrix, n)
        dense = merge_tiers(full, static, set(self._rows))
        lexical = self.lexical(query, n, pool)
        return fuse(dense, lexical, self.fusion)[:k], dict(static)

    def _answer(self, query: str, vector: np.ndarray, k: int,
                pool: set[int] | None) -> list[SearchHit]:
        hits = super()._answer(query, vector, k, pool)
        full = self._full_query(query)
        out = []
        for hit in hits:
            row = self._rows.get(hit.unit_id) if hit.unit_id is not None else None
            if row is None:
                out.append(hit)
                continue
            out.append(replace(hit, tier=self.full_tier,
                               similarity=float(self._matrix[row] @ full)))
        return out
