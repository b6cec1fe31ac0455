"""Bulk indexing on Ray: parsing and embedding on a cluster, one local writer.

``codeseek index PATH... --ray [ADDRESS]`` runs here. For every repository the
driver (this process) does what a local update does first
(:meth:`~codeseek.indexer.Updater.begin`: scan, compare sizes and times) and
reads and hashes the files that may have changed; only files whose content
changed travel to Ray, as bytes (the workers need no view of the disk). One
Ray Data pipeline over the files of every repository runs
``map_batches`` with a fixed-size actor pool (:class:`UnitWorker`): each actor
loads the embedder once, parses its batch of files with tree-sitter and embeds
the units' texts sorted by length. Results come back in file order and stream
into :meth:`~codeseek.indexer.Updater.finish`, the write path of a local build
(vectors, then files and units, batch by batch, one transaction each), so the
index equals a local build's and a run cut short resumes as a local one does:
committed files are not read again, committed vectors are not stored again.
A worker that dies mid-batch (killed, out of memory) is restarted and its batch
retried, :data:`WORKER_RETRIES` times, before the run fails in one line; a
killed driver leaves what it committed, and the next run goes on from there.

``import ray`` happens only here, and only when a run needs it.
"""

from __future__ import annotations

import logging
import os
import pickle
import socket
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from functools import partial
from types import ModuleType
from typing import TYPE_CHECKING, Any

import numpy as np

from codeseek.embed import Embedder, FakeEmbedder
from codeseek.errors import ClusterError, CodeseekError
from codeseek.indexer import FileChange, Plan, ProgressCallback, Updater, UpdateSummary
from codeseek.languages import spec_by_name
from codeseek.parse import ParseResult, parse_source
from codeseek.scan import SkipFile, SourceFile
from codeseek.tiers import load_tier_embedder
from codeseek.units import CodeUnit

if TYPE_CHECKING:
    from codeseek.api import Index

DEFAULT_WORKERS = 2
FILES_PER_CALL = 16
"""Files one actor call parses and embeds (Ray Data's ``batch_size``)."""
WORKER_RETRIES = 2
"""How often a worker that died (killed, out of memory) is restarted and its batch
retried before the run fails; Ray Data's default retries forever, so a file that
crashes every worker would hang the run."""
PROBE_SECONDS = 5.0
"""How long the address is tried before a run gives up (Ray itself retries for minutes)."""
RAY_MISSING = "codeseek index --ray needs Ray: pip install 'codeseek[ray]'"

EmbedderFactory = Callable[[], Embedder]


def import_ray() -> ModuleType:
    """The ``ray`` module, or ClusterError naming the extra to install."""
    try:
        import ray
        import ray.data  # noqa: F401  (the extra is ray[data])
    except ImportError:
        raise ClusterError(RAY_MISSING) from None
    return ray


# -- what travels -------------------------------------------------------------------


@dataclass(frozen=True)
class FileTask:
    """One changed file for a worker: its bytes, and the content hashes its stored
    units already have vectors for (those are not embedded again)."""

    path: str
    language: str
    data: bytes
    known: frozenset[str] = frozenset()


@dataclass(frozen=True)
class FileResult:
    """A worker's answer for one file: its units and the vectors of the new ones, or
    the reason the file is left out (``skip``), or the worker's failure (``error``)."""

    path: str
    units: tuple[CodeUnit, ...] = ()
    has_errors: bool = False
    vectors: dict[str, np.ndarray] = field(default_factory=dict)
    skip: str | None = None
    error: str | None = None


def embedder_factory(embedder: Embedder, index: Index) -> EmbedderFactory:
    """How a worker makes the embedder the driver uses (same model id, checked)."""
    if isinstance(embedder, FakeEmbedder):
        return partial(FakeEmbedder, embedder.dim)
    return partial(load_tier_embedder, index.settings, index.tier)


