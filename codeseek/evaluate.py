"""Recall checks on held-out docstrings: how well does search work on this repository?

The repository's own docs are the test set. A unit whose doc summary has at
least :data:`MIN_QUERY_WORDS` words is a candidate, unless its doc is
near-identical to another unit's (an ambiguous query) or its body duplicates
another unit's (an ambiguous answer). A deterministic split, by a hash of path
and qualified name (or of the path alone with ``by_file``), holds out a share
of the candidates. For each held-out unit:

* the query is its doc summary: the first paragraph, tags, parameter sections
  and markup removed, and a leading copy of the unit's name removed (Go's doc
  convention puts the name first; wherever it stands first it would give the
  answer away);
* the document is the unit without its doc. The index's own vectors include
  the doc, so the checks embed the doc-less documents themselves (with the
  index's embedder) and score BM25 over doc-less text in an in-memory SQLite
  FTS5 table built exactly like the index's, then fuse with the served rule
  (:func:`codeseek.search.fuse`).

Protocols, the pool size printed beside every figure: the true unit among
999 (and 9,999) distractors drawn at random from the same language, as in the
CodeSearchNet challenge (Husain et al. 2019), for languages that have that
many units; and the whole index. Methods side by side: ``lexical`` (BM25
only), ``dense`` (exact cosine), ``dense-ann`` (the same through an HNSW
index, whole index only) and ``served`` (the ranking search returns). Metrics:
recall@1/5/10 and MRR, each with a percentile-bootstrap 95% interval.
"""

from __future__ import annotations

import hashlib
import html
import re
import sqlite3
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from codeseek import safefs
from codeseek.adapter import QueryAdapter
from codeseek.embed import Embedder
from codeseek.errors import InvalidSplit, ReportWriteError, TooFewExamples
from codeseek.search import CANDIDATES, DEFAULT_FUSION, Fusion, fuse, lexical_match
from codeseek.store import MIGRATIONS, Store
from codeseek.units import CodeUnit, lexical_codes, summarize_doc
from codeseek.vectors import VectorIndex

DEFAULT_HOLDOUT = 0.2
DEFAULT_SEED = 0
MIN_QUERY_WORDS = 3
POOL_SIZES = (1000, 10000)
WHOLE = "all"
CUTOFFS = (1, 5, 10)
METHODS = ("lexical", "dense", "dense-ann", "served")
BOOTSTRAP_SAMPLES = 1000
ENCODE_CHUNK = 512
DENSE_CHUNK = 256
# How many candidates of each side the signals keep; served search fuses the best
# CANDIDATES of them. Only scripts/bench_quality.py sets it deeper, to try other depths.
DEPTH = CANDIDATES
CACHE_NAME = "eval-vectors.npz"

Progress = Callable[[str, int, int], None]
"""Called as ``progress(stage, done, total)``."""

Pool = int | str
"""A protocol: a pool size, or :data:`WHOLE` for the whole index."""

# -- queries and documents -------------------------------------------------------------

_MARKUP: tuple[tuple[re.Pattern[str], str], ...] = (
    (re.compile(r":[\w.:+-]+:`~?([^`<]*?)\s*(?:<[^>]*>)?`"), r"\1"),  # reST roles
    (re.compile(r"\{@\w+\s+([^}]*)\}"), r"\1"),  # JSDoc / Javadoc inline tags
    (re.compile(r"\[`?([^\]`]+)`?\]\([^)]*\)"), r"\1"),  # Markdown links
    (re.compile(r"\[`([^\]`]+)`\]"), r"\1"),  # rustdoc intra-doc links
    (re.compile(r"`+([^`]*)`+"), r"\1"),  # inline code
    (re.compile(r"(\*\*|__)(\S(?:.*?\S)?)\1"), r"\2"),  # strong
    (re.compile(r"(?<![\w*])\*(\S(?:.*?\S)?)\*(?![\w*])"), r"\1"),  # emphasis
    (re.compile(r"</?[A-Za-z][^>]*>"), ""),  # HTML tags
    (re.compile(r"^\s*(?:[-*+>#]+|\d+[.)])\s+"), ""),  # list, quote, heading markers
)
_WORD = re.compile(r"[A-Za-z]+")
_NOT_WORD = re.compile(r"[\W_]+")


def clean_summary(doc: str) -> str:
    """The doc's first paragraph without tags, parameter sections or markup."""
    text = summarize_doc(doc)
    for pattern, replacement in _MARKUP:
        text = pattern.sub(replacement, text)
    return " ".join(text.split())


def strip_leading_name(summary: str, unit: CodeUnit) -> tuple[str, bool]:
    """The summary without a leading copy of the unit's name; whether one was removed."""
    for name in dict.fromkeys((unit.qualname, unit.name)):
        if not name:
            continue
        match = re.match(rf"(?:the\s+|an?\s+)?`?{re.escape(name)}`?(?:\(\))?[\s:,-]+",
                         summary, flags=re.IGNORECASE)
        if match and match.end() < len(summary):
            return summary[match.end():], True
    return summary, False


