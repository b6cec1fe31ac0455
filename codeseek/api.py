"""The public entry point: :func:`open_index` and the :class:`Index` it returns.

The command line, the tests and scripts all go through this surface. The
embedding model is loaded on first need, so ``status`` never touches it.
"""

from __future__ import annotations

import errno
import fcntl
import os
import stat
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager, suppress
from itertools import groupby
from pathlib import Path
from typing import TYPE_CHECKING, Any

from codeseek import safefs, seal
from codeseek.adapter import (
    ADAPTER_NAME,
    QueryAdapter,
    adapter_summary,
    load_adapter,
    remove_adapter,
    save_adapter,
)
from codeseek.bm25 import CorpusStats
from codeseek.confidence import Baseline
from codeseek.config import Settings, load_settings
from codeseek.embed import Embedder
from codeseek.errors import (
    ConfigError,
    IndexBuilding,
    IndexCorrupt,
    IndexLocked,
    IndexNotFound,
    IndexWriteError,
    InvalidQuery,
    InvalidSplit,
    ModelMismatch,
    RepositoryNotFound,
    TooFewExamples,
)
from codeseek.indexer import (
    ProgressCallback,
    Updater,
    UpdateSummary,
    load_vectors,
    save_vectors,
)
from codeseek.locks import ReadWriteLock
from codeseek.multi import Basis, Pick, Sides
from codeseek.query import DEFAULT_K, Filters, Query, as_queries, filters_of
from codeseek.refine import (
    FIRST_TIER,
    REFINE_MODEL_KEY,
    UNITS_PER_REFINE_BATCH,
    QueryTraffic,
    Refiner,
    RefiningSearcher,
    begin_refinement,
    refinement_of,
)
from codeseek.scan import ScanResult, SourceFile, scan_repository
from codeseek.search import DEFAULT_FUSION, Fusion, Searcher, SearchHit, neighbour_units
from codeseek.service import IndexStatus, repository_mismatch
from codeseek.store import DB_NAME, Store, unlink_all
from codeseek.tiers import DEFAULT_TIER, load_tier_embedder, tier_of
from codeseek.vectors import HNSW_NAME, VectorIndex

if TYPE_CHECKING:
    from codeseek.evaluate import EvalReport, Progress, Split, VectorCache
    from codeseek.evaluate.questions import Question, QuestionReport
    from codeseek.tune import TrainSettings, TuneReport

LOCK_NAME = "writer.lock"


