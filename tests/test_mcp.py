"""``codeseek mcp``: the Model Context Protocol server, through the SDK's own client, over
raw JSON-RPC on stdio, against bad input, and with a running daemon."""

from __future__ import annotations

import ast
import errno
import json
import os
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

mcp = pytest.importorskip("mcp", reason="the mcp extra is not installed: "
                                        "pip install -e '.[mcp]' (scripts/setup.sh does)")

import anyio  # noqa: E402  (installed with mcp)
from test_daemon import wait_for  # noqa: E402

from codeseek import FakeEmbedder, open_index  # noqa: E402
from codeseek.client import DaemonClient, DaemonUnavailable  # noqa: E402
from codeseek.mcp_server import (  # noqa: E402
    MAX_K,
    SNIPPET_CHARS,
    SNIPPET_LINES,
    Tools,
    build_server,
    cap_snippet,
    open_repositories,
)

MAINTENANCE = "python/kestrune/maintenance.py"
RATELIMIT = "python/kestrune/ratelimit.py"


@pytest.fixture
def indexed(sample_copy: Path) -> Path:
    """A sample_repo copy indexed with the fake embedder."""
    index = open_index(sample_copy, create=True, embedder=FakeEmbedder())
    index.update()
    index.close()
    return sample_copy


def ast_lines(path: Path) -> dict[str, int]:
    """qualname -> line of the def or class, by Python's own parser (the reference)."""
    found: dict[str, int] = {}

    def visit(node: ast.AST, prefix: str) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.FunctionDef | ast.AsyncFunctionDef | ast.ClassDef):
                name = prefix + child.name
                found[name] = child.lineno  # the def or class line, below any decorator
                visit(child, name + "." if isinstance(child, ast.ClassDef) else name + ".")

    visit(ast.parse(path.read_text(encoding="utf-8")), "")
    return found


def call_all(repos: list[Path], calls: list[tuple[str, dict[str, Any]]],
             backend: str | None = "fake") -> tuple[list[Any], list[Any]]:
    """List the tools and make the calls with the SDK's in-process client."""
    tools = Tools(open_repositories(repos, backend=backend))
    results: list[Any] = []
    listed: list[Any] = []

    async def main() -> None:
        async with mcp.Client(build_server(tools)) as client:
            listed.extend((await client.list_tools()).tools)
            for name, arguments in calls:
                results.append(await client.call_tool(name, arguments))

    try:
        anyio.run(main)
    finally:
        tools.close()
    return listed, results


def places(result: Any) -> list[str]:
    return [f"{h['path']}:{h['start_line']} {h['qualname']}"
            for h in result.structured_content["results"]]


# -- the tools through the SDK's client -------------------------------------------------------


def test_the_tools_are_listed_with_their_schemas(indexed: Path) -> None:
    listed, _ = call_all([indexed], [])
    by_name = {tool.name: tool for tool in listed}
    assert sorted(by_name) == ["neighbours", "outline", "search", "status"]
    for tool in listed:
        assert tool.description and "\n" not in tool.description
        assert tool.input_schema["type"] == "object"
        assert tool.input_schema["additionalProperties"] is False
    assert by_name["search"].input_schema["required"] == ["query"]
    assert by_name["search"].input_schema["properties"]["k"]["maximum"] == MAX_K
    assert by_name["outline"].input_schema["required"] == ["path"]


def test_search_finds_a_known_unit_at_its_line(indexed: Path) -> None:
    query = "open ticket fault report"
    _, (result,) = call_all([indexed], [("search", {"query": query, "k": 3})])
    assert not result.is_error
    line = ast_lines(indexed / MAINTENANCE)["TicketDesk.open_ticket"]
    assert places(result)[0] == f"{MAINTENANCE}:{line} TicketDesk.open_ticket"
    first = result.structured_content["results"][0]
    # the JSON Lines fields of `codeseek search --json`, and the cap's flag
    for key in ("query", "rank", "score", "similarity", "path", "start_line", "end_line",
                "language", "kind", "name", "qualname", "signature", "doc_summary",
                "snippet", "snippet_truncated"):
        assert key in first
    text_lines = result.content[0].text.splitlines()
    assert len(text_lines) == 3
    assert text_lines[0].startswith(
        f"{MAINTENANCE}:{line}-{first['end_line']} method TicketDesk.open_ticket (")
    assert text_lines[0].endswith(f") - {first['doc_summary']}")