def query_of(unit: CodeUnit) -> tuple[str, bool]:
    """The query a unit's doc makes, and whether a leading name was stripped from it."""
    return strip_leading_name(clean_summary(unit.doc), unit)


def word_count(text: str) -> int:
    """Words of letters in a text."""
    return len(_WORD.findall(text))


def doc_key(query: str) -> str:
    """A query normalised so that near-identical docs compare equal."""
    return _NOT_WORD.sub(" ", query.lower()).strip()


def body_key(unit: CodeUnit) -> str:
    """The unit's code without its doc, whitespace-insensitive."""
    return hashlib.sha256(" ".join(unit.code_without_doc.split()).encode(
        "utf-8", "surrogatepass")).hexdigest()


def without_doc(unit: CodeUnit) -> CodeUnit:
    """The unit as the checks' documents see it: no doc anywhere."""
    return replace(unit, doc="", code=unit.code_without_doc, doc_span=None)


def text_key(text: str) -> str:
    """The cache key of a text (the same digest as a unit's content hash)."""
    return hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:32]


# -- the split -------------------------------------------------------------------------


@dataclass(frozen=True)
class Split:
    """Which units are held out: a deterministic share by hash.

    Attributes:
        holdout: the share held out, in (0, 1].
        seed: changes which units fall on each side.
        by_file: split whole files, so no held-out unit shares a file with a training one.
    """

    holdout: float = DEFAULT_HOLDOUT
    seed: int = DEFAULT_SEED
    by_file: bool = False

    def validate(self) -> None:
        """Raise a clear error for a share outside (0, 1]."""
        if not 0.0 < self.holdout <= 1.0:
            raise InvalidSplit(
                f"--holdout must be a share above 0 and at most 1, not {self.holdout}")

    def fraction(self, unit: CodeUnit, salt: str = "") -> float:
        """A uniform number in [0, 1) fixed by the unit's split key and the seed."""
        key = unit.path if self.by_file else f"{unit.path}::{unit.qualname}"
        digest = hashlib.sha256(f"{self.seed}\0{salt}\0{key}".encode(
            "utf-8", "surrogatepass")).hexdigest()
        return int(digest[:13], 16) / float(16**13)

    def held_out(self, unit: CodeUnit) -> bool:
        """Whether the unit belongs to the held-out side."""
        return self.fraction(unit) < self.holdout

    def describe(self) -> str:
        """The split in words."""
        unit = "file" if self.by_file else "unit"
        return f"{self.holdout:.0%} held out by {unit}, seed {self.seed}"

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"holdout": self.holdout, "seed": self.seed, "by_file": self.by_file}

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> Split:
        """The split a :meth:`to_json` dict describes."""
        return cls(float(data["holdout"]), int(data["seed"]), bool(data["by_file"]))


@dataclass(frozen=True)
class Case:
    """One (query, unit) pair.

    Attributes:
        position: the unit's position in the corpus.
        query: the cleaned doc summary.
        held_out: on the held-out side of the split.
        name_stripped: a leading copy of the unit's name was removed from the query.
        unique: no other unit has a near-identical doc or the same body.
    """

    position: int
    query: str
    held_out: bool
    name_stripped: bool = False
    unique: bool = True


@dataclass(frozen=True)
class Selection:
    """The pairs the checks use, and what was left out.

    ``cases`` holds every held-out pair and every training pair; held-out
    pairs are always unique, training pairs may share a doc or a body with
    another pair (:mod:`codeseek.tune` keeps such pairs out of one batch).
    """

    cases: tuple[Case, ...]
    undocumented: int
    short: int
    duplicate_docs: int
    duplicate_bodies: int

    @property
    def held_out(self) -> list[Case]:
        """The held-out pairs."""
        return [c for c in self.cases if c.held_out]

    @property
    def training(self) -> list[Case]:
        """The training pairs."""
        return [c for c in self.cases if not c.held_out]


def select_cases(units: Sequence[CodeUnit], split: Split) -> Selection:
    """The held-out and training pairs of a corpus."""
    split.validate()
    queries = [query_of(unit) for unit in units]
    long_enough = [word_count(q) >= MIN_QUERY_WORDS for q, _ in queries]
    docs = Counter(doc_key(q) for (q, _), ok in zip(queries, long_enough, strict=True) if ok)
    bodies = Counter(body_key(unit) for unit in units)
    cases: list[Case] = []
    short = duplicate_docs = duplicate_bodies = 0
    for position, (unit, (query, stripped)) in enumerate(zip(units, queries, strict=True)):
        if not long_enough[position]:
            short += bool(unit.doc.strip())
            continue
        held = split.held_out(unit)
        same_doc = docs[doc_key(query)] > 1
        same_body = bodies[body_key(unit)] > 1
        if held and (same_doc or same_body):
            duplicate_docs += same_doc
            duplicate_bodies += same_body and not same_doc
            continue
        cases.append(Case(position, query, held, stripped, not (same_doc or same_body)))
    return Selection(tuple(cases), sum(1 for u in units if not u.doc.strip()), short,
                     duplicate_docs, duplicate_bodies)


