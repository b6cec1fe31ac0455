"""``codeseek mcp``: a Model Context Protocol server on stdio, for coding agents and editors.

A shell layer like the command line: it parses tool arguments, calls the
library (or the running daemon) and shapes the answers; the MCP SDK (the
optional ``mcp`` extra) is imported only when the server is built, so
``codeseek --help`` never loads it.

Four tools, each answering with a compact text form and structured content:

- ``search``: the units that match a query (the JSON Lines fields of
  ``codeseek search --json``, snippets capped); with several repositories served
  and no ``repo`` given, all of them, their hits ranked together
  (:class:`codeseek.multi.MultiService`), each line and record naming its ``repo``.
- ``neighbours``: the units whose meaning is nearest a unit named by
  ``path`` and ``qualname`` or ``line``.
- ``outline``: the units of one file of a repository, read with the index's
  rules.
- ``status``: what each repository's index holds, how fresh it is, and what
  its daemon is doing.

Caps, so that a reply fits an agent's context: ``k`` is at most
:data:`MAX_K`; each hit's snippet keeps at most :data:`SNIPPET_LINES` lines
and :data:`SNIPPET_CHARS` characters (``snippet_truncated`` says when it was
cut). Bad input is an error result (``isError``) carrying the one-line
``error: ...`` message the command line prints; the server keeps answering.
No file outside the served repositories is read or named, and a file the index
leaves out (secrets, vendored, generated, ...) is refused with its reason.

Each repository is served through ONE search service from
:func:`codeseek.connect`, the only place that chooses between the daemon and
the library in process.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from codeseek.display import json_path, printable
from codeseek.errors import CodeseekError, InvalidQuery
from codeseek.query import Filters, Query

if TYPE_CHECKING:
    from codeseek.api import Index
    from codeseek.hits import SearchHit
    from codeseek.service import SearchService

SERVER_NAME = "codeseek"
MAX_K = 50
DEFAULT_K = 10
SNIPPET_LINES = 12
SNIPPET_CHARS = 1000

_FILTERS: dict[str, Any] = {
    "languages": {"type": "array", "items": {"type": "string"},
                  "description": "only these languages, e.g. python, go, typescript"},
    "paths": {"type": "array", "items": {"type": "string"},
              "description": "only files matching these gitignore-style patterns, relative to "
                             "the repository root, e.g. src/billing/ or *.go"},
    "kinds": {"type": "array", "items": {"type": "string"},
              "description": "only these units: function, method, class (struct, trait... "
                             "count as class)"},
}
_K = {"type": "integer", "minimum": 1, "maximum": MAX_K, "default": DEFAULT_K,
      "description": f"how many results (1 to {MAX_K})"}


def _schema(properties: dict[str, Any], required: Sequence[str], repos: Sequence[str],
            which: str = "which repository (needed when several are served)"
            ) -> dict[str, Any]:
    repo: dict[str, Any] = {"type": "string", "description": which}
    if len(repos) > 1:
        repo["enum"] = list(repos)
    return {"type": "object", "properties": {**properties, "repo": repo},
            "required": list(required), "additionalProperties": False}


def tool_specs(repos: Sequence[str]) -> list[dict[str, Any]]:
    """name, description and input schema of every tool (repos: the served names)."""
    return [
        {"name": "search",
         "description": "Find functions, methods and classes in the repository by what they "
                        "do, described in plain words; returns file:line ranges ranked best "
                        "first.",
         "inputSchema": _schema({"query": {"type": "string", "minLength": 1,
                                           "description": "what the code does, in plain words"},
                                 "k": _K, **_FILTERS}, ["query"], repos,
                                "which repository (default: every served one, their hits "
                                "ranked together, each naming its repo)")},
        {"name": "neighbours",
         "description": "Find the units whose meaning is nearest a given unit, named by its "
                        "file path and qualified name or a line inside it.",
         "inputSchema": _schema({"path": {"type": "string",
                                          "description": "the unit's file, relative to the "
                                                         "repository root"},
                                 "qualname": {"type": "string",
                                              "description": "its qualified name, e.g. "
                                                             "TicketDesk.open_ticket"},
                                 "line": {"type": "integer", "minimum": 1,
                                          "description": "or a line inside it (the innermost "
                                                         "unit holding it)"},
                                 "k": _K, **_FILTERS}, ["path"], repos)},
        {"name": "outline",
         "description": "List the functions, methods and classes of one source file of the "
                        "repository, with their lines and doc summaries.",
         "inputSchema": _schema({"path": {"type": "string",
                                          "description": "the file, relative to the "
                                                         "repository root"}},
                                ["path"], repos)},
        {"name": "status",
         "description": "Say what the index holds (files, units, languages, files left out), "
                        "how fresh it is, and whether a daemon keeps it up to date.",
         "inputSchema": _schema({}, [], repos)},
    ]


# -- one service per repository ------------------------------------------------------------


def _open_service(repo: Path, index_dir: str | None = None, model: str | None = None,
                  backend: str | None = None) -> SearchService:
    """The search service of ``repo`` (:func:`codeseek.connect`: the running daemon's
    when one listens and no model or backend is asked for, else the index in this
    process). A daemon that is not running is never started here."""
    from codeseek.service import connect

    return connect(repo, index_dir=index_dir, model=model, backend=backend)


@dataclass
class Repository:
    """One served repository: its root, its service, and a store-only index for lookups
    (which file is indexed, which unit a name or line means, the index's status)."""

    name: str
    root: Path
    open_service: Callable[[], SearchService]
    open_lookup: Callable[[], Index]
    _service: SearchService | None = field(default=None, repr=False)
    _lookup: Index | None = field(default=None, repr=False)

    def service(self, fresh: bool = False) -> SearchService:
        """The service, opened on first use (``fresh``: chosen again)."""
        if fresh or self._service is None:
            self.close_service()
            self._service = self.open_service()
        return self._service

    def lookup(self) -> Index:
        """The index read in this process, for lookups that need no model."""
        from codeseek.api import Index

        if isinstance(self._service, Index):
            return self._service
        if self._lookup is None:
            self._lookup = self.open_lookup()
        return self._lookup

    def close_service(self) -> None:
        if self._service is not None:
            self._service.close()
        self._service = None

    def close(self) -> None:
        self.close_service()
        if self._lookup is not None:
            self._lookup.close()
            self._lookup = None


def open_repositories(roots: Sequence[Path], *, index_dir: str | None = None,
                      model: str | None = None, backend: str | None = None
                      ) -> list[Repository]:
    """The served repositories (nothing is opened until a tool needs it)."""
    from codeseek.api import open_index

    served: list[Repository] = []
    for root in roots:
        resolved = root.resolve()

        def service(at: Path = resolved) -> SearchService:
            return _open_service(at, index_dir, model, backend)

        def lookup(at: Path = resolved) -> Index:
            return open_index(at, index_dir=index_dir)

        served.append(Repository(str(resolved), resolved, service, lookup))
    return served


# -- the tools -------------------------------------------------------------------------------


@dataclass
class ToolAnswer:
    """A tool's answer: the compact text, the structured content, whether it is an error."""

    text: str
    structured: dict[str, Any] | None = None
    is_error: bool = False


class Tools:
    """The tools over the served repositories, callable without the SDK (the server
    wraps them)."""

    def __init__(self, repositories: Sequence[Repository]) -> None:
        if not repositories:
            raise InvalidQuery("serve at least one repository")
        self.repositories = list(repositories)
        self._lock = threading.Lock()  # one call at a time, and none during the warm-up

    def warm_in_background(self) -> threading.Thread:
        """Open each repository's service and load its model in a thread, while the
        server itself starts: the first search then finds them ready. A failure here
        is left for the first call, which meets it again and answers with it."""
        thread = threading.Thread(target=self._warm, name="codeseek-mcp-warm", daemon=True)
        thread.start()
        return thread

    def _warm(self) -> None:
        from codeseek.api import Index

        with self._lock:
            for repo in self.repositories:
                try:
                    service = repo.service()
                    if isinstance(service, Index):
                        service.searcher()  # the model and the vectors
                except Exception:  # noqa: BLE001 - any failure resurfaces at the first call
                    continue

    def specs(self) -> list[dict[str, Any]]:
        return tool_specs([repo.name for repo in self.repositories])

    def close(self) -> None:
        with self._lock:
            for repo in self.repositories:
                repo.close()

    def call(self, name: str, arguments: dict[str, Any] | None) -> ToolAnswer:
        """Run one tool; a bad call is an error answer, never an exception."""
        handlers: dict[str, Callable[[dict[str, Any]], ToolAnswer]] = {
            "search": self._search, "neighbours": self._neighbours,
            "outline": self._outline, "status": self._status}
        with self._lock:
            return self._call(handlers, name, arguments)

    def _call(self, handlers: dict[str, Callable[[dict[str, Any]], ToolAnswer]], name: str,
              arguments: dict[str, Any] | None) -> ToolAnswer:
        from codeseek.client import DaemonUnavailable

        try:
            handler = handlers.get(name)
            if handler is None:
                raise InvalidQuery(f"no tool named {printable(repr(name))}; the tools are "
                                   f"{', '.join(handlers)}")
            args = dict(arguments or {})
            spec = next(s for s in self.specs() if s["name"] == name)
            _check_names(name, args, spec["inputSchema"])
            try:
                return handler(args)
            except DaemonUnavailable:  # the daemon stopped: choose again
                several = "repo" not in args and len(self.repositories) > 1
                for repo in self.repositories if several else [self._repo(args)]:
                    repo.service(fresh=True)
                return handler(args)
        except (CodeseekError, DaemonUnavailable) as exc:
            return ToolAnswer(f"error: {printable(str(exc))}", None, is_error=True)

    # -- arguments

    def _repo(self, args: dict[str, Any]) -> Repository:
        given = args.get("repo")
        if given is None:
            if len(self.repositories) == 1:
                return self.repositories[0]
            raise InvalidQuery("several repositories are served; name one with repo: "
                               + ", ".join(r.name for r in self.repositories))
        if not isinstance(given, str):
            raise InvalidQuery("repo must be a string")
        for repo in self.repositories:
            if given in (repo.name, repo.root.name) or _same_folder(given, repo.root):
                return repo
        raise InvalidQuery(f"{printable(given)}: not a served repository; the served are "
                           + ", ".join(r.name for r in self.repositories))

    def _filters(self, args: dict[str, Any], repo: Repository) -> Filters:
        from codeseek.filtering import files_pattern, language_name, unit_kind

        def strings(key: str) -> list[str]:
            value = args.get(key, [])
            if isinstance(value, str):
                value = [value]
            if not isinstance(value, list) or not all(isinstance(x, str) for x in value):
                raise InvalidQuery(f"{key} must be a list of strings")
            return value

        return Filters(
            languages=tuple(dict.fromkeys(language_name(x) for x in strings("languages"))),
            paths=tuple(files_pattern(x, repo.root, repo.root) for x in strings("paths")),
            kinds=tuple(dict.fromkeys(unit_kind(x) for x in strings("kinds"))),
        )

    # -- tools

    def _search(self, args: dict[str, Any]) -> ToolAnswer:
        query = args.get("query")
        if query is None:
            raise InvalidQuery("search needs a query: what the code does, in plain words")
        if not isinstance(query, str):
            raise InvalidQuery("the query must be a string")
        if not query.strip():
            raise InvalidQuery("the query is empty; type what you are looking for")
        try:
            query.encode("utf-8")
        except UnicodeEncodeError as exc:  # a lone surrogate escaped in the JSON
            raise InvalidQuery(f"the query is not valid UTF-8 text: {printable(query)} "
                               f"(character {exc.start + 1})") from None
        k = _k(args)
        if "repo" not in args and len(self.repositories) > 1:
            return self._search_all(Query(text=query, k=k,
                                          filters=self._filters(args, self.repositories[0])))
        repo = self._repo(args)
        filters = self._filters(args, repo)
        hits = repo.service().search(Query(text=query, k=k, filters=filters))
        return _hits_answer(repo, hits, f"no unit matches {printable(repr(query))}")

    def _search_all(self, query: Query) -> ToolAnswer:
        """One query over every served repository, their hits merged into one ranking
        (:class:`codeseek.multi.MultiService`), each hit naming its repository (path
        patterns are relative to each repository's root, so the same for all)."""
        from codeseek.multi import MultiService

        merged = MultiService([(repo.name, repo.service()) for repo in self.repositories])
        hits = merged.search(query)  # not closed: the repositories keep their services
        text = "\n".join(f"[{printable(str(h.repo))}] " + _unit_line(
            h.path, h.start_line, h.end_line, h.kind, h.qualname, h.score, h.doc_summary)
            for h in hits)
        return ToolAnswer(text or f"no unit matches {printable(repr(query.text))}",
                          {"repos": [repo.name for repo in self.repositories],
                           "results": [hit_record(h) for h in hits]})

    def _neighbours(self, args: dict[str, Any]) -> ToolAnswer:
        k = _k(args)
        repo = self._repo(args)
        rel = repo_path(repo.root, _string(args, "path"))
        qualname, line = args.get("qualname"), args.get("line")
        if (qualname is None) == (line is None):
            raise InvalidQuery("name the unit by qualname or by line, one of them")
        if line is not None and (isinstance(line, bool) or not isinstance(line, int)
                                 or line < 1):
            raise InvalidQuery(f"line must be a whole number from 1, not {line!r}")
        if qualname is not None and (not isinstance(qualname, str) or not qualname.strip()):
            raise InvalidQuery("qualname must be a name, e.g. TicketDesk.open_ticket")
        filters = self._filters(args, repo)
        lookup = repo.lookup()
        if not lookup.has_file(rel):
            raise InvalidQuery(f"{rel}: not a file of the index")
        unit_id = lookup.unit_at(rel, str(line) if line is not None else str(qualname))
        hits = repo.service().neighbours(Query(unit_id=unit_id, k=k, filters=filters))
        return _hits_answer(repo, hits, "no other unit is near it")

    def _outline(self, args: dict[str, Any]) -> ToolAnswer:
        from codeseek.config import load_settings
        from codeseek.outline import outline_repository_file

        repo = self._repo(args)
        rel = repo_path(repo.root, _string(args, "path"))
        units = outline_repository_file(load_settings(repo.root), rel)
        records = [{**json_path(u.path), "language": u.language, "kind": u.kind,
                    "name": u.name, "qualname": u.qualname, "signature": u.signature,
                    "start_line": u.start_line, "end_line": u.end_line,
                    "has_doc": bool(u.doc), "doc_summary": u.doc_summary} for u in units]
        lines = [_unit_line(u.path, u.start_line, u.end_line, u.kind, u.qualname, None,
                            u.doc_summary) for u in units]
        return ToolAnswer("\n".join(lines) or f"{rel}: no functions, methods or classes",
                          {"repo": repo.name, "path": rel, "units": records})

    def _status(self, args: dict[str, Any]) -> ToolAnswer:
        chosen = [self._repo(args)] if "repo" in args else self.repositories
        records: list[dict[str, Any]] = []
        lines: list[str] = []
        for repo in chosen:
            status = repo.lookup().status()
            daemon = repo.service().daemon_status()
            record = {**status.to_json(), "daemon": daemon}
            records.append(record)
            fresh = ("kept fresh by a daemon (pid {pid}, {state}, {pending} changes pending)"
                     .format(**daemon) if daemon else "no daemon: fresh as of the last "
                     "`codeseek index`")
            left_out = sum(status.skipped.values())
            lines.append(f"{printable(repo.name)}: {status.files} files, {status.units} units "
                         f"({', '.join(sorted(status.languages)) or 'none'}), "
                         f"{left_out} files left out; generation {status.generation}; {fresh}")
        return ToolAnswer("\n".join(lines), {"repositories": records})


def _check_names(tool: str, args: dict[str, Any], schema: dict[str, Any]) -> None:
    unknown = sorted(set(args) - set(schema["properties"]))
    if unknown:
        raise InvalidQuery(f"{tool} takes no argument {printable(repr(unknown[0]))}; its "
                           f"arguments are {', '.join(schema['properties'])}")


def _k(args: dict[str, Any]) -> int:
    k = args.get("k", DEFAULT_K)
    if isinstance(k, bool) or not isinstance(k, int) or not 1 <= k <= MAX_K:
        raise InvalidQuery(f"k must be a whole number from 1 to {MAX_K}, not {k!r}")
    return k


def _string(args: dict[str, Any], key: str) -> str:
    value = args.get(key)
    if not isinstance(value, str) or not value.strip():
        raise InvalidQuery(f"{key} must be a file path, relative to the repository root")
    return value


def _same_folder(given: str, root: Path) -> bool:
    try:
        return Path(given).expanduser().resolve() == root
    except (OSError, RuntimeError, ValueError):
        return False


def repo_path(root: Path, given: str) -> str:
    """``given`` (relative to the repository root, or absolute) as a repository-relative
    ``/``-separated path; a path that leaves the repository, also through a symbolic
    link, is refused. ``root`` is resolved."""
    if "\0" in given:
        raise InvalidQuery(f"{printable(given)}: a path cannot hold a NUL character")
    candidate = Path(given) if os.path.isabs(given) else root / given
    normal = Path(os.path.normpath(candidate))
    try:
        resolved = candidate.resolve()
    except (OSError, RuntimeError) as exc:
        raise InvalidQuery(f"{printable(given)}: cannot be read ({exc})") from exc
    if not normal.is_relative_to(root) or not resolved.is_relative_to(root):
        raise InvalidQuery(f"{printable(given)}: outside the repository {root}")
    rel = normal.relative_to(root).as_posix()
    if rel == ".":
        raise InvalidQuery(f"{printable(given)}: the repository itself, not a file")
    return rel


def cap_snippet(snippet: str) -> tuple[str, bool]:
    """The snippet cut to :data:`SNIPPET_LINES` lines and :data:`SNIPPET_CHARS` characters;
    whether anything was cut."""
    lines = snippet.splitlines()
    capped = "\n".join(lines[:SNIPPET_LINES])
    if len(capped) > SNIPPET_CHARS:
        capped = capped[:SNIPPET_CHARS]
    return capped, capped != snippet.rstrip("\n")


def hit_record(hit: SearchHit) -> dict[str, Any]:
    """A hit's JSON Lines record, its snippet capped."""
    record = hit.to_json()
    record["snippet"], record["snippet_truncated"] = cap_snippet(hit.snippet)
    return record


def _unit_line(path: str, start: int, end: int, kind: str, qualname: str,
               score: float | None, doc_summary: str) -> str:
    line = f"{printable(path)}:{start}-{end} {kind} {printable(qualname)}"
    if score is not None:
        line += f" ({score:.3f})"
    if doc_summary:
        line += f" - {printable(doc_summary)}"
    return line


def _hits_answer(repo: Repository, hits: Sequence[SearchHit], none: str) -> ToolAnswer:
    text = "\n".join(_unit_line(h.path, h.start_line, h.end_line, h.kind, h.qualname, h.score,
                                h.doc_summary) for h in hits)
    return ToolAnswer(text or none, {"repo": repo.name,
                                     "results": [hit_record(h) for h in hits]})


# -- the MCP server ------------------------------------------------------------------------


def build_server(tools: Tools) -> Any:
    """The SDK's low-level server over these tools (imports the ``mcp`` package)."""
    import mcp_types as types
    from mcp.server import Server

    from codeseek import __version__

    listed = [types.Tool(name=s["name"], description=s["description"],
                         input_schema=s["inputSchema"]) for s in tools.specs()]

    async def list_tools(ctx: Any, params: Any) -> types.ListToolsResult:
        return types.ListToolsResult(tools=listed)

    async def call_tool(ctx: Any, params: types.CallToolRequestParams) -> types.CallToolResult:
        answer = tools.call(params.name, params.arguments)
        return types.CallToolResult(content=[types.TextContent(text=answer.text)],
                                    structured_content=answer.structured,
                                    is_error=answer.is_error)

    return Server(SERVER_NAME, version=__version__,
                  instructions="Search this repository's code by meaning: `search` with a "
                               "plain-words query, then `outline` or `neighbours` on a hit.",
                  on_list_tools=list_tools, on_call_tool=call_tool)


def serve_stdio(tools: Tools) -> None:
    """Answer MCP requests on stdin and stdout until stdin closes."""
    import anyio
    from mcp.server.stdio import stdio_server

    server = build_server(tools)

    async def main() -> None:
        async with stdio_server() as (read_stream, write_stream):
            await server.run(read_stream, write_stream, server.create_initialization_options())

    try:
        anyio.run(main)
    finally:
        tools.close()
