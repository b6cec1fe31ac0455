"""The HNSW index against exact search, and its save/load round trip."""

from __future__ import annotations

import shutil
import sysconfig
from pathlib import Path

import numpy as np

from codeseek import FakeEmbedder, open_index
from codeseek.store import vector_unit_ids
from codeseek.vectors import VectorIndex, exact_search

# Real code nobody here wrote: packages of the Python standard library on this machine.
STDLIB = Path(sysconfig.get_paths()["stdlib"])
STDLIB_PACKAGES = ("json", "email", "http", "xml", "asyncio", "unittest", "logging",
                   "importlib", "concurrent", "urllib")


def copy_stdlib_subset(target: Path) -> Path:
    for name in STDLIB_PACKAGES:
        shutil.copytree(STDLIB / name, target / name,
                        ignore=shutil.ignore_patterns("__pycache__", "test", "tests"))
    return target


def recall_at_10(vectors: VectorIndex, labels: np.ndarray, matrix: np.ndarray,
                 queries: np.ndarray) -> float:
    found = 0
    for query in queries:
        ann = {label for label, _ in vectors.search(query, 10)}
        exact = {label for label, _ in exact_search(query, labels, matrix, 10)}
        found += len(ann & exact)
    return found / (10 * len(queries))


def test_hnsw_agrees_with_exact_search_on_an_indexed_repository(tmp_path: Path) -> None:
    repo = copy_stdlib_subset(tmp_path / "stdlib")
    embedder = FakeEmbedder()
    index = open_index(repo, create=True, embedder=embedder)
    index.update()
    labels, matrix = index.store.unit_vectors(embedder.model_id, embedder.dim)
    assert len(labels) > 2000
    docs = [s.unit.doc_summary for s in index.store.iter_units() if s.unit.doc_summary][:200]
    queries = embedder.encode(docs)
    vectors = index.searcher().vectors
    # reference: exact cosine search by numpy brute force over the same stored vectors
    assert recall_at_10(vectors, labels, matrix, queries) >= 0.99


def test_exact_search_matches_a_plain_numpy_argsort() -> None:
    rng = np.random.default_rng(7)
    matrix = rng.normal(size=(500, 32)).astype(np.float32)
    matrix /= np.linalg.norm(matrix, axis=1, keepdims=True)
    labels = np.arange(1000, 1500)
    query = matrix[3]
    # reference: numpy's full sort of the cosine scores
    expected = labels[np.argsort(-(matrix @ query), kind="stable")[:10]]
    assert [label for label, _ in exact_search(query, labels, matrix, 10)] == list(expected)


def test_save_and_load_round_trip(tmp_path: Path) -> None:
    rng = np.random.default_rng(11)
    matrix = rng.normal(size=(300, 16)).astype(np.float32)
    labels = np.arange(1, 301)
    index = VectorIndex.build(16, labels, matrix)
    index.remove([5, 6, 7])
    index.add(np.array([400, 401]), matrix[:2])  # reuses deleted slots
    path = tmp_path / "v.hnsw"
    index.save(path)
    expected = set(range(1, 301)) - {5, 6, 7} | {400, 401}
    loaded = VectorIndex.load(path, 16, expected)
    assert loaded is not None and loaded.labels == expected
    assert [lab for lab, _ in loaded.search(matrix[10], 5)] == [
        lab for lab, _ in index.search(matrix[10], 5)]
    # a file that holds a deleted label as live, or lacks one, is refused
    assert VectorIndex.load(path, 16, expected | {5}) is None
    assert VectorIndex.load(path, 16, expected - {400}) is None
    assert not list(tmp_path.glob(".tmp-*"))  # the atomic save left no temp file


def test_sync_labels_equal_units_with_vectors(sample_copy: Path) -> None:
    embedder = FakeEmbedder()
    index = open_index(sample_copy, create=True, embedder=embedder)
    index.update()
    assert index.searcher().vectors.labels == vector_unit_ids(index.store, embedder.model_id)