# -- vectors ---------------------------------------------------------------------------


class VectorCache:
    """Vectors of texts by :func:`text_key`, kept in a ``.npz`` file between runs.

    A second ``codeseek eval`` (or ``codeseek tune`` after an eval) embeds
    nothing again. Entries not used by a run are dropped when it saves,
    unless ``prune`` is False (benchmarks that try several text variants).
    """

    def __init__(self, path: Path | None, model_id: str, *, prune: bool = True) -> None:
        self.path = path
        self.model_id = model_id
        self.prune = prune
        self.vectors: dict[str, np.ndarray] = {}
        self.used: set[str] = set()
        self.borrowed: set[str] = set()  # kept elsewhere (the store): never saved here
        if path is not None and safefs.is_regular_file(path):  # a link is never followed
            self._load(path)

    def _load(self, path: Path) -> None:
        try:
            with np.load(path, allow_pickle=False) as data:
                if str(data["model_id"]) != self.model_id:
                    return
                keys, matrix = data["keys"], data["vectors"]
        except (OSError, ValueError, KeyError):
            return  # a damaged cache only costs time
        self.vectors = {str(k): matrix[i] for i, k in enumerate(keys)}

    def add(self, key: str, vector: np.ndarray, *, borrowed: bool = False) -> None:
        """Remember one vector (``borrowed``: it is stored elsewhere, do not save it)."""
        self.vectors[key] = np.asarray(vector, dtype=np.float32)
        if borrowed:
            self.borrowed.add(key)

    def save(self) -> None:
        """Write the entries this run used (atomically; a failure only costs time)."""
        if self.path is None:
            return
        keys = sorted((self.used & self.vectors.keys() if self.prune else set(self.vectors))
                      - self.borrowed)
        matrix = np.stack([self.vectors[k] for k in keys]) if keys else np.zeros((0, 0))
        try:
            with safefs.replacing(self.path) as pending:
                np.savez(pending.file, keys=np.array(keys), vectors=matrix.astype(np.float32),
                         model_id=np.array(self.model_id))
        except OSError:
            return


def encode_cached(embedder: Embedder, texts: Sequence[str], cache: VectorCache | None = None,
                  progress: Progress | None = None, stage: str = "embed") -> np.ndarray:
    """Vectors of texts, each distinct text encoded once and only if not cached."""
    cache = cache or VectorCache(None, embedder.model_id)
    keys = [text_key(t) for t in texts]
    cache.used.update(keys)
    todo = {k: t for k, t in zip(keys, texts, strict=True) if k not in cache.vectors}
    ordered = sorted(todo.items(), key=lambda item: len(item[1]))
    for start in range(0, len(ordered), ENCODE_CHUNK):
        if progress:
            progress(stage, start, len(ordered))
        chunk = ordered[start : start + ENCODE_CHUNK]
        matrix = embedder.encode([t for _, t in chunk])
        for (key, _), vector in zip(chunk, matrix, strict=True):
            cache.add(key, vector)
    if progress:
        progress(stage, len(ordered), len(ordered))
    if not keys:
        return np.zeros((0, embedder.dim), dtype=np.float32)
    return np.stack([cache.vectors[k] for k in keys]).astype(np.float32)


# -- the doc-less document index -------------------------------------------------------


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


# -- ranks and metrics -----------------------------------------------------------------


def rank_of_true(scores: np.ndarray, true_index: int) -> int:
    """The true item's rank, ties counted against it (1 + the items scored at least as high)."""
    return int(np.count_nonzero(scores >= scores[true_index]))


def rank_in(ranking: Sequence[int] | np.ndarray, item: int) -> int:
    """The 1-based rank of an item in a ranking, 0 when it is absent."""
    found = np.flatnonzero(np.asarray(ranking) == item)
    return int(found[0]) + 1 if len(found) else 0


def reciprocal_ranks(ranks: np.ndarray) -> np.ndarray:
    """1 / rank, and 0 for an absent item (rank 0)."""
    ranks = np.asarray(ranks, dtype=np.float64)
    return np.divide(1.0, ranks, out=np.zeros_like(ranks), where=ranks > 0)


def mean_reciprocal_rank(ranks: np.ndarray) -> float:
    """MRR over cases."""
    return float(reciprocal_ranks(ranks).mean()) if len(ranks) else 0.0


def recall_at(ranks: np.ndarray, k: int) -> float:
    """The share of cases whose true item is in the top k."""
    ranks = np.asarray(ranks)
    return float(((ranks > 0) & (ranks <= k)).mean()) if len(ranks) else 0.0


