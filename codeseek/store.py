"""The SQLite store: the index's source of truth.

Tables: ``manifest`` (format version, model id, dimension, generation),
``migrations``, ``files``, ``units``, ``vectors`` (float32 BLOBs keyed by
content hash and model id, so a unit that moves or comes back is never
embedded twice), ``units_fts`` (FTS5 over identifier-split names, signature,
doc and code) and ``skipped`` (files left out, with their reason). The
database runs in WAL mode; every change is one transaction. sqlite3 errors
are translated here into codeseek's own.

Paths are stored losslessly. A file name that is not UTF-8 reaches codeseek
as text holding lone surrogates (Python's ``surrogateescape``), which SQLite's
TEXT cannot hold; such a path (and the unit ids made from it) is stored as a
BLOB of the file system's own bytes and read back as the same text
(:func:`to_column`, :func:`from_column`). Every other path stays TEXT, so an
index of UTF-8 names is unchanged. Skipping such files instead would lose code
a user can open and edit; escaping them into TEXT would make two names read
the same.
"""

from __future__ import annotations

import math
import os
import sqlite3
import threading
import time
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

import numpy as np

from codeseek import safefs
from codeseek.bm25 import COLUMN_WEIGHTS, varints
from codeseek.errors import (
    IndexCorrupt,
    IndexFolderUnsafe,
    IndexFormatMismatch,
    IndexNotFound,
    IndexWriteError,
)
from codeseek.query import Filters
from codeseek.units import CodeUnit, lexical_codes

DB_NAME = "index.sqlite3"
FORMAT_VERSION = 1
FIRST_BUILD_KEY = "first_build"  # in the manifest until the first full build is committed

# Migrations: version -> statements. A new format adds a new entry; the store
# applies what the file lacks, in order, inside one transaction.
MIGRATIONS: dict[int, tuple[str, ...]] = {
    1: (
        """CREATE TABLE manifest (key TEXT PRIMARY KEY, value TEXT NOT NULL)""",
        """CREATE TABLE files (
            id INTEGER PRIMARY KEY,
            path TEXT NOT NULL UNIQUE,
            language TEXT NOT NULL,
            size INTEGER NOT NULL,
            mtime_ns INTEGER NOT NULL,
            sha256 TEXT NOT NULL,
            has_errors INTEGER NOT NULL DEFAULT 0,
            indexed_at REAL NOT NULL)""",
        """CREATE TABLE units (
            id INTEGER PRIMARY KEY AUTOINCREMENT,
            file_id INTEGER NOT NULL REFERENCES files(id) ON DELETE CASCADE,
            uid TEXT NOT NULL UNIQUE,
            kind TEXT NOT NULL,
            name TEXT NOT NULL,
            qualname TEXT NOT NULL,
            signature TEXT NOT NULL,
            doc TEXT NOT NULL,
            start_line INTEGER NOT NULL,
            end_line INTEGER NOT NULL,
            code TEXT NOT NULL,
            doc_start INTEGER,
            doc_end INTEGER,
            ordinal INTEGER NOT NULL DEFAULT 0,
            content_hash TEXT NOT NULL)""",
        "CREATE INDEX units_file ON units(file_id)",
        "CREATE INDEX units_hash ON units(content_hash)",
        """CREATE TABLE vectors (
            content_hash TEXT NOT NULL,
            model_id TEXT NOT NULL,
            vector BLOB NOT NULL,
            PRIMARY KEY (content_hash, model_id)) WITHOUT ROWID""",
        """CREATE VIRTUAL TABLE units_fts USING fts5(
            names, signature, doc, code, tokenize = 'porter unicode61')""",
        """CREATE TABLE skipped (path TEXT PRIMARY KEY, reason TEXT NOT NULL)""",
    ),
}


@dataclass(frozen=True)
class FileRow:
    """What the store knows of one indexed file."""

    id: int
    path: str
    language: str
    size: int
    mtime_ns: int
    sha256: str


