"""What the UI talks to: the searcher seam, the optional index builder, the neighbours.

The app needs only a :class:`SearchBackend`: the in-process
:class:`~codeseek.api.Index` is one, and a client of the background service
offers the same three methods (``search``, ``neighbours``, ``status``).
Anything more is optional and found by name:

* ``service_state()``: a few words on the background service and the file
  watcher, shown in the index line.
* ``close()``: called when the UI swaps searchers or quits.

An :class:`IndexBuilder` (for the in-process case, :class:`LocalIndexer`)
builds or refreshes the index in a worker thread and opens fresh searchers.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Protocol, cast, runtime_checkable

import numpy as np

from codeseek.indexer import ProgressCallback, UpdateSummary
from codeseek.search import Filters, SearchHit

if TYPE_CHECKING:
    from codeseek.api import Index, IndexStatus
    from codeseek.client import DaemonClient
    from codeseek.embed import Embedder, Progress

LOCAL_SERVICE_STATE = "in-process · not watching"


@runtime_checkable
class SearchBackend(Protocol):
    """The two calls the UI makes of its searcher."""

    def search(self, query: str, k: int = 10, *, languages: Sequence[str] = (),
               paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The k best units for a query."""
        ...

    def neighbours(self, unit_id: int, k: int = 10, *, languages: Sequence[str] = (),
                   paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The unit's neighbours: the k units whose meaning is nearest its own."""
        ...

    def status(self) -> IndexStatus:
        """What the index holds and how fresh it is."""
        ...


class IndexBuilder(Protocol):
    """Builds or refreshes an index, and opens searchers over it."""

    def update(self, progress: ProgressCallback) -> UpdateSummary:
        """Bring the index up to date (called in a worker thread)."""
        ...

    def open_searcher(self) -> SearchBackend:
        """A new searcher over what the index holds now (raises IndexNotFound if none)."""
        ...


def service_state(searcher: object) -> str:
    """A few words on the background service and the watcher behind a searcher."""
    describe = getattr(searcher, "service_state", None)
    if callable(describe):
        return str(describe())
    return LOCAL_SERVICE_STATE


def close_searcher(searcher: object) -> None:
    """Close a searcher that can be closed."""
    close = getattr(searcher, "close", None)
    if callable(close):
        close()


# -- the in-process index ------------------------------------------------------------


class SharedEmbedder:
    """One embedding model for every index the UI opens, loaded on first use."""

    def __init__(self, repo: Path, index_dir: str | None, model: str | None,
                 backend: str | None) -> None:
        self._args = (repo, index_dir, model, backend)
        self._loaded: Embedder | None = None
        self._lock = threading.Lock()

    def _get(self) -> Embedder:
        with self._lock:
            if self._loaded is None:
                from codeseek.config import load_settings
                from codeseek.embed import load_embedder

                repo, index_dir, model, backend = self._args
                settings = load_settings(repo, index_dir=index_dir, model=model, backend=backend)
                self._loaded = load_embedder(settings)
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
        """Build the index, or bring it up to date."""
        with self._open(create=True) as index:
            return index.update(progress=progress)


# -- the neighbours -------------------------------------------------------------------


def neighbour_hits(searcher: SearchBackend, hit: SearchHit, k: int,
                   filters: Filters) -> list[SearchHit]:
    """``hit``'s neighbours: the k units whose meaning is nearest it, within the filters
    (the library's ``neighbours``, in process or through the daemon)."""
    return searcher.neighbours(hit.unit_id, k, languages=filters.languages,
                               paths=filters.paths, kinds=filters.kinds)


# -- the background service ------------------------------------------------------------


class DaemonSearcher:
    """A running ``codeseek watch`` as the UI's searcher: the same answers from a
    warm model, and an index the daemon keeps fresh by itself."""

    def __init__(self, client: DaemonClient) -> None:
        self.client = client

    def search(self, query: str, k: int = 10, *, languages: Sequence[str] = (),
               paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The daemon's answer to one query."""
        return self.client.search_many([query], k, languages=languages, paths=paths,
                                       kinds=kinds)[0]

    def neighbours(self, unit_id: int, k: int = 10, *, languages: Sequence[str] = (),
                   paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The unit's neighbours, found by the daemon."""
        return self.client.neighbours(unit_id, k, languages=languages, paths=paths,
                                      kinds=kinds)

    def status(self) -> IndexStatus:
        """The index's status, as the daemon reports it."""
        from codeseek.api import IndexStatus

        return IndexStatus(**self.client.status()["index"])

    def service_state(self) -> str:
        """The daemon and its watcher, in a few words."""
        daemon = self.client.status()["daemon"]
        pending = f" · {daemon['pending']} pending" if daemon["pending"] else ""
        error = " · write error, retrying" if daemon["last_error"] else ""
        return f"daemon {daemon['pid']} · watching ({daemon['watcher']}){pending}{error}"