def test_search_filters_reach_the_index(indexed: Path) -> None:
    _, (result,) = call_all([indexed], [("search", {
        "query": "parse a packet", "k": 5, "languages": ["Go"], "kinds": ["struct"],
        "paths": ["go/"]})])
    assert not result.is_error, result.content[0].text
    hits = result.structured_content["results"]
    assert hits and all(h["language"] == "go" and h["kind"] == "class"
                        and h["path"].startswith("go/") for h in hits)


def test_neighbours_by_name_and_by_line_agree_with_the_library(indexed: Path) -> None:
    line = ast_lines(indexed / MAINTENANCE)["triage_priority"]
    _, (by_name, by_line) = call_all([indexed], [
        ("neighbours", {"path": MAINTENANCE, "qualname": "triage_priority", "k": 4}),
        ("neighbours", {"path": MAINTENANCE, "line": line + 2, "k": 4})])
    assert not by_name.is_error and not by_line.is_error
    index = open_index(indexed, embedder=FakeEmbedder())
    try:
        expected = [f"{h.path}:{h.start_line} {h.qualname}" for h in
                    index.neighbours(index.unit_at(MAINTENANCE, "triage_priority"), 4)]
    finally:
        index.close()
    assert places(by_name) == places(by_line) == expected
    assert len(expected) == 4 and f"{MAINTENANCE}:{line} triage_priority" not in expected


def test_outline_lists_a_files_units_at_their_lines(indexed: Path) -> None:
    _, (result,) = call_all([indexed], [("outline", {"path": RATELIMIT})])
    assert not result.is_error
    units = {u["qualname"]: u["start_line"] for u in result.structured_content["units"]}
    reference = ast_lines(indexed / RATELIMIT)
    assert units == reference
    assert result.content[0].text.splitlines()[0].startswith(
        f"{RATELIMIT}:{reference['RateLimitExceeded']}-")


def test_status_says_what_is_indexed(indexed: Path) -> None:
    _, (result,) = call_all([indexed], [("status", {})])
    assert not result.is_error
    (record,) = result.structured_content["repositories"]
    index = open_index(indexed)
    try:
        status = index.status()
    finally:
        index.close()
    assert (record["files"], record["units"]) == (status.files, status.units)
    assert record["daemon"] is None
    assert f"{status.files} files, {status.units} units" in result.content[0].text


def test_snippets_are_capped(indexed: Path) -> None:
    long_line = "    note = '" + "spoke " * 250 + "'\n"  # 1,500 characters on one line
    (indexed / "python" / "kestrune" / "spokes.py").write_text(
        'def count_spare_spokes(depot):\n    """Count the spare spokes kept at a depot."""\n'
        + long_line + "".join(f"    x{i} = {i}\n" for i in range(40)), encoding="utf-8")
    index = open_index(indexed, embedder=FakeEmbedder())
    index.update()
    index.close()
    _, (result,) = call_all([indexed], [("search", {"query": "count the spare spokes",
                                                    "k": 1, "paths": ["spokes.py"]})])
    (hit,) = result.structured_content["results"]
    assert hit["qualname"] == "count_spare_spokes"
    assert len(hit["snippet"]) == SNIPPET_CHARS and hit["snippet_truncated"] is True
    assert hit["snippet"].startswith("def count_spare_spokes(depot):")


def test_cap_snippet_keeps_whole_lines_up_to_the_cap() -> None:
    code = "\n".join(f"line {i}" for i in range(30))
    capped, cut = cap_snippet(code)
    assert capped.splitlines() == [f"line {i}" for i in range(SNIPPET_LINES)] and cut
    assert cap_snippet("a\nb\n") == ("a\nb", False)


