"""The query seam: one :class:`SearchService` protocol, and :func:`connect`, the one
place that decides whether a search is answered by a running daemon or in process.

A search service takes :class:`~codeseek.query.Query` values and gives
:class:`~codeseek.hits.SearchHit` records. Two implement it: the in-process
:class:`~codeseek.api.Index`, and :class:`~codeseek.client.DaemonService`, the
client of a running ``codeseek watch``. The command line and the UI call
:func:`connect` and use what it returns; neither knows which one it got.

The rules :func:`connect` applies:

* an explicit ``model``, ``backend`` or ``tier`` is answered in process (the
  daemon runs its own model, of the index's own tier);
* when no daemon listens on the index's socket (there is none, or a crashed
  daemon left it), the index is searched in process, silently (also when the
  daemon goes away between two calls): :meth:`SearchService.daemon_status`
  says which answered last;
* a daemon that listens but fails to answer is an error
  (:class:`~codeseek.errors.DaemonError`), never a silent fallback.

Light: the index is imported only when :func:`connect` opens one.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

from codeseek.errors import UsageError
from codeseek.hits import SearchHit
from codeseek.query import Query

if TYPE_CHECKING:
    from codeseek.api import Index
    from codeseek.config import Settings
    from codeseek.embed import Embedder

Notice = Callable[[str], None]
"""Where a service says something worth knowing that is not an error (stderr)."""


@dataclass(frozen=True)
class IndexStatus:
    """What an index holds and how fresh it is."""

    repo: str
    index_dir: str
    files: int
    units: int
    languages: dict[str, int]
    skipped: dict[str, int]
    files_with_syntax_errors: int
    model_id: str | None
    dim: int | None
    generation: int
    vectors_in_sync: bool
    updated_at: float | None
    bytes_on_disk: int
    adapter: dict[str, object] | None = None
    tier: str | None = None  # the embedding tier of the stored vectors (codeseek/tiers.py)
    # a refinement under way (codeseek/refine.py): tier, model_id, refined, total,
    # units_per_second, seconds_left; None (and left out of the JSON) when there is none
    refinement: dict[str, object] | None = None

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict (``refinement`` only while one is under way)."""
        record = dict(self.__dict__)
        if record["refinement"] is None:
            del record["refinement"]
        return record


