"""Indexing and query benchmark: prints its figures; asserts nothing.

Usage: .venv/bin/python scripts/bench_index.py [PATH] [--torch-sample N] [--queries N]
       .venv/bin/python scripts/bench_index.py [PATH] --tiers [--tier-units N]
       .venv/bin/python scripts/bench_index.py --corpora [--repeat N]
       .venv/bin/python scripts/bench_index.py [PATH] --ray
       .venv/bin/python scripts/bench_index.py [PATH] --refine | --refine-daemon

With --ray it builds three fresh indexes of PATH in one run, with the packaged
model: a local build, then a build on a local Ray instance with 1 worker and
with 2 workers (``codeseek index --ray``), and prints units/s of each and the
ratios (the Ray figures include starting the actor pool, not starting Ray); then
the one local writer alone (a fresh index written from vectors made beforehand), the
rate past which more workers stop helping.

Without PATH it indexes a copy of this machine's Python standard library
(test folders left out). It prints, from one run on one machine:
  * the full index: files, units, seconds, units/s;
  * the raw encode throughput of the default (ONNX) backend on the same unit
    texts, same batch size, and of the torch reference on a sample, with the
    ratios pipeline / raw ONNX and ONNX / torch;
  * a second index of the unchanged tree (seconds, units embedded: should be 0);
  * the one-off rewrite of every keyword entry (an index made before they folded
    members gets it on its next update);
  * warm query latency p50/p95 in one process, with the served candidates per
    side and with half as many (taken in turn on each query);
  * a cold `codeseek search` CLI call (a new process, no daemon).

With --tiers it compares the embedding tiers (codeseek/tiers.py) side by side in one
run, on a small standard-library copy (the modules the standard-library question set
answers from, tests/corpora.py stdlib_question_subset; or PATH): for each tier, a fresh
index of it (units/s), the raw encode of --tier-units unit texts (best of two passes
taken in turn, full / int8 / static then back), the ratios to the full tier, and how
close each derived tier's vectors are to the full one's (mean cosine, int8 only: the
same space; top-10 neighbour overlap among those texts, every tier). Each tier's model
is made (quantised, distilled) before the clock starts.

With --refine (default repository: as for --tiers) it prints, in one run: a full
build; a fresh index built with --refine (seconds to searchable) and refined to the
end, with the standard-library questions, a docstring check (documented units found
by their own summary) and the warm p50 at 0/25/50/75/100% refined, for each way of
mixing the tiers (codeseek.refine.TIER_MAPS); the same refinement with the earlier
256-unit chunks, for comparison; the full tier's exact scan at 19,200 and 200,000
rows; and `codeseek watch --refine` on a fresh index: seconds to searchable, warm
query p50/p95 through the daemon while it refines, then the cold `codeseek search`
median without a daemon, mid-refinement; twice, with the refiner not giving way to
searches and then giving way (the served behaviour, codeseek.refine.QueryTraffic).
--refine-daemon runs only that last part.

With --watch-first (default repository: the whole standard-library copy) it starts
`codeseek watch` with no option on a new index, as a user would (its size decides whether
it is built searchable first), and prints the seconds to searchable and the warm p50 right
after: once with this machine's model cache, once with an empty one (the ONNX export and
the static tier's distillation then happen before it is searchable); then `codeseek watch
--no-refine` (a full build: minutes) and the same queries on the full index, side by side.

With --corpora it prints parse throughput only, per language, on the real
registry code the language tests use (tests/corpora.py; fetched and cached on
first use) and on this machine's standard library for Python: the raw
tree-sitter parse, and the whole extraction (parse, query, names, docs,
signatures) in MB/s and units/s, best of --repeat passes. No embedding.
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import os
import shutil
import statistics
import subprocess
import sys
import sysconfig
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

import numpy as np

PROJECT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(PROJECT))

import codeseek.refine as refine_module  # noqa: E402
import codeseek.search as search_module  # noqa: E402
from codeseek import open_index  # noqa: E402
from codeseek.api import Index  # noqa: E402
from codeseek.client import DaemonClient, DaemonUnavailable  # noqa: E402
from codeseek.config import load_settings  # noqa: E402
from codeseek.embed import Embedder, load_embedder  # noqa: E402
from codeseek.languages import LanguageSpec, spec_by_name  # noqa: E402
from codeseek.parse import _parser, parse_source  # noqa: E402
from codeseek.refine import TIER_MAPS, RefiningSearcher, pending_units  # noqa: E402
from codeseek.scan import SkipFile, read_source, scan_repository  # noqa: E402
from codeseek.tiers import TIERS, load_tier_embedder  # noqa: E402
from codeseek.vectors import exact_search  # noqa: E402

T = TypeVar("T")
SKIP = shutil.ignore_patterns("test", "tests", "idle_test", "site-packages", "__pycache__")


def copy_stdlib(target: Path) -> Path:
    """A copy of the standard library without its test folders."""
    shutil.copytree(sysconfig.get_paths()["stdlib"], target, ignore=SKIP, symlinks=True)
    return target


def percentile(values: list[float], share: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(share * (len(ordered) - 1))))]


def parse_throughput(repo: Path) -> None:
    settings = load_settings(repo)
    per_language: dict[str, list[float]] = {}
    for source in scan_repository(settings).files:
        try:
            data = read_source(source, settings.max_file_bytes)
        except SkipFile:
            continue
        start = time.perf_counter()
        units = parse_source(source.path, data, source.spec).units
        elapsed = time.perf_counter() - start
        stats = per_language.setdefault(source.spec.name, [0.0, 0.0, 0.0])
        stats[0] += len(data)
        stats[1] += len(units)
        stats[2] += elapsed
    for language, (size, units, seconds) in sorted(per_language.items()):
        print(f"parse {language:<10} {size / 1e6 / seconds:6.1f} MB/s "
              f"{units / seconds:9.0f} units/s ({units:.0f} units, {size / 1e6:.1f} MB)")


def corpus_files() -> list[tuple[str, str, list[Path]]]:
    """(language, source label, files) for every language: registry corpora and the stdlib."""
    sys.path.insert(0, str(PROJECT / "tests"))
    from corpora import CORPORA, files  # the test corpora: fetched and cached on first use

    stdlib = sorted(Path(sysconfig.get_paths()["stdlib"]).glob("*.py"))
    found = [("python", f"this Python's standard library ({len(stdlib)} top-level modules)",
              stdlib)]
    found += [(lang, corpus.label, files(corpus)) for lang, corpus in sorted(CORPORA.items())]
    return found


def raw_parses(spec: LanguageSpec, blobs: list[tuple[str, bytes]]) -> None:
    """tree-sitter alone: one parse per file."""
    parser = _parser(spec)
    for _, data in blobs:
        parser.parse(data)


def extractions(spec: LanguageSpec, blobs: list[tuple[str, bytes]]) -> None:
    """codeseek's whole extraction: parse, query, names, docs, signatures."""
    for name, data in blobs:
        parse_source(name, data, spec)