def test_several_repositories_are_named_by_repo(indexed: Path, tmp_path: Path) -> None:
    other = tmp_path / "other"
    (other / "src").mkdir(parents=True)
    (other / "src" / "bells.py").write_text(
        'def ring_bells(count):\n    """Ring the depot bells."""\n    return count\n',
        encoding="utf-8")
    index = open_index(other, create=True, embedder=FakeEmbedder())
    index.update()
    index.close()
    _, (unnamed, named, status, everywhere) = call_all([indexed, other], [
        ("neighbours", {"path": "src/bells.py", "qualname": "ring_bells"}),
        ("search", {"query": "ring the bells", "repo": str(other)}),
        ("status", {}),
        ("search", {"query": "ring the bells", "k": 20})])
    assert unnamed.is_error
    assert unnamed.content[0].text.startswith(
        "error: several repositories are served; name one with repo: ")
    # a search naming no repository asks them all; each hit names its repository
    records = everywhere.structured_content["results"]
    assert {r["repo"] for r in records} == {str(indexed.resolve()), str(other.resolve())}
    assert everywhere.structured_content["repos"] == [str(indexed.resolve()),
                                                      str(other.resolve())]
    assert [r["rank"] for r in records] == list(range(1, 21))
    lines = everywhere.content[0].text.splitlines()
    for line, record in zip(lines, records, strict=True):
        assert line.startswith(f"[{record['repo']}] {record['path']}:{record['start_line']}-")
        assert (Path(record["repo"]) / record["path"]).is_file()
    assert records[0]["qualname"] == "ring_bells"
    assert places(named)[0] == "src/bells.py:1 ring_bells"
    assert named.structured_content["repo"] == str(other.resolve())
    assert [r["repo"] for r in status.structured_content["repositories"]] == [
        str(indexed.resolve()), str(other.resolve())]


# -- bad input: an error result with the command line's message; the server answers on --------


def bad_calls(repo: Path, outside: Path) -> list[tuple[str, dict[str, Any], str]]:
    return [
        ("search", {}, "error: search needs a query: what the code does, in plain words"),
        # the same words as `codeseek search ""`
        ("search", {"query": "  "}, "error: the query is empty; type what you are looking for"),
        # the same words as `codeseek search` given bytes that are not UTF-8
        ("search", {"query": "fare\udcff"},
         "error: the query is not valid UTF-8 text: fare"),
        ("search", {"query": "x", "k": 0}, "error: k must be a whole number from 1 to 50, not 0"),
        ("search", {"query": "x", "k": 51},
         "error: k must be a whole number from 1 to 50, not 51"),
        ("search", {"query": "x", "k": "5"},
         "error: k must be a whole number from 1 to 50, not '5'"),
        ("search", {"query": "x", "languages": ["cobol"]}, "error: unknown language 'cobol'"),
        ("search", {"query": "x", "top": 3},
         "error: search takes no argument 'top'; its arguments are query, k, languages, "
         "paths, kinds, repo"),
        # the same words as `codeseek search --neighbours` for a path outside the repository
        ("outline", {"path": "../../etc/passwd"},
         f"error: ../../etc/passwd: outside the repository {repo}"),
        ("outline", {"path": str(outside)}, f"error: {outside}: outside the repository {repo}"),
        ("outline", {"path": "python/escape.py"},
         f"error: python/escape.py: outside the repository {repo}"),
        ("neighbours", {"path": "../secret.py", "line": 1},
         f"error: ../secret.py: outside the repository {repo}"),
        ("neighbours", {"path": MAINTENANCE, "qualname": "no_such_unit"},
         f"error: {MAINTENANCE}: no unit named 'no_such_unit'"),
        ("neighbours", {"path": MAINTENANCE},
         "error: name the unit by qualname or by line, one of them"),
        ("outline", {"path": "python/nothing.py"}, "error: python/nothing.py: no such file"),
        ("outline", {"path": "python"}, "error: python: a folder, not a file"),
        ("outline", {"path": "README.md"}, "error: README.md: left out: no supported language"),
        ("outline", {"path": "."}, "error: .: the repository itself, not a file"),
        # the operating system's own words for the error (reference: os.strerror)
        ("outline", {"path": "a" * 5000},
         f"error: {'a' * 5000}: cannot read: {os.strerror(errno.ENAMETOOLONG)}"),
        ("outline", {"path": "x/" * 3000 + "y.py"}, "error: x/x/x/"),
        ("nosuch", {}, "error: no tool named 'nosuch'; the tools are search, neighbours, "
                       "outline, status"),
    ]


