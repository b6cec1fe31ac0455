"""Searchable first, refined behind: an index built with the fast static tier, then
embedded again with the full tier in committed batches, most useful files first.

``codeseek index`` and ``codeseek watch`` refine a new index with more source than
``refine_above_bytes`` (4 MB) to parse by default (``Index.choose_refinement``);
``--refine``/``--no-refine`` and ``refine`` in codeseek.toml decide otherwise. While a refinement
runs, the manifest names its target model (``refine_model_id``) and the index's own
model is the static tier's: every unit has a static vector, and a growing share of
them has a target vector too (vectors are keyed by model id, so both coexist).

* Order: files with the most documented units first, then by path and unit id; one
  vector per content hash, as a build embeds them. Each batch of vectors is one
  transaction, so a kill at any point loses at most the batch in flight, and the
  next run embeds only what still lacks a target vector.
* Searching (:class:`RefiningSearcher`): BM25 as always; the dense side keeps the
  static tier's scores, but the refined candidates' static scores are handed out
  again in the full tier's order (``slots`` in :func:`merge_tiers`: the refined unit
  the full tier ranks first takes the best static score among the refined ones), so
  refining reorders the refined units by the better tier without giving them scores
  the static tier would not. At 0% refined the ranking is the static tier's, with
  every unit refined the full tier's (exact search over the refined units, where a
  full index searches its HNSW graph); in between it is not guaranteed to improve
  at every step, but it nearly did at every step measured (README; the other mixes
  of ``TIER_MAPS`` are measured beside it).
* Batching (:class:`Refiner`): pending units are taken 2,048 at a time in order of
  usefulness, sorted by length, and committed 256 at a time.
* Queries first (:class:`QueryTraffic`): the index counts the searches under way;
  between the encoder's batches the refiner waits while one runs and for
  :data:`QUIET_SECONDS` after the last, so a search in the same process does not
  share the two cores with a refinement batch (at most one encoder batch already
  in flight), and a steady stream of searches still lets a batch through every
  :data:`MAX_YIELD_SECONDS`.
* Finishing (:meth:`Refiner.finish`): once no unit lacks a target vector, in one
  transaction, the static vectors and target vectors no unit uses are deleted and
  the target model becomes the index's model; the index then equals a fresh build
  with the target tier (units and vectors). The HNSW cache is rebuilt from them.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, replace

import numpy as np

from codeseek.embed import Embedder
from codeseek.hits import SearchHit
from codeseek.indexer import REFINE_MODEL_KEY, WriteLock, _no_lock, bump_generation
from codeseek.query import MAX_K, Filters
from codeseek.search import CANDIDATES, Searcher, fuse
from codeseek.store import Store, StoredUnit, _stored_unit, vector_unit_ids
from codeseek.tiers import tier_of
from codeseek.vectors import exact_search

__all__ = ["FIRST_TIER", "REFINE_MODEL_KEY", "QueryTraffic", "Refinement", "Refiner",
           "RefiningSearcher", "pending_units", "refinement_of"]

FIRST_TIER = "static"
REFINE_DIM_KEY = "refine_dim"
REFINE_RATE_KEY = "refine_rate"  # target-tier units per second in the latest run
REFINE_STEP_KEY = "refine_step"  # bumped by every committed batch: searchers reload
REFINE_KEYS = (REFINE_MODEL_KEY, REFINE_DIM_KEY, REFINE_RATE_KEY, REFINE_STEP_KEY)
UNITS_PER_REFINE_BATCH = 256
UNITS_PER_REFINE_CHUNK = 2048  # taken in usefulness order, then sorted by length
QUIET_SECONDS = 0.5
"""How long after a search the refiner waits before its next encoder batch: a person
reading hits, or a script's next query, finds the cores free."""
MAX_YIELD_SECONDS = 2.0
"""The longest the refiner waits between two encoder batches, however busy searching is."""


