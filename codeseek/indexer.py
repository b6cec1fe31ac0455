"""Full and incremental indexing: scan, parse, embed, store, then the HNSW cache.

The order makes every stage resumable and every commit consistent:

1. the files that may have changed (size or mtime differ) are read and hashed;
   those whose content changed are parsed, in memory;
2. then, batch by batch of files: every unit text of the batch whose content
   hash has no vector for the current model is embedded and the vectors are
   committed (nothing refers to them yet, so a crash here only leaves a useful
   cache); then the batch's units are committed in one transaction under the
   index's write lock, and the in-memory HNSW index follows. Each batch is
   searchable once committed.

A unit whose content did not change is never embedded again, wherever it
moved. An interrupted run leaves the store consistent; the next run sees the
files already stored by their hash and the vectors already made by their
content hash, and picks up where the last one stopped.
"""

from __future__ import annotations

import hashlib
import os
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from codeseek import seal
from codeseek.config import Settings
from codeseek.embed import Embedder
from codeseek.parse import ParseResult, parse_source
from codeseek.scan import ScanResult, SkipFile, SourceFile, read_source, scan_repository
from codeseek.store import FileRow, Store, missing_vector_units, vector_unit_ids
from codeseek.units import LEXICAL_TEXT, CodeUnit, lexical_codes
from codeseek.vectors import HNSW_NAME, VectorIndex

REFINE_MODEL_KEY = "refine_model_id"
"""The manifest key naming the model a refinement embeds toward (:mod:`codeseek.refine`)."""

ProgressCallback = Callable[[str, int, int], None]
"""Called as ``progress(stage, done, total)``; stages: scan, parse, embed, save."""

WriteLock = Callable[[], AbstractContextManager[object]]
"""Returns the context manager that excludes searches while a change is applied."""

FILES_PER_TRANSACTION = 200
UNITS_PER_EMBED_CHUNK = 512
UNITS_PER_BATCH = 2048
COMPACT_DELETED_SHARE = 0.3  # rebuild the graph when this share of its slots is dead
COMPACT_MIN_SIZE = 1000


@dataclass(frozen=True)
class UpdateSummary:
    """What one update did.

    Attributes:
        files: files in the index afterwards.
        units: units in the index afterwards.
        added: units that are new (by id).
        changed: units whose content changed.
        removed: units that are gone.
        embedded: texts the model encoded (0 when nothing new).
        files_parsed: files read and parsed this time.
        files_removed: files that left the index.
        skipped: files left out, by reason.
        syntax_warnings: paths with syntax errors (indexed as far as recovered).
        seconds: wall time.
    """

    files: int
    units: int
    added: int
    changed: int
    removed: int
    embedded: int
    files_parsed: int
    files_removed: int
    skipped: dict[str, int] = field(default_factory=dict)
    syntax_warnings: tuple[str, ...] = ()
    seconds: float = 0.0


@dataclass(frozen=True)
class FileChange:
    """One file to write: its scan record, content hash and parse (None: unchanged).

    ``vectors`` holds vectors made elsewhere (by :mod:`codeseek.distributed`'s
    workers) for units of this file, by content hash; the write path stores those
    the store lacks and embeds only what is still missing.
    """

    source: SourceFile
    sha256: str
    result: ParseResult | None
    vectors: Mapping[str, np.ndarray] = field(default_factory=dict)


@dataclass(frozen=True)
class Plan:
    """What an update found before anything is parsed: the scan, the stored files,
    the files that may have changed (in scan order), and when it started."""

    scan: ScanResult
    known: dict[str, FileRow]
    todo: list[SourceFile]
    started: float


@dataclass
class _Tally:
    added: int = 0
    changed: int = 0
    removed: int = 0
    embedded: int = 0
    files_parsed: int = 0
    files_removed: int = 0
    syntax_warnings: list[str] = field(default_factory=list)


def _no_progress(stage: str, done: int, total: int) -> None:
    return None


def _no_lock() -> AbstractContextManager[object]:
    return nullcontext()