def test_bad_arguments_are_error_results_and_the_server_answers_on(indexed: Path,
                                                                  tmp_path: Path) -> None:
    outside = tmp_path / "secret.py"
    outside.write_text("def leak():\n    return 'outside'\n", encoding="utf-8")
    (indexed / "python" / "escape.py").symlink_to(outside)  # a link out of the repository
    repo = indexed.resolve()
    cases = bad_calls(repo, outside)
    calls: list[tuple[str, dict[str, Any]]] = []
    for name, arguments, _ in cases:
        calls += [(name, arguments), ("outline", {"path": RATELIMIT})]
    _, results = call_all([indexed], calls)
    for (name, arguments, message), bad, good in zip(cases, results[::2], results[1::2],
                                                     strict=True):
        assert bad.is_error, (name, arguments)
        text = bad.content[0].text
        assert text.startswith(message), (text, message)
        assert "\n" not in text and "outside'" not in text
        assert not good.is_error and good.structured_content["units"]


@pytest.mark.parametrize(("rel", "content", "reason"), [
    ("python/kestrune/credentials.py", "TOKEN = 'x'\n", "may hold secrets"),
    ("vendor/wheel.py", "def spin():\n    pass\n", "vendored dependencies"),
    ("python/kestrune/fares_pb2.py", "def build():\n    pass\n", "generated or minified"),
    ("python/kestrune/made.py", "# Code generated by a tool. DO NOT EDIT.\ndef a():\n    pass\n",
     "generated or minified"),
    ("node_modules/pump/index.js", "function pump() {}\n", "vendored dependencies"),
    (".git/hooks/x.py", "def hook():\n    pass\n", "version-control folder"),
    ("build/stale_copy.py", None, "ignored by .gitignore or exclude rules"),
])
def test_outline_refuses_what_the_index_leaves_out(indexed: Path, rel: str,
                                                  content: str | None, reason: str) -> None:
    if content is not None:
        (indexed / rel).parent.mkdir(parents=True, exist_ok=True)
        (indexed / rel).write_text(content, encoding="utf-8")
    index = open_index(indexed, embedder=FakeEmbedder())
    try:
        index.update()
        # the index's own verdict on the file is the reference for the reason
        left_out = dict(index.skipped_files())
        folder = rel.split("/", 1)[0] + "/"
        assert left_out.get(rel, left_out.get(folder)) == reason or rel.startswith(".git/")
        assert not index.has_file(rel)
    finally:
        index.close()
    _, (result,) = call_all([indexed], [("outline", {"path": rel})])
    assert result.is_error
    assert result.content[0].text == f"error: {rel}: left out: {reason}"


def test_outline_refuses_a_linked_folder_inside_the_repository(indexed: Path) -> None:
    (indexed / "linked").symlink_to(indexed / "python")
    _, (result,) = call_all([indexed], [("outline", {"path": "linked/kestrune/ratelimit.py"})])
    assert result.content[0].text == (
        "error: linked/kestrune/ratelimit.py: left out: symbolic link (not followed)")


# -- the entry point: raw JSON-RPC over stdio -------------------------------------------------


class Wire:
    """Newline-delimited JSON-RPC 2.0 over a child's stdin and stdout, as the MCP stdio
    transport frames it (reference: the MCP specification, Transports: stdio)."""

    def __init__(self, process: subprocess.Popen[bytes]) -> None:
        self.process = process
        self.next_id = 0

    def write(self, line: bytes) -> None:
        assert self.process.stdin is not None
        self.process.stdin.write(line)
        self.process.stdin.flush()

    def send(self, method: str, params: dict[str, Any] | None = None,
             notify: bool = False) -> dict[str, Any] | None:
        message: dict[str, Any] = {"jsonrpc": "2.0", "method": method}
        if params is not None:
            message["params"] = params
        if not notify:
            self.next_id += 1
            message["id"] = self.next_id
        assert self.process.stdin is not None and self.process.stdout is not None
        self.process.stdin.write(json.dumps(message).encode() + b"\n")
        self.process.stdin.flush()
        if notify:
            return None
        while True:
            line = self.process.stdout.readline()
            assert line, "the server closed its stdout"
            answer = json.loads(line)
            if answer.get("id") == self.next_id:
                assert answer["jsonrpc"] == "2.0"
                return dict(answer)