class QueryTraffic:
    """The searches under way in this process, for the refiner to give way to."""

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._lock = threading.Lock()
        self._active = 0
        self._last = float("-inf")  # when the latest search ended

    @contextmanager
    def searching(self) -> Iterator[None]:
        """Count one search for as long as it runs."""
        with self._lock:
            self._active += 1
        try:
            yield
        finally:
            with self._lock:
                self._active -= 1
                self._last = self._clock()

    def busy(self) -> bool:
        """Whether a search runs, or ended less than :data:`QUIET_SECONDS` ago."""
        with self._lock:
            return self._active > 0 or self._clock() - self._last < QUIET_SECONDS

    def give_way(self, sleep: Callable[[float], None] = time.sleep) -> float:
        """Wait while :meth:`busy`, at most :data:`MAX_YIELD_SECONDS`; seconds waited."""
        started = self._clock()
        while self.busy() and self._clock() - started < MAX_YIELD_SECONDS:
            sleep(0.01)
        return self._clock() - started


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
    """Embeds an index's units with the target tier, batch by committed batch.

    Pending units are taken :data:`UNITS_PER_REFINE_CHUNK` at a time in the order of
    usefulness, and each chunk is sorted by text length before it is cut into committed
    batches of :data:`UNITS_PER_REFINE_BATCH`: similar lengths in a batch keep the
    padding small, as a build's chunks do (a build sorts its 2,048-unit batches). A
    change of the index (a new generation: the watcher wrote) drops the chunk in hand.
    """

    def __init__(self, store: Store, embedder: Embedder,
                 write_lock: WriteLock | None = None,
                 traffic: QueryTraffic | None = None) -> None:
        self.store = store
        self.embedder = embedder
        self.write_lock = write_lock or _no_lock
        self.traffic = traffic  # searches to give way to between encoder batches
        self.waited = 0.0  # seconds spent giving way
        self._seconds = 0.0  # spent embedding in this run
        self._done = 0
        self._queue: list[tuple[str, str]] = []  # (content hash, text), shortest first
        self._generation = -1
        self._counted: tuple[int, int] = (0, 0)  # (refined, total) when the chunk was taken
        self._since = 0  # units committed since then

    def _take_chunk(self) -> None:
        self._generation = self.store.generation()
        pending = pending_units(self.store, self.embedder.model_id, UNITS_PER_REFINE_CHUNK)
        texts = [(s.content_hash, s.unit.embed_text()) for s in pending]
        self._queue = sorted(texts, key=lambda item: len(item[1]))  # less padding
        state = refinement_of(self.store)
        self._counted = (state.refined, state.total) if state is not None else (0, 0)
        self._since = 0

    def progress(self) -> tuple[int, int]:
        """(units refined, units) as of the latest batch: counted once a chunk and
        followed from there (a change by the watcher shows at the next chunk)."""
        refined, total = self._counted
        return min(total, refined + self._since), total

    def step(self, limit: int = UNITS_PER_REFINE_BATCH) -> int:
        """Embed and commit the next ``limit`` units' target vectors; how many."""
        if not self._queue or self.store.generation() != self._generation:
            self._take_chunk()
        batch, self._queue = self._queue[:limit], self._queue[limit:]
        if not batch:
            return 0
        traffic = self.traffic
        waited = 0.0
        if traffic is not None:
            waited += traffic.give_way()

        def give_way(_: int) -> None:
            nonlocal waited
            waited += traffic.give_way() if traffic is not None else 0.0

        started = time.perf_counter()
        matrix = self.embedder.encode([text for _, text in batch], progress=give_way)
        # the rate is the encoder's: time spent giving way to searches is not counted
        self._seconds += time.perf_counter() - started - waited
        self.waited += waited
        self._done += len(batch)
        rate = self._done / self._seconds if self._seconds > 0 else 0.0
        with self.write_lock(), self.store.transaction():
            step = int(self.store.manifest().get(REFINE_STEP_KEY, "0")) + 1
            self.store.put_vectors(self.embedder.model_id,
                                   {digest: matrix[i] for i, (digest, _) in enumerate(batch)})
            self.store.set_manifest(**{REFINE_RATE_KEY: f"{rate:.3f}" if rate else "",
                                       REFINE_STEP_KEY: str(step)})
        self._since += len(batch)
        return len(batch)

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


MIN_PAIRS = 8
"""Refined candidates needed to fit the map from static to full cosines; with fewer, the
dense side is the static tier's alone (as at 0% refined)."""

TIER_MAPS = ("slots", "standardised", "linear", "matched")
"""How :func:`merge_tiers` puts the two tiers' cosines on one scale, the served one first.

``slots`` (served; chosen by ``scripts/bench_index.py --refine``: the mix whose figures
rose at every step measured, but for one question's MRR at 25%) keeps every candidate's
static score but hands the refined candidates' static scores out again in the full
tier's order, so refining reorders the refined units without giving them scores the
static tier would not; with no unrefined candidate left, the full tier's own cosines.
``standardised`` (served before) scores each tier in standard deviations over its own
candidate list. ``linear`` fits full = a * static + b on the refined candidates (the
fitted slope shrinks the unrefined units' scores toward the mean). ``matched`` maps
static onto full by the mean and spread of the same pairs (the slope is the ratio of
spreads)."""