def metric_rows(ranks: np.ndarray) -> dict[str, np.ndarray]:
    """Per-case values whose means are the metrics (recall@k and MRR)."""
    ranks = np.asarray(ranks)
    rows = {f"recall@{k}": ((ranks > 0) & (ranks <= k)).astype(np.float64) for k in CUTOFFS}
    rows["mrr"] = reciprocal_ranks(ranks)
    return rows


def bootstrap_ci(values: np.ndarray, seed: int,
                 samples: int = BOOTSTRAP_SAMPLES) -> tuple[float, float]:
    """A percentile-bootstrap 95% interval of the mean (cases resampled with replacement)."""
    values = np.asarray(values, dtype=np.float64)
    if len(values) == 0:
        return (0.0, 0.0)
    rng = np.random.default_rng(seed)
    means = np.empty(samples)
    for start in range(0, samples, 100):
        count = min(100, samples - start)
        picks = rng.integers(0, len(values), size=(count, len(values)))
        means[start : start + count] = values[picks].mean(axis=1)
    low, high = np.percentile(means, [2.5, 97.5])
    return float(low), float(high)


@dataclass(frozen=True)
class MethodResult:
    """One method under one protocol.

    Attributes:
        method: ``lexical``, ``dense``, ``dense-ann`` or ``served``.
        pool: the pool size, or ``"all"`` for the whole index.
        pool_size: how many units each query competes with (the whole index's size for "all").
        n: held-out queries measured.
        metrics: ``recall@1``, ``recall@5``, ``recall@10`` and ``mrr``.
        ci95: a bootstrap 95% interval for each metric.
        ranks: each query's rank of its unit (0: not among the candidates).
    """

    method: str
    pool: Pool
    pool_size: int
    n: int
    metrics: dict[str, float]
    ci95: dict[str, tuple[float, float]]
    ranks: tuple[int, ...] = field(repr=False)

    @property
    def mrr(self) -> float:
        """Mean reciprocal rank."""
        return self.metrics["mrr"]

    def to_json(self) -> dict[str, object]:
        """The JSON record of this result."""
        record: dict[str, object] = {"method": self.method, "pool": self.pool,
                                     "pool_size": self.pool_size, "n": self.n}
        record.update({name: round(value, 4) for name, value in self.metrics.items()})
        record["ci95"] = {name: [round(low, 4), round(high, 4)]
                          for name, (low, high) in self.ci95.items()}
        return record


def summarise(method: str, pool: Pool, pool_size: int, ranks: np.ndarray,
              seed: int) -> MethodResult:
    """Metrics and bootstrap intervals of one method's ranks."""
    rows = metric_rows(ranks)
    metrics = {name: float(values.mean()) for name, values in rows.items()}
    ci = {name: bootstrap_ci(values, seed) for name, values in rows.items()}
    return MethodResult(method, pool, pool_size, len(ranks), metrics, ci,
                        tuple(int(r) for r in ranks))


# -- signals: what each side ranks, per protocol ---------------------------------------

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
                    progress: Progress | None = None) -> dict[Pool, Signals]:
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
                rank, top = _lexical_case(order, scores, case.position, pool, sampler)
                ranks[pool].append(rank)
                tops[pool].append(top)
    if progress:
        progress("keyword search", len(cases), len(cases))
    return {pool: Signals(protocols[pool], np.array(ranks[pool], dtype=np.int64), tops[pool])
            for pool in protocols}


def _lexical_case(order: np.ndarray, scores: np.ndarray, true: int, pool: Pool,
                  sampler: PoolSampler) -> tuple[int, Top]:
    if pool == WHOLE:
        return rank_of_true(scores, true), _top_of(order, scores, DEPTH)
    chosen = sampler.pool(true, int(pool))
    inside = np.zeros(len(scores), dtype=bool)
    inside[chosen] = True
    # the served path for a narrowed pool: BM25 matches in order, kept if inside the pool
    return rank_of_true(scores[chosen], 0), _top_of(order[inside[order]], scores, DEPTH)


def dense_signals(cases: Sequence[Case], queries: np.ndarray, documents: DocumentIndex,
                  sampler: PoolSampler, protocols: dict[Pool, np.ndarray],
                  progress: Progress | None = None) -> dict[Pool, Signals]:
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
                rank, top = _dense_case(scores, true, pool, sampler)
                ranks[pool].append(rank)
                tops[pool].append(top)
    if progress:
        progress("dense search", len(cases), len(cases))
    return {pool: Signals(protocols[pool], np.array(ranks[pool], dtype=np.int64), tops[pool])
            for pool in protocols}