class Index:
    """One repository's index: update it, search it, ask its status."""

    def __init__(self, settings: Settings, store: Store, embedder: Embedder | None = None,
                 refine_embedder: Embedder | None = None) -> None:
        self.settings = settings
        self.store = store
        self._embedder = embedder
        self._refine_embedder = refine_embedder  # the target of a refinement (refine.py)
        self._refiner: Refiner | None = None
        self.traffic = QueryTraffic()  # the searches a refinement gives way to
        self._vectors: VectorIndex | None = None
        self._searcher: Searcher | None = None
        self._adapter_seen: tuple[int, int, int] | None = None  # the adapter file searched with
        self.lock = ReadWriteLock()  # searches read, updates write

    # -- lifecycle -------------------------------------------------------------------

    def close(self) -> None:
        """Release the store."""
        self.store.close()

    def __enter__(self) -> Index:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def embedder(self) -> Embedder:
        """The embedding model of :attr:`tier`, loaded on first use."""
        if self._embedder is None:
            self._embedder = load_tier_embedder(self.settings, self.tier)
        return self._embedder

    @property
    def tier(self) -> str:
        """The embedding tier this index embeds with: the one the settings name, else
        the one its vectors were made with, else DEFAULT_TIER (a new index)."""
        if self._embedder is not None:
            return tier_of(self._embedder.model_id) or DEFAULT_TIER
        manifest = self.store.manifest()
        target = tier_of(manifest.get(REFINE_MODEL_KEY))
        if target is not None and self.settings.tier in (None, target):
            return FIRST_TIER  # under refinement: the index's own vectors are static
        return self.settings.tier or tier_of(manifest.get("model_id")) or DEFAULT_TIER

    @property
    def refine_embedder(self) -> Embedder:
        """The model a refinement embeds toward: the one the manifest names, else the
        settings' tier (default: full), loaded on first use."""
        if self._refine_embedder is None:
            target = tier_of(self.store.manifest().get(REFINE_MODEL_KEY))
            tier = target or self.settings.tier or DEFAULT_TIER
            if tier == FIRST_TIER:
                raise ConfigError(f"--refine embeds toward a slower tier than {FIRST_TIER}; "
                                  "ask for --tier full or --tier int8")
            self._refine_embedder = load_tier_embedder(self.settings, tier)
        return self._refine_embedder

    @property
    def refining(self) -> bool:
        """Whether a refinement is under way (the first tier searchable, the target tier
        filled in behind, :mod:`codeseek.refine`)."""
        return REFINE_MODEL_KEY in self.store.manifest()

    def choose_refinement(self, asked: bool | None = None) -> tuple[bool, str | None]:
        """Whether an update should build searchable first (:meth:`update`'s ``refine``)
        and, when the size of the repository decided it, a notice saying so.

        ``asked`` is the caller's word (``--refine``/``--no-refine``; None: not said),
        else ``codeseek.toml``'s ``refine``; else a new index (no unit yet) whose target
        tier is slower than the static one is refined when the files it would parse add
        up to more than ``refine_above_bytes``. A refinement under way is never begun
        again; :meth:`refine` resumes it whatever this says."""
        if asked is not None:
            return asked, None
        if self.settings.refine is not None:
            return self.settings.refine, None
        manifest = self.store.manifest()
        target = self.settings.tier or tier_of(manifest.get("model_id")) or DEFAULT_TIER
        if (target == FIRST_TIER or REFINE_MODEL_KEY in manifest
                or self.store.counts()["units"] > 0):
            return False, None
        size = sum(source.size for source in scan_repository(self.settings).files)
        if size <= self.settings.refine_above_bytes:
            return False, None
        return True, (f"codeseek: {size / 1e6:.1f} MB of source to index: searchable first "
                      f"with the {FIRST_TIER} tier, the {target} tier filled in behind "
                      "(--no-refine builds with it at once)")

    # -- writing ---------------------------------------------------------------------

    @property
    def notes(self) -> list[str]:
        """Warnings about the index folder, to show once (when the index was made)."""
        return list(self.store.notes)

    def update(self, progress: ProgressCallback | None = None, *,
               refine: bool = False) -> UpdateSummary:
        """Bring the index up to date with the files on disk, and save the vector index.

        With ``refine``, an index whose vectors are not all of the target tier (the
        settings' tier, default full) is built with the static tier first and marked for
        refinement: :meth:`refine` then embeds it with the target tier behind."""
        with self.writer_lock():
            if refine:
                self._begin_refinement()
            summary = self.updater(progress).full()
            self.finish_build(progress)
            return summary

    def finish_build(self, progress: ProgressCallback | None = None) -> None:
        """After a whole update (under :meth:`writer_lock`): record the first build as
        finished and save the vector index."""
        self.store.finish_first_build()
        if progress:
            progress("save", 0, 1)
        self.save()
        if progress:
            progress("save", 1, 1)

    def _begin_refinement(self) -> None:
        target = self.refine_embedder
        if self.store.manifest().get("model_id") == target.model_id:
            return  # built with the target tier already: a plain update
        begin_refinement(self.store, target, self.lock.write)
        if self._embedder is None or tier_of(self._embedder.model_id) != FIRST_TIER:
            self._embedder = load_tier_embedder(self.settings, FIRST_TIER)
            self._vectors = None
            self._searcher = None

    def refine(self, progress: ProgressCallback | None = None,
               limit: int | None = None) -> int:
        """Embed up to ``limit`` units (default: all) with the refinement's target tier,
        in committed batches, most useful files first; once none is left, the target
        tier becomes the index's own. Returns the units embedded (0: not refining)."""
        if not self.refining:
            return 0
        done = 0
        with self.writer_lock():
            refiner = self._refiner
            if refiner is None or refiner.embedder is not self.refine_embedder:
                refiner = self._refiner = Refiner(self.store, self.refine_embedder,
                                                  self.lock.write, self.traffic)
            while limit is None or done < limit:
                batch = UNITS_PER_REFINE_BATCH if limit is None else min(
                    UNITS_PER_REFINE_BATCH, limit - done)
                embedded = refiner.step(batch)
                done += embedded
                if progress:
                    progress("refine", *refiner.progress())
                if embedded == 0:
                    break
            if refiner.finish():
                self._finish_refinement()
        return done

    def _finish_refinement(self) -> None:
        """Search with the target tier from now on (its HNSW built and saved)."""
        with self.lock.write():
            if self._refine_embedder is not None:  # else a search switched already
                self._embedder = self._refine_embedder
            self._refine_embedder = None
            self._refiner = None
            self._vectors = None
            self._searcher = None
        self._vectors_for(self.embedder.model_id, self.embedder.dim)
        self.save()

    def update_files(self, files: list[SourceFile], gone: list[str],
                     scan: ScanResult | None = None) -> UpdateSummary:
        """Apply changed files and removed paths; the vector file is saved later by save()."""
        with self.writer_lock():
            return self.updater(None).paths(files, gone, scan)

    def save(self) -> None:
        """Save the vector index atomically if it holds changes not yet on disk."""
        if self._vectors is None:
            return
        with self.lock.read():
            if self.store.manifest().get("hnsw_generation") != str(self.store.generation()):
                save_vectors(self.store, self._vectors, self.settings)

    def updater(self, progress: ProgressCallback | None = None) -> Updater:
        """The updater that writes this index (call under :meth:`writer_lock`)."""
        vectors = self._vectors_for(self.embedder.model_id, self.embedder.dim)
        if self._searcher is not None and self._searcher.vectors is not vectors:
            self._searcher = None
        return Updater(self.store, self.embedder, vectors, self.settings, progress,
                       self.lock.write)

    @contextmanager
    def writer_lock(self) -> Iterator[None]:
        """The one writer: excludes other processes' updates of this index (a lock file)."""
        path = self.settings.index_dir / LOCK_NAME
        handle = safefs.open_lock(path)
        try:
            try:
                fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                raise IndexLocked(
                    f"another codeseek process is updating the index at "
                    f"{self.settings.index_dir}; wait for it to finish"
                ) from None
            yield
        finally:
            handle.close()

    def _writer_running(self) -> bool:
        """Whether some process (this one included) holds the writer lock now."""
        try:
            fd = safefs.open_regular(self.settings.index_dir / LOCK_NAME, os.O_RDONLY)
        except OSError:
            return False  # no lock file: no update has run here
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except OSError as exc:
            return exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN)
        finally:
            os.close(fd)
        return False

    def _check_built(self) -> None:
        """Refuse to search an index whose first build is not whole (it would answer
        "no matches" for what it has not reached yet)."""
        if self.store.first_build_finished():
            return
        where = self.settings.index_dir
        if self._writer_running():
            raise IndexBuilding(
                f"the index at {where} is being built ({self.store.counts()['files']} files "
                "so far); search again when the build is done")
        raise IndexBuilding(
            f"the first build of the index at {where} did not finish; run `codeseek index` "
            "to complete it")

    # -- reading ---------------------------------------------------------------------

    def _vectors_for(self, model_id: str, dim: int) -> VectorIndex:
        if self._vectors is not None and self._vectors.dim == dim:
            return self._vectors
        manifest = self.store.manifest()
        if manifest.get("model_id") != model_id:
            self._vectors = VectorIndex(dim)  # a new model: every vector is made anew
            return self._vectors
        vectors = load_vectors(self.store, model_id, dim, self.settings)
        if (vectors.rebuilt and not self.store.read_only
                and os.access(self.settings.index_dir, os.W_OK)):
            with suppress(IndexWriteError):  # searching still works from memory
                save_vectors(self.store, vectors, self.settings)
        self._vectors = vectors
        return vectors

    def _adapter_signature(self) -> tuple[int, int, int] | None:
        """(inode, size, mtime) of the adapter file; None when there is none."""
        info = safefs.lstat_or_none(self.settings.index_dir / ADAPTER_NAME)
        if info is None:
            return None
        return info.st_ino, info.st_size, info.st_mtime_ns

    def _refresh_adapter(self, searcher: Searcher) -> None:
        """Follow a query adapter saved or removed since the searcher loaded (by another
        process, e.g. ``codeseek tune`` beside a running daemon): one stat per search."""
        signature = self._adapter_signature()
        if signature == self._adapter_seen:
            return
        adapter = load_adapter(self.settings.index_dir, searcher.model_id)
        with self.lock.write():
            searcher.adapter = adapter
            searcher.fusion = _fusion_of(adapter) or DEFAULT_FUSION
        self._adapter_seen = signature

    def searcher(self) -> Searcher:
        """The searcher over this index (loads the model and the vectors).

        A query adapter written or removed since the last call is picked up here.
        An index whose first build is not whole is refused (:class:`IndexBuilding`).
        """
        self._check_built()
        if isinstance(self._searcher, RefiningSearcher) and not self.refining:
            # the refinement finished (in another process, or this one's writer thread
            # is switching): search its target tier now
            with self.lock.write():
                target = self._refine_embedder
                self._searcher = self._vectors = None
                self._embedder = target if target is not None and target.model_id == (
                    self.store.manifest().get("model_id")) else None
                self._refine_embedder = None
        if self._searcher is not None:
            self._refresh_adapter(self._searcher)
        if self._searcher is None:
            manifest = self.store.manifest()
            built_with = manifest.get("model_id")
            if built_with is None:
                raise IndexNotFound(
                    f"the index at {self.settings.index_dir} is empty; "
                    "build it with `codeseek index`"
                )
            embedder = self.embedder
            if built_with != embedder.model_id and tier_of(built_with) != self.tier:
                raise ModelMismatch(
                    f"the index holds vectors of the {tier_of(built_with)} tier, not the "
                    f"{self.tier} tier asked for (--tier, CODESEEK_TIER or codeseek.toml "
                    f"`tier`); run `codeseek index --tier {self.tier}` to re-embed it, or "
                    f"ask for the {tier_of(built_with)} tier")
            if built_with != embedder.model_id:
                raise ModelMismatch(
                    f"the index was built with model {built_with}, not {embedder.model_id}; "
                    "run `codeseek index` with this model to re-embed"
                )
            vectors = self._vectors_for(embedder.model_id, embedder.dim)
            self._adapter_seen = self._adapter_signature()
            adapter = load_adapter(self.settings.index_dir, embedder.model_id)
            if self.refining and tier_of(embedder.model_id) == FIRST_TIER:
                self._searcher = RefiningSearcher(
                    self.store, vectors, embedder, embedder.model_id, self.lock,
                    adapter=adapter, fusion=_fusion_of(adapter), full=self.refine_embedder)
            else:
                self._searcher = Searcher(self.store, vectors, embedder, embedder.model_id,
                                          self.lock, adapter=adapter,
                                          fusion=_fusion_of(adapter))
        return self._searcher

    def search(self, query: str | Query, k: int = DEFAULT_K, *,
               filters: Filters | None = None, languages: Sequence[str] = (),
               paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The k best units for a natural-language query (a :class:`Query` carries its
        own k and filters; the keyword filters are the older spelling of ``filters``)."""
        return self.search_many([query], k, filters=filters, languages=languages,
                                paths=paths, kinds=kinds)[0]

    def search_many(self, queries: Sequence[str | Query], k: int = DEFAULT_K, *,
                    filters: Filters | None = None, languages: Sequence[str] = (),
                    paths: Sequence[str] = (), kinds: Sequence[str] = ()
                    ) -> list[list[SearchHit]]:
        """The k best units for each of several queries (each run of queries with the
        same k and filters is embedded in one batch and answered from one state)."""
        batch = as_queries(queries, k, filters_of(filters, languages, paths, kinds))
        with self.traffic.searching():
            searcher = self.searcher()
            answers: list[list[SearchHit]] = []
            for (run_k, run_filters), run in groupby(batch, key=lambda q: (q.k, q.filters)):
                texts = [_text_of(query) for query in run]
                answers.extend(searcher.search_many(texts, run_k, run_filters))
        return answers

    # -- the steps of a search across several indexes (codeseek.multi) ---------------

    def merge_basis(self, queries: Sequence[Query]) -> Basis:
        """The model, the fusion and each query's BM25 statistics of this index."""
        searcher = self.searcher()
        texts = [_text_of(query) for query in queries]
        with self.lock.read():
            stats = [searcher.corpus_stats(text) for text in texts]
            off_topic = searcher.off_topic_best()
        return Basis(searcher.model_id, searcher.fusion.to_json(), stats, off_topic)

    def merge_sides(self, queries: Sequence[Query],
                    stats: Sequence[CorpusStats]) -> list[Sides]:
        """Each query's dense and keyword candidates, keyword scores under ``stats``."""
        if len(stats) != len(queries):
            raise InvalidQuery("one set of corpus statistics per query is needed")
        searcher = self.searcher()
        answers: list[Sides] = []
        at = 0
        with self.traffic.searching():
            for (run_k, run_filters), run in groupby(queries, key=lambda q: (q.k, q.filters)):
                texts = [_text_of(query) for query in run]
                answers.extend(searcher.sides(texts, run_k, run_filters,
                                              stats[at:at + len(texts)]))
                at += len(texts)
        return answers

    def merge_hits(self, queries: Sequence[Query], picks: Sequence[Sequence[Pick]],
                   off_topic: Sequence[float] | None = None) -> list[list[SearchHit]]:
        """Each query's picked units of this index as hits, in the order given; their
        confidences against the off-topic questions' best cosines given (default: this
        index's own)."""
        if len(picks) != len(queries):
            raise InvalidQuery("one list of picked units per query is needed")
        searcher = self.searcher()
        baseline = None if off_topic is None else Baseline.of(off_topic)
        return [searcher.picked(_text_of(query), chosen, baseline)
                for query, chosen in zip(queries, picks, strict=True)]

    # -- recall checks and tuning ------------------------------------------------------

    def evaluate(self, *, holdout: float | None = None, seed: int | None = None,
                 by_file: bool | None = None, questions: Path | None = None,
                 progress: Progress | None = None) -> EvalReport:
        """Recall checks on held-out docstrings (:mod:`codeseek.evaluate`), the name-blind
        protocol beside them, and the question checks of ``questions`` (default: the
        index folder's ``questions.jsonl``, if there is one).

        The split defaults to the one the index's query adapter was trained
        with, if it has one (a different split would test on training pairs).
        """
        from dataclasses import replace

        from codeseek.evaluate import EvalReport, evaluate_units

        searcher = self.searcher()
        split = self._split(holdout, seed, by_file, searcher.adapter)
        asked = self.evaluate_questions(questions, seed=split.seed)  # a bad file fails first
        units = [stored.unit for stored in self.store.iter_units()]
        try:
            report = evaluate_units(units, searcher.embedder,
                                    repository=str(self.settings.repo), split=split,
                                    fusion=searcher.fusion, adapter=searcher.adapter,
                                    cache=self._eval_cache(), progress=progress)
        except TooFewExamples as exc:
            if asked is None:
                raise
            # a repository with few docs can still be checked on its own questions
            return EvalReport(repository=str(self.settings.repo), model=searcher.model_id,
                              split=split, holdout=0, training=0, corpus=len(units),
                              results=(), fusion=searcher.fusion,
                              adapter=searcher.adapter is not None, notes=(str(exc),),
                              questions=asked)
        return report if asked is None else replace(report, questions=asked)

    def question_file(self) -> Path | None:
        """The index folder's question file, if there is one (never through a link)."""
        from codeseek.evaluate.questions import QUESTIONS_NAME

        path = self.settings.index_dir / QUESTIONS_NAME
        return path if safefs.lstat_or_none(path) is not None else None

    def evaluate_questions(self, path: Path | None = None, *,
                           seed: int = 0) -> QuestionReport | None:
        """The question checks of a question file (:mod:`codeseek.evaluate.questions`),
        asked through :meth:`search`; without ``path``, the index folder's question
        file, and None when it has none."""
        loaded = self._load_questions(path)
        if loaded is None:
            return None
        searcher = self.searcher()
        return self._ask_questions(*loaded, self.search_many, seed=seed,
                                   adapter=searcher.adapter is not None)

    def _load_questions(self, path: Path | None) -> tuple[list[Question], Path] | None:
        """A question file's questions (a bad file fails here, with its name and line);
        without ``path``, the index folder's own file, read without following a link."""
        from codeseek.evaluate.questions import load_questions

        own = path is None
        path = self.question_file() if path is None else path
        if path is None:
            return None
        return load_questions(path, in_index_dir=own), path

    def _ask_questions(self, questions: list[Question], path: Path,
                       search: Callable[[list[str], int], list[list[SearchHit]]], *,
                       seed: int, adapter: bool) -> QuestionReport:
        from codeseek.evaluate.questions import check_questions

        known = {(s.unit.path, s.unit.qualname) for s in self.store.iter_units()}

        def ask(texts: list[str], depth: int) -> list[list[tuple[str, str]]]:
            return [[(hit.path, hit.qualname) for hit in hits] for hits in search(texts, depth)]

        return check_questions(questions, ask, known, source=str(path),
                               corpus=self.store.counts()["units"], seed=seed, adapter=adapter)

    def tune(self, *, holdout: float | None = None, seed: int | None = None,
             by_file: bool | None = None, batch_size: int | None = None,
             questions: Path | None = None, settings: TrainSettings | None = None,
             progress: Progress | None = None) -> TuneReport:
        """Train a query adapter on the training split; keep it only under the rules of
        :mod:`codeseek.keeping` (held-out docstrings gain beyond noise, name-blind and
        question figures do not fall). ``questions`` defaults to the index folder's
        ``questions.jsonl``, if there is one; a bad file fails before any training.
        ``settings`` replaces the training settings (``batch_size`` then changes them)."""
        from dataclasses import replace

        from codeseek.evaluate import Split
        from codeseek.tune import TrainSettings, tune_units

        searcher = self.searcher()
        defaults = Split()
        split = Split(defaults.holdout if holdout is None else holdout,
                      defaults.seed if seed is None else seed,
                      defaults.by_file if by_file is None else by_file)
        split.validate()
        settings = settings or TrainSettings()
        if batch_size is not None:
            settings = replace(settings, batch_size=batch_size)
        loaded = self._load_questions(questions)
        units = [stored.unit for stored in self.store.iter_units()]

        def check(adapter: QueryAdapter | None, fusion: Fusion) -> QuestionReport:
            assert loaded is not None
            # a searcher of its own: the plain model, or the adapter on trial, never the
            # index's saved one
            trial = Searcher(self.store, searcher.vectors, searcher.embedder,
                             searcher.model_id, self.lock, adapter=adapter, fusion=fusion)
            return self._ask_questions(*loaded, trial.search_many, seed=split.seed,
                                       adapter=adapter is not None)

        with self.writer_lock():
            adapter, report = tune_units(units, searcher.embedder,
                                         repository=str(self.settings.repo), split=split,
                                         settings=settings, cache=self._eval_cache(),
                                         questions=None if loaded is None else check,
                                         progress=progress)
            if report.kept and adapter is not None:
                save_adapter(self.settings.index_dir, adapter)
            else:
                remove_adapter(self.settings.index_dir)
        self._searcher = None  # the next search loads the adapter (or goes without)
        return report

    def remove_adapter(self) -> bool:
        """Delete the index's query adapter; whether there was one."""
        with self.writer_lock():
            removed = remove_adapter(self.settings.index_dir)
        self._searcher = None
        return removed

    def _split(self, holdout: float | None, seed: int | None, by_file: bool | None,
               adapter: QueryAdapter | None) -> Split:
        from codeseek.evaluate import Split

        trained = _trained_split(adapter)
        base = trained or Split()
        split = Split(base.holdout if holdout is None else holdout,
                      base.seed if seed is None else seed,
                      base.by_file if by_file is None else by_file)
        split.validate()
        if trained is not None and split != trained:
            raise InvalidSplit(
                f"the query adapter of this index was trained with {trained.describe()}; "
                "check with that split (its held-out docstrings were not trained on), "
                "run `codeseek tune` with this one, or `codeseek tune --remove`")
        return split

    def _eval_cache(self) -> VectorCache:
        """The recall checks' vector cache, seeded with the stored vectors of undocumented
        units (their doc-less text is the text that was embedded)."""
        from codeseek.evaluate import CACHE_NAME, VectorCache

        embedder = self.embedder
        cache = VectorCache(self.settings.index_dir / CACHE_NAME, embedder.model_id)
        undocumented = {s.id: s.content_hash for s in self.store.iter_units()
                        if not s.unit.doc.strip()}
        labels, matrix = self.store.unit_vectors(embedder.model_id, embedder.dim,
                                                 sorted(undocumented))
        for label, vector in zip(labels, matrix, strict=True):
            cache.add(undocumented[int(label)], vector, borrowed=True)
        return cache

    def has_file(self, path: str) -> bool:
        """Whether the index holds the file at this repository-relative path."""
        return path in self.store.file_rows()

    def unit_at(self, path: str, where: str) -> int:
        """The unit of ``path`` (repository-relative) that ``where`` names: a qualified
        name (or a name only one unit of the file has), or a line number (the innermost
        unit whose lines hold it); its unit id. Raises InvalidQuery when none or several
        fit."""
        units = self.store.units_of_file(path)
        if not units and not self.has_file(path):
            raise InvalidQuery(f"{path}: not a file of the index")
        # ASCII digits only: "²".isdigit() holds but int("²") fails, and "٣" is no
        # line number a user types
        if where.isascii() and where.isdecimal():
            line = int(where)
            if line < 1:
                raise InvalidQuery(f"{path}: line numbers start at 1, not {where}")
            holding = [s for s in units if s.unit.start_line <= line <= s.unit.end_line]
            if not holding:
                raise InvalidQuery(f"{path}: no unit holds line {line}")
            chosen = min(holding, key=lambda s: (s.unit.end_line - s.unit.start_line,
                                                 -s.unit.start_line))
            return chosen.id
        named = [s for s in units if s.unit.qualname == where] or [
            s for s in units if s.unit.name == where]
        if not named:
            raise InvalidQuery(f"{path}: no unit named {where!r}")
        if len(named) > 1:
            lines = ", ".join(str(s.unit.start_line) for s in named)
            raise InvalidQuery(f"{path}: {len(named)} units are named {where!r} (lines {lines}); "
                               "name one by its line, PATH:LINE")
        return named[0].id

    def neighbours(self, unit: int | Query, k: int = DEFAULT_K, *,
                   filters: Filters | None = None, languages: Sequence[str] = (),
                   paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The unit's neighbours: the k units whose meaning is nearest this one's (a
        :class:`Query` names the unit by ``unit_id`` and carries its k and filters)."""
        query = unit if isinstance(unit, Query) else Query(
            unit_id=unit, k=k, filters=filters_of(filters, languages, paths, kinds))
        if query.unit_id is None:
            raise InvalidQuery("a neighbours query names a unit, not a text")
        return neighbour_units(self.searcher(), query.unit_id, query.k, query.filters)

    def daemon_status(self) -> dict[str, Any] | None:
        """None: this index answers in process (the search service protocol)."""
        return None

    def skipped_files(self) -> list[tuple[str, str]]:
        """(path, reason) of every file left out of the index, by path."""
        return self.store.skipped_files()

    def status(self) -> IndexStatus:
        """Counts and freshness; never loads the model. A damaged store raises
        :class:`IndexCorrupt` (SQLite's quick check reads every page once)."""
        self.store.check_health()
        manifest = self.store.manifest()
        counts = self.store.counts()
        generation = self.store.generation()
        hnsw = self.settings.index_dir / HNSW_NAME
        size = sum(info.st_size for info in map(os.lstat, self.settings.index_dir.iterdir())
                   if stat.S_ISREG(info.st_mode))
        updated = manifest.get("updated_at")
        refinement = refinement_of(self.store)
        return IndexStatus(
            repo=str(self.settings.repo), index_dir=str(self.settings.index_dir),
            files=counts["files"], units=counts["units"], languages=self.store.languages(),
            skipped=self.store.skipped_counts(),
            files_with_syntax_errors=counts["files_with_syntax_errors"],
            model_id=manifest.get("model_id"),
            dim=int(manifest["dim"]) if "dim" in manifest else None,
            tier=tier_of(manifest.get("model_id")),
            generation=generation,
            vectors_in_sync=manifest.get("hnsw_generation") == str(generation)
            and seal.verifies(seal.key(self.settings.cache_dir, create=False), hnsw,
                              manifest.get("hnsw_seal")),
            updated_at=float(updated) if updated else None,
            bytes_on_disk=size,
            adapter=adapter_summary(self.settings.index_dir),
            refinement=refinement.to_json() if refinement is not None else None,
        )


def _text_of(query: Query) -> str:
    if query.text is None:
        raise InvalidQuery("a search query holds a text; a unit's neighbours are asked "
                           "for with neighbours()")
    return query.text


def _trained_split(adapter: QueryAdapter | None) -> Split | None:
    """The split an adapter was trained with (None without an adapter)."""
    from codeseek.evaluate import Split

    if adapter is None:
        return None
    try:
        return Split.from_json(adapter.header["split"])
    except (KeyError, ValueError, TypeError) as exc:
        raise IndexCorrupt(f"the query adapter does not record its split ({exc}); "
                           "run `codeseek tune` again or `codeseek tune --remove`") from exc


def _fusion_of(adapter: QueryAdapter | None) -> Fusion | None:
    """The ranking rule saved with an adapter (None: the default)."""
    if adapter is None or "fusion" not in adapter.header:
        return None
    try:
        return Fusion.from_json(adapter.header["fusion"])
    except (ValueError, TypeError, AttributeError) as exc:
        raise IndexCorrupt(f"the query adapter's fusion settings are malformed ({exc}); "
                           "run `codeseek tune` again or `codeseek tune --remove`") from exc


def open_index(
    repo: str | os.PathLike[str] = ".",
    *,
    index_dir: str | os.PathLike[str] | None = None,
    model: str | os.PathLike[str] | None = None,
    backend: str | None = None,
    create: bool = False,
    embedder: Embedder | None = None,
    settings: Settings | None = None,
    tier: str | None = None,
    refine_embedder: Embedder | None = None,
) -> Index:
    """Open the index of ``repo`` (with ``create``, make it if missing).

    ``embedder`` replaces the configured model (tests pass a FakeEmbedder).
    """
    if settings is None:
        root = Path(repo).expanduser()
        if not root.is_dir():
            raise RepositoryNotFound(f"{root}: no such folder")
        settings = load_settings(root, index_dir=index_dir, model=model, backend=backend,
                                 tier=tier)
    store = Store.open(settings.index_dir, create=create, repo=settings.repo)
    try:
        check_repository(settings, store)
    except BaseException:
        store.close()
        raise
    return Index(settings, store, embedder, refine_embedder)


def check_repository(settings: Settings, store: Store) -> None:
    """Refuse an index kept outside the repository that was built for another repository.

    Every opening of an index checks it (:func:`open_index`: the CLI, the TUI, the
    daemon; :func:`codeseek.connect` checks the same through a running daemon). An
    index inside the repository (the default ``.codeseek``) moves with it, so only an
    index elsewhere is checked; an index from before the manifest recorded its
    repository is taken as it is.
    """
    if settings.index_dir.is_relative_to(settings.repo):
        return
    mismatch = repository_mismatch(settings, store.manifest().get("repo"))
    if mismatch is not None:
        raise mismatch


def remove_index_files(index_dir: Path) -> None:
    """Delete the store and vector files of an index (for ``--rebuild``); the folder
    must pass the index folder check."""
    unlink_all(index_dir, (DB_NAME, DB_NAME + "-wal", DB_NAME + "-shm", HNSW_NAME))


