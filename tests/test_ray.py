"""Indexing on Ray (``codeseek index --ray``) against the local build.

The local build is the reference: the same units (ids, content hashes), the
same vectors and the same search results; numpy's element-wise comparison
checks the vectors. One local Ray instance with 2 CPUs serves the module.
"""

from __future__ import annotations

import contextlib
import io
import logging
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import threading
from collections.abc import Iterator
from functools import partial
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("ray", reason="the ray extra is not installed (pip install 'codeseek[ray]')")

from codeseek import FakeEmbedder, open_index  # noqa: E402
from codeseek import indexer as indexer_module  # noqa: E402
from codeseek.api import Index  # noqa: E402
from codeseek.cli import main  # noqa: E402
from codeseek.distributed import WORKER_RETRIES, index_on_ray  # noqa: E402
from codeseek.errors import IndexBuilding  # noqa: E402
from codeseek.store import DB_NAME  # noqa: E402

PROJECT = Path(__file__).resolve().parent.parent
SAMPLE_REPO = PROJECT / "sample_repo"
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


# -- interruption ---------------------------------------------------------------------

# A driver that stops after two committed batches and waits to be killed: the
# kill -9 then lands mid-build, with a Ray job running on the cluster.
PAUSING_DRIVER = r"""
import os, sys, time
from codeseek import indexer
from codeseek.cli import main

indexer.FILES_PER_TRANSACTION = 3
init = indexer.Updater.__init__

def pausing_init(self, *args, **kwargs):
    init(self, *args, **kwargs)
    report = self.report

    def pausing(stage, done, total):
        report(stage, done, total)
        if stage == "parse" and done >= 7:  # files 1-6 are committed in two batches
            os.write(1, b"committed\n")  # sys.stdout points at Ray's log meanwhile
            time.sleep(600)

    self.report = pausing

indexer.Updater.__init__ = pausing_init
sys.exit(main(["index", sys.argv[1], "--backend", "fake", "--ray", sys.argv[2]]))
"""


def _session_processes(session: int) -> list[int]:
    """Processes of a session (Linux /proc: the sixth field of ``stat`` is the session id)."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue  # ended meanwhile
        if int(fields[3]) == session:
            found.append(int(entry.name))
    return found


def _kill_session(session: int) -> None:
    for pid in _session_processes(session):
        with contextlib.suppress(ProcessLookupError):  # ended meanwhile
            os.kill(pid, signal.SIGKILL)


def test_a_driver_killed_mid_build_leaves_a_searchable_index_and_the_rerun_resumes(
        ray_session: object, tmp_path: Path) -> None:
    import ray

    local = open_index(_copy(tmp_path, "local"), create=True, embedder=FakeEmbedder())
    local.update()
    repo = _copy(tmp_path, "killed")
    env = {**os.environ, "PYTHONPATH": str(PROJECT)}
    # its own session, so whatever it starts is found and ended after the test
    driver = subprocess.Popen(
        [sys.executable, "-c", PAUSING_DRIVER, str(repo),
         ray.get_runtime_context().gcs_address],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
        start_new_session=True)
    watchdog = threading.Timer(120, driver.kill)  # a driver that never pauses fails the test
    watchdog.start()
    try:
        assert driver.stdout is not None
        assert driver.stdout.readline() == "committed\n", driver.communicate()[1]
        driver.send_signal(signal.SIGKILL)
        driver.wait()
    finally:
        watchdog.cancel()
        _kill_session(driver.pid)
    assert driver.returncode == -signal.SIGKILL
    assert driver.stderr is not None
    progress = driver.stderr.read().splitlines()
    # codeseek's progress reached the terminal; Ray's own output went to its log
    assert progress and all(line.startswith("codeseek: ") for line in progress), progress
    assert "codeseek: parsing changed files" in progress

    # SQLite's own check of the file the killed driver was writing
    with sqlite3.connect(repo / ".codeseek" / DB_NAME) as db:
        assert db.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
    index = open_index(repo, embedder=FakeEmbedder())
    partial_counts = index.store.counts()
    assert 0 < partial_counts["files"] < local.store.counts()["files"]
    with pytest.raises(IndexBuilding, match="did not finish; run `codeseek index`"):
        index.search("retry failed uploads")  # says how to finish, never half an answer

    # the cluster ended the dead driver's job (its actors too): the rerun gets the workers
    (summary,) = index_on_ray([index], workers=2)
    assert summary.files_parsed == local.store.counts()["files"] - partial_counts["files"]
    _assert_same(index, local, 0.0)  # searches too, now the build is whole
    assert index.store.first_build_finished()
    index.close()
    local.close()


class DyingEmbedder(FakeEmbedder):
    """The fake embedder in a worker that kills its own process mid-batch: once (the
    first to see no ``marker`` file) or every time."""

    def __init__(self, marker: str, always: bool) -> None:
        super().__init__()
        self.marker = Path(marker)
        self.always = always

    def encode(self, texts: list[str], progress: object = None) -> np.ndarray:
        if self.always or not self.marker.exists():
            self.marker.touch()
            os.kill(os.getpid(), signal.SIGKILL)
        return super().encode(texts, progress)  # type: ignore[arg-type]


@pytest.fixture
def workers_see_this_module() -> Iterator[None]:
    """Ray's workers cannot import the tests folder: the embedder class travels by value."""
    from ray import cloudpickle

    module = sys.modules[__name__]
    cloudpickle.register_pickle_by_value(module)
    yield
    cloudpickle.unregister_pickle_by_value(module)