def _dense_case(scores: np.ndarray, true: int, pool: Pool,
                sampler: PoolSampler) -> tuple[int, Top]:
    if pool == WHOLE:
        return rank_of_true(scores, true), (np.zeros(0, dtype=np.int64), np.zeros(0))
    chosen = sampler.pool(true, int(pool))
    # the served path for a narrowed pool is exact search over the pool's vectors
    # (vectors.exact_search); the same selection here, on the scores already computed
    inside = scores[chosen]
    k = min(DEPTH, len(chosen))
    top = np.argpartition(-inside, k - 1)[:k]
    top = top[np.argsort(-inside[top], kind="stable")]
    return rank_of_true(inside, 0), (chosen[top], inside[top].astype(np.float64))


def ann_signals(cases: Sequence[Case], queries: np.ndarray, documents: DocumentIndex,
                progress: Progress | None = None) -> Signals:
    """HNSW candidates of each case over the whole index (rank 0 when not among them)."""
    index = documents.ann()
    ranks, tops = [], []
    for done, case in enumerate(cases):
        if progress and done % 200 == 0:
            progress("HNSW search", done, len(cases))
        hits = index.search(queries[done], DEPTH)
        positions = documents.positions([label for label, _ in hits])
        ranks.append(rank_in(positions, case.position))
        tops.append((positions, np.array([score for _, score in hits])))
    return Signals(np.arange(len(cases)), np.array(ranks, dtype=np.int64), tops)


def served_ranks(cases: Sequence[Case], dense: Signals, lexical: Signals,
                 fusion: Fusion, candidates: int = CANDIDATES) -> np.ndarray:
    """Each case's rank in the served ranking (:func:`~codeseek.search.fuse`) of the
    best ``candidates`` of each side."""
    ranks = []
    for slot, index in enumerate(dense.cases):
        d_ids, d_scores = (a[:candidates] for a in dense.tops[slot])
        l_ids, l_scores = (a[:candidates] for a in lexical.tops[slot])
        fused = fuse(list(zip(d_ids.tolist(), d_scores.tolist(), strict=True)),
                     list(zip(l_ids.tolist(), l_scores.tolist(), strict=True)), fusion)
        ranks.append(rank_in([item for item, _ in fused], cases[int(index)].position))
    return np.array(ranks, dtype=np.int64)


@dataclass(frozen=True, eq=False)
class CaseSignals:
    """Everything the methods need for a set of cases: lexical, exact dense and HNSW."""

    cases: tuple[Case, ...]
    lexical: dict[Pool, Signals]
    dense: dict[Pool, Signals]
    ann: Signals

    def served_for(self, pool: Pool) -> tuple[Signals, Signals]:
        """The dense and lexical candidates served search would fuse under a protocol."""
        return (self.ann if pool == WHOLE else self.dense[pool]), self.lexical[pool]

    def ranks(self, fusion: Fusion) -> Iterator[tuple[str, Pool, np.ndarray]]:
        """(method, protocol, ranks) for every method under every protocol."""
        for pool in self.lexical:
            yield "lexical", pool, self.lexical[pool].ranks
            yield "dense", pool, self.dense[pool].ranks
            if pool == WHOLE:
                yield "dense-ann", pool, self.ann.ranks
            yield "served", pool, served_ranks(self.cases, *self.served_for(pool), fusion)


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
    return CaseSignals(tuple(cases), lexical, dense, ann)


FUSION_GRID = tuple(replace(DEFAULT_FUSION, dense_weight=weight / 10) for weight in range(3, 10))
"""The fusions :func:`choose_fusion` tries: the served rule, dense weight 0.3 to 0.9."""


def choose_fusion(signals: CaseSignals,
                  grid: Sequence[Fusion] = FUSION_GRID) -> tuple[Fusion, dict[Fusion, float]]:
    """The fusion with the best served MRR, summed over protocols, on these (training) cases."""
    scores = {fusion: sum(mean_reciprocal_rank(served_ranks(signals.cases,
                                                            *signals.served_for(pool), fusion))
                          for pool in signals.lexical)
              for fusion in grid}
    best = max(grid, key=lambda fusion: scores[fusion])
    return best, scores


# -- the report ------------------------------------------------------------------------