def _standardised(side: Sequence[tuple[int, float]]) -> list[tuple[int, float]]:
    """Scores in standard deviations above the list's worst (the search module's rule)."""
    if not side:
        return []
    scores = np.array([score for _, score in side], dtype=np.float64)
    spread = float(scores.std())
    values = (scores - scores.min()) / spread if spread > 0 else np.zeros_like(scores)
    return [(item, float(value)) for (item, _), value in zip(side, values, strict=True)]


def fit_static_to_full(static: Mapping[int, float], full: Mapping[int, float],
                       matched: bool = False) -> tuple[float, float] | None:
    """(a, b) of the least-squares line full = a * static + b over the units both scored
    (``matched``: the line that gives the static scores the full ones' mean and spread),
    None when fewer than :data:`MIN_PAIRS` did, the static scores do not vary, or the
    line does not rise (the static tier would then say nothing of the full one)."""
    both = sorted(static.keys() & full.keys())
    if len(both) < MIN_PAIRS:
        return None
    x = np.array([static[i] for i in both], dtype=np.float64)
    y = np.array([full[i] for i in both], dtype=np.float64)
    spread = float(x.var())
    if spread <= 1e-12:
        return None
    slope = float(((x - x.mean()) * (y - y.mean())).mean() / spread)
    if slope <= 0:
        return None
    if matched:
        slope = float(y.std() / x.std())
    return slope, float(y.mean() - slope * x.mean())


def merge_tiers(full: Sequence[tuple[int, float]], static: Sequence[tuple[int, float]],
                refined: Mapping[int, float] | set[int], n: int,
                static_of: Mapping[int, float] | None = None,
                how: str = TIER_MAPS[0]) -> list[tuple[int, float]]:
    """One dense candidate list of at most ``n``, best first: refined units scored by the
    full tier, the others by the static tier put on the full tier's scale.

    ``linear``: ``refined`` maps each refined unit among the static candidates to its
    full cosine and ``static_of`` each refined full candidate to its static cosine; a
    line fitted on those pairs (:func:`fit_static_to_full`) maps the unrefined units'
    static cosines. Were the two tiers' cosines related by an increasing line, the list
    would be the full tier's ranking at any share refined. Without a fit (too few pairs)
    the list is the static tier's alone, as at 0% refined.
    ``matched``: the same pairs, the line that gives the static cosines the full ones'
    mean and spread.
    ``slots``: the same scores; the refined candidates' static scores, best first, go
    to them in the full tier's order; the others keep theirs.
    ``standardised``: each tier in standard deviations over its own list.
    """
    if how == "standardised":
        merged = _standardised(full)
        merged += [(item, score) for item, score in _standardised(static)
                   if item not in refined]
        return sorted(merged, key=lambda pair: (-pair[1], pair[0]))[:n]
    if how not in TIER_MAPS:
        raise ValueError(f"unknown tier map {how!r}; expected one of {', '.join(TIER_MAPS)}")
    assert isinstance(refined, Mapping)
    full_scores = dict(full)
    full_scores.update(refined)
    static_scores = dict(static)
    static_scores.update(static_of or {})
    if how == "slots":
        if full_scores and all(unit in full_scores for unit in static_scores):
            # nothing unrefined to compare with: the full tier's own scores
            return sorted(full_scores.items(), key=lambda pair: (-pair[1], pair[0]))[:n]
        both = [unit for unit in full_scores if unit in static_scores]
        by_full = sorted(both, key=lambda unit: (-full_scores[unit], unit))
        slots = sorted((static_scores[unit] for unit in both), reverse=True)
        scores = {unit: score for unit, score in static_scores.items()
                  if unit not in full_scores}
        scores.update(zip(by_full, slots, strict=True))
        # equal slots keep the full tier's order among the refined
        place = {unit: (0, at) for at, unit in enumerate(by_full)}
        return sorted(scores.items(),
                      key=lambda pair: (-pair[1], place.get(pair[0], (1, pair[0]))))[:n]
    line = fit_static_to_full(static_scores, full_scores, matched=how == "matched")
    if line is None:
        return list(static[:n])
    slope, intercept = line
    merged = list(full_scores.items())
    merged += [(item, slope * score + intercept) for item, score in static
               if item not in full_scores]
    return sorted(merged, key=lambda pair: (-pair[1], pair[0]))[:n]


