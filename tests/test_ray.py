"""Indexing on Ray (``codeseek index --ray``) against the local build.

The local build is the reference: the same units (ids, content hashes), the
same vectors and the same search results; numpy's element-wise comparison
checks the vectors. One local Ray instance with 2 CPUs serves the module.
"""

from __future__ import annotations

import io
import logging
import shutil
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("ray", reason="the ray extra is not installed (pip install 'codeseek[ray]')")

from codeseek import FakeEmbedder, open_index  # noqa: E402
from codeseek import indexer as indexer_module  # noqa: E402
from codeseek.api import Index  # noqa: E402
from codeseek.cli import main  # noqa: E402
from codeseek.distributed import index_on_ray  # noqa: E402

SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"
QUERIES = ["retry failed uploads", "rate limit requests", "rebalance the fleet"]


@pytest.fixture(scope="module")
def ray_session() -> Iterator[object]:
    import ray

    ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False,
             logging_level=logging.ERROR)
    yield ray
    ray.shutdown()


def _copy(root: Path, name: str) -> Path:
    target = root / name
    shutil.copytree(SAMPLE_REPO, target, symlinks=True)
    return target


def _units(index: Index) -> list[tuple[int, str, str]]:
    return [(s.id, s.unit.uid, s.content_hash) for s in index.store.iter_units()]


def _assert_same(ray_index: Index, local: Index, tolerance: float) -> None:
    assert _units(ray_index) == _units(local)
    dim = local.embedder.dim
    labels, vectors = ray_index.store.unit_vectors(ray_index.embedder.model_id, dim)
    local_labels, local_vectors = local.store.unit_vectors(local.embedder.model_id, dim)
    np.testing.assert_array_equal(labels, local_labels)
    np.testing.assert_allclose(vectors, local_vectors, atol=tolerance, rtol=0)
    for query in QUERIES:
        assert ([(h.path, h.qualname) for h in ray_index.search(query)]
                == [(h.path, h.qualname) for h in local.search(query)])


def test_two_repositories_on_one_pool_equal_local_builds_and_a_cut_build_resumes(
        ray_session: object, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(indexer_module, "FILES_PER_TRANSACTION", 3)  # several batches
    local = open_index(_copy(tmp_path, "local"), create=True, embedder=FakeEmbedder())
    local.update()
    fresh = open_index(_copy(tmp_path, "fresh"), create=True, embedder=FakeEmbedder())
    cut = open_index(_copy(tmp_path, "cut"), create=True, embedder=FakeEmbedder())

    class Died(Exception):
        pass

    batches = []

    def dies_after_two_batches(stage: str, done: int, total: int) -> None:
        if stage == "embed" and done:
            batches.append(done)
            if len(batches) > 2:
                raise Died  # the writer stops part-way, as a killed driver would

    with pytest.raises(Died):
        cut.update(progress=dies_after_two_batches)
    partial = cut.store.counts()
    assert 0 < partial["files"] < local.store.counts()["files"]

    summaries = index_on_ray([fresh, cut], workers=2)

    assert summaries[0].units == summaries[1].units == local.store.counts()["units"]
    # the rerun reads only what the cut build had not committed
    assert summaries[1].added == summaries[0].units - partial["units"]
    assert summaries[1].files_parsed == summaries[0].files_parsed - partial["files"]
    for index in (fresh, cut):
        _assert_same(index, local, 0.0)  # the fake embedder is exact
        assert index.store.first_build_finished()
        index.close()
    local.close()


def test_a_bad_address_is_one_line_without_traceback(ray_session: object,
                                                      tmp_path: Path) -> None:
    repo = _copy(tmp_path, "repo")
    out, err = io.StringIO(), io.StringIO()
    code = main(["index", str(repo), "--ray", "127.0.0.1:1", "--backend", "fake"], out, err)
    assert code == 1
    lines = err.getvalue().splitlines()
    assert lines == [lines[0]] and lines[0].startswith("error: cannot reach a Ray cluster at "
                                                       "127.0.0.1:1")
    assert "Traceback" not in err.getvalue()
    out, err = io.StringIO(), io.StringIO()
    assert main(["index", str(repo), "--ray", "no-port-here", "--backend", "fake"],
                out, err) == 1
    assert err.getvalue().startswith("error: --ray no-port-here: give the cluster as")


@pytest.mark.model
def test_real_model_vectors_equal_a_local_build(ray_session: object, tmp_path: Path) -> None:
    local = open_index(_copy(tmp_path, "local"), create=True)
    local.update()
    on_ray = open_index(_copy(tmp_path, "ray"), create=True)
    index_on_ray([on_ray], workers=2)
    # ONNX on other batches pads differently; 1e-5 is the bound
    _assert_same(on_ray, local, 1e-5)
    on_ray.close()
    local.close()