@dataclass(frozen=True)
class EvalReport:
    """The recall checks of one repository.

    Attributes:
        repository: the repository root.
        model: the embedding model id.
        split: how the held-out side was chosen.
        holdout: held-out queries.
        training: training pairs (what ``codeseek tune`` learns from).
        corpus: units in the index (the whole-index pool).
        results: every method under every protocol.
        fusion: the served ranking rule.
        adapter: whether the served (and dense) queries went through the index's adapter.
        notes: how queries and documents were made, and what was left out.
    """

    repository: str
    model: str
    split: Split
    holdout: int
    training: int
    corpus: int
    results: tuple[MethodResult, ...]
    fusion: Fusion = DEFAULT_FUSION
    adapter: bool = False
    notes: tuple[str, ...] = ()

    def result(self, method: str, pool: Pool) -> MethodResult | None:
        """One method's result under one protocol."""
        return next((r for r in self.results if r.method == method and r.pool == pool), None)

    @property
    def pools(self) -> list[Pool]:
        """The protocols measured, pools first."""
        return list(dict.fromkeys(r.pool for r in self.results))

    def best(self, pool: Pool) -> MethodResult:
        """The method with the highest MRR under a protocol."""
        return max((r for r in self.results if r.pool == pool), key=lambda r: r.mrr)

    def to_json(self) -> dict[str, object]:
        """One JSON document: repository, model, holdout, results, and how they were made."""
        return {
            "repository": self.repository, "model": self.model, "holdout": self.holdout,
            "training": self.training, "corpus": self.corpus, "split": self.split.to_json(),
            "fusion": self.fusion.to_json(), "adapter": self.adapter,
            "results": [r.to_json() for r in self.results],
            "best": {str(pool): self.best(pool).method for pool in self.pools},
            "notes": list(self.notes),
        }

    def to_text(self) -> str:
        """The readable table the command line prints."""
        lines = [f"recall checks on {self.holdout} held-out docstrings of {self.repository}",
                 f"({self.split.describe()}; model {self.model}; {self.training} training "
                 f"pairs; served ranking: {_fusion_words(self.fusion)}"
                 f"{', with the tuned query adapter' if self.adapter else ''})", "",
                 f"{'method':<10} {'pool':>7} {'n':>6}  {'R@1':>6} {'R@5':>6} {'R@10':>6}  "
                 f"{'MRR':>6}  95% interval"]
        for result in self.results:
            low, high = result.ci95["mrr"]
            metrics = result.metrics
            lines.append(
                f"{result.method:<10} {result.pool_size:>7} {result.n:>6}  "
                f"{metrics['recall@1']:6.3f} {metrics['recall@5']:6.3f} "
                f"{metrics['recall@10']:6.3f}  {result.mrr:6.3f}  {low:.3f}-{high:.3f}")
        lines.append("")
        for pool in self.pools:
            best = self.best(pool)
            where = "the whole index" if pool == WHOLE else f"pool {pool}"
            lines.append(f"best on {where} ({best.pool_size} units): {best.method} "
                         f"(MRR {best.mrr:.3f})")
        lines.extend(f"note: {note}" for note in self.notes)
        return "\n".join(lines)


def _fusion_words(fusion: Fusion) -> str:
    weight = f"dense weight {fusion.dense_weight:g}"
    if fusion.kind == "rrf":
        return f"reciprocal rank fusion (k {fusion.rrf_k:g}, {weight})"
    scale = "standardised" if fusion.kind == "zscore" else "scaled"
    return f"fusion of {scale} scores ({weight})"


def report_notes(selection: Selection, cases: Sequence[Case], signals: CaseSignals,
                 corpus: int) -> tuple[str, ...]:
    """How the queries and documents were made, in a few sentences."""
    stripped = sum(1 for c in cases if c.name_stripped)
    notes = [
        "queries are each held-out doc's first paragraph with tags, parameter sections and "
        f"markup removed; a leading copy of the unit's name was removed from {stripped}",
        "documents are the units without their docs, embedded and keyword-indexed for this "
        "check (the index's own vectors include the docs and are not used)",
        f"left out: {selection.short} docs under {MIN_QUERY_WORDS} words, "
        f"{selection.undocumented} undocumented units, {selection.duplicate_docs} held-out "
        f"docs shared by another unit, {selection.duplicate_bodies} held-out bodies shared "
        "by another unit",
        f"dense-ann and served rank the best {CANDIDATES} candidates of each side; a unit "
        "outside them counts as a miss",
    ]
    for pool, members in signals.lexical.items():
        if pool != WHOLE and len(members.cases) < len(cases):
            notes.append(f"pool {pool}: {len(cases) - len(members.cases)} queries left out "
                         f"(their language has fewer than {pool} units)")
    if WHOLE in signals.lexical and len(signals.lexical) == 1:
        notes.append(f"no pool protocol: no language has {min(POOL_SIZES)} units "
                     f"(the whole index holds {corpus})")
    return tuple(notes)


def build_report(*, repository: str, model: str, split: Split, selection: Selection,
                 signals: CaseSignals, corpus: int, fusion: Fusion,
                 adapter: bool) -> EvalReport:
    """Summarise signals into a report."""
    results = []
    for method, pool, ranks in signals.ranks(fusion):
        pool_size = corpus if pool == WHOLE else int(pool)
        results.append(summarise(method, pool, pool_size, ranks, split.seed))
    return EvalReport(
        repository=repository, model=model, split=split, holdout=len(signals.cases),
        training=len(selection.training), corpus=corpus, results=tuple(results),
        fusion=fusion, adapter=adapter,
        notes=report_notes(selection, signals.cases, signals, corpus),
    )


# -- the whole check -------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Prepared:
    """The parts of a check that training reuses: documents, pairs and their vectors."""

    units: tuple[CodeUnit, ...]
    documents: DocumentIndex
    selection: Selection
    sampler: PoolSampler
    query_vectors: dict[str, np.ndarray]


