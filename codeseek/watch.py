"""Keep an index fresh while people edit: watchdog events, debounce, reconciliation.

Events from the file watcher become relative paths in a :class:`ChangeQueue`;
a single worker thread takes them in batches once the tree has been quiet for
a moment (a ``git checkout`` of 500 files becomes a few batches, not 500
updates), works out which files changed or left (:func:`resolve_paths`), and
applies them to the index. Editors that save by writing a temp file and
renaming it over the original produce a move: its destination counts as
modified; temp, swap and backup names are never indexed. A change to a
``.gitignore`` re-evaluates the folder it governs. inotify can drop events
silently, so a periodic reconciliation scan (size and mtime, then hash)
catches what was missed; when the inotify watch limit is reached, watching
falls back to polling with a warning.
"""

from __future__ import annotations

import errno
import os
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from fnmatch import fnmatch
from pathlib import Path

from watchdog.events import FileSystemEvent, FileSystemEventHandler

from codeseek.api import Index
from codeseek.display import printable
from codeseek.errors import CodeseekError
from codeseek.indexer import UpdateSummary
from codeseek.refine import UNITS_PER_REFINE_BATCH
from codeseek.scan import (
    IgnoreRules,
    ScanResult,
    SourceFile,
    check_file,
    entered,
    scan_repository,
)

DEBOUNCE_SECONDS = 0.15
MAX_BATCH_DELAY_SECONDS = 1.0
RECONCILE_SECONDS = 300.0
SAVE_SECONDS = 10.0
RETRY_SECONDS = 5.0
TEMP_PATTERNS = ("*.swp", "*.swo", "*.swx", "*~", ".#*", "#*#", "*.tmp", "*.temp", "*.bak",
                 "*.orig", "*.rej", "4913", ".*.kate-swp", "*.crdownload", ".~lock.*",
                 "*.part", "*___jb_tmp___", "*___jb_old___")
WATCH_LIMIT_WARNING = (
    "warning: the inotify watch limit is reached; watching by polling instead (slower). "
    "Raise fs.inotify.max_user_watches (sysctl) to watch with inotify."
)

Log = Callable[[str], None]


def is_temp_name(name: str) -> bool:
    """Whether a file name is an editor's temp, swap or backup file."""
    return any(fnmatch(name, pattern) for pattern in TEMP_PATTERNS)


class ChangeQueue:
    """Paths that changed, collected until the tree is quiet."""

    def __init__(self) -> None:
        self._cond = threading.Condition()
        self._paths: set[str] = set()
        self._first: float | None = None
        self._last = 0.0
        self._closed = False

    def add(self, rel_path: str) -> None:
        """Record one changed path ("" means the whole tree)."""
        with self._cond:
            now = time.monotonic()
            if self._first is None:
                self._first = now
            self._last = now
            self._paths.add(rel_path)
            self._cond.notify_all()

    def __len__(self) -> int:
        with self._cond:
            return len(self._paths)

    def close(self) -> None:
        """Wake the taker for good."""
        with self._cond:
            self._closed = True
            self._cond.notify_all()

    def take(self, timeout: float, debounce: float = DEBOUNCE_SECONDS,
             max_delay: float = MAX_BATCH_DELAY_SECONDS) -> set[str]:
        """Wait up to ``timeout`` for changes; return a batch once quiet (or too old)."""
        deadline = time.monotonic() + timeout
        with self._cond:
            while not self._paths and not self._closed:
                remaining = deadline - time.monotonic()
                if remaining <= 0:
                    return set()
                self._cond.wait(remaining)
            while self._paths and not self._closed:
                now = time.monotonic()
                assert self._first is not None
                quiet_at = self._last + debounce
                oldest_at = self._first + max_delay
                if now >= quiet_at or now >= oldest_at:
                    break
                self._cond.wait(min(quiet_at, oldest_at) - now)
            batch, self._paths, self._first = self._paths, set(), None
            return batch


def relative_path(repo: Path, path: str | bytes) -> str | None:
    """``path`` relative to the repository, ``/``-separated; None when outside it."""
    text = os.path.normpath(os.fsdecode(path))
    try:
        value = Path(text).relative_to(repo).as_posix()
    except ValueError:
        return None
    return "" if value == "." else value


def resolve_paths(index: Index, rules: IgnoreRules, rel_paths: set[str]
                  ) -> tuple[list[SourceFile], list[str], ScanResult]:
    """Which files to (re)read and which indexed paths are gone, for changed paths."""
    settings = index.settings
    known = set(index.store.file_rows())
    files: dict[str, SourceFile] = {}
    gone: set[str] = set()
    scan = ScanResult()
    for rel in sorted(rel_paths):
        under = {p for p in known if p == rel or p.startswith(rel + "/")}
        absolute = settings.repo / rel
        if _excluded_folder(index, rules, rel):
            gone |= under
            continue
        if absolute.is_dir() and not absolute.is_symlink():
            sub = scan_repository(settings, rules, start=rel)
            files.update({f.path: f for f in sub.files})
            gone |= under - {f.path for f in sub.files}
            for path, reason in sub.skipped_paths:
                scan.skip(path, reason)
            continue
        if os.path.lexists(absolute):
            source = None
            if not rules.is_ignored(rel, is_dir=False) and not is_temp_name(absolute.name):
                source = check_file(settings, rel, str(absolute), scan)
            if source is not None:
                files[rel] = source
                continue
        gone |= under
    return list(files.values()), sorted(gone - set(files)), scan


