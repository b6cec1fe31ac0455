"""What the UI talks to: a search service, the optional index builder, the neighbours.

The app needs only a :class:`~codeseek.service.SearchService` (what
:func:`codeseek.connect` returns: the in-process :class:`~codeseek.api.Index`
or a running daemon); its ``daemon_status()`` gives the few words on the
background service shown in the index line, and ``close()`` is called when the
UI swaps searchers or quits.

An :class:`IndexBuilder` (for the in-process case, :class:`LocalIndexer`)
builds or refreshes the index in a worker thread and opens fresh searchers.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Protocol, cast

import numpy as np

from codeseek.indexer import ProgressCallback, UpdateSummary
from codeseek.query import Filters, Query
from codeseek.search import SearchHit
from codeseek.service import IndexStatus, SearchService

if TYPE_CHECKING:
    from codeseek.api import Index
    from codeseek.config import Settings
    from codeseek.embed import Embedder, Progress

LOCAL_SERVICE_STATE = "in-process · not watching"

SearchBackend = SearchService
"""The UI's searcher: any search service (the name the UI's package exports)."""


class IndexBuilder(Protocol):
    """Builds or refreshes an index, and opens searchers over it."""

    def update(self, progress: ProgressCallback) -> UpdateSummary:
        """Bring the index up to date (called in a worker thread)."""
        ...

    def open_searcher(self) -> SearchService:
        """A new searcher over what the index holds now (raises IndexNotFound if none)."""
        ...


def is_several(searcher: SearchService | None) -> bool:
    """Whether the searcher spans several repositories (``ui --repo A --repo B``)."""
    from codeseek.multi import MultiService

    return isinstance(searcher, MultiService)


def searcher_status(searcher: SearchService) -> IndexStatus:
    """The searcher's index status; for several repositories one summing them all (the
    repositories' folder names joined, their counts and languages added up)."""
    from codeseek.multi import MultiService

    if not isinstance(searcher, MultiService):
        return searcher.status()
    each = searcher.statuses()
    languages: dict[str, int] = {}
    skipped: dict[str, int] = {}
    for status in each:
        for name, count in status.languages.items():
            languages[name] = languages.get(name, 0) + count
        for reason, count in status.skipped.items():
            skipped[reason] = skipped.get(reason, 0) + count
    updated = [s.updated_at for s in each if s.updated_at is not None]
    return IndexStatus(
        repo=" + ".join(Path(s.repo).name or s.repo for s in each), index_dir="",
        files=sum(s.files for s in each), units=sum(s.units for s in each),
        languages=languages, skipped=skipped,
        files_with_syntax_errors=sum(s.files_with_syntax_errors for s in each),
        model_id=each[0].model_id, dim=each[0].dim,
        generation=sum(s.generation for s in each),
        vectors_in_sync=all(s.vectors_in_sync for s in each),
        updated_at=min(updated) if len(updated) == len(each) else None,
        bytes_on_disk=sum(s.bytes_on_disk for s in each))


def service_state(searcher: SearchService) -> str:
    """A few words on the background service and the watcher behind a searcher."""
    daemon = searcher.daemon_status()
    if daemon is None:
        return LOCAL_SERVICE_STATE
    pending = f" · {daemon['pending']} pending" if daemon["pending"] else ""
    error = " · write error, retrying" if daemon["last_error"] else ""
    return f"daemon {daemon['pid']} · watching ({daemon['watcher']}){pending}{error}"


# -- the in-process index ------------------------------------------------------------


class SharedEmbedder:
    """One embedding model for every index the UI opens, loaded on first use: the tier
    the settings name, else the one the repository's index was built with
    (:mod:`codeseek.tiers`), else the default tier."""

    def __init__(self, repo: Path, index_dir: str | None, model: str | None,
                 backend: str | None) -> None:
        self._args = (repo, index_dir, model, backend)
        self._loaded: Embedder | None = None
        self._lock = threading.Lock()

    def _get(self) -> Embedder:
        with self._lock:
            if self._loaded is None:
                from codeseek.config import load_settings
                from codeseek.tiers import load_tier_embedder

                repo, index_dir, model, backend = self._args
                settings = load_settings(repo, index_dir=index_dir, model=model, backend=backend)
                self._loaded = load_tier_embedder(settings, _index_tier(settings))
            return self._loaded

    @property
    def model_id(self) -> str:
        """The model's id (loads the model)."""
        return self._get().model_id

    @property
    def dim(self) -> int:
        """The model's dimension (loads the model)."""
        return self._get().dim

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        """Encode with the shared model."""
        return self._get().encode(texts, progress)


def _index_tier(settings: Settings) -> str | None:
    """The tier the settings name or the index holds (None: no index yet, no tier named)."""
    from codeseek.api import open_index
    from codeseek.errors import CodeseekError

    if settings.tier is not None:
        return settings.tier
    try:
        with open_index(settings.repo, settings=settings) as index:
            return index.tier  # no model is loaded for it
    except CodeseekError:
        return None  # the index is made (or the error shown) when the UI opens it


class LocalIndexer:
    """Builds the index of a local repository and opens searchers over it.

    Every :class:`~codeseek.api.Index` it opens shares one embedding model.
    Updates run on their own ``Index`` (their own store connection and vector
    index), so searches on an open searcher never see a half-applied change.
    """

    def __init__(self, repo: str | os.PathLike[str], *, index_dir: str | None = None,
                 model: str | None = None, backend: str | None = None,
                 embedder: Embedder | None = None) -> None:
        self.repo = Path(repo)
        self.index_dir = index_dir
        self.model = model
        self.backend = backend
        # read-only attributes satisfy the Embedder protocol at run time
        self.embedder: Embedder = embedder or cast(
            "Embedder", SharedEmbedder(self.repo, index_dir, model, backend))

    def _open(self, *, create: bool) -> Index:
        from codeseek.api import open_index

        return open_index(self.repo, index_dir=self.index_dir, model=self.model,
                          backend=self.backend, create=create, embedder=self.embedder)

    def open_searcher(self) -> Index:
        """An open in-process index (raises IndexNotFound when there is none)."""
        return self._open(create=False)

    def update(self, progress: ProgressCallback) -> UpdateSummary:
        """Build the index, or bring it up to date, with the full tier at once: every
        index this UI opens shares one model, so it never builds searchable first
        (``codeseek index`` and ``codeseek watch`` do, codeseek/refine.py)."""
        with self._open(create=True) as index:
            return index.update(progress=progress, refine=False)


# -- the neighbours -------------------------------------------------------------------


def neighbour_hits(searcher: SearchService, hit: SearchHit, k: int,
                   filters: Filters) -> list[SearchHit]:
    """``hit``'s neighbours: the k units whose meaning is nearest it, within the filters
    (the library's ``neighbours``, in process or through the daemon; with several
    repositories, those of the hit's own)."""
    from codeseek.multi import MultiService

    query = Query(unit_id=hit.unit_id, k=k, filters=filters)
    if isinstance(searcher, MultiService) and hit.repo is not None:
        return searcher.neighbours_in(hit.repo, query)
    return searcher.neighbours(query)
