"""Keystroke-to-results latency of the terminal UI: prints its figures; asserts nothing.

Usage: .venv/bin/python scripts/bench_tui.py [--work DIR] [--queries N] [--gap SECONDS]

It indexes a copy of sample_repo/ and a copy of this machine's Python standard
library (test folders left out) with the configured model (the default
backend unless CODESEEK_BACKEND says otherwise), then drives the running app
headless with a Pilot, as a user would:

  * typing: each query typed one key at a time, a pause of --gap seconds between
    keys (longer than the debounce, as a person types); for every key, the time
    from the key press to the hits for the text so far being on screen;
  * pasting: the whole query put in the query line at once (as a paste); the
    time until its hits are on screen.

A change after a quiet spell is searched at once; only keys that follow each
other faster than the debounce wait for it, so neither figure includes it.

With --work DIR the copies and their indexes are kept there and reused.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import shutil
import statistics
import sys
import sysconfig
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

PROJECT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(PROJECT))

from codeseek import open_index  # noqa: E402
from codeseek.api import Index  # noqa: E402
from codeseek.tui.app import DEBOUNCE_SECONDS, CodeseekApp, Shown  # noqa: E402
from codeseek.tui.widgets import QueryLine  # noqa: E402

SKIP = shutil.ignore_patterns("test", "tests", "idle_test", "site-packages", "__pycache__")
STDLIB_QUERIES = [
    "read a zip archive and list its members",
    "parse a date string into a datetime",
    "send an email message over smtp",
    "escape special characters for html",
    "compute the checksum of a file",
    "walk a directory tree recursively",
    "split a shell command line into words",
    "wait for a child process to finish with a timeout",
    "decode base64 encoded bytes",
    "retry when a network connection is refused",
    "compare two sequences and show the differences",
    "guess the mime type of a file name",
]
WAIT_SECONDS = 60.0


def percentile(values: list[float], share: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(share * (len(ordered) - 1))))]


def sample_queries(limit: int) -> list[str]:
    records = json.loads((PROJECT / "tests" / "data" / "sample_queries.json").read_text())
    return [record["query"] for record in records][:limit]


@contextmanager
def workdir(path: str | None) -> Iterator[Path]:
    if path:
        folder = Path(path).resolve()
        folder.mkdir(parents=True, exist_ok=True)
        yield folder
        return
    with tempfile.TemporaryDirectory() as scratch:
        yield Path(scratch)


def prepared(name: str, source: Path, work: Path, ignore: Any = None) -> Index:
    """A copy of ``source`` under ``work`` and its index, built or brought up to date."""
    repo = work / name
    if not repo.exists():
        shutil.copytree(source, repo, ignore=ignore, symlinks=True)
    index = open_index(repo, index_dir=work / f"{name}-index", create=True)
    index.embedder.encode(["warm up"])  # load (and export once) before the clock starts
    start = time.perf_counter()
    summary = index.update()
    print(f"{name}: {summary.files} files, {summary.units} units "
          f"(index brought up to date in {time.perf_counter() - start:.1f} s, "
          f"{summary.embedded} embedded)")
    return index


async def wait_answered(app: CodeseekApp) -> Shown:
    """Until the hits for the query line's current text are on screen."""
    deadline = time.monotonic() + WAIT_SECONDS
    while app.shown is None or app.shown.serial != app._serial:
        if time.monotonic() > deadline:
            raise TimeoutError("the app did not answer")
        await asyncio.sleep(0.001)
    return app.shown


async def drive(app: CodeseekApp, queries: list[str], gap: float) -> dict[str, list[float]]:
    typed: list[float] = []
    pasted: list[float] = []
    async with app.run_test(size=(120, 40)) as pilot:
        while app.index_status is None:  # warmed up: model and vectors loaded
            await asyncio.sleep(0.05)
        line = app.query_one(QueryLine)
        for query in queries:
            line.value = ""
            await pilot.pause(gap)
            for character in query:
                started = time.perf_counter()
                await pilot.press(character)
                if line.value.strip():
                    typed.append((await wait_answered(app)).at - started)
                await asyncio.sleep(gap)
            line.value = ""
            await pilot.pause(gap)
            started = time.perf_counter()
            line.value = query
            pasted.append((await wait_answered(app)).at - started)
    return {"typing": typed, "pasting": pasted}


def report(name: str, figures: dict[str, list[float]]) -> None:
    for kind, values in figures.items():
        millis = [v * 1000 for v in values]
        print(f"{name} {kind:<8} keystroke-to-results: p50 {statistics.median(millis):6.1f} ms, "
              f"p95 {percentile(millis, 0.95):6.1f} ms, max {max(millis):6.1f} ms "
              f"({len(millis)} samples)")


def direct_search(index: Index, queries: list[str]) -> None:
    times = []
    for query in queries:
        start = time.perf_counter()
        index.search(query, 30)
        times.append((time.perf_counter() - start) * 1000)
    print(f"  (the library alone, same queries: p50 {statistics.median(times):.1f} ms, "
          f"p95 {percentile(times, 0.95):.1f} ms)")


def bench(name: str, index: Index, queries: list[str], gap: float) -> None:
    app = CodeseekApp(index, repo=index.settings.repo, env={})
    figures = asyncio.run(drive(app, queries, gap))
    report(name, figures)
    direct_search(index, queries)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", help="keep the copies and indexes here (default: a temp folder)")
    parser.add_argument("--queries", type=int, default=8, help="queries per repository")
    parser.add_argument("--gap", type=float, default=0.12,
                        help="seconds between typed keys (default 0.12)")
    args = parser.parse_args()
    print(f"debounce {DEBOUNCE_SECONDS * 1000:.0f} ms; {args.gap * 1000:.0f} ms between keys")
    with workdir(args.work) as work:
        sample = prepared("sample_repo", PROJECT / "sample_repo", work)
        bench("sample_repo", sample, sample_queries(args.queries), args.gap)
        sample.close()
        stdlib = prepared("stdlib", Path(sysconfig.get_paths()["stdlib"]), work, SKIP)
        bench("stdlib", stdlib, STDLIB_QUERIES[: args.queries], args.gap)
        stdlib.close()


if __name__ == "__main__":
    main()