class RefiningSearcher(Searcher):
    """A searcher over an index under refinement: BM25, the full tier over the refined
    units and the static tier over the rest (module docstring)."""

    tier_map = TIER_MAPS[0]  # the served one; the benchmark switches it

    def __init__(self, *args: object, full: Embedder, **kwargs: object) -> None:
        super().__init__(*args, **kwargs)  # type: ignore[arg-type]
        self.full = full
        self.full_tier = tier_of(full.model_id)
        self._step: str | None = None
        self._generation = -1
        self._count = 0  # rows of _labels and _matrix in use (the rest is spare room)
        self._labels = np.zeros(0, dtype=np.int64)
        self._matrix = np.zeros((0, full.dim), dtype=np.float32)
        # the same units' static vectors, row for row (NaN: none stored), so a refined
        # candidate's static cosine is one product, not a read of the HNSW index's rows
        self._static = np.zeros((0, self.vectors.dim), dtype=np.float32)
        self._rows: dict[int, int] = {}
        self._queries: dict[str, np.ndarray] = {}

    def _reload(self) -> None:
        """Follow the refinement's committed batches (call under the read lock): after a
        batch, only the vectors not yet held are read; after a change of the index's
        units (a new generation), all of them."""
        manifest = self.store.manifest()
        generation = self.store.generation()
        step = f"{generation}:{manifest.get(REFINE_STEP_KEY)}"
        if step == self._step:
            return
        if generation != self._generation:
            labels, matrix = self.store.unit_vectors(self.full.model_id, self.full.dim)
            self._labels, self._matrix, self._count = labels, matrix, len(labels)
            self._static = self._static_rows(labels)
            self._rows = {int(label): i for i, label in enumerate(labels)}
        else:
            fresh = sorted(set(vector_unit_ids(self.store, self.full.model_id)) - set(self._rows))
            labels, matrix = self.store.unit_vectors(self.full.model_id, self.full.dim, fresh)
            self._append(labels, matrix)
        self._generation = generation
        self._step = step

    def _static_rows(self, labels: np.ndarray) -> np.ndarray:
        """The stored static vectors of ``labels``, in their order (NaN rows: none)."""
        rows = np.full((len(labels), self.vectors.dim), np.nan, dtype=np.float32)
        held, matrix = self.store.unit_vectors(self.model_id, self.vectors.dim,
                                               [int(label) for label in labels])
        where = {int(label): i for i, label in enumerate(labels)}
        for label, vector in zip(held, matrix, strict=True):
            rows[where[int(label)]] = vector
        return rows

    def _append(self, labels: np.ndarray, matrix: np.ndarray) -> None:
        """Add rows, doubling the spare room when it runs out (no copy per batch)."""
        needed = self._count + len(labels)
        if needed > len(self._labels):
            room = max(needed, 2 * len(self._labels), 1024)
            grown_labels = np.zeros(room, dtype=np.int64)
            grown = np.zeros((room, self.full.dim), dtype=np.float32)
            grown_static = np.full((room, self.vectors.dim), np.nan, dtype=np.float32)
            grown_labels[: self._count] = self._labels[: self._count]
            grown[: self._count] = self._matrix[: self._count]
            grown_static[: self._count] = self._static[: self._count]
            self._labels, self._matrix, self._static = grown_labels, grown, grown_static
        self._labels[self._count : needed] = labels
        self._matrix[self._count : needed] = matrix
        self._static[self._count : needed] = self._static_rows(labels)
        for offset, label in enumerate(labels):
            self._rows[int(label)] = self._count + offset
        self._count = needed

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
        labels, matrix = self._labels[: self._count], self._matrix[: self._count]
        if pool is not None:
            keep = np.array([int(label) in pool for label in labels], dtype=bool)
            labels, matrix = labels[keep], matrix[keep]
        full_vector = self._full_query(query)
        full = exact_search(full_vector, labels, matrix, n)
        if self.tier_map == "standardised":
            dense = merge_tiers(full, static, set(self._rows), n, how=self.tier_map)
        else:
            # both scores of every refined candidate (the static ones of the full tier's
            # candidates beyond the static list from their static rows, in memory)
            refined = {unit: float(self._matrix[self._rows[unit]] @ full_vector)
                       for unit, _ in static if unit in self._rows}
            seen = {unit for unit, _ in static}
            missing = [unit for unit, _ in full if unit not in seen]
            static_of = self._static_cosines(vector, missing)
            dense = merge_tiers(full, static, refined, n, static_of, how=self.tier_map)
        lexical = self.lexical(query, n, pool)
        return (fuse(dense, lexical, self.fusion, self.enclosing(dense, lexical))[:k],
                dict(static))

    def _static_cosines(self, vector: np.ndarray, units: list[int]) -> dict[int, float]:
        """The static cosine to ``vector`` of each refined unit of ``units``."""
        if not units:
            return {}
        scores = self._static[[self._rows[unit] for unit in units]] @ vector.astype(np.float32)
        found = {unit: float(score) for unit, score in zip(units, scores, strict=True)
                 if not np.isnan(score)}
        if len(found) < len(units):  # no static vector stored: as a keyword-only hit
            found.update(self._cosines(vector, [u for u in units if u not in found], {}))
        return found

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