def prepare(units: Sequence[CodeUnit], embedder: Embedder, split: Split, *,
            cache: VectorCache | None = None, training: bool = False,
            progress: Progress | None = None) -> Prepared:
    """Select pairs, embed documents and queries (held-out, and training ones if asked)."""
    selection = select_cases(units, split)
    if not selection.held_out:
        raise TooFewExamples(
            f"no held-out docstrings to check: {len(selection.cases)} units have a doc of at "
            f"least {MIN_QUERY_WORDS} words; document more code or raise --holdout")
    documents = build_documents(units, embedder, cache, progress)
    wanted = [c.query for c in selection.cases if c.held_out or training]
    vectors = encode_cached(embedder, wanted, cache, progress, "embed queries")
    if cache is not None:
        cache.save()
    return Prepared(tuple(units), documents, selection, PoolSampler(documents, split.seed),
                    dict(zip(wanted, vectors, strict=True)))


def query_matrix(prepared: Prepared, cases: Sequence[Case],
                 adapter: QueryAdapter | None = None) -> np.ndarray:
    """The query vectors of some cases (through the adapter, if any)."""
    dim = prepared.documents.vectors.shape[1]
    matrix = (np.stack([prepared.query_vectors[c.query] for c in cases]) if cases
              else np.zeros((0, dim), dtype=np.float32))
    return matrix if adapter is None else adapter.apply(matrix)


def evaluate_prepared(prepared: Prepared, *, repository: str, model: str, split: Split,
                      fusion: Fusion = DEFAULT_FUSION, adapter: QueryAdapter | None = None,
                      progress: Progress | None = None) -> EvalReport:
    """Run every method under every protocol on the held-out pairs."""
    cases = prepared.selection.held_out
    signals = collect_signals(cases, query_matrix(prepared, cases, adapter),
                              prepared.documents, prepared.sampler, progress=progress)
    return build_report(repository=repository, model=model, split=split,
                        selection=prepared.selection, signals=signals,
                        corpus=len(prepared.documents), fusion=fusion,
                        adapter=adapter is not None)


def evaluate_units(units: Sequence[CodeUnit], embedder: Embedder, *, repository: str,
                   split: Split | None = None, fusion: Fusion = DEFAULT_FUSION,
                   adapter: QueryAdapter | None = None, cache: VectorCache | None = None,
                   progress: Progress | None = None) -> EvalReport:
    """The recall checks of a corpus of units (see the module docstring)."""
    split = split or Split()
    prepared = prepare(units, embedder, split, cache=cache, progress=progress)
    return evaluate_prepared(prepared, repository=repository, model=embedder.model_id,
                             split=split, fusion=fusion, adapter=adapter, progress=progress)


# -- the HTML report -------------------------------------------------------------------

_BINS = ((1, 1, "1"), (2, 2, "2"), (3, 5, "3-5"), (6, 10, "6-10"), (11, 20, "11-20"),
         (21, 50, "21-50"), (51, 100, "51-100"))
_COLOURS = {"lexical": "#b8860b", "dense": "#1f77b4", "dense-ann": "#17becf",
            "served": "#2ca02c"}


def rank_histogram(ranks: Sequence[int]) -> list[tuple[str, int]]:
    """Counts of ranks in bins (1, 2, 3-5, ..., 51-100, and >100 for later or missed)."""
    ranks_array = np.asarray(ranks)
    bins = [(label, int(((ranks_array >= low) & (ranks_array <= high)).sum()))
            for low, high, label in _BINS]
    bins.append((">100", int(((ranks_array > 100) | (ranks_array == 0)).sum())))
    return bins


def _svg_histogram(result: MethodResult, width: int = 420, height: int = 180) -> str:
    bins = rank_histogram(result.ranks)
    top = max((count for _, count in bins), default=1) or 1
    bar = (width - 40) / len(bins)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height + 40}" '
             f'role="img" aria-label="rank histogram of {html.escape(result.method)}">']
    for i, (label, count) in enumerate(bins):
        h = (height - 20) * count / top
        x = 30 + i * bar
        parts.append(f'<rect x="{x:.1f}" y="{height - h:.1f}" width="{bar - 4:.1f}" '
                     f'height="{h:.1f}" fill="{_COLOURS.get(result.method, "#888")}">'
                     f'<title>{html.escape(label)}: {count}</title></rect>')
        parts.append(f'<text x="{x + bar / 2 - 2:.1f}" y="{height + 14}" font-size="9" '
                     f'text-anchor="middle">{html.escape(label)}</text>')
        parts.append(f'<text x="{x + bar / 2 - 2:.1f}" y="{height - h - 3:.1f}" '
                     f'font-size="9" text-anchor="middle">{count}</text>')
    parts.append("</svg>")
    return "".join(parts)