@dataclass(frozen=True)
class StoredUnit:
    """A unit as stored, with its row id (also its label in the vector index)."""

    id: int
    unit: CodeUnit
    content_hash: str


def to_column(text: str) -> str | bytes:
    """A path or unit id as stored: itself, or its bytes when it is not UTF-8."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return text.encode("utf-8", "surrogateescape")
    return text


def from_column(value: str | bytes) -> str:
    """The text of a stored path or unit id (the inverse of :func:`to_column`)."""
    return value.decode("utf-8", "surrogateescape") if isinstance(value, bytes) else value


def _cannot_write(exc: sqlite3.OperationalError) -> bool:
    text = str(exc)
    return "readonly" in text or "unable to open" in text


def _connect_read_only(path: Path) -> sqlite3.Connection:
    """A read-only connection: ``mode=ro`` reads the WAL when its files are there; with
    no WAL file at all, the store is whole in the main file and ``immutable`` reads it
    without the shared-memory file a read-only folder cannot hold."""
    uri = f"file:{quote(os.fsencode(path))}?mode=ro"  # the name's bytes, whatever they are
    if safefs.lstat_or_none(Path(str(path) + "-wal")) is None:
        uri += "&immutable=1"
    db = sqlite3.connect(uri, uri=True, timeout=30.0, check_same_thread=False,
                         isolation_level=None)
    db.execute("PRAGMA trusted_schema=OFF")  # a planted schema runs no functions
    return db


def _translate(exc: sqlite3.Error, path: Path) -> Exception:
    text = str(exc)
    if isinstance(exc, sqlite3.OperationalError) and (
        "disk" in text or "full" in text or "readonly" in text or "unable to open" in text
    ):
        if "full" in text:
            return IndexWriteError(f"{path}: cannot write the index: {text}; free some space "
                                   "and run it again (the index keeps what was committed)")
        return IndexWriteError(f"{path}: cannot write the index: {text}")
    return IndexCorrupt(
        f"{path}: the index store is unreadable ({text}); "
        "rebuild it with `codeseek index --rebuild`"
    )


class Store:
    """One open SQLite index store."""

    def __init__(self, connection: sqlite3.Connection, path: Path, *,
                 read_only: bool = False) -> None:
        self._db = connection
        # one transaction at a time on the connection: the threads of one index (a search
        # saving its vector file, a refinement, the watcher) share it, and SQLite refuses
        # a BEGIN inside an open transaction
        self._one_transaction = threading.RLock()  # the same thread: SQLite says no, as before
        self.path = path
        self.read_only = read_only  # opened so because the folder cannot be written
        self.notes: list[str] = []  # warnings about the index folder, shown once

    # -- opening -----------------------------------------------------------------

    @classmethod
    def open(cls, index_dir: Path, *, create: bool, repo: Path | None = None) -> Store:
        """Open (and with ``create``, make) the store in ``index_dir``.

        The folder is checked first (:func:`~codeseek.safefs.check_index_dir`); a new
        store is made in a folder :func:`~codeseek.safefs.prepare_index_dir` accepts
        (``repo`` tells it whether the folder lies inside the repository), and its
        warnings are kept in :attr:`notes`. An existing store in a folder this
        process cannot write is opened read-only: searching and status need no
        write access.
        """
        path = index_dir / DB_NAME
        notes: list[str] = []
        safefs.check_index_dir(index_dir)
        if safefs.lstat_or_none(path) is None:
            if not create:
                raise IndexNotFound(
                    f"no index at {index_dir}; build one with `codeseek index`"
                )
            notes = safefs.prepare_index_dir(index_dir, repo)
            try:
                safefs.create_new(path)  # 0600: SQLite gives -wal and -shm the same mode
            except OSError as exc:
                raise IndexWriteError(f"{path}: cannot create the index: {exc}") from exc
        elif not safefs.is_regular_file(path):
            raise IndexFolderUnsafe(f"{path}: not a regular file; remove it, or rebuild "
                                    "with `codeseek index --rebuild`")
        try:
            store = cls._connect(path, create)
        except sqlite3.Error as exc:
            raise _translate(exc, path) from exc
        store.notes = notes
        return store

    @classmethod
    def _connect(cls, path: Path, create: bool) -> Store:
        db: sqlite3.Connection | None = None
        try:
            db = sqlite3.connect(path, timeout=30.0, check_same_thread=False,
                                 isolation_level=None)
            db.execute("PRAGMA trusted_schema=OFF")  # a planted schema runs no functions
            db.execute("PRAGMA journal_mode=WAL")
            return cls._ready(db, path, create, read_only=False)
        except sqlite3.OperationalError as exc:
            if db is not None:
                db.close()
            if create or not _cannot_write(exc):
                raise
        return cls._ready(_connect_read_only(path), path, create, read_only=True)

    @classmethod
    def _ready(cls, db: sqlite3.Connection, path: Path, create: bool, *,
               read_only: bool) -> Store:
        db.execute("PRAGMA synchronous=NORMAL")
        db.execute("PRAGMA foreign_keys=ON")
        store = cls(db, path, read_only=read_only)
        store._migrate(create)
        return store

    def close(self) -> None:
        """Close the connection."""
        self._db.close()

    def _migrate(self, create: bool) -> None:
        if self.read_only:
            self._check_read_only_format()
            return
        self._db.execute(
            "CREATE TABLE IF NOT EXISTS migrations (version INTEGER PRIMARY KEY, applied_at REAL)"
        )
        done = {row[0] for row in self._db.execute("SELECT version FROM migrations")}
        newest = max(done, default=0)
        if newest > FORMAT_VERSION:
            raise IndexFormatMismatch(
                f"{self.path}: the index has format {newest}, this codeseek reads up to "
                f"{FORMAT_VERSION}; upgrade codeseek or rebuild with `codeseek index --rebuild`"
            )
        pending = [v for v in sorted(MIGRATIONS) if v not in done]
        if pending and done == set() and not create:
            raise IndexNotFound(f"no index at {self.path.parent}; build one with `codeseek index`")
        for version in pending:
            with self.transaction():
                for statement in MIGRATIONS[version]:
                    self._db.execute(statement)
                self._db.execute(
                    "INSERT INTO migrations VALUES (?, ?)", (version, time.time())
                )
                self._set("format_version", str(version))
                if not done:  # a new store: searchable once its first build is whole
                    self._set(FIRST_BUILD_KEY, "unfinished")

    def _check_read_only_format(self) -> None:
        done = {row[0] for row in self._db.execute("SELECT version FROM migrations")}
        if max(done, default=0) != FORMAT_VERSION:
            raise IndexFormatMismatch(
                f"{self.path}: the index has format {max(done, default=0)}, this codeseek "
                f"reads {FORMAT_VERSION}, and the folder is read-only; run `codeseek index` "
                "where it can be written")

    def check_health(self) -> None:
        """Raise IndexCorrupt if SQLite finds damage (``PRAGMA quick_check``: every page
        read once, no index contents compared)."""
        rows = self._query("PRAGMA quick_check(5)")
        problems = [str(row[0]) for row in rows if row[0] != "ok"]
        if problems:
            raise IndexCorrupt(
                f"{self.path}: the index store is damaged ({problems[0]}); "
                "rebuild it with `codeseek index --rebuild`")

    # -- transactions and the manifest ---------------------------------------------

    @contextmanager
    def transaction(self) -> Iterator[None]:
        """One atomic change; sqlite3 errors become codeseek errors. Other threads'
        transactions on this store wait for it to end."""
        with self._one_transaction:
            try:
                self._db.execute("BEGIN IMMEDIATE")
            except sqlite3.Error as exc:
                raise _translate(exc, self.path) from exc
            try:
                yield
            except sqlite3.Error as exc:
                self._rollback()
                raise _translate(exc, self.path) from exc
            except BaseException:
                self._rollback()
                raise
            try:
                self._db.execute("COMMIT")
            except sqlite3.Error as exc:
                self._rollback()
                raise _translate(exc, self.path) from exc

    def _rollback(self) -> None:
        """Undo the open transaction, if SQLite has not already (it rolls back by
        itself on a full disk); the error that led here is the one to report."""
        if self._db.in_transaction:
            with suppress(sqlite3.Error):
                self._db.execute("ROLLBACK")

    def _set(self, key: str, value: str) -> None:
        self._db.execute(
            "INSERT INTO manifest VALUES (?, ?) "
            "ON CONFLICT(key) DO UPDATE SET value=excluded.value",
            (key, value),
        )

    def manifest(self) -> dict[str, str]:
        """The manifest as a dict."""
        return dict(self._query("SELECT key, value FROM manifest"))

    def set_manifest(self, **values: str) -> None:
        """Write manifest keys (inside the caller's transaction if there is one)."""
        try:
            for key, value in values.items():
                self._set(key, value)
        except sqlite3.Error as exc:
            raise _translate(exc, self.path) from exc

    def delete_manifest(self, *keys: str) -> None:
        """Remove manifest keys (inside the caller's transaction if there is one)."""
        for key in keys:
            self._exec("DELETE FROM manifest WHERE key=?", (key,))

    def first_build_finished(self) -> bool:
        """Whether a full build has been committed (an index made before this mark
        existed counts as finished)."""
        return FIRST_BUILD_KEY not in self.manifest()

    def finish_first_build(self) -> None:
        """Record that a full build has been committed."""
        if not self.first_build_finished():
            with self.transaction():
                self._exec("DELETE FROM manifest WHERE key=?", (FIRST_BUILD_KEY,))

    def generation(self) -> int:
        """The number of committed changes so far."""
        return int(self.manifest().get("generation", "0"))

    def _query(self, sql: str, params: Sequence[object] = ()) -> list[tuple]:
        try:
            return self._db.execute(sql, params).fetchall()
        except sqlite3.Error as exc:
            raise _translate(exc, self.path) from exc

    def _exec(self, sql: str, params: Sequence[object] = ()) -> sqlite3.Cursor:
        try:
            return self._db.execute(sql, params)
        except sqlite3.Error as exc:
            raise _translate(exc, self.path) from exc

    # -- files and units -----------------------------------------------------------

    def file_rows(self) -> dict[str, FileRow]:
        """Every indexed file, by path."""
        rows = self._query("SELECT id, path, language, size, mtime_ns, sha256 FROM files")
        found: dict[str, FileRow] = {}
        for row_id, path, *rest in rows:
            found[from_column(path)] = FileRow(row_id, from_column(path), *rest)
        return found

    def touch_file(self, file_id: int, size: int, mtime_ns: int) -> None:
        """Record a new size and mtime for a file whose content did not change."""
        self._exec("UPDATE files SET size=?, mtime_ns=? WHERE id=?", (size, mtime_ns, file_id))

    def upsert_file(self, path: str, language: str, size: int, mtime_ns: int, sha256: str,
                    has_errors: bool) -> int:
        """Insert or update a file row; returns its id."""
        self._exec(
            """INSERT INTO files (path, language, size, mtime_ns, sha256, has_errors, indexed_at)
               VALUES (?, ?, ?, ?, ?, ?, ?)
               ON CONFLICT(path) DO UPDATE SET language=excluded.language, size=excluded.size,
                 mtime_ns=excluded.mtime_ns, sha256=excluded.sha256,
                 has_errors=excluded.has_errors, indexed_at=excluded.indexed_at""",
            (to_column(path), language, size, mtime_ns, sha256, int(has_errors), time.time()),
        )
        return int(self._query("SELECT id FROM files WHERE path=?", (to_column(path),))[0][0])

    def unit_keys_of_file(self, file_id: int) -> dict[str, tuple[int, str]]:
        """uid -> (row id, content hash) for one file's units."""
        rows = self._query("SELECT uid, id, content_hash FROM units WHERE file_id=?", (file_id,))
        return {from_column(uid): (uid_id, digest) for uid, uid_id, digest in rows}

    def insert_unit(self, file_id: int, unit: CodeUnit, content_hash: str,
                    lexical_code: str | None = None) -> int:
        """Add one unit and its lexical entry; returns its row id.

        ``lexical_code`` is the code its lexical entry matches
        (:func:`~codeseek.units.lexical_codes`; default: its code without the doc).
        """
        doc_start, doc_end = unit.doc_span if unit.doc_span else (None, None)
        cursor = self._exec(
            """INSERT INTO units (file_id, uid, kind, name, qualname, signature, doc, start_line,
                 end_line, code, doc_start, doc_end, ordinal, content_hash)
               VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
            (file_id, to_column(unit.uid), unit.kind, unit.name, unit.qualname, unit.signature,
             unit.doc, unit.start_line, unit.end_line, unit.code, doc_start, doc_end, unit.ordinal,
             content_hash),
        )
        row_id = int(cursor.lastrowid or 0)
        self._insert_lexical(row_id, unit, lexical_code)
        return row_id

    def _insert_lexical(self, row_id: int, unit: CodeUnit, code: str | None) -> None:
        fields = unit.lexical_fields(code)
        self._exec(
            "INSERT INTO units_fts (rowid, names, signature, doc, code) VALUES (?, ?, ?, ?, ?)",
            (row_id, fields["names"], fields["signature"], fields["doc"], fields["code"]),
        )

    def replace_lexical(self, row_id: int, unit: CodeUnit, code: str | None) -> None:
        """Write one unit's lexical entry afresh."""
        self._exec("DELETE FROM units_fts WHERE rowid=?", (row_id,))
        self._insert_lexical(row_id, unit, code)

    def rewrite_lexical(self) -> int:
        """Write every unit's lexical entry afresh (after the way it is made changed);
        returns the number of units. Call inside a transaction."""
        units = list(self.iter_units())
        self._exec("DELETE FROM units_fts")
        for stored, code in zip(units, lexical_codes([s.unit for s in units]), strict=True):
            self._insert_lexical(stored.id, stored.unit, code)
        return len(units)

    def update_unit_position(self, row_id: int, unit: CodeUnit) -> None:
        """Refresh where an unchanged unit now stands (its lines moved)."""
        doc_start, doc_end = unit.doc_span if unit.doc_span else (None, None)
        self._exec(
            """UPDATE units SET start_line=?, end_line=?, code=?, signature=?, doc_start=?,
                 doc_end=? WHERE id=?""",
            (unit.start_line, unit.end_line, unit.code, unit.signature, doc_start, doc_end,
             row_id),
        )

    def delete_units(self, row_ids: Iterable[int]) -> None:
        """Remove units and their lexical entries."""
        for row_id in row_ids:
            self._exec("DELETE FROM units_fts WHERE rowid=?", (row_id,))
            self._exec("DELETE FROM units WHERE id=?", (row_id,))

    def delete_file(self, file_id: int) -> list[int]:
        """Remove a file and its units; returns the removed unit ids."""
        ids = [row[0] for row in self._query("SELECT id FROM units WHERE file_id=?", (file_id,))]
        self.delete_units(ids)
        self._exec("DELETE FROM files WHERE id=?", (file_id,))
        return ids

    def replace_skipped(self, skipped: Iterable[tuple[str, str]]) -> None:
        """Record the files left out by the latest scan."""
        self._exec("DELETE FROM skipped")
        self._db.executemany("INSERT OR REPLACE INTO skipped VALUES (?, ?)",
                             [(to_column(path), reason) for path, reason in skipped])

    def skipped_counts(self) -> dict[str, int]:
        """Files left out by the latest scan, counted by reason."""
        return dict(self._query("SELECT reason, COUNT(*) FROM skipped GROUP BY reason"))

    def skipped_files(self) -> list[tuple[str, str]]:
        """(path, reason) of every file the latest scan left out, by path."""
        return [(from_column(path), str(reason)) for path, reason in
                self._query("SELECT path, reason FROM skipped ORDER BY path")]

    def counts(self) -> dict[str, int]:
        """How many files and units the index holds."""
        files = self._query("SELECT COUNT(*) FROM files")[0][0]
        units = self._query("SELECT COUNT(*) FROM units")[0][0]
        errors = self._query("SELECT COUNT(*) FROM files WHERE has_errors")[0][0]
        return {"files": int(files), "units": int(units), "files_with_syntax_errors": int(errors)}

    def languages(self) -> dict[str, int]:
        """Units per language."""
        return dict(self._query(
            "SELECT f.language, COUNT(*) FROM units u JOIN files f ON f.id=u.file_id "
            "GROUP BY f.language"
        ))

    _UNIT_COLUMNS = (
        "u.id, f.path, f.language, u.kind, u.name, u.qualname, u.signature, u.doc, "
        "u.start_line, u.end_line, u.code, u.doc_start, u.doc_end, u.ordinal, u.content_hash"
    )

    def units_by_ids(self, row_ids: Sequence[int]) -> dict[int, StoredUnit]:
        """Stored units by row id (missing ids are left out)."""
        found: dict[int, StoredUnit] = {}
        for start in range(0, len(row_ids), 500):
            chunk = list(row_ids[start : start + 500])
            marks = ",".join("?" * len(chunk))
            rows = self._query(
                f"SELECT {self._UNIT_COLUMNS} FROM units u JOIN files f ON f.id=u.file_id "
                f"WHERE u.id IN ({marks})",
                chunk,
            )
            for row in rows:
                found[row[0]] = _stored_unit(row)
        return found

    def iter_units(self) -> Iterator[StoredUnit]:
        """Every stored unit, in row id order."""
        rows = self._query(
            f"SELECT {self._UNIT_COLUMNS} FROM units u JOIN files f ON f.id=u.file_id "
            "ORDER BY u.id"
        )
        for row in rows:
            yield _stored_unit(row)

    def units_of_file(self, path: str) -> list[StoredUnit]:
        """The stored units of one file (its repository-relative path), in source order."""
        rows = self._query(
            f"SELECT {self._UNIT_COLUMNS} FROM units u JOIN files f ON f.id=u.file_id "
            "WHERE f.path=? ORDER BY u.start_line, u.id", (to_column(path),)
        )
        return [_stored_unit(row) for row in rows]

    def filtered_ids(self, filters: Filters) -> list[int]:
        """Unit ids within the filters the store can apply: languages, kinds and the
        files' modification time (an empty value: any). Path patterns are matched by
        the caller."""
        where: list[str] = []
        params: list[object] = []
        if filters.languages:
            where.append(f"f.language IN ({','.join('?' * len(filters.languages))})")
            params.extend(filters.languages)
        if filters.kinds:
            where.append(f"u.kind IN ({','.join('?' * len(filters.kinds))})")
            params.extend(filters.kinds)
        if filters.since is not None:
            where.append("f.mtime_ns >= ?")
            params.append(_since_ns(filters.since))
        clause = ("WHERE " + " AND ".join(where)) if where else ""
        rows = self._query(
            f"SELECT u.id FROM units u JOIN files f ON f.id=u.file_id {clause}", params
        )
        return [row[0] for row in rows]

    def paths_of(self, row_ids: Sequence[int]) -> dict[int, str]:
        """The file path of each unit id (ids and paths only: no unit text is read)."""
        rows = self._by_ids("SELECT u.id, f.path FROM units u JOIN files f ON f.id=u.file_id "
                            "WHERE u.id IN ({ids})", row_ids)
        return {int(row_id): from_column(path) for row_id, path in rows}

    def _by_ids(self, sql: str, row_ids: Sequence[int]) -> list[tuple]:
        """The rows of ``sql`` (its ``{ids}`` a list of marks), run for 500 ids at a time."""
        ids = list(row_ids)
        rows: list[tuple] = []
        for start in range(0, len(ids), 500):
            chunk = ids[start : start + 500]
            rows.extend(self._query(sql.format(ids=",".join("?" * len(chunk))), chunk))
        return rows

    def enclosing(self, row_ids: Sequence[int]) -> dict[int, int]:
        """Which of these units are nested helpers, and the unit each is defined in:
        unit id -> enclosing unit id, by the rule of :func:`codeseek.fusion.is_enclosed_by`
        (a function of the same file named ``outer.name``, within the lines of ``outer``,
        a function or method; the innermost when redefinitions leave several). Reads
        names and lines only, over the units of the same files."""
        rows = self._by_ids(
            "SELECT c.id, p.id FROM units c JOIN units p ON p.file_id = c.file_id "
            "WHERE c.id IN ({ids}) AND c.kind = 'function' AND instr(c.qualname, '.') > 0 "
            "AND p.kind IN ('function', 'method') "
            "AND c.qualname = p.qualname || '.' || c.name "
            "AND p.start_line <= c.start_line AND c.end_line <= p.end_line "
            "ORDER BY c.id, p.start_line, p.id", row_ids)
        return {int(inner): int(outer) for inner, outer in rows}  # the innermost comes last

    # -- vectors -------------------------------------------------------------------

    def known_hashes(self, model_id: str) -> set[str]:
        """Content hashes that already have a vector for this model."""
        rows = self._query("SELECT content_hash FROM vectors WHERE model_id=?", (model_id,))
        return {row[0] for row in rows}

    def put_vectors(self, model_id: str, vectors: dict[str, np.ndarray]) -> None:
        """Store vectors (float32) by content hash."""
        try:
            self._db.executemany(
                "INSERT OR REPLACE INTO vectors VALUES (?, ?, ?)",
                [(h, model_id, np.asarray(v, dtype=np.float32).tobytes())
                 for h, v in vectors.items()],
            )
        except sqlite3.Error as exc:
            raise _translate(exc, self.path) from exc

    def unit_vectors(self, model_id: str, dim: int,
                     row_ids: Sequence[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(unit ids, matrix) of units that have a vector for this model."""
        sql = ("SELECT u.id, v.vector FROM units u JOIN vectors v "
               "ON v.content_hash=u.content_hash AND v.model_id=?")
        rows: list[tuple] = []
        if row_ids is None:
            rows = self._query(sql + " ORDER BY u.id", (model_id,))
        else:
            ids = list(row_ids)
            for start in range(0, len(ids), 500):
                chunk = ids[start : start + 500]
                rows.extend(self._query(
                    sql + f" WHERE u.id IN ({','.join('?' * len(chunk))})", [model_id, *chunk]
                ))
        labels = np.array([row[0] for row in rows], dtype=np.int64)
        matrix = np.zeros((len(rows), dim), dtype=np.float32)
        for i, row in enumerate(rows):
            matrix[i] = np.frombuffer(row[1], dtype=np.float32)
        return labels, matrix

    def prune_vectors(self, model_id: str) -> int:
        """Delete this model's vectors no unit uses any more; returns how many."""
        cursor = self._exec(
            "DELETE FROM vectors WHERE model_id=? AND content_hash NOT IN "
            "(SELECT content_hash FROM units)",
            (model_id,),
        )
        return cursor.rowcount

    def drop_other_models(self, model_id: str, *keep: str) -> None:
        """Delete the vectors of every other model (but those of ``keep``)."""
        kept = (model_id, *keep)
        self._exec(f"DELETE FROM vectors WHERE model_id NOT IN ({','.join('?' * len(kept))})",
                   kept)

    # -- lexical search ------------------------------------------------------------

    def lexical_search(self, match: str, limit: int) -> list[tuple[int, float]]:
        """(unit id, BM25 score; higher is better) for an FTS5 MATCH expression."""
        if not match:
            return []
        weights = ", ".join(str(w) for w in COLUMN_WEIGHTS)  # 4.0, 2.0, 2.0, 1.0
        rows = self._query(
            f"SELECT rowid, bm25(units_fts, {weights}) AS score FROM units_fts "
            "WHERE units_fts MATCH ? ORDER BY score LIMIT ?",
            (match, limit),
        )
        return [(int(r[0]), -float(r[1])) for r in rows]

    def lexical_totals(self) -> tuple[int, int]:
        """(rows, tokens over all columns) of the lexical table, as FTS5's ``bm25()``
        counts them (its averages record: varints, the row count then each column's
        token total)."""
        rows = self._query("SELECT block FROM units_fts_data WHERE id = 1")
        if not rows:
            return 0, 0
        values = varints(bytes(rows[0][0]))
        return (values[0], sum(values[1:])) if values else (0, 0)

    def phrase_count(self, phrase: str) -> int:
        """How many rows hold one phrase (a quoted FTS5 string)."""
        return int(self._query("SELECT count(*) FROM units_fts WHERE units_fts MATCH ?",
                               (phrase,))[0][0])

    def phrase_matches(self, phrase: str) -> list[tuple[int, float, int]]:
        """(unit id, BM25 for the phrase alone, row length in tokens) of every row
        holding one phrase (a quoted FTS5 string), in unit id order."""
        weights = ", ".join(str(w) for w in COLUMN_WEIGHTS)
        rows = self._query(
            f"SELECT f.rowid, bm25(units_fts, {weights}), d.sz FROM units_fts AS f "
            "JOIN units_fts_docsize AS d ON d.id = f.rowid WHERE units_fts MATCH ? "
            "ORDER BY f.rowid", (phrase,))
        return [(int(r[0]), -float(r[1]), sum(varints(bytes(r[2])))) for r in rows]


def _since_ns(since: float) -> int:
    """A time in seconds as the nanoseconds the files table records, kept within
    SQLite's 64 bits (a time beyond them selects nothing, or everything)."""
    limit = 9.2e9  # seconds; 9.2e18 ns is just under 2**63
    return math.floor(max(-limit, min(limit, since)) * 1_000_000_000)


def _stored_unit(row: tuple) -> StoredUnit:
    (row_id, path, language, kind, name, qualname, signature, doc, start, end, code,
     doc_start, doc_end, ordinal, content_hash) = row
    unit = CodeUnit(
        path=from_column(path), language=language, kind=kind, name=name, qualname=qualname,
        signature=signature, doc=doc, start_line=start, end_line=end, code=code,
        doc_span=(doc_start, doc_end) if doc_start is not None else None, ordinal=ordinal,
    )
    return StoredUnit(row_id, unit, content_hash)


def vector_unit_ids(store: Store, model_id: str) -> set[int]:
    """Ids of the units that have a vector for this model (the HNSW's labels)."""
    rows = store._query(
        "SELECT u.id FROM units u JOIN vectors v ON v.content_hash=u.content_hash "
        "AND v.model_id=?",
        (model_id,),
    )
    return {int(row[0]) for row in rows}


def missing_vector_units(store: Store, model_id: str) -> list[StoredUnit]:
    """One stored unit per content hash that has no vector for this model yet."""
    rows = store._query(
        f"SELECT {Store._UNIT_COLUMNS} FROM units u JOIN files f ON f.id=u.file_id "
        "WHERE NOT EXISTS (SELECT 1 FROM vectors v WHERE v.content_hash=u.content_hash "
        "AND v.model_id=?) GROUP BY u.content_hash ORDER BY u.id",
        (model_id,),
    )
    return [_stored_unit(row) for row in rows]


def unlink_all(folder: Path, names: Iterable[str]) -> None:
    """Delete these files of an index folder (missing ones are fine; a link is removed,
    never followed, and the folder itself must pass the index folder check)."""
    safefs.check_index_dir(folder)
    for name in names:
        try:
            (folder / name).unlink()
        except FileNotFoundError:
            continue
        except OSError as exc:
            raise IndexWriteError(f"{folder / name}: cannot remove: {exc}") from exc