def _excluded_folder(index: Index, rules: IgnoreRules, rel: str) -> bool:
    """Whether a folder above ``rel`` is never entered (the walk's own rule: ignored,
    vendored, version control, the index folder, a symbolic link...)."""
    return not entered(index.settings, rules, rel.rsplit("/", 1)[0] if "/" in rel else "")


@dataclass
class WatchState:
    """What the watcher is doing, for ``status``."""

    mode: str = "starting"  # inotify, polling, stopped
    pending: int = 0
    last_update: float | None = None
    last_summary: str = ""
    last_error: str | None = None
    batches: int = 0
    embedded: int = 0  # unit texts embedded since the watcher started


class Watcher:
    """Watches a repository and applies its changes to the index, in one worker thread."""

    def __init__(self, index: Index, *, log: Log | None = None, poll: bool = False,
                 debounce: float = DEBOUNCE_SECONDS,
                 reconcile_seconds: float = RECONCILE_SECONDS,
                 save_seconds: float = SAVE_SECONDS) -> None:
        self.index = index
        self.log = log or (lambda message: None)
        self.queue = ChangeQueue()
        self.state = WatchState()
        self.rules = IgnoreRules(index.settings.repo, index.settings.exclude)
        self._poll = poll
        self._debounce = debounce
        self._reconcile_seconds = reconcile_seconds
        self._save_seconds = save_seconds
        self._stop = threading.Event()
        self._observer: object | None = None
        self._worker: threading.Thread | None = None
        self._failed: set[str] = set()
        self._failed_at = 0.0
        self._refine_retry_at = 0.0
        self.retry_seconds = RETRY_SECONDS

    # -- lifecycle -------------------------------------------------------------------

    def observe(self) -> None:
        """Start collecting changes; they are applied once :meth:`start` runs the worker.

        The daemon calls this before its first build, so that nothing written
        during the build is missed.
        """
        if self._observer is None:
            self._observer = self._start_observer()

    def start(self) -> None:
        """Start the observer (unless observing already) and the worker thread."""
        self.observe()
        self._worker = threading.Thread(target=self._run, name="codeseek-watch", daemon=True)
        self._worker.start()

    def stop(self) -> None:
        """Stop watching, apply nothing more, save the vector index."""
        self._stop.set()
        self.queue.close()
        observer = self._observer
        if observer is not None:
            observer.stop()  # type: ignore[attr-defined]
            observer.join(timeout=5)  # type: ignore[attr-defined]
        if self._worker is not None:
            self._worker.join(timeout=30)
        self.state.mode = "stopped"
        try:
            self.index.save()
        except CodeseekError as exc:
            self.log(f"error: {exc}")

    def _start_observer(self) -> object:
        from watchdog.observers import Observer
        from watchdog.observers.polling import PollingObserver

        handler = _EventHandler(self)
        if not self._poll:
            observer = Observer()
            try:
                observer.schedule(handler, str(self.index.settings.repo), recursive=True)
                observer.start()
                self.state.mode = "inotify"
                return observer
            except OSError as exc:
                if exc.errno not in (errno.ENOSPC, errno.EMFILE):
                    raise
                self.log(WATCH_LIMIT_WARNING)
                _quiet_stop(observer)
        observer = PollingObserver(timeout=1.0)
        observer.schedule(handler, str(self.index.settings.repo), recursive=True)
        observer.start()
        self.state.mode = "polling"
        return observer

    # -- events ----------------------------------------------------------------------

    def notice(self, path: str | bytes) -> None:
        """Record one path from an event."""
        rel = relative_path(self.index.settings.repo, path)
        if rel is None:
            return
        name = rel.rsplit("/", 1)[-1]
        if name == ".gitignore":
            folder = rel.rsplit("/", 1)[0] if "/" in rel else ""
            self.rules.forget(folder)
            self.queue.add(folder)
            return
        if rel and (is_temp_name(name) or _excluded_folder(self.index, self.rules, rel)):
            return
        self.queue.add(rel)
        self.state.pending = len(self.queue)

    # -- the worker --------------------------------------------------------------------

    def _run(self) -> None:
        next_reconcile = time.monotonic() + self._reconcile_seconds
        next_save = time.monotonic() + self._save_seconds
        refining = self._refining()
        while not self._stop.is_set():
            # while a refinement runs, changes still come first: a short wait, then a batch
            batch = self.queue.take(timeout=0.05 if refining else 1.0, debounce=self._debounce)
            if self._stop.is_set():
                break
            now = time.monotonic()
            if self._failed and not batch and now - self._failed_at >= self.retry_seconds:
                batch, self._failed = set(self._failed), set()  # retry after a write error
            if batch:
                self.apply(batch)
            elif refining and now >= self._refine_retry_at:
                refining = self.refine_step()
            if now >= next_reconcile:
                self.apply({""})
                next_reconcile = time.monotonic() + self._reconcile_seconds
            if now >= next_save:
                self._save()
                next_save = time.monotonic() + self._save_seconds

    def _refining(self) -> bool:
        try:
            return self.index.refining
        except CodeseekError:
            return False

    def refine_step(self) -> bool:
        """Embed one batch of the refinement (codeseek/refine.py); whether more remain."""
        try:
            self.index.refine(limit=UNITS_PER_REFINE_BATCH)
        except Exception as exc:  # noqa: BLE001 - the watcher must outlive any one batch
            message = str(exc) if isinstance(exc, CodeseekError) else (
                f"unexpected {type(exc).__name__}: {exc}")
            self.state.last_error = message
            self.log(f"error: refining: {message}; searching what is refined so far, "
                     f"retrying in {self.retry_seconds:.0f} s")
            self._refine_retry_at = time.monotonic() + self.retry_seconds
            return True
        if self.index.refining:
            return True
        self.log("codeseek: refinement done; every unit has its full-quality vector")
        return False

    def apply(self, batch: set[str]) -> UpdateSummary | None:
        """Apply a batch of changed paths ("" = reconcile the whole tree)."""
        self.state.pending = len(self.queue) + len(batch)
        try:
            before = _file_hashes(self.index)
            if "" in batch:
                self.rules = IgnoreRules(self.index.settings.repo, self.index.settings.exclude)
                summary = self.index.update()
            else:
                files, gone, scan = resolve_paths(self.index, self.rules, batch)
                summary = self.index.update_files(files, gone, scan)
        except Exception as exc:  # noqa: BLE001 - the watcher must outlive any one batch
            message = str(exc) if isinstance(exc, CodeseekError) else (
                f"unexpected {type(exc).__name__}: {exc}")
            self.state.last_error = message
            self._failed |= batch
            self._failed_at = time.monotonic()
            self.log(f"error: {message}; serving the last good index, retrying in "
                     f"{self.retry_seconds:.0f} s")
            return None
        self.state.last_error = None
        self.state.last_update = time.time()
        self.state.batches += 1
        self.state.embedded += summary.embedded
        self.state.pending = len(self.queue)
        if summary.added or summary.changed or summary.removed:
            self.state.last_summary = (f"+{summary.added} ~{summary.changed} "
                                       f"-{summary.removed} units")
            self.log(f"codeseek: updated {describe_paths(self._changed(before, batch))}: "
                     f"{self.state.last_summary} ({summary.seconds:.2f} s)")
        return summary

    def _changed(self, before: dict[str, str], batch: set[str]) -> list[str]:
        """The files an update added, changed or removed (else the batch's paths)."""
        try:
            after = _file_hashes(self.index)
        except CodeseekError:
            return sorted(batch)
        changed = sorted(path for path in before.keys() | after.keys()
                         if before.get(path) != after.get(path))
        return changed or sorted(batch)

    def _save(self) -> None:
        try:
            self.index.save()
        except CodeseekError as exc:
            self.state.last_error = str(exc)
            self.log(f"error: {exc}")


