"""Daemon benchmark: save-to-searchable latency, socket query latency, memory.

Usage: .venv/bin/python scripts/bench_watch.py [PATH] [--edits N] [--queries N] [--backend B]

Without PATH it uses a copy of this machine's Python standard library (test
folders left out). It starts `codeseek watch` as a real process, waits for the
initial index, then prints, from one run:
  * save-to-searchable: the time from writing a new function into a file to a
    search through the daemon returning it first, p50/p95 over N edits;
  * query latency through the socket, p50/p95 (client library in this process,
    no process start), and through the `codeseek search` CLI (process start
    included);
  * the daemon's resident memory (RSS).
It asserts nothing.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

PROJECT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(PROJECT))

from codeseek.client import DaemonClient, DaemonUnavailable  # noqa: E402
from codeseek.config import load_settings  # noqa: E402
from codeseek.scan import scan_repository  # noqa: E402

sys.path.insert(0, str(PROJECT / "scripts"))
from bench_index import copy_stdlib, percentile  # noqa: E402

WORDS = ("amber", "cobalt", "violet", "saffron", "teal", "crimson", "ivory", "jade")
NOUNS = ("lanterns", "kites", "bells", "gears", "comets", "harbours", "ledgers", "anchors")


def wait_ready(client: DaemonClient, process: subprocess.Popen[bytes], timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise SystemExit(f"the daemon exited with status {process.returncode}")
        try:
            if client.status()["daemon"]["state"] == "watching":
                return
        except (DaemonUnavailable, KeyError):
            pass
        time.sleep(0.5)
    raise SystemExit("the daemon did not become ready in time")


def rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def save_to_searchable(repo: Path, client: DaemonClient, edits: int) -> list[float]:
    indexed = scan_repository(load_settings(repo)).files  # edit only files that are indexed
    targets = sorted(f.abs_path for f in indexed
                     if f.path.endswith(".py") and f.size < 20_000)[:edits]
    latencies = []
    for number, target in enumerate(targets):
        name = f"{WORDS[number % 8]}_{NOUNS[(number // 8) % 8]}_{number}"
        phrase = f"count the {WORDS[number % 8]} {NOUNS[(number // 8) % 8]} number {number}"
        code = (f'\n\ndef {name}(items):\n    """{phrase.capitalize()}."""\n'
                "    return len(items)\n")
        start = time.perf_counter()
        with target.open("a", encoding="utf-8") as handle:
            handle.write(code)
        while True:
            hits = client.search(phrase, 1)
            if hits and hits[0].name == name:
                break
            if time.perf_counter() - start > 30:
                raise SystemExit(f"edit {number} never became searchable")
            time.sleep(0.01)
        latencies.append(time.perf_counter() - start)
    return latencies


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("path", nargs="?")
    parser.add_argument("--edits", type=int, default=50)
    parser.add_argument("--queries", type=int, default=200)
    parser.add_argument("--backend", default=None, help="onnx (default), torch or fake")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as scratch:
        repo = Path(scratch) / "repo"
        if args.path:
            shutil.copytree(args.path, repo, symlinks=True)
        else:
            copy_stdlib(repo)
        command = [str(PROJECT / ".venv" / "bin" / "codeseek"), "watch", str(repo)]
        if args.backend:
            command += ["--backend", args.backend]
        started = time.perf_counter()
        process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        client = DaemonClient(repo / ".codeseek")
        try:
            wait_ready(client, process, timeout=1800)
            status = client.status()
            print(f"repository: {repo} ({status['index']['units']} units); initial index "
                  f"{time.perf_counter() - started:.1f} s; watcher {status['daemon']['watcher']}")
            latencies = save_to_searchable(repo, client, args.edits)
            print(f"save-to-searchable over {len(latencies)} edits: "
                  f"p50 {percentile(latencies, 0.5):.3f} s, "
                  f"p95 {percentile(latencies, 0.95):.3f} s")
            queries = [f"read the {w} {n} from a file" for w in WORDS for n in NOUNS]
            queries = (queries * (args.queries // len(queries) + 1))[: args.queries]
            socket_ms = []
            for query in queries:
                start = time.perf_counter()
                client.search(query, 10)
                socket_ms.append((time.perf_counter() - start) * 1000)
            print(f"socket query latency over {len(socket_ms)} queries: "
                  f"p50 {percentile(socket_ms, 0.5):.1f} ms, "
                  f"p95 {percentile(socket_ms, 0.95):.1f} ms")
            cli = [str(PROJECT / ".venv" / "bin" / "codeseek"), "search", "parse a date string",
                   "--repo", str(repo), "-k", "5"]
            walls = []
            for _ in range(10):
                start = time.perf_counter()
                subprocess.run(cli, check=True, capture_output=True)
                walls.append(time.perf_counter() - start)
            print(f"`codeseek search` through the daemon, process start included: "
                  f"p50 {percentile(walls, 0.5):.3f} s, p95 {percentile(walls, 0.95):.3f} s")
            print(f"daemon memory (RSS): {rss_mb(process.pid):.0f} MB")
        finally:
            try:
                client.shutdown()
            except DaemonUnavailable:
                process.terminate()
            process.wait(timeout=60)


if __name__ == "__main__":
    main()
