"""MCP server benchmark: `tools/call search` round trips, and start to first answer.

Usage: .venv/bin/python scripts/bench_mcp.py [PATH] [--queries N] [--backend B]

Without PATH it uses a copy of sample_repo. It speaks newline-delimited JSON-RPC
to `codeseek mcp` as a real process, as an MCP client does, and prints:
  * the round trip of `tools/call search` through a running `codeseek watch`
    (started here, as a real process), p50/p95 over N queries;
  * without a daemon: the time from starting `codeseek mcp` to its answer to
    `initialize`, and to its first `search` answer (the index opened and the
    model loaded in that process).
It asserts nothing.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

PROJECT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(PROJECT))

sys.path.insert(0, str(PROJECT / "scripts"))
from bench_index import percentile  # noqa: E402
from bench_watch import wait_ready  # noqa: E402

from codeseek.client import DaemonClient  # noqa: E402
from codeseek.config import load_settings  # noqa: E402

QUERIES = ("open a maintenance ticket", "refund a fare", "rate limit a client",
           "decode a dock status packet", "load the settings file", "assign a mechanic",
           "charge the rider for a trip", "close the ticket with a resolution")


class Server:
    """`codeseek mcp` as a child process, spoken to over its stdin and stdout."""

    def __init__(self, repo: Path, env: dict[str, str], extra: list[str]) -> None:
        self.started = time.perf_counter()
        self.process = subprocess.Popen(
            [sys.executable, "-m", "codeseek", "mcp", "--repo", str(repo), *extra],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, env=env)
        self.next_id = 0

    def send(self, method: str, params: dict[str, Any], notify: bool = False) -> Any:
        assert self.process.stdin is not None and self.process.stdout is not None
        message: dict[str, Any] = {"jsonrpc": "2.0", "method": method, "params": params}
        if not notify:
            self.next_id += 1
            message["id"] = self.next_id
        self.process.stdin.write(json.dumps(message).encode() + b"\n")
        self.process.stdin.flush()
        while not notify:
            line = self.process.stdout.readline()
            if not line:
                raise SystemExit("codeseek mcp closed its output")
            answer = json.loads(line)
            if answer.get("id") == self.next_id:
                if "error" in answer or answer["result"].get("isError"):
                    raise SystemExit(f"codeseek mcp answered an error: {answer}")
                return answer["result"]
        return None

    def initialize(self) -> None:
        self.send("initialize", {"protocolVersion": "2025-06-18", "capabilities": {},
                                 "clientInfo": {"name": "bench_mcp", "version": "1"}})
        self.send("notifications/initialized", {}, notify=True)

    def search(self, query: str) -> Any:
        return self.send("tools/call", {"name": "search",
                                        "arguments": {"query": query, "k": 10}})

    def close(self) -> None:
        assert self.process.stdin is not None
        self.process.stdin.close()
        self.process.wait(timeout=60)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("path", nargs="?", help="repository (default: a copy of sample_repo)")
    parser.add_argument("--queries", type=int, default=200)
    parser.add_argument("--backend", default="onnx", choices=("onnx", "torch", "fake"))
    args = parser.parse_args()
    env = {**os.environ, "PYTHONPATH": str(PROJECT), "CODESEEK_BACKEND": args.backend}
    with tempfile.TemporaryDirectory() as scratch:
        repo = Path(args.path) if args.path else Path(scratch) / "repo"
        if not args.path:
            shutil.copytree(PROJECT / "sample_repo", repo, symlinks=True)
        index_dir = load_settings(repo).index_dir
        subprocess.run([sys.executable, "-m", "codeseek", "index", str(repo), "-q"],
                       env=env, check=True, stdout=subprocess.DEVNULL)

        daemon = subprocess.Popen([sys.executable, "-m", "codeseek", "watch", str(repo)],
                                  env=env, stdout=subprocess.DEVNULL,
                                  stderr=subprocess.DEVNULL)
        try:
            wait_ready(DaemonClient(index_dir), daemon, timeout=300)
            server = Server(repo, env, [])
            server.initialize()
            server.search(QUERIES[0])  # warm: the daemon's model, the server's first call
            times = []
            for number in range(args.queries):
                start = time.perf_counter()
                server.search(QUERIES[number % len(QUERIES)])
                times.append((time.perf_counter() - start) * 1000)
            server.close()
        finally:
            daemon.terminate()
            daemon.wait(timeout=60)
        print(f"tools/call search through the daemon ({args.backend}, {args.queries} calls): "
              f"p50 {percentile(times, 0.5):.1f} ms, p95 {percentile(times, 0.95):.1f} ms")

        server = Server(repo, env, ["--backend", args.backend])
        server.initialize()
        initialized = time.perf_counter() - server.started
        server.search(QUERIES[0])
        first_search = time.perf_counter() - server.started
        server.close()
        print(f"without a daemon ({args.backend}): start to initialize answer "
              f"{initialized:.2f} s, to first search answer {first_search:.2f} s")


if __name__ == "__main__":
    main()