class UnitWorker:
    """The actor: loads the embedder once, then parses and embeds batches of files."""

    def __init__(self, make_embedder: EmbedderFactory, model_id: str) -> None:
        self.error: str | None = None
        self.embedder: Embedder | None = None
        try:  # a failure is answered per file, not retried as a crashed actor
            embedder = make_embedder()
            if embedder.model_id != model_id:
                self.error = (f"a Ray worker has model {embedder.model_id}, the driver "
                              f"{model_id}; install the same codeseek and model everywhere")
            self.embedder = embedder
        except CodeseekError as exc:
            self.error = f"a Ray worker cannot load the model: {exc}"

    def __call__(self, batch: dict[str, Any]) -> dict[str, list[bytes]]:
        tasks: list[FileTask] = [pickle.loads(blob) for blob in batch["task"]]
        return {"result": [pickle.dumps(r) for r in self.work(tasks)]}

    def work(self, tasks: list[FileTask]) -> list[FileResult]:
        """Parse every file, then embed the new unit texts of the batch, shortest first."""
        if self.error is not None or self.embedder is None:
            return [FileResult(t.path, error=self.error) for t in tasks]
        parsed: list[tuple[FileTask, ParseResult | None, str | None]] = []
        texts: dict[str, str] = {}
        for task in tasks:
            try:
                result = parse_source(task.path, task.data, spec_by_name(task.language))
            except SkipFile as skip:
                parsed.append((task, None, str(skip.args[0])))
                continue
            parsed.append((task, result, None))
            for unit in result.units:
                if unit.content_hash not in task.known:
                    texts.setdefault(unit.content_hash, unit.embed_text())
        # similar lengths side by side keep the padding small (the local build's rule)
        order = sorted(texts, key=lambda digest: len(texts[digest]))
        matrix = self.embedder.encode([texts[digest] for digest in order])
        vectors = {digest: matrix[i] for i, digest in enumerate(order)}
        answers = []
        for task, parse, reason in parsed:
            if parse is None:
                answers.append(FileResult(task.path, skip=reason))
                continue
            own = {u.content_hash: vectors[u.content_hash] for u in parse.units
                   if u.content_hash in vectors}
            answers.append(FileResult(task.path, parse.units, parse.has_errors, own))
        return answers


# -- the Ray session ----------------------------------------------------------------


def check_address(address: str) -> None:
    """Refuse an address that is malformed or where nothing listens, within seconds
    (``ray.init`` itself retries for minutes)."""
    if address == "auto":
        return
    where = address.removeprefix("ray://")
    host, _, port = where.rpartition(":")
    if not host or not port.isdecimal():
        raise ClusterError(f"--ray {address}: give the cluster as HOST:PORT, "
                           "ray://HOST:PORT or auto")
    try:
        with socket.create_connection((host.strip("[]"), int(port)), timeout=PROBE_SECONDS):
            pass
    except OSError as exc:
        reason = exc.strerror or str(exc) or type(exc).__name__
        raise ClusterError(f"cannot reach a Ray cluster at {address}: {reason}") from None


def _quiet() -> None:
    """Ray's and Ray Data's own logs stay quiet below errors (the command line sends
    what remains to the index folder's ``ray.log``)."""
    os.environ.setdefault("RAY_DATA_LOG_LEVEL", "ERROR")
    os.environ.setdefault("RAY_DEDUP_LOGS", "0")
    for name in ("ray", "ray.data"):
        logging.getLogger(name).setLevel(logging.ERROR)


@contextmanager
def ray_session(address: str | None, workers: int) -> Iterator[ModuleType]:
    """Ray, connected: to the running session of this process if there is one, else to
    ``address``, else to a local instance with ``workers`` CPUs (shut down afterwards)."""
    _quiet()
    ray = import_ray()
    if address:
        check_address(address)
    if ray.is_initialized():
        yield ray
        return
    options: dict[str, Any] = {"include_dashboard": False, "log_to_driver": False,
                               "logging_level": logging.ERROR}
    try:
        if address:
            ray.init(address=address, **options)
        else:
            ray.init(num_cpus=workers, **options)
    except (ConnectionError, RuntimeError, ValueError) as exc:
        where = f"the Ray cluster at {address}" if address else "a local Ray instance"
        raise ClusterError(f"cannot start {where}: {_first_line(exc)}") from None
    try:
        yield ray
    finally:
        ray.shutdown()


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


# -- the run ------------------------------------------------------------------------


