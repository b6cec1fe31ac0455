"""Full and incremental indexing: scan, parse, store, embed, then the HNSW cache.

Units are written first (one transaction per batch of files), then every
content hash that lacks a vector for the current model is embedded and
stored (one transaction per batch), then the vector index is brought in line
with the store and saved. Each stage can be interrupted: the next run sees
the files already stored by their hash and the vectors already made by their
content hash, and picks up where the last one stopped. A unit whose content
did not change is never embedded again, wherever it moved.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from codeseek.config import Settings
from codeseek.embed import Embedder
from codeseek.parse import ParseResult, parse_source
from codeseek.scan import (
    ScanResult,
    SkipFile,
    SourceFile,
    read_source,
    scan_repository,
)
from codeseek.store import FileRow, Store, missing_vector_units, vector_unit_ids
from codeseek.vectors import VectorIndex

ProgressCallback = Callable[[str, int, int], None]
"""Called as ``progress(stage, done, total)``; stages: scan, parse, embed, save."""

FILES_PER_TRANSACTION = 200
UNITS_PER_EMBED_CHUNK = 512


@dataclass(frozen=True)
class UpdateSummary:
    """What one ``update`` did.

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


@dataclass
class _Tally:
    added: int = 0
    changed: int = 0
    removed: int = 0
    files_parsed: int = 0
    files_removed: int = 0
    syntax_warnings: list[str] = field(default_factory=list)


def _no_progress(stage: str, done: int, total: int) -> None:
    return None


def update_index(
    store: Store,
    embedder: Embedder,
    vectors: VectorIndex,
    settings: Settings,
    progress: ProgressCallback | None = None,
) -> UpdateSummary:
    """Bring the index up to date with the repository on disk."""
    report = progress or _no_progress
    started = time.perf_counter()
    _adopt_model(store, embedder)
    report("scan", 0, 0)
    scan = scan_repository(settings)
    tally = _Tally()
    _store_files(store, settings, scan, tally, report)
    embedded = embed_missing(store, embedder, report)
    sync_vectors(store, embedder, vectors)
    report("save", 0, 1)
    save_vectors(store, vectors, settings)
    report("save", 1, 1)
    counts = store.counts()
    return UpdateSummary(
        files=counts["files"], units=counts["units"], added=tally.added,
        changed=tally.changed, removed=tally.removed, embedded=embedded,
        files_parsed=tally.files_parsed, files_removed=tally.files_removed,
        skipped=dict(scan.skipped), syntax_warnings=tuple(tally.syntax_warnings),
        seconds=time.perf_counter() - started,
    )


def _adopt_model(store: Store, embedder: Embedder) -> None:
    manifest = store.manifest()
    if manifest.get("model_id") == embedder.model_id:
        return
    with store.transaction():
        store.drop_other_models(embedder.model_id)
        store.set_manifest(model_id=embedder.model_id, dim=str(embedder.dim))
        _bump(store)


def _bump(store: Store) -> None:
    store.set_manifest(generation=str(store.generation() + 1), updated_at=str(time.time()))


def _store_files(store: Store, settings: Settings, scan: ScanResult, tally: _Tally,
                 report: ProgressCallback) -> None:
    known = store.file_rows()
    present = {f.path for f in scan.files}
    todo = [f for f in scan.files if _may_have_changed(f, known.get(f.path))]
    batch: list[tuple[SourceFile, str, ParseResult] | tuple[SourceFile, str, None]] = []
    for done, source in enumerate(todo, 1):
        try:
            data = read_source(source, settings.max_file_bytes)
        except SkipFile as skip:
            scan.skip(source.path, str(skip.args[0]))
            present.discard(source.path)
            continue
        digest = hashlib.sha256(data).hexdigest()
        row = known.get(source.path)
        if row is not None and row.sha256 == digest:
            batch.append((source, digest, None))  # touched, not changed
        else:
            result = parse_source(source.path, data, source.spec)
            tally.files_parsed += 1
            if result.has_errors:
                tally.syntax_warnings.append(source.path)
            batch.append((source, digest, result))
        if len(batch) >= FILES_PER_TRANSACTION:
            _write_batch(store, batch, known, tally)
            batch = []
        report("parse", done, len(todo))
    gone = [row for path, row in known.items() if path not in present]
    with store.transaction():
        if batch:
            _write_file_rows(store, batch, known, tally)
        for row in gone:
            tally.removed += len(store.delete_file(row.id))
            tally.files_removed += 1
        store.replace_skipped(scan.skipped_paths)
        _bump(store)