def best_time(run: Callable[[], None], repeat: int) -> float:
    """The fastest of ``repeat`` timed calls of ``run`` (after one warm-up call)."""
    run()
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return min(times)


def corpus_throughput(repeat: int) -> None:
    print(f"parse throughput per language, best of {repeat} passes, one process, no embedding")
    print(f"{'language':<11}{'tree-sitter':>13}{'extraction':>12}{'units/s':>10}"
          f"{'units':>7}{'MB':>7}  source")
    for language, label, paths in corpus_files():
        spec: LanguageSpec = spec_by_name(language)
        blobs = [(p.name, p.read_bytes()) for p in paths]
        size = sum(len(data) for _, data in blobs)
        units = sum(len(parse_source(name, data, spec).units) for name, data in blobs)
        raw = best_time(functools.partial(raw_parses, spec, blobs), repeat)
        full = best_time(functools.partial(extractions, spec, blobs), repeat)
        print(f"{language:<11}{size / 1e6 / raw:>9.1f} MB/s{size / 1e6 / full:>7.1f} MB/s"
              f"{units / full:>10.0f}{units:>7}{size / 1e6:>7.2f}  {label}")


def warm_latency(index: Index, queries: list[str]) -> None:
    """Warm query latency with the served candidates per side, and with half as many,
    the two taken in turn on each query of one run."""
    served = search_module.CANDIDATES
    depths = (served, served // 2)
    latencies: dict[int, list[float]] = {depth: [] for depth in depths}
    try:
        for query in queries:
            for depth in depths:
                search_module.CANDIDATES = depth
                start = time.perf_counter()
                index.search(query, 10)
                latencies[depth].append((time.perf_counter() - start) * 1000)
    finally:
        search_module.CANDIDATES = served
    for depth in depths:
        times = latencies[depth]
        label = "served" if depth == served else "for comparison"
        print(f"warm query latency over {len(times)} queries, {depth} candidates per side "
              f"({label}): p50 {percentile(times, 0.5):.1f} ms, "
              f"p95 {percentile(times, 0.95):.1f} ms")
    ratio = percentile(latencies[depths[0]], 0.5) / percentile(latencies[depths[1]], 0.5)
    print(f"p50 ratio {depths[0]} / {depths[1]} candidates: {ratio:.2f}")


def neighbour_overlap(first: np.ndarray, second: np.ndarray, k: int = 10) -> float:
    """Mean share of each text's k nearest other texts that two embeddings agree on
    (exact search in numpy: every pair's cosine)."""
    def nearest(vectors: np.ndarray) -> np.ndarray:
        cosines = vectors @ vectors.T
        np.fill_diagonal(cosines, -np.inf)
        return np.argsort(-cosines, axis=1)[:, :k]

    a, b = nearest(first), nearest(second)
    return float(np.mean([len(set(x) & set(y)) / k for x, y in zip(a, b, strict=True)]))


def compare_tiers(repo: Path, scratch: Path, units: int) -> None:
    """Every tier on the same repository in one run: index, raw encode, closeness."""
    indexes: dict[str, Index] = {}
    pipeline: dict[str, float] = {}
    for tier in TIERS:
        index = open_index(repo, index_dir=scratch / f"index-{tier}", create=True, tier=tier)
        index.embedder.encode(["warm up"])  # made on first need, outside the clock
        start = time.perf_counter()
        summary = index.update()
        seconds = time.perf_counter() - start
        pipeline[tier] = summary.embedded / seconds
        indexes[tier] = index
        print(f"index, {tier:<6}: {summary.files} files, {summary.units} units, "
              f"{seconds:.1f} s, {pipeline[tier]:.1f} units/s  ({index.embedder.model_id}, "
              f"{index.embedder.dim} dimensions)")
    texts = [s.unit.embed_text() for s in indexes["full"].store.iter_units()]
    texts = texts[:: max(1, len(texts) // units)][:units]
    best: dict[str, float] = {}
    vectors: dict[str, np.ndarray] = {}
    for tier in [*TIERS, *reversed(TIERS)]:  # taken in turn: a busy spell hits both ends
        start = time.perf_counter()
        vectors[tier] = indexes[tier].embedder.encode(texts)
        best[tier] = max(best.get(tier, 0.0), len(texts) / (time.perf_counter() - start))
    print(f"raw encode of {len(texts)} unit texts, best of 2 passes, same run:")
    for tier in TIERS:
        closeness = ""
        if tier != "full":
            overlap = neighbour_overlap(vectors["full"], vectors[tier])
            cosine = (f"mean cosine to full {(vectors['full'] * vectors[tier]).sum(1).mean():.4f}, "
                      if vectors[tier].shape == vectors["full"].shape else "")
            closeness = f"; {cosine}top-10 neighbour overlap with full {overlap:.2f}"
        print(f"  {tier:<6} {best[tier]:8.1f} units/s, {best[tier] / best['full']:5.2f}x full "
              f"(index pipeline {pipeline[tier] / pipeline['full']:5.2f}x){closeness}")
    for index in indexes.values():
        index.close()


def ray_scaling(repo: Path, scratch: Path) -> None:
    """units/s of a local build and of Ray builds with 1 and 2 workers, one run."""
    import logging

    import ray

    from codeseek.distributed import index_on_ray

    rates: dict[str, float] = {}
    local = open_index(repo, index_dir=scratch / "local", create=True)
    local.embedder.encode(["warm up"])  # the ONNX export exists before any clock starts
    start = time.perf_counter()
    summary = local.update()
    rates["local"] = summary.embedded / (time.perf_counter() - start)
    local.close()
    print(f"local build: {summary.units} units, {rates['local']:.1f} units/s")
    for workers in (1, 2):
        ray.init(num_cpus=workers, include_dashboard=False, log_to_driver=False,
                 logging_level=logging.ERROR)
        index = open_index(repo, index_dir=scratch / f"ray{workers}", create=True)
        index.embedder.encode(["warm up"])
        start = time.perf_counter()
        (summary,) = index_on_ray([index], workers=workers)
        rates[f"ray{workers}"] = summary.embedded / (time.perf_counter() - start)
        index.close()
        ray.shutdown()
        print(f"Ray, {workers} worker(s): {summary.units} units, "
              f"{rates[f'ray{workers}']:.1f} units/s")
    print(f"ratios: Ray 1 worker / local = {rates['ray1'] / rates['local']:.2f}, "
          f"Ray 2 workers / local = {rates['ray2'] / rates['local']:.2f}, "
          f"Ray 2 / Ray 1 workers = {rates['ray2'] / rates['ray1']:.2f}")
    same_index(repo, scratch / "local", scratch / "ray2")
    written, seconds = writer_alone(repo, scratch / "local", scratch / "writer")
    writer = written / seconds
    print(f"the one local writer alone: {written} units in {seconds:.2f} s, {writer:.0f} units/s "
          f"(= {writer / rates['ray1']:.0f} Ray workers at this machine's per-worker rate)")


def same_index(repo: Path, local_dir: Path, ray_dir: Path) -> None:
    """Whether the 2-worker Ray build equals the local one: units, vectors (numpy, the
    largest difference) and the top 10 of 50 docstring queries."""
    with open_index(repo, index_dir=local_dir) as local, \
            open_index(repo, index_dir=ray_dir) as on_ray:
        units = [(s.id, s.unit.uid, s.content_hash) for s in local.store.iter_units()]
        same_units = units == [(s.id, s.unit.uid, s.content_hash)
                               for s in on_ray.store.iter_units()]
        dim = local.embedder.dim
        labels, vectors = local.store.unit_vectors(local.embedder.model_id, dim)
        ray_labels, ray_vectors = on_ray.store.unit_vectors(on_ray.embedder.model_id, dim)
        same_labels = bool(np.array_equal(labels, ray_labels))
        largest = float(np.abs(vectors - ray_vectors).max()) if same_labels else float("nan")
        documented = [s.unit.doc_summary for s in local.store.iter_units() if s.unit.doc_summary]
        queries = documented[:: max(1, len(documented) // 50)][:50]
        same_top = sum([(h.path, h.qualname) for h in a] == [(h.path, h.qualname) for h in b]
                       for a, b in zip(local.search_many(queries, 10),
                                       on_ray.search_many(queries, 10), strict=True))
    print(f"Ray 2 workers vs local build: same units {same_units} ({len(units)}), same vector "
          f"rows {same_labels}, largest vector difference {largest:.2e}, same top 10 on "
          f"{same_top} of {len(queries)} docstring queries")


def writer_alone(repo: Path, built: Path, scratch: Path) -> tuple[int, float]:
    """Units and seconds of the local writer alone: a fresh index written from files
    parsed and vectors made beforehand (as the workers' results arrive in a Ray build:
    store the vectors, then files and units batch by batch, the HNSW index, saving)."""
    from codeseek.indexer import FileChange

    with open_index(repo, index_dir=built) as done:
        model = done.embedder.model_id
        digest_of = {s.id: s.content_hash for s in done.store.iter_units()}
        labels, matrix = done.store.unit_vectors(model, done.embedder.dim)
        stored = {digest_of[int(label)]: matrix[i] for i, label in enumerate(labels)}
    index = open_index(repo, index_dir=scratch, create=True)
    with index.writer_lock():
        updater = index.updater(None)
        plan = updater.begin()
        changes = []
        for source, digest, data in updater.read_files(plan.todo, plan.known, plan.scan):
            if data is None:
                continue
            try:
                parse = parse_source(source.path, data, source.spec)
            except SkipFile:
                continue
            updater.note_parsed(source, parse)
            vectors = {u.content_hash: stored[u.content_hash] for u in parse.units}
            changes.append(FileChange(source, digest, parse, vectors))
        start = time.perf_counter()
        summary = updater.finish(plan, iter(changes))
        index.finish_build(None)
        seconds = time.perf_counter() - start
    index.close()
    return summary.units, seconds


def timed(run: Callable[[], T]) -> tuple[T, float]:
    """What ``run`` returns, and its wall time in seconds."""
    start = time.perf_counter()
    result = run()
    return result, time.perf_counter() - start


QUESTIONS = PROJECT / "tests" / "data" / "questions" / "stdlib.jsonl"


def docstring_check(index: Index, asked: list[tuple[str, int]]) -> tuple[float, float]:
    """hit@10 and MRR@10 of documented units found by their own docstring summary
    (the unit that carries the docstring is the answer): the selection check."""
    answers = index.search_many([summary for summary, _ in asked], 10)
    ranks = [next((hit.rank for hit in hits if hit.unit_id == unit), None)
             for hits, (_, unit) in zip(answers, asked, strict=True)]
    return (sum(rank is not None for rank in ranks) / len(ranks),
            sum(1 / rank for rank in ranks if rank is not None) / len(ranks))


def refinement_figures(index: Index, label: str, asked: list[tuple[str, int]]) -> None:
    """At this point of a refinement, with each way of putting the two tiers on one
    scale (codeseek.refine.TIER_MAPS; the served one first): the docstring check, the
    standard-library questions' hit@10 and MRR@10, and the warm query p50."""
    searcher = index.searcher()
    maps = TIER_MAPS if isinstance(searcher, RefiningSearcher) else ("(one tier)",)
    for how in maps:
        if isinstance(searcher, RefiningSearcher):
            searcher.tier_map = how
        hit, mrr = docstring_check(index, asked)
        report = index.evaluate_questions(QUESTIONS)
        if isinstance(searcher, RefiningSearcher):
            searcher._queries.clear()  # time the full tier's query encoder too
        walls = [timed(functools.partial(index.search, summary, 10))[1] * 1000
                 for summary, _ in asked[:50]]
        questions = (f"questions hit@10 {report.metrics['hit@10']:.3f} MRR@10 "
                     f"{report.metrics['mrr@10']:.3f}" if report is not None else "no questions")
        print(f"  {label:<20} {how:<13} docstrings hit@10 {hit:.3f} MRR@10 {mrr:.3f}; "
              f"{questions}; warm p50 {statistics.median(walls):.1f} ms", flush=True)
    if isinstance(searcher, RefiningSearcher):
        searcher.tier_map = TIER_MAPS[0]


def refine_all(index: Index, asked: list[tuple[str, int]] | None, todo: int) -> float:
    """Refine to the end; with ``asked``, print the figures at 0/25/50/75/100% (their
    searches out of the clock). The refinement's own seconds."""
    refine = 0.0
    done = 0
    for share in (0, 25, 50, 75, 100) if asked is not None else (100,):
        limit = max(0, todo * share // 100 - done)  # 0: none embedded (the switch at 100%)
        step, seconds = timed(functools.partial(index.refine, limit=limit))
        done += step
        refine += seconds
        if asked is not None:
            refinement_figures(index, f"{share}% refined" + (" (switched)" if share == 100
                                                              else ""), asked)
    return refine


def refine_run(repo: Path, index_dir: Path, full_embedder: Embedder,
               asked: list[tuple[str, int]] | None) -> tuple[float, float]:
    """A fresh index built with --refine and refined to the end: (seconds to searchable,
    seconds of the refinement)."""
    index = open_index(repo, index_dir=index_dir, create=True, refine_embedder=full_embedder)
    load_tier_embedder(index.settings, "static").encode(["warm up"])  # distilled once
    _, first = timed(lambda: index.update(refine=True))
    todo = len(pending_units(index.store, full_embedder.model_id, 10**9))
    refine = refine_all(index, asked, todo)
    index.close()
    return first, refine


def scan_figures(dim: int) -> None:
    """The full tier's exact scan over refined rows (numpy, random unit rows) at the
    whole standard-library copy's size and at a large monorepo's."""
    generator = np.random.default_rng(0)
    for rows in (19_200, 200_000):
        matrix = generator.standard_normal((rows, dim)).astype(np.float32)
        matrix /= np.linalg.norm(matrix, axis=1, keepdims=True)
        labels = np.arange(rows, dtype=np.int64)
        queries = matrix[:50] + 0.1
        walls = [timed(functools.partial(exact_search, q, labels, matrix, 200))[1] * 1000
                 for q in queries]
        print(f"full-tier exact scan over {rows:,} refined rows ({dim} dimensions, top 200): "
              f"p50 {statistics.median(walls):.1f} ms")


# `codeseek watch` with the refiner never giving way to searches (the earlier behaviour)
NO_GIVING_WAY = ("import sys, codeseek.refine as r; r.MAX_YIELD_SECONDS = 0.0; "
                 "from codeseek.cli import main; sys.exit(main(sys.argv[1:]))")


def wait_until_watching(client: DaemonClient, process: subprocess.Popen[bytes]) -> None:
    """Until the daemon of ``process`` says it is watching (its first build done)."""
    while True:
        if process.poll() is not None:
            raise SystemExit(f"the daemon exited with status {process.returncode}")
        with contextlib.suppress(DaemonUnavailable, KeyError):
            if client.status()["daemon"]["state"] == "watching":
                return
        time.sleep(0.2)


def stop_daemon(client: DaemonClient, process: subprocess.Popen[bytes]) -> None:
    try:
        client.shutdown()
    except DaemonUnavailable:
        process.terminate()
    process.wait(timeout=120)


def daemon_during_refinement(repo: Path, index_dir: Path, queries: list[str],
                             seconds: float, give_way: bool = True) -> None:
    """`codeseek watch --refine` on a fresh index: time to searchable from its start, warm
    query p50 through the daemon while it refines, then (daemon stopped mid-refinement)
    the cold `codeseek search` median without a daemon. ``give_way=False``: the refiner
    does not wait for searches (codeseek.refine.QueryTraffic), for comparison."""
    codeseek = str(PROJECT / ".venv" / "bin" / "codeseek")
    launcher = [codeseek] if give_way else [sys.executable, "-c", NO_GIVING_WAY]
    command = [*launcher, "watch", str(repo), "--index-dir", str(index_dir), "--refine"]
    print(f"-- the refiner {'gives way to searches (served)' if give_way else 'never gives way'}")
    started = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    client = DaemonClient(index_dir)
    walls: list[float] = []
    refined: list[int] = []
    try:
        wait_until_watching(client, process)
        print(f"`codeseek watch --refine`: searchable {time.perf_counter() - started:.1f} s "
              "after its start", flush=True)
        client.search(queries[0], 10)  # the daemon's first query loads the full tier's encoder
        until = time.perf_counter() + seconds
        for query in queries * 10:
            if time.perf_counter() > until:
                break
            walls.append(timed(functools.partial(client.search, query, 10))[1] * 1000)
            state = client.status()["index"].get("refinement")
            if not state:
                break  # refined to the end: what follows is not during refinement
            refined.append(int(state["refined"]))
            time.sleep(0.1)
        total = client.status()["index"]["units"]
    finally:
        stop_daemon(client, process)
    print(f"warm query through the daemon during refinement ({min(refined, default=0)} to "
          f"{max(refined, default=0)} of {total} units refined): {len(walls)} queries, "
          f"p50 {percentile(walls, 0.5):.1f} ms, p95 {percentile(walls, 0.95):.1f} ms")
    cli = [codeseek, "search", "read a config file", "--repo", str(repo), "--index-dir",
           str(index_dir), "-k", "5"]
    colds = [timed(functools.partial(subprocess.run, cli, check=True, capture_output=True))[1]
             for _ in range(5)]
    print(f"cold `codeseek search` mid-refinement (new process, no daemon): median "
          f"{statistics.median(colds):.2f} s, best {min(colds):.2f} s")


def searchable_first(repo: Path, scratch: Path, queries: int) -> None:
    """--refine beside a full build, in one run: the full build; a refinement with the
    served batching (figures at 0/25/50/75/100%); one with 256-unit chunks (the earlier
    batching, for comparison); the exact scan at scale; the daemon during refinement."""
    full_index = open_index(repo, index_dir=scratch / "index-full", create=True)
    full_embedder = full_index.embedder
    full_embedder.encode(["warm up"])  # loaded (and exported once) outside the clock
    summary, full = timed(full_index.update)
    print(f"full build (full tier): {summary.units} units, {full:.1f} s", flush=True)
    documented = [(s.unit.doc_summary, s.id) for s in full_index.store.iter_units()
                  if s.unit.doc_summary]
    picked = documented[:: max(1, len(documented) // queries)][:queries]
    paths = {s.id: (s.unit.path, s.unit.qualname) for s in full_index.store.iter_units()}
    refinement_figures(full_index, "full build", picked)
    full_index.close()

    def asked_in(index_dir: Path) -> list[tuple[str, int]]:
        """The same docstring questions by the unit ids of another index."""
        with open_index(repo, index_dir=index_dir) as other:
            ids = {(s.unit.path, s.unit.qualname): s.id for s in other.store.iter_units()}
        return [(summary, ids[paths[unit]]) for summary, unit in picked]

    # the figures need the refining index's unit ids: build it, then map the questions
    index = open_index(repo, index_dir=scratch / "index-refine", create=True,
                       refine_embedder=full_embedder)
    load_tier_embedder(index.settings, "static").encode(["warm up"])  # distilled once
    _, first = timed(lambda: index.update(refine=True))
    hits = index.search("read a config file", 10)
    print(f"--refine, searchable (keyword + static tier): {first:.1f} s "
          f"({first / full:.2f}x the full build); first hit's tier: {hits[0].tier}", flush=True)
    asked = asked_in(scratch / "index-refine")
    todo = len(pending_units(index.store, full_embedder.model_id, 10**9))
    refine = refine_all(index, asked, todo)
    index.close()
    print(f"--refine, served batching ({refine_module.UNITS_PER_REFINE_CHUNK}-unit chunks "
          f"sorted by length, {refine_module.UNITS_PER_REFINE_BATCH}-unit commits): "
          f"refinement {refine:.1f} s; full quality after {first + refine:.1f} s "
          f"({(first + refine) / full:.2f}x the full build)", flush=True)
    served_chunk = refine_module.UNITS_PER_REFINE_CHUNK
    refine_module.UNITS_PER_REFINE_CHUNK = refine_module.UNITS_PER_REFINE_BATCH
    try:
        old_first, old_refine = refine_run(repo, scratch / "index-refine-256", full_embedder,
                                           None)
    finally:
        refine_module.UNITS_PER_REFINE_CHUNK = served_chunk
    print(f"--refine, 256-unit chunks (the earlier batching, for comparison): refinement "
          f"{old_refine:.1f} s; full quality after {old_first + old_refine:.1f} s "
          f"({(old_first + old_refine) / full:.2f}x the full build); served / earlier "
          f"refinement time {refine / old_refine:.2f}", flush=True)
    scan_figures(full_embedder.dim)
    for give_way in (False, True):
        daemon_during_refinement(repo, scratch / f"index-daemon-{give_way}",
                                 [q for q, _ in picked], 60.0, give_way)


def refine_daemon_only(repo: Path, scratch: Path, queries: int) -> None:
    """--refine-daemon: the daemon during refinement, not giving way then giving way, asked
    the docstring summaries of ``repo`` (read from a fake-embedder index of it)."""
    with open_index(repo, index_dir=scratch / "docs", create=True, backend="fake") as index:
        index.update()
        documented = [s.unit.doc_summary for s in index.store.iter_units()
                      if s.unit.doc_summary]
    picked = documented[:: max(1, len(documented) // queries)][:queries]
    for give_way in (False, True):
        daemon_during_refinement(repo, scratch / f"index-daemon-{give_way}", picked, 60.0,
                                 give_way)


def watch_first(repo: Path, scratch: Path, queries: int) -> None:
    """`codeseek watch` on a new index with no option (the size decides whether it is built
    searchable first): seconds from its start to searchable, whether it refines, warm
    query p50/p95 through the daemon right after; once with this machine's model cache,
    once with an empty one (the ONNX export and the static tier's distillation included),
    then with --no-refine (a full build, minutes) for the same queries on the full tier."""
    with open_index(repo, index_dir=scratch / "docs", create=True, backend="fake") as index:
        index.update()
        documented = [s.unit.doc_summary for s in index.store.iter_units()
                      if s.unit.doc_summary]
        units = index.store.counts()["units"]
    picked = documented[:: max(1, len(documented) // queries)][:queries]
    size = sum(source.size for source in scan_repository(load_settings(repo)).files)
    print(f"{units} units, {size / 1e6:.1f} MB of source", flush=True)
    codeseek = str(PROJECT / ".venv" / "bin" / "codeseek")
    runs = [("this machine's", ()), ("an empty", ()), ("this machine's", ("--no-refine",))]
    for cache, options in runs:
        index_dir = scratch / f"index-watch-{len(cache)}-{len(options)}"
        env = dict(os.environ)
        if cache == "an empty":
            env["CODESEEK_CACHE_DIR"] = str(scratch / "empty-cache")
        started = time.perf_counter()
        process = subprocess.Popen([codeseek, "watch", str(repo), "--index-dir", str(index_dir),
                                    *options],
                                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
        client = DaemonClient(index_dir)
        walls: list[float] = []
        try:
            wait_until_watching(client, process)
            searchable = time.perf_counter() - started
            state = client.status()["index"]
            client.search(picked[0], 10)  # the first query loads the full tier's encoder
            refined: list[int] = []
            for query in picked[:100]:
                walls.append(timed(functools.partial(client.search, query, 10))[1] * 1000)
                now = client.status()["index"].get("refinement")
                refined.append(int(now["refined"]) if now else 0)
                time.sleep(0.1)
        finally:
            stop_daemon(client, process)
        refining = state.get("refinement")
        print(f"`codeseek watch {' '.join(options)}` with {cache} model cache: searchable "
              f"{searchable:.1f} s after its start; tier {state['tier']}, "
              + (f"refining toward {refining['tier']} ({min(refined)} to {max(refined)} "
                 "units refined while asked)" if refining else "not refining")
              + f"; warm query through the daemon right after: {len(walls)} queries, p50 "
              f"{percentile(walls, 0.5):.1f} ms, p95 {percentile(walls, 0.95):.1f} ms",
              flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("path", nargs="?", help="repository to index (default: a stdlib copy)")
    parser.add_argument("--torch-sample", type=int, default=2000,
                        help="unit texts encoded by the torch reference (default 2000)")
    parser.add_argument("--queries", type=int, default=200)
    parser.add_argument("--corpora", action="store_true",
                        help="only parse throughput per language on the real test corpora")
    parser.add_argument("--repeat", type=int, default=5, help="passes for --corpora (best of)")
    parser.add_argument("--tiers", action="store_true",
                        help="compare the embedding tiers side by side (default repository: "
                             "the modules the standard-library questions answer from)")
    parser.add_argument("--tier-units", type=int, default=2000,
                        help="unit texts of the raw encode for --tiers (default 2000)")
    parser.add_argument("--ray", action="store_true",
                        help="only the local build beside Ray builds with 1 and 2 workers")
    parser.add_argument("--refine", action="store_true",
                        help="time to first searchable with --refine beside a full build "
                             "(default repository: as for --tiers)")
    parser.add_argument("--refine-daemon", action="store_true",
                        help="only `codeseek watch --refine` with and without the refiner "
                             "giving way to searches (default repository: as for --tiers)")
    parser.add_argument("--watch-first", action="store_true",
                        help="only `codeseek watch` on a new index with no option: seconds "
                             "to searchable, with this machine's model cache and an empty "
                             "one (default repository: a stdlib copy)")
    args = parser.parse_args()
    if args.corpora:
        corpus_throughput(args.repeat)
        return
    if args.tiers or args.refine or args.refine_daemon:
        with tempfile.TemporaryDirectory() as scratch:
            sys.path.insert(0, str(PROJECT / "tests"))
            from corpora import stdlib_question_subset

            repo = (Path(args.path).resolve() if args.path
                    else stdlib_question_subset(Path(scratch) / "stdlib-subset"))
            print(f"command: .venv/bin/python scripts/bench_index.py {' '.join(sys.argv[1:])}")
            print(f"repository: {repo}")
            if args.tiers:
                compare_tiers(repo, Path(scratch), args.tier_units)
            if args.refine:
                searchable_first(repo, Path(scratch), args.queries)
            elif args.refine_daemon:  # --refine ends with this part already
                refine_daemon_only(repo, Path(scratch), args.queries)
        return
    if args.watch_first:
        with tempfile.TemporaryDirectory() as scratch:
            repo = Path(args.path).resolve() if args.path else copy_stdlib(
                Path(scratch) / "stdlib")
            print(f"command: .venv/bin/python scripts/bench_index.py {' '.join(sys.argv[1:])}")
            print(f"repository: {repo}")
            watch_first(repo, Path(scratch), args.queries)
        return
    if args.ray:
        with tempfile.TemporaryDirectory() as scratch:
            repo = Path(args.path).resolve() if args.path else copy_stdlib(
                Path(scratch) / "stdlib")
            print(f"repository: {repo}")
            ray_scaling(repo, Path(scratch))
        return

    with tempfile.TemporaryDirectory() as scratch:
        repo = Path(args.path).resolve() if args.path else copy_stdlib(Path(scratch) / "stdlib")
        index_dir = Path(scratch) / "index"
        print(f"repository: {repo}")
        parse_throughput(repo)

        index = open_index(repo, index_dir=index_dir, create=True)
        embedder = index.embedder  # load (and export once) before the clock starts
        embedder.encode(["warm up"])
        start = time.perf_counter()
        summary = index.update()
        full = time.perf_counter() - start
        print(f"full index: {summary.files} files, {summary.units} units, "
              f"{summary.embedded} embedded, {full:.1f} s, "
              f"{summary.embedded / full:.1f} units/s")

        texts = [s.unit.embed_text() for s in index.store.iter_units()]
        start = time.perf_counter()
        embedder.encode(texts)
        raw = time.perf_counter() - start
        raw_rate = len(texts) / raw
        print(f"raw ONNX encode of the same {len(texts)} texts: {raw:.1f} s, "
              f"{raw_rate:.1f} units/s; pipeline / raw = {summary.embedded / full / raw_rate:.2f}")

        sample = texts[: args.torch_sample]
        torch_embedder = load_embedder(index.settings.with_changes(backend="torch"))
        torch_embedder.encode(["warm up"])
        start = time.perf_counter()
        torch_embedder.encode(sample)
        torch_rate = len(sample) / (time.perf_counter() - start)
        start = time.perf_counter()
        embedder.encode(sample)
        onnx_rate = len(sample) / (time.perf_counter() - start)
        print(f"on {len(sample)} texts, same run: torch {torch_rate:.1f} units/s, "
              f"ONNX {onnx_rate:.1f} units/s, ONNX / torch = {onnx_rate / torch_rate:.2f}")

        start = time.perf_counter()
        again = index.update()
        print(f"unchanged re-index: {time.perf_counter() - start:.2f} s, "
              f"{again.embedded} units embedded, {again.files_parsed} files parsed")

        start = time.perf_counter()
        with index.store.transaction():
            rewritten = index.store.rewrite_lexical()
        print(f"keyword entries rewritten (once, for an index made before they folded "
              f"members): {rewritten} units, {time.perf_counter() - start:.1f} s")

        docs = [s.unit.doc_summary for s in index.store.iter_units() if s.unit.doc_summary]
        queries = docs[:: max(1, len(docs) // args.queries)][: args.queries]
        index.search(queries[0], 10)
        warm_latency(index, queries)
        index.close()

        cli = [str(PROJECT / ".venv" / "bin" / "codeseek"), "search", "read a config file",
               "--repo", str(repo), "--index-dir", str(index_dir), "-k", "5"]
        walls = []
        for _ in range(3):
            start = time.perf_counter()
            subprocess.run(cli, check=True, capture_output=True)
            walls.append(time.perf_counter() - start)
        print(f"cold CLI search (new process, no daemon): best {min(walls):.2f} s, "
              f"median {statistics.median(walls):.2f} s")


if __name__ == "__main__":
    main()