def describe_refinement(refinement: dict[str, Any]) -> str:
    """``120 of 400 units with the full tier (30%), about 12 s left``: a refinement's
    progress (:attr:`IndexStatus.refinement`) for ``status`` and the UI."""
    refined, total = int(str(refinement["refined"])), int(str(refinement["total"]))
    share = f"{100 * refined / total:.0f}%" if total else "-"
    left = refinement.get("seconds_left")
    eta = (f", about {_duration(float(left))} left" if isinstance(left, int | float)
           else ", time left known after the first batch")
    return f"{refined} of {total} units with the {refinement['tier']} tier ({share}){eta}"


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{max(seconds, 0):.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


@runtime_checkable
class SearchService(Protocol):
    """What answers searches: the in-process index or a running daemon."""

    def search(self, query: Query) -> list[SearchHit]:
        """The best units for one query (at most ``query.k``)."""
        ...

    def search_many(self, queries: Sequence[Query]) -> Iterable[list[SearchHit]]:
        """Each query's answer, in order (a daemon's are read as they arrive)."""
        ...

    def neighbours(self, query: Query) -> list[SearchHit]:
        """The units whose meaning is nearest ``query.unit_id``'s own."""
        ...

    def status(self) -> IndexStatus:
        """What the index holds and how fresh it is."""
        ...

    def daemon_status(self) -> dict[str, Any] | None:
        """The daemon's own status (pid, state, watcher, ...); None in process."""
        ...

    def close(self) -> None:
        """Release what the service holds."""
        ...


def connect(repo: str | os.PathLike[str] = ".", *,
            index_dir: str | os.PathLike[str] | None = None,
            model: str | os.PathLike[str] | None = None, backend: str | None = None,
            embedder: Embedder | None = None, check: Callable[[Index], None] | None = None,
            notice: Notice | None = None, tier: str | None = None) -> SearchService:
    """The search service of ``repo``'s index: its running daemon, or the index in process.

    The index is opened first either way (so a missing or damaged index is the
    same error), and ``check`` runs on it. ``embedder`` is the in-process model
    (it does not turn the daemon away; ``model``, ``backend`` and ``tier`` do). ``notice``
    hears why a query the daemon cannot take is answered in process.
    """
    from codeseek.client import DaemonClient, DaemonService

    def open_local() -> Index:
        from codeseek.api import open_index

        return open_index(repo, index_dir=index_dir, model=model, backend=backend,
                          embedder=embedder, tier=tier)

    own_model = model is None and backend is None and tier is None
    if check is None and own_model:
        # a running daemon answers without this process loading the index's modules
        from codeseek import safefs
        from codeseek.config import load_settings

        settings = load_settings(Path(repo), index_dir=index_dir)
        client = DaemonClient(settings.index_dir)
        if client.present():
            safefs.check_index_dir(settings.index_dir)  # the refusal open_index would give
            if not settings.index_dir.is_relative_to(settings.repo):  # else it moves with it
                mismatch = repository_mismatch(settings,
                                               _recorded_repository(settings.index_dir))
                if mismatch is not None:
                    raise mismatch
            return DaemonService(client, open_local, notice)
    index = open_local()
    try:
        if check is not None:
            check(index)
        if own_model:
            client = DaemonClient(index.settings.index_dir)
            if client.present():
                return DaemonService(client, lambda: index, notice)
    except BaseException:
        index.close()
        raise
    return index


def repository_mismatch(settings: Settings, recorded: str | None) -> UsageError | None:
    """The error for an index kept outside its repository that was built for another
    repository (``recorded``, from the manifest); None when it is this repository's, when
    it lies inside the repository (it moves with it), or when nothing was recorded."""
    if settings.index_dir.is_relative_to(settings.repo) or recorded is None:
        return None
    if recorded == os.fsencode(settings.repo).decode("utf-8", "backslashreplace"):
        return None
    return UsageError(f"the index at {settings.index_dir} was built for the repository "
                      f"{recorded}, not {settings.repo}; give --repo {recorded}, or another "
                      f"--index-dir for {settings.repo}")


def _recorded_repository(index_dir: Path) -> str | None:
    """The repository the manifest records, read with sqlite3 alone (read-only, no
    schema trusted); None when there is none or it cannot be read (the daemon, which
    has the index open, then answers for it)."""
    import sqlite3
    from urllib.parse import quote

    try:
        db = sqlite3.connect(f"file:{quote(os.fsencode(index_dir / 'index.sqlite3'))}?mode=ro",
                             uri=True, timeout=5.0)
    except sqlite3.Error:
        return None
    try:
        db.execute("PRAGMA trusted_schema=OFF")
        row = db.execute("SELECT value FROM manifest WHERE key = 'repo'").fetchone()
    except sqlite3.Error:
        return None
    finally:
        db.close()
    return str(row[0]) if row else None


def daemon_status(repo: str | os.PathLike[str] = ".", *,
                  index_dir: str | os.PathLike[str] | None = None) -> dict[str, Any] | None:
    """The running daemon's own status, or None when no daemon listens on the index's
    socket (a daemon that listens but fails raises :class:`~codeseek.errors.DaemonError`)."""
    from codeseek.client import DaemonClient, DaemonUnavailable
    from codeseek.config import load_settings

    client = DaemonClient(load_settings(Path(repo), index_dir=index_dir).index_dir)
    try:
        daemon: dict[str, Any] = client.status()["daemon"]
    except DaemonUnavailable:
        return None
    return daemon