def test_a_worker_killed_mid_batch_is_restarted_and_the_build_equals_a_local_one(
        ray_session: object, tmp_path: Path, workers_see_this_module: None) -> None:
    local = open_index(_copy(tmp_path, "local"), create=True, embedder=FakeEmbedder())
    local.update()
    index = open_index(_copy(tmp_path, "ray"), create=True, embedder=FakeEmbedder())
    marker = tmp_path / "a-worker-died"
    index_on_ray([index], workers=2,
                 make_embedder=partial(DyingEmbedder, str(marker), False))
    assert marker.exists()  # a worker did die mid-batch
    _assert_same(index, local, 0.0)
    assert index.store.first_build_finished()
    index.close()
    local.close()


# The command line with workers that always die: their embedder kills its process.
DYING_DRIVER = """
import os, signal, sys
import codeseek.distributed
from codeseek import indexer
from codeseek.cli import main
from codeseek.embed import FakeEmbedder

class Dying(FakeEmbedder):
    def encode(self, texts, progress=None):
        os.kill(os.getpid(), signal.SIGKILL)

indexer.FILES_PER_TRANSACTION = 3
codeseek.distributed.embedder_factory = lambda embedder, index: Dying
sys.exit(main(["index", sys.argv[1], "--backend", "fake", "-q", "--ray", sys.argv[2]]))
"""


def test_workers_that_always_die_fail_in_one_line_and_the_rerun_resumes(
        ray_session: object, tmp_path: Path) -> None:
    import ray

    local = open_index(_copy(tmp_path, "local"), create=True, embedder=FakeEmbedder())
    local.update()
    repo = _copy(tmp_path, "ray")
    env = {**os.environ, "PYTHONPATH": str(PROJECT)}
    run = subprocess.run(
        [sys.executable, "-c", DYING_DRIVER, str(repo), ray.get_runtime_context().gcs_address],
        capture_output=True, text=True, env=env, timeout=180)
    assert run.returncode == 1
    log = repo / ".codeseek" / "ray.log"
    # one line, however much Ray printed: its tracebacks and reports are in the log
    assert run.stderr == (f"error: a Ray worker failed ({WORKER_RETRIES} restarts tried): The "
                          "actor died unexpectedly before finishing this task; what was "
                          "written is kept, run the same command again to go on (Ray's own "
                          f"output: {log})\n")
    assert run.stdout == ""
    assert "ActorDiedError" in log.read_text()
    index = open_index(repo, embedder=FakeEmbedder())
    assert not index.store.first_build_finished()
    (summary,) = index_on_ray([index], workers=2)  # healthy workers now
    assert summary.units == local.store.counts()["units"]
    _assert_same(index, local, 0.0)
    index.close()
    local.close()