@dataclass
class _Job:
    """One repository of a run: its updater, plan and read files."""

    index: Index
    updater: Updater
    plan: Plan
    reads: list[tuple[SourceFile, str, bytes | None]]

    def tasks(self) -> Iterator[FileTask]:
        """The changed files, in order, for the workers; each names the vectors its
        stored units already have (a changed file mostly keeps most of its units)."""
        have = self.index.store.known_hashes(self.updater.embedder.model_id)
        for source, _, data in self.reads:
            if data is None:
                continue
            row = self.plan.known.get(source.path)
            old = (self.index.store.unit_keys_of_file(row.id).values()
                   if row is not None else ())
            known = frozenset(digest for _, digest in old if digest in have)
            yield FileTask(source.path, source.spec.name, data, known)

    def changes(self, results: Iterator[FileResult]) -> Iterator[FileChange]:
        """The plan's changes in order: unchanged files from here, changed ones from
        the workers' results (taken from the shared stream, exactly as many)."""
        total = len(self.reads)
        for done, (source, digest, data) in enumerate(self.reads, 1):
            if data is None:
                yield FileChange(source, digest, None)
            else:
                answer = next(results, None)
                if answer is None or answer.path != source.path:
                    raise ClusterError(f"{source.path}: the Ray results came back out of order")
                if answer.error is not None:
                    raise ClusterError(answer.error)
                if answer.skip is not None:
                    self.plan.scan.skip(source.path, answer.skip)
                    continue
                parse = ParseResult(answer.units, answer.has_errors)
                self.updater.note_parsed(source, parse)
                yield FileChange(source, digest, parse, answer.vectors)
            self.updater.report("parse", done, total)


def index_on_ray(indexes: Sequence[Index], *, address: str | None = None,
                 workers: int = DEFAULT_WORKERS,
                 progress: Callable[[Index], ProgressCallback | None] | None = None,
                 make_embedder: EmbedderFactory | None = None) -> list[UpdateSummary]:
    """Bring each index up to date, parsing and embedding on Ray; one summary each.

    All repositories share one actor pool of ``workers`` actors. Every index is
    held with its writer lock for the run; each is finished (its first build
    recorded, its vector file saved) as soon as its last batch is written.
    ``make_embedder`` replaces how workers make the embedder (tests).
    """
    if workers < 1:
        raise ClusterError(f"--workers {workers}: give at least one worker")
    import_ray()  # before any index is touched
    if address:
        check_address(address)
    with ExitStack() as stack:
        jobs: list[_Job] = []
        reporters = [progress(index) if progress else None for index in indexes]
        for index, report in zip(indexes, reporters, strict=True):
            stack.enter_context(index.writer_lock())
            updater = index.updater(report)
            plan = updater.begin()
            reads = list(updater.read_files(plan.todo, plan.known, plan.scan))
            jobs.append(_Job(index, updater, plan, reads))
        tasks = [task for job in jobs for task in job.tasks()]
        results: Iterator[FileResult] = iter(())
        if tasks:  # nothing changed: no cluster needed
            ray = stack.enter_context(ray_session(address, workers))
            model = jobs[0].updater.embedder
            factory = make_embedder or embedder_factory(model, jobs[0].index)
            results = _run_pool(ray, tasks, factory, model.model_id, workers)
        summaries = []
        for job, report in zip(jobs, reporters, strict=True):
            summaries.append(job.updater.finish(job.plan, job.changes(results)))
            job.index.finish_build(report)
        return summaries


def _run_pool(ray: ModuleType, tasks: list[FileTask], make_embedder: EmbedderFactory,
              model_id: str, workers: int) -> Iterator[FileResult]:
    """The workers' results, in task order, as they are made."""
    context = ray.data.DataContext.get_current()
    context.enable_progress_bars = False
    context.print_on_execution_start = False
    context.execution_options.preserve_order = True  # unit ids as a local build gives them
    blocks = max(1, min(len(tasks), -(-len(tasks) // FILES_PER_CALL)))
    dataset = ray.data.from_items([{"task": pickle.dumps(task)} for task in tasks],
                                  override_num_blocks=blocks)
    with warnings.catch_warnings():
        # Ray 2.60 names no parameter for an actor's restarts; the remote arguments that
        # carry them are deprecated, not yet replaced
        warnings.filterwarnings("ignore", message="`ray_remote_args` is deprecated")
        dataset = dataset.map_batches(
            UnitWorker, batch_size=FILES_PER_CALL,
            compute=ray.data.ActorPoolStrategy(size=workers),
            fn_constructor_args=(make_embedder, model_id), num_cpus=1,
            max_restarts=WORKER_RETRIES, max_task_retries=WORKER_RETRIES)
    try:
        for row in dataset.iter_rows():
            yield pickle.loads(row["result"])
    except ray.exceptions.RayError as exc:
        reason = _first_line(exc).rstrip(".")
        raise ClusterError(f"a Ray worker failed ({WORKER_RETRIES} restarts tried): {reason}; "
                           "what was written is kept, run the same command again to go on"
                           ) from None