class Updater:
    """Applies changes of the repository to the store and the vector index."""

    def __init__(self, store: Store, embedder: Embedder, vectors: VectorIndex,
                 settings: Settings, progress: ProgressCallback | None = None,
                 write_lock: WriteLock | None = None) -> None:
        self.store = store
        self.embedder = embedder
        self.vectors = vectors
        self.settings = settings
        self.report = progress or _no_progress
        self.write_lock = write_lock or _no_lock
        self.tally = _Tally()
        self._embed_done = 0
        self._embed_total = 0

    # -- entry points ----------------------------------------------------------------

    def full(self) -> UpdateSummary:
        """Bring the whole index up to date with the repository on disk."""
        plan = self.begin()
        changes = self.read_and_parse(plan.todo, plan.known, plan.scan)
        self.apply(changes, self.gone(plan), plan.known, skipped=plan.scan.skipped_paths)
        return self.summary(plan.scan.skipped, plan.started)

    def begin(self) -> Plan:
        """The first half of :meth:`full`: adopt the model, scan, find what may have changed."""
        started = time.perf_counter()
        self.adopt_model()
        self.refresh_lexical()
        self.report("scan", 0, 0)
        scan = scan_repository(self.settings)
        known = self.store.file_rows()
        todo = [f for f in scan.files if may_have_changed(f, known.get(f.path))]
        return Plan(scan, known, todo, started)

    def finish(self, plan: Plan, changes: Iterable[FileChange]) -> UpdateSummary:
        """The second half of :meth:`full` for changes made elsewhere: ``changes`` are
        those of ``plan.todo`` in order (files left out are counted in ``plan.scan``),
        streamed; each batch is written as :meth:`apply` writes it."""
        self.report("embed", 0, 0)
        self.write(batched(changes), lambda: self.gone(plan), plan.known,
                   skipped=plan.scan.skipped_paths)
        return self.summary(plan.scan.skipped, plan.started)

    def gone(self, plan: Plan) -> list[FileRow]:
        """Stored files that are no longer there, or are now left out (call after the
        files of ``plan.todo`` were read: reading can leave a file out)."""
        present = {f.path for f in plan.scan.files}
        present -= {path for path, _ in plan.scan.skipped_paths}
        return [row for path, row in plan.known.items() if path not in present]

    def paths(self, files: list[SourceFile], gone_paths: Iterable[str],
              scan: ScanResult | None = None) -> UpdateSummary:
        """Apply a known set of changed files and removed paths (the watcher's path)."""
        started = time.perf_counter()
        self.adopt_model()
        self.refresh_lexical()
        scan = scan or ScanResult()
        known = self.store.file_rows()
        todo = [f for f in files if may_have_changed(f, known.get(f.path))]
        changes = self.read_and_parse(todo, known, scan)
        unreadable = {path for path, _ in scan.skipped_paths}
        gone_set = set(gone_paths) | unreadable
        gone = [known[p] for p in sorted(gone_set) if p in known]
        self.apply(changes, gone, known, skipped=None)
        return self.summary(scan.skipped, started)

    # -- stages ----------------------------------------------------------------------

    def adopt_model(self) -> None:
        """Record the embedder's model; a new model drops the old vectors (but those of
        a refinement's target model, :mod:`codeseek.refine`)."""
        manifest = self.store.manifest()
        if manifest.get("model_id") == self.embedder.model_id:
            return
        target = manifest.get(REFINE_MODEL_KEY)
        with self.write_lock(), self.store.transaction():
            self.store.drop_other_models(self.embedder.model_id, *([target] if target else []))
            self.store.set_manifest(model_id=self.embedder.model_id, dim=str(self.embedder.dim))
            bump_generation(self.store)

    def refresh_lexical(self) -> None:
        """Rewrite the lexical entries of an index whose entries were made another way."""
        if self.store.manifest().get("lexical_text") == LEXICAL_TEXT:
            return
        with self.write_lock(), self.store.transaction():
            self.store.rewrite_lexical()
            self.store.set_manifest(lexical_text=LEXICAL_TEXT)

    def read_and_parse(self, todo: list[SourceFile], known: dict[str, FileRow],
                       scan: ScanResult) -> list[FileChange]:
        """Read, hash and (when the content changed) parse each file."""
        changes: list[FileChange] = []
        for done, (source, digest, data) in enumerate(self.read_files(todo, known, scan), 1):
            if data is None:
                changes.append(FileChange(source, digest, None))
            else:
                try:
                    result = parse_source(source.path, data, source.spec)
                except SkipFile as skip:  # e.g. over the parse time budget
                    scan.skip(source.path, str(skip.args[0]))
                    continue
                self.note_parsed(source, result)
                changes.append(FileChange(source, digest, result))
            self.report("parse", done, len(todo))
        return changes

    def read_files(self, todo: list[SourceFile], known: dict[str, FileRow],
                   scan: ScanResult) -> Iterator[tuple[SourceFile, str, bytes | None]]:
        """(file, content hash, bytes) of each readable file, in order; the bytes are
        None when the content is the stored one. Unreadable files are counted in ``scan``."""
        for source in todo:
            try:
                data = read_source(source, self.settings.max_file_bytes)
            except SkipFile as skip:
                scan.skip(source.path, str(skip.args[0]))
                continue
            digest = hashlib.sha256(data).hexdigest()
            row = known.get(source.path)
            yield source, digest, (None if row is not None and row.sha256 == digest else data)

    def note_parsed(self, source: SourceFile, result: ParseResult) -> None:
        """Count one parsed file (and its syntax errors) in the summary."""
        self.tally.files_parsed += 1
        if result.has_errors:
            self.tally.syntax_warnings.append(source.path)

    def embed_new(self, units: list[CodeUnit]) -> None:
        """Embed and commit the vectors these units lack (deduplicated by content)."""
        self._embed(list(self._wanted(units).items()))

    def _wanted(self, units: list[CodeUnit]) -> dict[str, CodeUnit]:
        have = self.store.known_hashes(self.embedder.model_id)
        wanted: dict[str, CodeUnit] = {}
        for unit in units:
            digest = unit.content_hash
            if digest not in have and digest not in wanted:
                wanted[digest] = unit
        return wanted

    def _embed(self, items: list[tuple[str, CodeUnit]]) -> None:
        # similar lengths in each chunk keep the padding (wasted work) small
        texts = {digest: unit.embed_text() for digest, unit in items}
        items = sorted(items, key=lambda item: len(texts[item[0]]))
        self._embed_total = max(self._embed_total, self._embed_done + len(items))
        for start in range(0, len(items), UNITS_PER_EMBED_CHUNK):
            chunk = items[start : start + UNITS_PER_EMBED_CHUNK]
            base = self._embed_done

            def step(n: int) -> None:
                self._embed_done += n
                self.report("embed", self._embed_done, self._embed_total)

            matrix = self.embedder.encode([texts[digest] for digest, _ in chunk],
                                          progress=step)
            self._embed_done = base + len(chunk)
            with self.write_lock(), self.store.transaction():
                self.store.put_vectors(self.embedder.model_id,
                                       {digest: matrix[i] for i, (digest, _) in enumerate(chunk)})
            self.tally.embedded += len(chunk)
            self.report("embed", self._embed_done, self._embed_total)

    def apply(self, changes: list[FileChange], gone: list[FileRow], known: dict[str, FileRow],
              skipped: list[tuple[str, str]] | None) -> None:
        """Per batch of files: embed what is new, then commit; the HNSW index follows.

        Each batch is searchable as soon as it is committed, so a first build of a
        large repository can be searched while it goes on.
        """
        self._embed_done = 0
        self._embed_total = len(self._wanted(
            [u for c in changes if c.result for u in c.result.units]))
        self.report("embed", 0, self._embed_total)
        self.write(batched(changes), lambda: gone, known, skipped)

    def write(self, batches: Iterable[list[FileChange]], gone: Callable[[], list[FileRow]],
              known: dict[str, FileRow], skipped: list[tuple[str, str]] | None) -> None:
        """Write batch after batch: the vectors first, then the files and units in one
        transaction; the last batch also removes the ``gone()`` files (asked for once
        every batch has been taken) and records what was left out."""
        for batch, last in _with_last(batches):
            self.store_ready([c for c in batch if c.result])
            self.embed_new([u for c in batch if c.result for u in c.result.units])
            with self.write_lock():
                with self.store.transaction():
                    for change in batch:
                        self._write_file(change, known.get(change.source.path))
                    if last:
                        for row in gone():
                            self.tally.removed += len(self.store.delete_file(row.id))
                            self.tally.files_removed += 1
                        if skipped is not None:
                            self.store.replace_skipped(skipped)
                            self.store.set_manifest(repo=repository_record(self.settings.repo))
                    bump_generation(self.store)
                self.sync_vectors()
        self.backfill()

    def store_ready(self, changes: list[FileChange]) -> None:
        """Commit the vectors made elsewhere that the store lacks (nothing refers to them
        yet, as with :meth:`embed_new`)."""
        ready = {digest: vector for c in changes for digest, vector in c.vectors.items()}
        if not ready:
            return
        have = self.store.known_hashes(self.embedder.model_id)
        fresh = {digest: vector for digest, vector in ready.items() if digest not in have}
        if fresh:
            with self.write_lock(), self.store.transaction():
                self.store.put_vectors(self.embedder.model_id, fresh)
            self.tally.embedded += len(fresh)
        self._embed_done += len(fresh)
        self.report("embed", self._embed_done, self._embed_total)

    def backfill(self) -> None:
        """Embed units that still lack a vector (after a model change or a crash)."""
        missing = missing_vector_units(self.store, self.embedder.model_id)
        if missing:
            self._embed([(s.content_hash, s.unit) for s in missing])
            with self.write_lock():
                bump_generation(self.store)
                self.sync_vectors()

    def _write_file(self, change: FileChange, row: FileRow | None) -> None:
        source = change.source
        if change.result is None and row is not None:
            self.store.touch_file(row.id, source.size, source.mtime_ns)
            return
        assert change.result is not None
        file_id = self.store.upsert_file(source.path, source.spec.name, source.size,
                                         source.mtime_ns, change.sha256, change.result.has_errors)
        self._diff_units(file_id, change.result)

    def _diff_units(self, file_id: int, result: ParseResult) -> None:
        old = self.store.unit_keys_of_file(file_id)
        new = {unit.uid: unit for unit in result.units}
        lexical = dict(zip(new, lexical_codes(list(new.values())), strict=True))
        stale = [row_id for uid, (row_id, digest) in old.items()
                 if uid not in new or new[uid].content_hash != digest]
        self.store.delete_units(stale)
        for uid, unit in new.items():
            digest = unit.content_hash
            previous = old.get(uid)
            if previous is not None and previous[1] == digest:
                self.store.update_unit_position(previous[0], unit)
                # what is embedded is unchanged, but the keyword entry may not be: a long
                # unit's embedded text keeps only its words, and folding depends on its
                # members (a blank line above one, its nesting)
                self.store.replace_lexical(previous[0], unit, lexical[uid])
                continue
            self.store.insert_unit(file_id, unit, digest, lexical[uid])
            if previous is None:
                self.tally.added += 1
            else:
                self.tally.changed += 1
        self.tally.removed += sum(1 for uid in old if uid not in new)

    def sync_vectors(self) -> None:
        """Make the in-memory HNSW hold exactly the store's vectors (call under the lock)."""
        sync_vectors(self.store, self.embedder, self.vectors)

    def summary(self, skipped: dict[str, int], started: float) -> UpdateSummary:
        """The summary of this update."""
        counts = self.store.counts()
        return UpdateSummary(
            files=counts["files"], units=counts["units"], added=self.tally.added,
            changed=self.tally.changed, removed=self.tally.removed,
            embedded=self.tally.embedded, files_parsed=self.tally.files_parsed,
            files_removed=self.tally.files_removed, skipped=dict(skipped),
            syntax_warnings=tuple(self.tally.syntax_warnings),
            seconds=time.perf_counter() - started,
        )