@pytest.fixture
def wire(indexed: Path) -> Iterator[Wire]:
    process = subprocess.Popen(
        [sys.executable, "-m", "codeseek", "mcp", "--backend", "fake", "--repo", str(indexed)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        yield Wire(process)
    finally:
        assert process.stdin is not None
        process.stdin.close()
        process.wait(timeout=30)
        assert process.stderr is not None
        stderr = process.stderr.read().decode()
        assert "Traceback" not in stderr, stderr


def test_raw_json_rpc_over_stdio(wire: Wire, indexed: Path) -> None:
    init = wire.send("initialize", {"protocolVersion": "2025-06-18", "capabilities": {},
                                    "clientInfo": {"name": "wire-test", "version": "1"}})
    assert init is not None and init["result"]["serverInfo"]["name"] == "codeseek"
    assert "tools" in init["result"]["capabilities"]
    wire.send("notifications/initialized", notify=True)
    listed = wire.send("tools/list", {})
    assert listed is not None
    assert {t["name"] for t in listed["result"]["tools"]} == {"search", "neighbours", "outline",
                                                             "status"}
    bad = wire.send("tools/call", {"name": "search", "arguments": {"query": "x", "k": 0}})
    assert bad is not None and bad["result"]["isError"] is True
    assert bad["result"]["content"][0]["text"] == (
        "error: k must be a whole number from 1 to 50, not 0")
    # a lone surrogate is not Unicode text: the SDK's transport drops such a message
    # unanswered (the in-process test sees the tool's own error), and the server answers on
    wire.write(b'{"jsonrpc": "2.0", "id": 99, "method": "tools/call", "params": {"name": '
               b'"search", "arguments": {"query": "fare\\udcff"}}}\n')
    wire.write(b"this line is not JSON\n")
    unknown = wire.send("tools/call", {"name": "grep", "arguments": {}})
    assert unknown is not None and unknown["result"]["isError"] is True
    found = wire.send("tools/call", {"name": "search", "arguments": {
        "query": "open ticket fault report",
        "k": 2}})
    assert found is not None and found["result"]["isError"] is False
    line = ast_lines(indexed / MAINTENANCE)["TicketDesk.open_ticket"]
    top = found["result"]["structuredContent"]["results"][0]
    assert (top["path"], top["start_line"]) == (MAINTENANCE, line)
    assert found["result"]["content"][0]["type"] == "text"


def test_mcp_without_an_index_answers_with_the_error(sample_copy: Path) -> None:
    _, (result, again) = call_all([sample_copy], [("search", {"query": "refunds"}),
                                                  ("status", {})])
    assert result.is_error and again.is_error
    assert result.content[0].text.startswith("error: ") and "codeseek index" in \
        result.content[0].text


def test_mcp_of_a_missing_folder_is_one_error_line(tmp_path: Path) -> None:
    result = subprocess.run([sys.executable, "-m", "codeseek", "mcp", "--repo",
                             str(tmp_path / "gone")], capture_output=True, text=True,
                            stdin=subprocess.DEVNULL, timeout=60)
    assert result.returncode == 1
    assert result.stderr == f"error: {tmp_path / 'gone'}: no such folder\n"


# -- with a daemon running ------------------------------------------------------------------


@pytest.fixture
def watching(indexed: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Path]:
    """`codeseek watch` on the repository, as a user starts it, answering on its socket."""
    process = subprocess.Popen([sys.executable, "-m", "codeseek", "watch", str(indexed),
                                "--backend", "fake"], stdin=subprocess.DEVNULL,
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    client = DaemonClient(indexed / ".codeseek")

    def answers() -> bool:
        try:
            return client.status()["daemon"]["state"] == "watching"
        except (DaemonUnavailable, KeyError):
            return False

    try:
        wait_for(answers, timeout=60, what="the daemon")
        # a fallback in this process would embed with the fake model too
        monkeypatch.setenv("CODESEEK_BACKEND", "fake")
        yield indexed
    finally:
        process.terminate()
        process.wait(timeout=30)


def test_a_saved_file_is_found_through_the_daemon(watching: Path) -> None:
    tools = Tools(open_repositories([watching]))
    query = "count the teal lanterns on a street"

    async def ask(name: str, arguments: dict[str, Any]) -> Any:
        async with mcp.Client(build_server(tools)) as client:
            return await client.call_tool(name, arguments)

    try:
        status = anyio.run(ask, "status", {})
        daemon = status.structured_content["repositories"][0]["daemon"]
        assert daemon is not None and daemon["pid"] > 0
        (watching / "python" / "kestrune" / "lanterns.py").write_text(
            'def count_teal_lanterns(street):\n    """Count the teal lanterns on a street."""\n'
            "    return len(street)\n", encoding="utf-8")

        def found() -> bool:
            result = anyio.run(ask, "search", {"query": query, "k": 1})
            return not result.is_error and places(result) == [
                "python/kestrune/lanterns.py:1 count_teal_lanterns"]

        wait_for(found, timeout=60, what="the saved file through MCP search")
    finally:
        tools.close()


def test_help_does_not_import_the_sdk() -> None:
    # reference: CPython's own import tracer (python -X importtime)
    result = subprocess.run([sys.executable, "-X", "importtime", "-m", "codeseek", "--help"],
                            capture_output=True, text=True, check=True,
                            env={**os.environ, "PYTHONDONTWRITEBYTECODE": "1"})
    imported = {line.split("|")[-1].strip() for line in result.stderr.splitlines()
                if "|" in line}
    assert "codeseek.cli" in imported
    assert not {"mcp", "mcp_types", "codeseek.mcp_server", "anyio"} & imported


def test_mcp_without_the_sdk_says_how_to_install_it(indexed: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    import io

    from codeseek.cli import main

    monkeypatch.setitem(sys.modules, "mcp", None)  # `import mcp` raises ImportError
    err = io.StringIO()
    assert main(["mcp", "--repo", str(indexed)], out=io.StringIO(), err=err) == 1
    assert err.getvalue() == ("error: codeseek mcp needs the mcp package: "
                              "pip install 'codeseek[mcp]'\n")


def test_one_index_folder_for_several_repositories_is_a_usage_error(indexed: Path,
                                                                    tmp_path: Path) -> None:
    result = subprocess.run([sys.executable, "-m", "codeseek", "mcp", "--repo", str(indexed),
                             "--repo", str(tmp_path), "--index-dir", str(tmp_path / "ix")],
                            capture_output=True, text=True, stdin=subprocess.DEVNULL, timeout=60)
    assert result.returncode == 2
    assert result.stderr == "error: --index-dir names one index; give it with one --repo\n"


def test_the_warm_up_loads_the_model_before_the_first_call(indexed: Path) -> None:
    tools = Tools(open_repositories([indexed], backend="fake"))
    try:
        tools.warm_in_background().join(timeout=60)
        service = tools.repositories[0]._service
        assert service is not None and service._searcher is not None  # type: ignore[attr-defined]
        answer = tools.call("search", {"query": "token bucket", "k": 3})
        assert not answer.is_error and f"{RATELIMIT}:" in answer.text
    finally:
        tools.close()


def test_a_failed_warm_up_is_answered_at_the_first_call(sample_copy: Path) -> None:
    tools = Tools(open_repositories([sample_copy], backend="fake"))  # no index yet
    try:
        tools.warm_in_background().join(timeout=60)
        answer = tools.call("search", {"query": "token bucket"})
        assert answer.is_error and answer.text.startswith("error: no index")
    finally:
        tools.close()