def describe_paths(paths: list[str], shown: int = 3) -> str:
    """A few paths by name for the log, then how many more (terminal-safe)."""
    names = [printable(path) if path else "the whole tree" for path in paths[:shown]]
    if not names:
        return "nothing"
    if len(paths) > shown:
        return f"{', '.join(names)} and {len(paths) - shown} more"
    return ", ".join(names[:-1]) + (" and " if len(names) > 1 else "") + names[-1]


def _file_hashes(index: Index) -> dict[str, str]:
    """Each indexed file's content hash (what tells which files an update changed)."""
    return {path: row.sha256 for path, row in index.store.file_rows().items()}


def _quiet_stop(observer: object) -> None:
    try:
        observer.stop()  # type: ignore[attr-defined]
    except Exception:  # the observer never started; nothing to stop
        return


class _EventHandler(FileSystemEventHandler):
    """Forwards every path of every watchdog event to the watcher."""

    def __init__(self, watcher: Watcher) -> None:
        super().__init__()
        self.watcher = watcher

    def dispatch(self, event: FileSystemEvent) -> None:
        kind = event.event_type
        if kind in ("opened", "closed_no_write"):
            return
        if event.is_directory and kind == "modified":
            return  # a folder's mtime; its files report themselves
        self.watcher.notice(event.src_path)
        dest = event.dest_path  # "" but for a move
        if dest:
            self.watcher.notice(dest)