def batched(changes: Iterable[FileChange]) -> Iterator[list[FileChange]]:
    """Changes cut into batches of at most FILES_PER_TRANSACTION files or
    UNITS_PER_BATCH parsed units, as they come (always at least one batch, maybe empty)."""
    batch: list[FileChange] = []
    units = 0
    for change in changes:
        count = len(change.result.units) if change.result else 0
        if batch and (len(batch) >= FILES_PER_TRANSACTION or units + count > UNITS_PER_BATCH):
            yield batch
            batch = []
            units = 0
        batch.append(change)
        units += count
    yield batch


def _with_last(batches: Iterable[list[FileChange]]) -> Iterator[tuple[list[FileChange], bool]]:
    """Each batch with whether it is the last (one batch read ahead)."""
    iterator = iter(batches)
    current = next(iterator, None)
    while current is not None:
        following = next(iterator, None)
        yield current, following is None
        current = following


def may_have_changed(source: SourceFile, row: FileRow | None) -> bool:
    """Whether a file's size or mtime differ from what the store recorded."""
    return row is None or row.size != source.size or row.mtime_ns != source.mtime_ns


def repository_record(repo: Path) -> str:
    """How the manifest records the repository an index was built for (``repo``):
    the path as text, undecodable bytes written as ``\\xNN``."""
    return os.fsencode(repo).decode("utf-8", "backslashreplace")


