"""Shared fixtures: a scrubbed environment, temp copies of sample_repo, indexes."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from codeseek.config import ENV_VARS

PROJECT = Path(__file__).resolve().parent.parent
SAMPLE_REPO = PROJECT / "sample_repo"
DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture(autouse=True)
def _scrub_env(monkeypatch: pytest.MonkeyPatch, tmp_path_factory: pytest.TempPathFactory) -> None:
    """No test sees the developer's codeseek settings; caches go to a shared temp folder."""
    for name in ENV_VARS:
        monkeypatch.delenv(name, raising=False)
    monkeypatch.setenv("CODESEEK_CACHE_DIR", str(_shared_cache(tmp_path_factory)))


def _shared_cache(factory: pytest.TempPathFactory) -> Path:
    # one cache per test session: the ONNX export is made once for all model tests
    root = factory.getbasetemp() / "codeseek-cache"
    root.mkdir(exist_ok=True)
    return root


@pytest.fixture
def sample_copy(tmp_path: Path) -> Path:
    """A private copy of sample_repo/ (tests may edit it)."""
    target = tmp_path / "repo"
    shutil.copytree(SAMPLE_REPO, target, symlinks=True)
    return target


@pytest.fixture
def fake_index(sample_copy: Path) -> Iterator[object]:
    """An index of a sample_repo copy built with the fake embedder."""
    from codeseek import FakeEmbedder, open_index

    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    index.update()
    yield index
    index.close()