def _svg_recall_curve(results: Sequence[MethodResult], width: int = 520,
                      height: int = 240, depth: int = 20) -> str:
    left, bottom = 40, height - 30
    scale_x = (width - left - 110) / (depth - 1)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
             'role="img" aria-label="recall at k">',
             f'<line x1="{left}" y1="{bottom}" x2="{width - 110}" y2="{bottom}" stroke="#444"/>',
             f'<line x1="{left}" y1="10" x2="{left}" y2="{bottom}" stroke="#444"/>']
    for tick in (0.0, 0.25, 0.5, 0.75, 1.0):
        y = bottom - tick * (bottom - 10)
        parts.append(f'<text x="{left - 4}" y="{y + 3:.1f}" font-size="9" '
                     f'text-anchor="end">{tick:.2f}</text>')
    for k in (1, 5, 10, 15, 20):
        x = left + (k - 1) * scale_x
        parts.append(f'<text x="{x:.1f}" y="{bottom + 14}" font-size="9" '
                     f'text-anchor="middle">{k}</text>')
    for row, result in enumerate(results):
        colour = _COLOURS.get(result.method, "#888")
        points = " ".join(
            f"{left + (k - 1) * scale_x:.1f},"
            f"{bottom - recall_at(np.asarray(result.ranks), k) * (bottom - 10):.1f}"
            for k in range(1, depth + 1))
        dash = ' stroke-dasharray="5 3"' if result.method == "dense-ann" else ""
        parts.append(f'<polyline points="{points}" fill="none" stroke="{colour}" '
                     f'stroke-width="2"{dash}/>')
        parts.append(f'<text x="{width - 100}" y="{20 + 14 * row}" font-size="11" '
                     f'fill="{colour}">{html.escape(result.method)}</text>')
    parts.append(f'<text x="{(width - 110) / 2 + 20}" y="{height - 2}" font-size="10" '
                 'text-anchor="middle">k</text></svg>')
    return "".join(parts)


def render_html(report: EvalReport) -> str:
    """A small self-contained HTML page: the table, rank histograms, recall@k curves."""
    esc = html.escape
    rows = "".join(
        f"<tr><td>{esc(r.method)}</td><td>{r.pool_size}</td><td>{r.n}</td>"
        + "".join(f"<td>{r.metrics[name]:.3f}</td>" for name in metric_rows(np.zeros(0)))
        + f"<td>{r.ci95['mrr'][0]:.3f}-{r.ci95['mrr'][1]:.3f}</td></tr>"
        for r in report.results)
    sections = []
    for pool in report.pools:
        chosen = [r for r in report.results if r.pool == pool]
        size = chosen[0].pool_size
        title = f"whole index ({size} units)" if pool == WHOLE else f"pool of {size}"
        histograms = "".join(f"<figure>{_svg_histogram(r)}<figcaption>{esc(r.method)}: "
                             "rank of the true unit (&gt;100: later, or not among the "
                             "candidates)</figcaption></figure>" for r in chosen)
        sections.append(f"<h2>{esc(title)}</h2><figure>{_svg_recall_curve(chosen)}"
                        f"<figcaption>recall@k, k = 1..20</figcaption></figure>"
                        f"<div class=row>{histograms}</div>")
    notes = "".join(f"<li>{esc(n)}</li>" for n in report.notes)
    best = "; ".join(f"{'whole index' if p == WHOLE else f'pool {p}'}: "
                     f"<b>{esc(report.best(p).method)}</b>" for p in report.pools)
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<title>codeseek recall checks: {esc(report.repository)}</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2em; color: #222; }}
table {{ border-collapse: collapse; }} td, th {{ padding: 2px 10px; text-align: right; }}
td:first-child, th:first-child {{ text-align: left; }} tr:nth-child(even) {{ background: #f3f3f3; }}
.row {{ display: flex; flex-wrap: wrap; gap: 1em; }} figcaption {{ font-size: 0.85em; }}
</style></head><body>
<h1>Recall checks on held-out docstrings</h1>
<p>{esc(report.repository)}: {report.holdout} held-out docstrings ({esc(report.split.describe())}),
model {esc(report.model)}, {report.training} training pairs. Best: {best}.</p>
<table><tr><th>method</th><th>pool</th><th>n</th><th>recall@1</th><th>recall@5</th>
<th>recall@10</th><th>MRR</th><th>MRR 95% interval</th></tr>{rows}</table>
{''.join(sections)}
<h2>How these figures were made</h2><ul>{notes}</ul>
</body></html>
"""


def check_report_path(path: Path) -> None:
    """Fail early (before minutes of work) when the report's folder does not exist."""
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ReportWriteError(f"{path}: cannot write the report: the folder {folder} "
                               "does not exist")


def write_html(report: EvalReport, path: Path) -> None:
    """Write the HTML report to a file."""
    try:
        path.write_text(render_html(report), encoding="utf-8")
    except OSError as exc:
        raise ReportWriteError(f"{path}: cannot write the report: {exc.strerror or exc}") from exc