def bump_generation(store: Store) -> None:
    """Count one more committed change (inside the caller's transaction)."""
    store.set_manifest(generation=str(store.generation() + 1), updated_at=str(time.time()))


def sync_vectors(store: Store, embedder: Embedder, vectors: VectorIndex) -> None:
    """Make the HNSW index hold exactly the store's vectors for this model."""
    expected = vector_unit_ids(store, embedder.model_id)
    current = vectors.labels
    vectors.remove(sorted(current - expected))
    fresh = sorted(expected - current)
    if fresh:
        labels, matrix = store.unit_vectors(embedder.model_id, embedder.dim, fresh)
        vectors.add(labels, matrix)
    if len(vectors) >= COMPACT_MIN_SIZE and vectors.deleted_share() > COMPACT_DELETED_SHARE:
        vectors.compact(*store.unit_vectors(embedder.model_id, embedder.dim))


def save_vectors(store: Store, vectors: VectorIndex, settings: Settings) -> None:
    """Save the HNSW file atomically, then record it, with its seal, in the manifest."""
    generation = store.generation()
    path = settings.index_dir / HNSW_NAME
    vectors.save(path)
    secret = seal.key(settings.cache_dir, create=True)
    sealed = seal.seal_of(secret, path) if secret is not None else None
    with store.transaction():
        store.set_manifest(hnsw_generation=str(generation), hnsw_count=str(len(vectors)),
                           hnsw_seal=sealed or "")


def load_vectors(store: Store, model_id: str, dim: int, settings: Settings) -> VectorIndex:
    """The saved HNSW when it matches the store and carries this user's seal
    (:mod:`codeseek.seal`), else one rebuilt from the store."""
    manifest = store.manifest()
    expected = vector_unit_ids(store, model_id)
    loaded = None
    path = settings.index_dir / HNSW_NAME
    if (manifest.get("hnsw_generation") == str(store.generation())
            and seal.verifies(seal.key(settings.cache_dir, create=False), path,
                              manifest.get("hnsw_seal"))):
        loaded = VectorIndex.load(path, dim, expected)
    if loaded is not None:
        return loaded
    return rebuild_vectors(store, model_id, dim)


def rebuild_vectors(store: Store, model_id: str, dim: int) -> VectorIndex:
    """A fresh HNSW index from the store's vectors."""
    labels, matrix = store.unit_vectors(model_id, dim)
    rebuilt = VectorIndex.build(dim, labels, matrix)
    rebuilt.rebuilt = True
    return rebuilt
