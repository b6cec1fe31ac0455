"""Vectors of texts, embedded once and kept in a ``.npz`` file between runs."""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from codeseek import safefs
from codeseek.embed import Embedder

ENCODE_CHUNK = 512
CACHE_NAME = "eval-vectors.npz"

Progress = Callable[[str, int, int], None]
"""Called as ``progress(stage, done, total)``."""


def text_key(text: str) -> str:
    """The cache key of a text (the same digest as a unit's content hash)."""
    return hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:32]


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
