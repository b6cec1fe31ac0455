"""The HNSW vector index (hnswlib): a derived, rebuildable cache of the store.

Labels are unit row ids. The file is saved atomically (a temp file in the
same folder, fsync, ``os.replace``, fsync of the folder: :mod:`codeseek.safefs`) and the store's
manifest records it, with the store generation it reflects, only after the
rename. :meth:`VectorIndex.load` refuses a file that does not match and the
caller rebuilds from SQLite. ``ef`` is not saved by hnswlib, so it is set
after every load. hnswlib is not safe for a search while an add runs: a lock
serialises writers against readers.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from codeseek import safefs
from codeseek.errors import IndexWriteError

HNSW_NAME = "vectors.hnsw"
M = 16
EF_CONSTRUCTION = 200
EF_SEARCH = 128
MIN_CAPACITY = 1024


class VectorIndex:
    """An HNSW index over unit vectors (cosine space), with slot reuse."""

    def __init__(self, dim: int, capacity: int = MIN_CAPACITY) -> None:
        import hnswlib

        self.dim = dim
        self._index = hnswlib.Index(space="cosine", dim=dim)
        self._index.init_index(max_elements=max(capacity, MIN_CAPACITY), M=M,
                               ef_construction=EF_CONSTRUCTION, allow_replace_deleted=True)
        self._index.set_ef(EF_SEARCH)
        self._index.set_num_threads(1)
        self._lock = threading.RLock()
        self._labels: set[int] = set()
        self.rebuilt = False  # True when built from the store rather than loaded

    @classmethod
    def build(cls, dim: int, labels: np.ndarray, vectors: np.ndarray) -> VectorIndex:
        """A fresh index holding these vectors."""
        index = cls(dim, capacity=int(len(labels) * 1.25) + MIN_CAPACITY)
        index.add(labels, vectors)
        return index

    @classmethod
    def load(cls, path: Path, dim: int, expected: set[int]) -> VectorIndex | None:
        """Load a saved index holding exactly the ``expected`` live labels.

        None when the file is missing, unreadable, or holds other labels: the
        caller then rebuilds it from the store.
        """
        import hnswlib

        if not safefs.is_regular_file(path):  # missing, or a link: never followed
            return None
        try:
            raw = hnswlib.Index(space="cosine", dim=dim)
            raw.load_index(os.fsencode(path), allow_replace_deleted=True)  # bytes: any name
            stored = {int(x) for x in raw.get_ids_list()}
            if not expected <= stored:
                return None
            if expected:
                raw.get_items(sorted(expected))  # raises if one is marked deleted
            for label in stored - expected:  # every other label must be deleted
                try:
                    raw.get_items([label])
                except RuntimeError:
                    continue
                return None
        except (RuntimeError, ValueError, MemoryError, OSError, IndexError):
            return None  # truncated or corrupt: the caller rebuilds
        raw.set_ef(EF_SEARCH)
        raw.set_num_threads(1)
        index = cls.__new__(cls)
        index.dim = dim
        index._lock = threading.RLock()
        index._index = raw
        index._labels = set(expected)
        index.rebuilt = False
        return index

    def deleted_share(self) -> float:
        """The share of slots that hold deleted vectors."""
        total = int(self._index.element_count)
        return 0.0 if total == 0 else (total - len(self._labels)) / total

    def compact(self, labels: np.ndarray, vectors: np.ndarray) -> None:
        """Replace the graph by a fresh one holding only these vectors."""
        fresh = VectorIndex.build(self.dim, labels, vectors)
        with self._lock:
            self._index = fresh._index
            self._labels = fresh._labels

    def __len__(self) -> int:
        return len(self._labels)

    @property
    def labels(self) -> set[int]:
        """The live labels."""
        return set(self._labels)

    def add(self, labels: np.ndarray, vectors: np.ndarray) -> None:
        """Add (or replace) vectors under labels, reusing deleted slots."""
        if len(labels) == 0:
            return
        with self._lock:
            needed = self._index.element_count + len(labels)
            if needed > self._index.get_max_elements():
                self._index.resize_index(max(needed * 2, MIN_CAPACITY))
            fresh = [i for i, label in enumerate(labels) if int(label) not in self._labels]
            if fresh:
                self._index.add_items(vectors[fresh], np.asarray(labels)[fresh],
                                      replace_deleted=True)
            for label in labels:
                self._labels.add(int(label))

    def remove(self, labels: Sequence[int]) -> None:
        """Mark labels deleted (their slots are reused by later adds)."""
        with self._lock:
            for label in labels:
                if int(label) in self._labels:
                    self._index.mark_deleted(int(label))
                    self._labels.discard(int(label))

    def search(self, query: np.ndarray, k: int) -> list[tuple[int, float]]:
        """(label, cosine similarity) of the k nearest, best first."""
        with self._lock:
            k = min(k, len(self._labels))
            if k <= 0:
                return []
            self._index.set_ef(max(EF_SEARCH, k))
            labels, distances = self._index.knn_query(query.reshape(1, -1), k=k)
        return [(int(lab), float(1.0 - dist)) for lab, dist in zip(labels[0], distances[0],
                                                                    strict=True)]

    def save(self, path: Path) -> None:
        """Write the index atomically (:func:`codeseek.safefs.replacing`)."""
        with self._lock:
            try:
                with safefs.replacing(path) as pending:
                    self._index.save_index(os.fsencode(pending.path))  # bytes: any name
            except (OSError, RuntimeError) as exc:
                raise IndexWriteError(f"{path}: cannot save the vector index: {exc}") from exc


def exact_search(query: np.ndarray, labels: np.ndarray, matrix: np.ndarray,
                 k: int) -> list[tuple[int, float]]:
    """Brute-force cosine search over unit-length rows: the reference for HNSW."""
    if len(labels) == 0:
        return []
    scores = matrix @ query.astype(np.float32)
    k = min(k, len(labels))
    top = np.argpartition(-scores, k - 1)[:k]
    top = top[np.argsort(-scores[top], kind="stable")]
    return [(int(labels[i]), float(scores[i])) for i in top]
