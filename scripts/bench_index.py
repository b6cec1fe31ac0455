"""Indexing and query benchmark: prints its figures; asserts nothing.

Usage: .venv/bin/python scripts/bench_index.py [PATH] [--torch-sample N] [--queries N]
       .venv/bin/python scripts/bench_index.py [PATH] --tiers [--tier-units N]
       .venv/bin/python scripts/bench_index.py --corpora [--repeat N]
       .venv/bin/python scripts/bench_index.py [PATH] --ray

With --ray it builds three fresh indexes of PATH in one run, with the packaged
model: a local build, then a build on a local Ray instance with 1 worker and
with 2 workers (``codeseek index --ray``), and prints units/s of each and the
ratios (the Ray figures include starting the actor pool, not starting Ray).

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

With --corpora it prints parse throughput only, per language, on the real
registry code the language tests use (tests/corpora.py; fetched and cached on
first use) and on this machine's standard library for Python: the raw
tree-sitter parse, and the whole extraction (parse, query, names, docs,
signatures) in MB/s and units/s, best of --repeat passes. No embedding.
"""

from __future__ import annotations

import argparse
import functools
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

import codeseek.search as search_module  # noqa: E402
from codeseek import open_index  # noqa: E402
from codeseek.api import Index  # noqa: E402
from codeseek.config import load_settings  # noqa: E402
from codeseek.embed import load_embedder  # noqa: E402
from codeseek.languages import LanguageSpec, spec_by_name  # noqa: E402
from codeseek.parse import _parser, parse_source  # noqa: E402
from codeseek.refine import pending_units  # noqa: E402
from codeseek.scan import SkipFile, read_source, scan_repository  # noqa: E402
from codeseek.tiers import TIERS, load_tier_embedder  # noqa: E402

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


def timed(run: Callable[[], T]) -> tuple[T, float]:
    """What ``run`` returns, and its wall time in seconds."""
    start = time.perf_counter()
    result = run()
    return result, time.perf_counter() - start


QUESTIONS = PROJECT / "tests" / "data" / "questions" / "stdlib.jsonl"


def refinement_figures(index: Index, label: str, queries: list[str]) -> None:
    """The standard-library questions' hit@10 and MRR@10 and the warm query p50 now."""
    report = index.evaluate_questions(QUESTIONS)
    walls = []
    for query in queries:
        _, wall = timed(functools.partial(index.search, query, 10))
        walls.append(wall * 1000)
    figures = (f"questions hit@10 {report.metrics['hit@10']:.3f}, MRR@10 "
               f"{report.metrics['mrr@10']:.3f}" if report is not None else "no questions")
    print(f"  {label:<22} {figures}; warm query p50 {statistics.median(walls):.1f} ms")


def searchable_first(repo: Path, scratch: Path, queries: int) -> None:
    """Time to first searchable with ``--refine`` (keyword + static tier) beside a full
    build, the refinement's own time, and the question figures as it goes, in one run."""
    full_index = open_index(repo, index_dir=scratch / "index-full", create=True)
    full_index.embedder.encode(["warm up"])  # loaded (and exported once) outside the clock
    summary, full = timed(full_index.update)
    print(f"full build (full tier): {summary.units} units, {full:.1f} s")
    docs = [s.unit.doc_summary for s in full_index.store.iter_units() if s.unit.doc_summary]
    asked = docs[:: max(1, len(docs) // queries)][:queries]
    refinement_figures(full_index, "full build", asked)
    index = open_index(repo, index_dir=scratch / "index-refine", create=True,
                       refine_embedder=full_index.embedder)
    load_tier_embedder(index.settings, "static").encode(["warm up"])  # distilled once
    _, first = timed(lambda: index.update(refine=True))
    hits = index.search("read a config file", 10)
    print(f"--refine, searchable (keyword + static tier): {first:.1f} s "
          f"({first / full:.2f}x the full build); first hit's tier: {hits[0].tier}")
    todo = len(pending_units(index.store, full_index.embedder.model_id, 10**9))
    refine = 0.0
    done = 0
    for share in (0, 25, 50, 75, 100):
        limit = max(0, todo * share // 100 - done)  # 0: none embedded (the switch at 100%)
        step, seconds = timed(functools.partial(index.refine, limit=limit))
        done += step
        refine += seconds
        refinement_figures(index, f"{share}% refined" + (" (switched)" if share == 100
                                                          else ""), asked)
    print(f"--refine, refinement to the full tier: {done} units, {refine:.1f} s (with the "
          f"figures' searches out of the clock); full quality after {first + refine:.1f} s "
          f"({(first + refine) / full:.2f}x the full build)")
    full_index.close()
    index.close()


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
    args = parser.parse_args()
    if args.corpora:
        corpus_throughput(args.repeat)
        return
    if args.tiers or args.refine:
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