def _may_have_changed(source: SourceFile, row: FileRow | None) -> bool:
    return row is None or row.size != source.size or row.mtime_ns != source.mtime_ns


def _write_batch(store: Store, batch: list, known: dict[str, FileRow],
                 tally: _Tally) -> None:
    with store.transaction():
        _write_file_rows(store, batch, known, tally)
        _bump(store)


def _write_file_rows(store: Store, batch: list, known: dict[str, FileRow],
                     tally: _Tally) -> None:
    for source, digest, result in batch:
        row = known.get(source.path)
        if result is None and row is not None:
            store.touch_file(row.id, source.size, source.mtime_ns)
            continue
        file_id = store.upsert_file(source.path, source.spec.name, source.size,
                                    source.mtime_ns, digest, result.has_errors)
        _diff_units(store, file_id, result, tally)


def _diff_units(store: Store, file_id: int, result: ParseResult, tally: _Tally) -> None:
    old = store.unit_keys_of_file(file_id)
    new = {unit.uid: unit for unit in result.units}
    stale = [row_id for uid, (row_id, digest) in old.items()
             if uid not in new or new[uid].content_hash != digest]
    store.delete_units(stale)
    for uid, unit in new.items():
        digest = unit.content_hash
        previous = old.get(uid)
        if previous is not None and previous[1] == digest:
            store.update_unit_position(previous[0], unit)
            continue
        store.insert_unit(file_id, unit, digest)
        if previous is None:
            tally.added += 1
        else:
            tally.changed += 1
    tally.removed += sum(1 for uid in old if uid not in new)


def embed_missing(store: Store, embedder: Embedder, report: ProgressCallback) -> int:
    """Embed every content hash that has no vector for the model; returns how many."""
    missing = missing_vector_units(store, embedder.model_id)
    total = len(missing)
    done = 0
    report("embed", 0, total)
    for start in range(0, total, UNITS_PER_EMBED_CHUNK):
        chunk = missing[start : start + UNITS_PER_EMBED_CHUNK]
        texts = [stored.unit.embed_text() for stored in chunk]

        def step(n: int) -> None:
            nonlocal done
            done += n
            report("embed", done, total)

        matrix = embedder.encode(texts, progress=step)
        done = start + len(chunk)
        with store.transaction():
            store.put_vectors(embedder.model_id, {
                stored.content_hash: matrix[i] for i, stored in enumerate(chunk)
            })
            _bump(store)
        report("embed", done, total)
    return total


def sync_vectors(store: Store, embedder: Embedder, vectors: VectorIndex) -> None:
    """Make the in-memory HNSW hold exactly the store's vectors for this model."""
    expected = vector_unit_ids(store, embedder.model_id)
    current = vectors.labels
    vectors.remove(sorted(current - expected))
    fresh = sorted(expected - current)
    if fresh:
        labels, matrix = store.unit_vectors(embedder.model_id, embedder.dim, fresh)
        vectors.add(labels, matrix)


def save_vectors(store: Store, vectors: VectorIndex, settings: Settings) -> None:
    """Save the HNSW file atomically, then record it in the manifest."""
    from codeseek.vectors import HNSW_NAME

    generation = store.generation()
    vectors.save(settings.index_dir / HNSW_NAME)
    with store.transaction():
        store.set_manifest(hnsw_generation=str(generation), hnsw_count=str(len(vectors)))


def load_vectors(store: Store, model_id: str, dim: int, settings: Settings) -> VectorIndex:
    """The saved HNSW when it matches the store, else one rebuilt from the store."""
    from codeseek.vectors import HNSW_NAME

    manifest = store.manifest()
    expected = vector_unit_ids(store, model_id)
    loaded = None
    if manifest.get("hnsw_generation") == str(store.generation()):
        loaded = VectorIndex.load(settings.index_dir / HNSW_NAME, dim, expected)
    if loaded is not None:
        return loaded
    labels, matrix = store.unit_vectors(model_id, dim)
    rebuilt = VectorIndex.build(dim, labels, matrix)
    rebuilt.rebuilt = True
    return rebuilt
