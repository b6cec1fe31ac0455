"""The command line: thin, one library call per command.

Each command parses its options, calls the library, prints, and turns a
:class:`~codeseek.errors.CodeseekError` into one ``error: ...`` line on stderr
and exit status 1 (2 for a :class:`~codeseek.errors.UsageError`: an option
value or combination that cannot be used, as argparse's own errors). Heavy
modules are imported inside the commands, so ``codeseek --help`` answers at once.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import sys
import time
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from codeseek import __version__
from codeseek.confidence import weak_note
from codeseek.config import DEFAULT_REFINE_ABOVE_BYTES, DEFAULT_TIER, TIERS
from codeseek.display import json_path, printable, printable_block
from codeseek.errors import (
    CodeseekError,
    IndexLocked,
    InvalidQuery,
    RepositoryNotFound,
    UsageError,
)
from codeseek.query import Filters, Query

if TYPE_CHECKING:
    from codeseek.api import Index, IndexStatus
    from codeseek.indexer import ProgressCallback, UpdateSummary
    from codeseek.search import SearchHit
    from codeseek.service import SearchService
    from codeseek.tui.app import CodeseekApp

EXIT_OK = 0
EXIT_ERROR = 1
EXIT_USAGE = 2
EXIT_INTERRUPTED = 130

DESCRIPTION = """\
Search a source repository by meaning: ask in plain words, get the functions,
methods and classes that do it, ranked, with file and line."""

EPILOG = """\
examples:
  codeseek index                      build or refresh the index of this repository
  codeseek search "retry failed uploads"
  codeseek search "parse the config file" --language python -k 5 --json
  codeseek outline src/billing.py     list the units codeseek extracts from a file"""


def _common_index_options(parser: argparse.ArgumentParser, *, model: bool = True,
                          tier: bool = False) -> None:
    parser.add_argument("--index-dir", metavar="DIR",
                        help="index folder (default: <repo>/.codeseek)")
    if tier:
        parser.add_argument("--tier", choices=TIERS,
                            help="embedding tier: full (the model as it is), int8 (its "
                                 "weights quantised) or static (distilled); default: the "
                                 f"index's own, {DEFAULT_TIER} for a new index")
    else:
        parser.set_defaults(tier=None)
    if model:
        parser.add_argument("--model", metavar="PATH",
                            help="local sentence-transformers model folder "
                                 "(default: the packaged all-MiniLM-L6-v2)")
        parser.add_argument("--backend", choices=("onnx", "torch", "fake"),
                            help="embedding backend (default: onnx)")
    else:
        parser.set_defaults(model=None, backend=None)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every command."""
    parser = argparse.ArgumentParser(
        prog="codeseek", description=DESCRIPTION, epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"codeseek {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    for add_parser in (_index_parser, _search_parser, _status_parser, _watch_parser,
                       _outline_parser, _ui_parser, _eval_parser, _tune_parser, _mcp_parser):
        add_parser(commands)
    return parser


def _index_parser(commands: Any) -> None:
    index = commands.add_parser("index", help="build or bring up to date the index of a repository",
                                description="Build the index of a repository, or bring it up "
                                            "to date; only changed files are parsed and only "
                                            "new code is embedded.")
    index.add_argument("paths", nargs="*", default=["."], metavar="PATH",
                       help="repository root, one or more (default: the current folder)")
    _common_index_options(index, tier=True)
    index.add_argument("--ray", nargs="?", const="", default=None, metavar="ADDRESS",
                       help="parse and embed on Ray (pip install 'codeseek[ray]'): the "
                            "cluster at ADDRESS (HOST:PORT, ray://HOST:PORT or auto), or a "
                            "local Ray instance without it; put it after the paths")
    index.add_argument("--workers", type=int, default=None, metavar="N",
                       help="Ray actors that parse and embed (default: 2; with --ray)")
    index.add_argument("--rebuild", action="store_true",
                       help="discard the existing index and build it from scratch")
    index.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    _refine_option(index, "then embeds it with the full tier (or --tier) in the foreground, "
                          "in committed batches, while searches answer from what exists")


def _refine_option(parser: argparse.ArgumentParser, then: str) -> None:
    parser.add_argument("--refine", action=argparse.BooleanOptionalAction, default=None,
                        help="searchable first: build with the fast static tier, "
                             f"{then}; an interrupted refinement resumes on the next run "
                             "(default: a new index with over "
                             f"{DEFAULT_REFINE_ABOVE_BYTES // 1000**2} MB of source to parse; "
                             "--no-refine: build with the full tier at once)")


def _search_parser(commands: Any) -> None:
    search = commands.add_parser("search", help="rank the units that match a query",
                                 description="Rank the functions, methods and classes that "
                                             "match a natural-language query.")
    search.add_argument("query", nargs="?", metavar="QUERY", help="what you are looking for")
    _several_repos_options(search, "search")
    search.add_argument("-k", type=int, default=10, metavar="N",
                        help="number of results (default: 10)")
    search.add_argument("--language", action="append", dest="languages", default=[],
                        metavar="L", help="only this language (repeatable; any case)")
    search.add_argument("--files", action="append", dest="files", default=[], metavar="GLOB",
                        help="only files matching this gitignore-style pattern, read from "
                             "the current folder (repeatable)")
    search.add_argument("--unit", action="append", dest="units", default=[], metavar="K",
                        help="only this unit: function, method, class, or a language's own "
                             "word for a class such as struct or trait (repeatable)")
    search.add_argument("--since", metavar="WHEN",
                        help="only files modified at or after WHEN: a date (2026-11-30), a "
                             "date and time (2026-11-30T14:00) or an age (90m, 12h, 3d, 2w)")
    # the options' first names, still accepted so that scripts keep working
    search.add_argument("--lang", action="append", dest="languages", help=argparse.SUPPRESS)
    search.add_argument("--path", action="append", dest="files", help=argparse.SUPPRESS)
    search.add_argument("--kind", action="append", dest="units", help=argparse.SUPPRESS)
    search.add_argument("--json", action="store_true", help="one JSON object per hit (JSON Lines)")
    search.add_argument("--batch", metavar="FILE",
                        help="read one query per line from FILE (- for stdin); "
                             "answers in JSON Lines")
    search.add_argument("--neighbours", metavar="PATH:NAME",
                        help="instead of a query: the units whose meaning is nearest this "
                             "one, named PATH:QUALNAME or PATH:LINE (the innermost unit "
                             "holding that line)")
    _common_index_options(search, tier=True)


def _several_repos_options(parser: argparse.ArgumentParser, verb: str) -> None:
    parser.add_argument("--repo", action="append", dest="repos", default=[], metavar="PATH",
                        help="repository root (default: the current folder's repository); "
                             f"repeat it to {verb} several repositories at once")
    parser.add_argument("--workspace", metavar="FILE",
                        help=f"{verb} the repositories a TOML file lists "
                             "([workspace] repos = [...], paths relative to the file; "
                             "default: a codeseek.toml holding [workspace] at or above the "
                             "current folder, when no repository is nearer)")


def _status_parser(commands: Any) -> None:
    status = commands.add_parser("status", help="what the index holds and how fresh it is",
                                 description="Show what the index holds, what was left out "
                                             "and why, and whether it is up to date.")
    status.add_argument("path", nargs="?", default=None, metavar="PATH",
                        help="repository root (default: the current folder's repository)")
    _several_repos_options(status, "show")
    _common_index_options(status, model=False)
    status.add_argument("--json", action="store_true",
                        help="one JSON object (one line per repository when several)")
    status.add_argument("--skipped", action="store_true",
                        help="list the files left out, one `path  reason` line each "
                             "(with --json: a skipped_files list)")


def _watch_parser(commands: Any) -> None:
    watch = commands.add_parser("watch", help="index, then keep the index fresh and answer "
                                              "queries (runs in the foreground)",
                                description="Index the repository, then watch it: every saved "
                                            "change is indexed within a second, and searches "
                                            "are answered by this warm process through a "
                                            "socket in the index folder. Stop with Ctrl-C.")
    watch.add_argument("path", nargs="?", default=".", metavar="PATH",
                       help="repository root (default: the current folder)")
    _common_index_options(watch, tier=True)
    watch.add_argument("--poll", action="store_true",
                       help="watch by polling instead of inotify (network file systems)")
    _refine_option(watch, "then embeds it with the full tier (or --tier) behind, between "
                          "changes")


def _outline_parser(commands: Any) -> None:
    outline = commands.add_parser("outline", help="list the units extracted from a file or tree",
                                  description="List the units codeseek extracts from a file or "
                                              "a folder, without an index or a model.")
    outline.add_argument("path", metavar="PATH", help="a source file or a folder")
    outline.add_argument("--json", action="store_true", help="one JSON object per unit")


def _ui_parser(commands: Any) -> None:
    ui = commands.add_parser("ui", help="search as you type in the terminal and read the hits",
                             description="Search as you type, read each hit's code, and open "
                                         "it in your editor ($VISUAL or $EDITOR).")
    ui.add_argument("path", nargs="?", default=None, metavar="PATH",
                    help="repository root (default: the current folder's repository)")
    _several_repos_options(ui, "search")
    _common_index_options(ui)


def find_repo_root(start: Path) -> Path:
    """The nearest folder at or above ``start`` that holds an index or a .git folder."""
    start = start.resolve()
    for folder in (start, *start.parents):
        if (folder / ".codeseek").is_dir():
            return folder
    for folder in (start, *start.parents):
        if (folder / ".git").exists():
            return folder
    return start


def _root(repo: str | None) -> Path:
    root = Path(repo) if repo else find_repo_root(Path.cwd())
    if not root.is_dir():
        raise RepositoryNotFound(f"{root}: no such folder")
    return root


def _open(repo: str | None, args: argparse.Namespace, *, create: bool) -> Index:
    from codeseek.api import open_index
    from codeseek.errors import IndexNotFound

    try:
        index = open_index(_root(repo), index_dir=args.index_dir, model=args.model,
                           backend=args.backend, create=create, tier=args.tier)
    except IndexNotFound as exc:
        raise IndexNotFound(f"{exc}{NO_INDEX_HINT}") from exc
    return index  # open_index checked that the index is this repository's


def _connect(repo: str | None, args: argparse.Namespace, err: TextIO) -> SearchService:
    """The search service of the index (a running daemon or this process: see
    :func:`codeseek.connect`), after the same checks as :func:`_open`."""
    from codeseek.errors import IndexNotFound
    from codeseek.service import connect

    try:
        return connect(_root(repo), index_dir=args.index_dir, model=args.model,
                       backend=args.backend,  # open_index checks the index's repository
                       tier=args.tier,
                       notice=lambda message: print(message, file=err))
    except IndexNotFound as exc:
        raise IndexNotFound(f"{exc}{NO_INDEX_HINT}") from exc


def _search_repos(args: argparse.Namespace, discover: bool = True) -> list[str]:
    """The repositories ``search`` asks: the ``--repo`` options, then a workspace's
    (``--workspace``; with neither, and ``discover``, the workspace file found at or above
    the current folder when no repository is nearer: :func:`codeseek.multi.find_workspace`)."""
    from codeseek.multi import find_workspace, workspace_repos

    repos = list(args.repos)
    workspace = None if args.workspace is None else Path(args.workspace)
    if workspace is None and not repos and discover:
        root = find_repo_root(Path.cwd())
        marked = (root / ".codeseek").is_dir() or (root / ".git").exists()
        workspace = find_workspace(Path.cwd(), root if marked else None)
    if workspace is not None:
        try:
            repos += [str(path) for path in workspace_repos(workspace)]
        except ValueError as exc:
            raise UsageError(str(exc)) from exc
    if len(repos) > 1 and args.index_dir is not None:
        raise UsageError("--index-dir names one index; give it with one --repo")
    if len(repos) > 1 and args.tier is not None:
        raise UsageError("--tier names one index's tier; give it with one --repo")
    return repos


def _connect_all(repos: Sequence[str], args: argparse.Namespace, err: TextIO) -> SearchService:
    """One service over every repository's own (:class:`codeseek.multi.MultiService`);
    a missing repository or index is a usage error naming it."""
    from codeseek.errors import IndexNotFound
    from codeseek.multi import MultiService

    services: list[tuple[str, SearchService]] = []
    try:
        for repo in repos:
            root = Path(repo)
            if not root.is_dir():
                raise UsageError(f"{printable(repo)}: no such repository folder")
            try:
                services.append((str(root.resolve()), _connect(repo, args, err)))
            except IndexNotFound as exc:
                raise UsageError(f"{printable(repo)}: no index here; run codeseek index "
                                 f"{printable(repo)} first") from exc
    except BaseException:
        for _, service in services:
            service.close()
        raise
    return MultiService(services)


NO_INDEX_HINT = "; for an index built elsewhere, give --index-dir DIR or set CODESEEK_INDEX_DIR"


# -- index -------------------------------------------------------------------------


def cmd_index(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    if args.workers is not None and args.ray is None:
        raise UsageError("--workers goes with --ray")
    if args.ray is not None and args.refine:
        raise UsageError("--refine goes without --ray: a Ray build embeds with one tier")
    if args.ray and Path(args.ray).is_dir():
        raise UsageError(f"--ray took {printable(args.ray)} as its address; put --ray after "
                         "the paths, or write --ray=ADDRESS")
    if len(args.paths) > 1 and args.index_dir is not None:
        raise UsageError("--index-dir names one index; give it with one PATH")
    paths = [path for path in args.paths if _ready_to_index(path, args, out)]
    if args.ray is None:
        for path in paths:
            _index_one(path, args, out, err)
        return EXIT_OK
    from codeseek.distributed import DEFAULT_WORKERS, index_on_ray
    from codeseek.errors import ClusterError

    with contextlib.ExitStack() as stack:
        indexes = [stack.enter_context(_open(path, args, create=True)) for path in paths]
        if not indexes:
            return EXIT_OK
        for index in indexes:
            _print_notes(index, err)
        log = indexes[0].settings.index_dir / RAY_LOG
        try:
            with _ray_output_to(log, err) as shown:
                summaries = index_on_ray(
                    indexes, address=args.ray or None,
                    workers=DEFAULT_WORKERS if args.workers is None else args.workers,
                    progress=lambda _index: None if args.quiet else _LineProgress(shown))
        except ClusterError as exc:
            raise ClusterError(f"{exc} (Ray's own output: {log})") from None
    for path, summary in zip(paths, summaries, strict=True):
        _print_summary(summary, out, err, path if len(paths) > 1 else None)
    return EXIT_OK


RAY_LOG = "ray.log"
"""Ray's own output of the last ``index --ray`` run, in the (first) index folder."""


@contextlib.contextmanager
def _ray_output_to(log: Path, err: TextIO) -> Iterator[TextIO]:
    """Send what Ray prints to ``log`` for the run; yield the stream for codeseek's lines.

    Ray's C++ core and its Python loggers write to file descriptor 2 directly,
    including tracebacks for a failure codeseek reports in one line, so the
    descriptor itself points at ``log`` for the run. When ``err`` is that
    descriptor, codeseek's own lines go to a copy of the original. Ray prints its
    cluster's error reports to ``sys.stdout``, which points at ``log`` too
    (codeseek's own output, written after the run, keeps its stream).
    """
    from codeseek.safefs import open_regular

    try:
        err_fd: int | None = err.fileno()
    except (AttributeError, OSError, ValueError):  # a StringIO, a closed stream
        err_fd = None
    log_fd = open_regular(log, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
    err.flush()
    sys.stderr.flush()
    saved = os.dup(2)
    os.dup2(log_fd, 2)
    os.close(log_fd)
    try:
        with contextlib.ExitStack() as streams:
            shown = err
            if err_fd == 2:
                shown = streams.enter_context(open(
                    saved, "w", buffering=1, closefd=False, errors="replace",
                    encoding=getattr(err, "encoding", None) or "utf-8"))
            reports = streams.enter_context(open(os.dup(2), "w", buffering=1,
                                                 encoding="utf-8", errors="replace"))
            streams.enter_context(contextlib.redirect_stdout(reports))
            yield shown
    finally:
        sys.stderr.flush()
        os.dup2(saved, 2)
        os.close(saved)


def _ready_to_index(path: str, args: argparse.Namespace, out: TextIO) -> bool:
    """Whether to index ``path`` here (not when a daemon keeps it); with --rebuild,
    its index files are deleted first."""
    from codeseek.api import remove_index_files
    from codeseek.config import load_settings
    from codeseek.errors import IndexCorrupt, IndexFormatMismatch, IndexNotFound

    args.path = path
    daemon_pid = _running_daemon_pid(args)
    if daemon_pid is not None:
        if args.rebuild:
            raise IndexLocked(f"a codeseek daemon (pid {daemon_pid}) watches this index; "
                              "stop it before rebuilding")
        print(f"a codeseek daemon (pid {daemon_pid}) keeps this index up to date; "
              "nothing to do", file=out)
        return False
    if args.rebuild:
        # the repository check first: --rebuild never deletes another repository's index
        # nothing there, or nothing readable: rebuilding is the remedy
        with contextlib.suppress(IndexNotFound, IndexCorrupt, IndexFormatMismatch):
            _open(path, args, create=False).close()
        settings = load_settings(_root(path), index_dir=args.index_dir)
        remove_index_files(settings.index_dir)
    return True


def _index_one(path: str, args: argparse.Namespace, out: TextIO, err: TextIO) -> None:
    """Index one repository in this process."""
    with _open(path, args, create=True) as index:
        _print_notes(index, err)
        refine = _choose_refinement(index, args, err)
        if args.quiet or not err.isatty():
            summary, refined = _update_and_refine(
                index, _LineProgress(err) if not args.quiet else None, refine, err)
        else:
            summary, refined = _update_with_bar(index, err, refine)
        tier = index.tier
    _print_summary(summary, out, err, path if len(args.paths) > 1 else None)
    if refined is not None:
        print(f"refined {refined} units with the {tier} tier", file=out)


def _choose_refinement(index: Index, args: argparse.Namespace, err: TextIO) -> bool:
    """``--refine``/``--no-refine``, codeseek.toml's ``refine``, else the repository's
    size (:meth:`~codeseek.api.Index.choose_refinement`), saying so when the size chose."""
    refine, notice = index.choose_refinement(args.refine)
    if notice is not None and not getattr(args, "quiet", False):
        print(notice, file=err, flush=True)
    return refine


def _print_summary(summary: UpdateSummary, out: TextIO, err: TextIO,
                   path: str | None) -> None:
    """The summary line (after the path, when several were indexed) and the warnings."""
    prefix = f"{printable(path)}: " if path is not None else ""
    print(prefix + format_summary(summary), file=out)
    for warned in summary.syntax_warnings[:20]:
        print(f"warning: {printable(warned)}: syntax errors; indexed the units that could be "
              "recovered", file=err)
    if len(summary.syntax_warnings) > 20:
        print(f"warning: {len(summary.syntax_warnings) - 20} more files with syntax errors "
              "(see `codeseek status`)", file=err)


def _running_daemon_pid(args: argparse.Namespace) -> int | None:
    """The pid of a daemon that answers on this index's socket, if one does."""
    from codeseek.service import daemon_status

    try:
        daemon = daemon_status(_root(args.path), index_dir=args.index_dir)
        return None if daemon is None else int(daemon["pid"])
    except (CodeseekError, KeyError, TypeError, ValueError):
        return None


def _print_notes(index: Index, err: TextIO) -> None:
    """The index folder's warnings (said once, when the index is made)."""
    for note in index.notes:
        print(f"warning: {printable(note)}", file=err)  # a note may quote a path


class _LineProgress:
    """Progress for a non-terminal stderr: one line when each stage starts."""

    def __init__(self, err: TextIO) -> None:
        self.err = err
        self.stage = ""

    def __call__(self, stage: str, done: int, total: int) -> None:
        if stage != self.stage:
            self.stage = stage
            label = {"scan": "scanning files", "parse": "parsing changed files",
                     "embed": f"embedding {total} new units", "save": "saving",
                     "refine": f"refining {total} units"}.get(stage, stage)
            print(f"codeseek: {label}", file=self.err, flush=True)


def _update_and_refine(index: Index, progress: ProgressCallback | None, refine: bool,
                       err: TextIO) -> tuple[UpdateSummary, int | None]:
    """Update the index; then, when a refinement is under way (``--refine`` now or an
    interrupted one before), refine it to the end: the summary, and the units refined
    (None: no refinement)."""
    summary = index.update(progress=progress, refine=refine)
    if not index.refining:
        return summary, None
    print("codeseek: searchable now; refining with the full-quality tier "
          "(Ctrl-C is safe: the next run resumes)", file=err, flush=True)
    return summary, index.refine(progress=progress)


def _update_with_bar(index: Index, err: TextIO,
                     refine: bool = False) -> tuple[UpdateSummary, int | None]:
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeRemainingColumn,
    )

    console = Console(file=err)
    with Progress(TextColumn("{task.description:<8}"), BarColumn(), MofNCompleteColumn(),
                  TimeRemainingColumn(), console=console, transient=True) as bar:
        tasks: dict[str, Any] = {}

        def progress(stage: str, done: int, total: int) -> None:
            if stage not in tasks:
                tasks[stage] = bar.add_task(stage, total=total or None)
            bar.update(tasks[stage], completed=done, total=total or None)

        return _update_and_refine(index, progress, refine, err)


def format_summary(summary: UpdateSummary) -> str:
    """The one line printed after indexing."""
    skipped = sum(summary.skipped.values())
    return (f"indexed {summary.files} files, {summary.units} units: "
            f"{summary.added} added, {summary.changed} changed, {summary.removed} removed, "
            f"{summary.embedded} embedded, {skipped} files skipped, "
            f"{summary.seconds:.1f} s")


# -- search ------------------------------------------------------------------------


def cmd_search(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    repos = _search_repos(args)
    args.repo = repos[0] if repos else None
    if len(repos) > 1 and (args.neighbours is not None or args.files):
        raise UsageError("--neighbours and --files work in one repository; give one --repo")
    if args.neighbours is not None:
        return _search_neighbours(args, out, err)
    if args.batch is None and args.query is None:
        raise UsageError("give a QUERY or --batch FILE")
    if args.batch is not None and args.query is not None:
        raise UsageError("give a QUERY or --batch FILE, not both")
    if args.batch is None and not args.query.strip():
        raise UsageError("the query is empty; type what you are looking for")
    if args.k < 1:
        raise UsageError(f"-k must be at least 1, not {args.k}")
    lines = _read_batch(args.batch) if args.batch is not None else [_query_text(args.query)]
    filters = _search_filters(args)
    queries = [Query(text=line, k=args.k, filters=filters) for line in lines if line]
    service = _connect(args.repo, args, err) if len(repos) < 2 else _connect_all(repos, args, err)
    try:
        results: Iterable[list[SearchHit]] = service.search_many(queries) if queries else []
        if args.batch is not None:
            _print_batch(lines, results, out)
            return EXIT_OK
        hits = next(iter(results))
    finally:
        service.close()
    _print_answer(hits, args.json, out)
    return EXIT_OK


def _search_neighbours(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    """``search --neighbours PLACE``: the unit's neighbours, printed like a search."""
    if args.query is not None or args.batch is not None:
        raise UsageError("give a QUERY, --batch FILE or --neighbours PATH:NAME, only one")
    if args.k < 1:
        raise UsageError(f"-k must be at least 1, not {args.k}")
    filters = _search_filters(args)
    with _open(args.repo, args, create=False) as index:
        unit_id = _unit_of_place(index, args.neighbours)
    service = _connect(args.repo, args, err)
    try:
        hits = service.neighbours(Query(unit_id=unit_id, k=args.k, filters=filters))
    finally:
        service.close()
    _print_answer(hits, args.json, out)
    return EXIT_OK


def _print_answer(hits: Sequence[SearchHit], as_json: bool, out: TextIO) -> None:
    """One answer's hits: JSON Lines with ``--json``, else the plain listing."""
    if as_json:
        _print_json(hits, out)
    else:
        _print_hits(hits, out)


def _unit_of_place(index: Index, place: str) -> int:
    """The unit id ``PATH:QUALNAME`` or ``PATH:LINE`` names. PATH is taken from where the
    user stands, else from the repository root (as search prints it); a colon inside PATH
    or the name is fine (the first split naming an indexed file wins)."""
    splits = [at for at, char in enumerate(place) if char == ":" and 0 < at < len(place) - 1]
    if not splits:
        raise UsageError(f"--neighbours wants PATH:QUALNAME or PATH:LINE, not "
                         f"{printable(repr(place))}")
    root = index.settings.repo.resolve()
    outside: str | None = None
    for at in splits:
        given, where = place[:at], place[at + 1:]
        full = (Path.cwd() / given).resolve()
        candidates = [full.relative_to(root).as_posix()] if full.is_relative_to(root) else []
        if not full.is_relative_to(root) and (full.exists() or Path(given).is_absolute()):
            outside = outside or given
        candidates.append(Path(given).as_posix())
        for relative in candidates:
            if index.has_file(relative):
                return index.unit_at(relative, where)
    if outside is not None:
        raise UsageError(f"{printable(outside)}: outside the repository {printable(str(root))}")
    raise InvalidQuery(f"{place[:splits[0]]}: not a file of the index")


def _search_filters(args: argparse.Namespace) -> Filters:
    """The filter options in the stored names, file patterns relative to the repository
    root (read from the current folder), ``--since`` as a time; a value that cannot be
    used is a usage error."""
    from codeseek.errors import UnsupportedLanguage
    from codeseek.filtering import files_pattern, language_name, since_time, unit_kind

    root = _root(args.repo).resolve()
    try:
        return Filters(
            languages=tuple(dict.fromkeys(language_name(x) for x in args.languages)),
            paths=tuple(files_pattern(x, root, Path.cwd().resolve()) for x in args.files),
            kinds=tuple(dict.fromkeys(unit_kind(x) for x in args.units)),
            since=None if args.since is None else since_time(args.since),
        )
    except (InvalidQuery, UnsupportedLanguage) as exc:
        raise UsageError(str(exc)) from exc


def _query_text(query: str) -> str:
    """The query argument; one holding bytes that are not UTF-8 (kept by Python as
    lone surrogates) is refused, since no index text could match them."""
    try:
        query.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise InvalidQuery(f"the query is not valid UTF-8 text: {printable(query)} "
                           f"(character {exc.start + 1})") from None
    return query


def _read_batch(source: str) -> list[str]:
    """The queries of a batch file or of stdin (``-``): UTF-8 text, one per line, every line
    kept (stripped).

    The bytes are decoded here, not by the locale's text layer, so binary input
    is refused the same way on every system; a closed stdin is an error too.
    """
    try:
        if source == "-":
            if sys.stdin is None or sys.stdin.closed:
                raise InvalidQuery("-: cannot read the batch: standard input is closed")
            # a real stdin is read as bytes; a text stream standing in for it (tests) as text
            data = (sys.stdin.buffer.read() if isinstance(sys.stdin, io.TextIOWrapper)
                    else sys.stdin.read())
        else:
            data = Path(source).read_bytes()
    except FileNotFoundError as exc:
        raise InvalidQuery(f"{source}: no such file") from exc
    except IsADirectoryError as exc:
        raise InvalidQuery(f"{source}: a folder, not a batch file; give one query per line "
                           "in a file, or - for standard input") from exc
    except OSError as exc:
        raise InvalidQuery(f"{source}: cannot read the batch file: {exc}") from exc
    if isinstance(data, str):  # a text stream stood in for stdin (tests)
        data = data.encode("utf-8", "surrogateescape")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidQuery(f"{source}: cannot read the batch: not UTF-8 text (byte "
                           f"0x{data[exc.start]:02x} at offset {exc.start})") from None
    if "\0" in text:
        raise InvalidQuery(f"{source}: cannot read the batch: it holds a NUL byte "
                           f"(at offset {data.index(0)}); give one query per line as text")
    return [line.strip() for line in text.splitlines()]  # blank lines too: each gets an answer


def no_hits_record(query: str) -> dict[str, object]:
    """The JSON Lines record of a batch line with no hit (or a blank line): ``rank`` is
    null, which no hit has, and ``hits`` is 0."""
    return {"query": query, "rank": None, "hits": 0}


def _print_batch(lines: Sequence[str], results: Iterable[Sequence[SearchHit]],
                 out: TextIO) -> None:
    """Every line's hits in line order; a line without any, one :func:`no_hits_record`."""
    answers = iter(results)
    for line in lines:
        hits = next(answers) if line else []
        if hits:
            _print_json(hits, out)
        else:
            out.write(json.dumps(no_hits_record(line), ensure_ascii=False) + "\n")


def _print_json(hits: Sequence[SearchHit], out: TextIO) -> None:
    for hit in hits:
        out.write(json.dumps(hit.to_json(), ensure_ascii=False) + "\n")


def _print_hits(hits: Sequence[SearchHit], out: TextIO) -> None:
    if not hits:
        print("no matches; try other words or fewer filters", file=out)
        return
    note = weak_note([hit.confidence for hit in hits])  # see codeseek.confidence
    if note:
        print(note, file=out)
    columns = _columns()
    for hit in hits:  # repository text is escaped: shown, never obeyed by the terminal
        print(f"{hit.rank:>2}. {printable(hit.qualname)}  "
              f"[{printable(hit.kind)}, {printable(hit.language)}]  "
              f"{_shown_path(hit)}:{hit.start_line}", file=out)
        if hit.doc_summary:
            print(f"    {_clip(printable(hit.doc_summary), columns - 4)}", file=out)
        for number, line in shown_code_lines(hit):
            print(f"    {number:>5} | {_clip(printable_block(line), columns - 12)}", file=out)
        print(file=out)


def _shown_path(hit: SearchHit) -> str:
    """The hit's path; under its repository's root when several are searched."""
    return printable(hit.path if hit.repo is None else str(Path(hit.repo) / hit.path))


CODE_LINES = 3
"""Lines of code plain search output shows per hit."""


def _columns() -> int:
    """The terminal's width (``COLUMNS`` first, as :func:`shutil.get_terminal_size` reads
    it); 104 when output is not a terminal; never under 40."""
    import shutil

    return max(40, shutil.get_terminal_size((104, 24)).columns)


def shown_code_lines(hit: SearchHit, count: int = CODE_LINES) -> list[tuple[int, str]]:
    """(line number, text) of the code lines plain output shows: the snippet's first
    lines, without a docstring (its summary is shown above them already)."""
    lines = list(enumerate(hit.snippet.splitlines(), hit.start_line))
    if hit.doc_summary and hit.language == "python":
        rows = _docstring_rows(hit.snippet)
        if rows is not None:
            first, last = rows
            lines = lines[: first - 1] + [pair for pair in lines[last:] if pair[1].strip()]
    return lines[:count]


def _docstring_rows(code: str) -> tuple[int, int] | None:
    """The 1-based first and last rows of a Python docstring in ``code`` (a unit's first
    lines, so the docstring may run past their end), or None when there is none."""
    import tokenize

    header_done = False
    found: tuple[int, int] | None = None
    skipped = (tokenize.NL, tokenize.INDENT, tokenize.COMMENT)
    try:
        for token in tokenize.generate_tokens(io.StringIO(code).readline):
            if not header_done:
                header_done = token.type == tokenize.NEWLINE  # the def or class line ends
            elif token.type == tokenize.STRING:
                found = (found[0] if found else token.start[0], token.end[0])
            elif token.type not in skipped:
                return found if token.type in (tokenize.NEWLINE, tokenize.ENDMARKER) else None
    except tokenize.TokenError as exc:
        # only a string still open where the snippet ends gets here after the header
        if header_done and found is None and len(exc.args) > 1:
            return (int(exc.args[1][0]), code.count("\n") + 1)
        return None
    return found


def _clip(text: str, width: int) -> str:
    return text if len(text) <= width else text[: width - 3] + "..."


# -- status ------------------------------------------------------------------------


def cmd_status(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.errors import IndexNotFound
    from codeseek.service import daemon_status

    repos = ([args.path] if args.path else []) + _search_repos(args, discover=not args.path)
    several = len(repos) > 1 or args.workspace is not None
    if several and args.index_dir is not None:
        raise UsageError("--index-dir names one index; give it with one --repo")
    reports = []
    for repo in repos or [None]:
        if several and not Path(repo or ".").is_dir():
            raise UsageError(f"{printable(str(repo))}: no such repository folder")
        try:
            with _open(repo, args, create=False) as index:
                reports.append((index.status(),
                                index.skipped_files() if args.skipped else None,
                                daemon_status(_root(repo), index_dir=args.index_dir)))
        except IndexNotFound as exc:
            if not several:
                raise
            raise UsageError(f"{printable(str(repo))}: no index here; run codeseek index "
                             f"{printable(str(repo))} first") from exc
    for number, (status, skipped, daemon) in enumerate(reports):
        if args.json:
            record = status.to_json()
            record["daemon"] = daemon
            if skipped is not None:
                record["skipped_files"] = [{**json_path(p), "reason": r} for p, r in skipped]
            out.write(json.dumps(record, ensure_ascii=False) + "\n")
        elif skipped is not None:
            out.write(format_skipped(skipped, status.repo if several else None))
        else:
            out.write(("\n" if number else "") + format_status(status, daemon))
    return EXIT_OK


def format_skipped(skipped: Sequence[tuple[str, str]], repo: str | None = None) -> str:
    """``status --skipped``: one ``path  reason`` line per file left out (each path under
    ``repo`` when given: several repositories are listed)."""
    return "".join(f"{printable(path if repo is None else str(Path(repo) / path))}  {reason}\n"
                   for path, reason in skipped)


def format_status(status: IndexStatus, daemon: dict[str, Any] | None) -> str:
    """What ``codeseek status`` prints: the index's status and the daemon's, if one runs."""
    updated = (time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(status.updated_at))
               if status.updated_at else "never")
    lines = [
        f"repository   {printable(str(status.repo))}",
        f"index        {printable(str(status.index_dir))} ({status.bytes_on_disk / 1e6:.1f} MB)",
        f"model        {printable(status.model_id or 'none yet')} ({status.dim or '-'} dimensions)",
        f"contents     {status.files} files, {status.units} units",
    ]
    if status.tier is not None:  # the vectors' embedding tier (codeseek/tiers.py)
        lines.insert(3, f"tier         {status.tier}")
    if status.refinement is not None:  # codeseek/refine.py
        lines.insert(4 if status.tier is not None else 3, _refinement_line(status.refinement))
    lines += [f"             {count:>6} {printable(language)}"
              for language, count in sorted(status.languages.items())]
    lines.append(f"updated      {updated} (generation {status.generation}; vector index "
                 f"{'in sync' if status.vectors_in_sync else 'will be rebuilt on next search'})")
    if status.files_with_syntax_errors:
        lines.append(f"warnings     {status.files_with_syntax_errors} files with syntax errors")
    lines.append(f"adapter      {_adapter_words(status.adapter, status.model_id)}")
    lines += _daemon_lines(daemon)
    if status.skipped:
        lines.append("left out      (`codeseek status --skipped` lists the files)")
        lines += [f"             {count:>6} {reason}"
                  for reason, count in sorted(status.skipped.items(), key=lambda kv: -kv[1])]
    return "".join(line + "\n" for line in lines)


def _refinement_line(refinement: dict[str, Any]) -> str:
    """``refining  120 of 400 units with the full tier (30%), about 12 s left; ...``."""
    from codeseek.service import describe_refinement

    return (f"refining     {describe_refinement(refinement)}; the rest are searched with "
            "the static tier")


def _daemon_lines(daemon: dict[str, Any] | None) -> list[str]:
    if daemon is None:
        return ["daemon       not running (searches load the index in their own process)"]
    last = (time.strftime("%H:%M:%S", time.localtime(daemon["last_update"]))
            if daemon["last_update"] else "none yet")
    state, watcher = daemon["state"], daemon["watcher"]
    doing = (f"watching for changes ({watcher})" if state == "watching"
             else f"{state} (file watcher: {watcher})")
    pending = daemon["pending"]
    lines = [f"daemon       pid {daemon['pid']}, {doing}, {pending} "
             f"{'change' if pending == 1 else 'changes'} pending, last update {last}"]
    if daemon["last_error"]:
        lines.append(f"             last error: {printable(str(daemon['last_error']))}")
    return lines


def _adapter_words(adapter: dict[str, Any] | None, model_id: str | None) -> str:
    if adapter is None:
        return "none (search uses the plain model; `codeseek tune` trains one)"
    when = time.strftime("%Y-%m-%d %H:%M", time.localtime(adapter["saved_at"]))
    if adapter["model_id"] != model_id:
        return f"saved {when} for model {adapter['model_id']}, not this index's: unused"
    before, after = adapter["served_mrr_before"], adapter["served_mrr_after"]
    gain = (f"; held-out served MRR {before:.3f} -> {after:.3f} ({adapter['held_out']} "
            "docstrings)" if isinstance(before, float) and isinstance(after, float) else "")
    return f"in use, trained {when}{gain}"


# -- outline -----------------------------------------------------------------------


def cmd_outline(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.outline import outline_path

    for unit in outline_path(Path(args.path)):
        if args.json:
            record = {
                **json_path(unit.path), "language": unit.language, "kind": unit.kind,
                "name": unit.name, "qualname": unit.qualname, "signature": unit.signature,
                "start_line": unit.start_line, "end_line": unit.end_line,
                "has_doc": bool(unit.doc), "doc_summary": unit.doc_summary,
            }
            out.write(json.dumps(record, ensure_ascii=False) + "\n")
        else:
            out.write(f"{printable(unit.path)}:{unit.start_line}-{unit.end_line} "
                      f"{printable(unit.kind)} {printable(unit.qualname)}\n")
    return EXIT_OK


def cmd_watch(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.daemon import run_foreground

    def log(message: str) -> None:
        print(printable(message), file=err, flush=True)  # log lines may quote file names

    with _open(args.path, args, create=True) as index:
        _print_notes(index, err)
        run_foreground(index, log, poll=args.poll, refine=_choose_refinement(index, args, err))
    return EXIT_OK


# -- ui ----------------------------------------------------------------------------


def cmd_ui(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.errors import IndexNotFound

    repos = _search_repos(args, discover=not args.path)
    args.repo = repos[0] if len(repos) == 1 else None
    if args.path and args.repo and Path(args.path).resolve() != Path(args.repo).resolve():
        raise InvalidQuery("name the repository once: PATH or --repo, not both")
    if not (sys.stdin.isatty() and sys.stdout.isatty()):
        print("error: codeseek ui needs a terminal; in scripts use `codeseek search --json`",
              file=err)
        return EXIT_ERROR
    from codeseek.service import connect
    from codeseek.tui.app import CodeseekApp
    from codeseek.tui.backend import LocalIndexer

    if len(repos) > 1:
        # several repositories: each answered by its daemon or in process, no builder
        # (index each with `codeseek index`); each hit names its repository
        return _run_ui(CodeseekApp(_connect_all(repos, args, err), builder=None), out)
    chosen = args.repo or args.path
    root = Path(chosen) if chosen else find_repo_root(Path.cwd())
    if not root.is_dir():
        raise RepositoryNotFound(f"{root}: no such folder")
    local = LocalIndexer(root, index_dir=args.index_dir, model=args.model,
                         backend=args.backend)
    builder: LocalIndexer | None = local
    searcher: SearchService | None = None
    try:
        searcher = connect(root, index_dir=args.index_dir, model=args.model,
                           backend=args.backend, embedder=local.embedder)
    except IndexNotFound:
        searcher = None
    if searcher is not None and searcher.daemon_status() is not None:
        builder = None  # a running daemon answers, warm, and keeps the index fresh
    return _run_ui(CodeseekApp(searcher, repo=root.resolve(), builder=builder), out)


def _run_ui(app: CodeseekApp, out: TextIO) -> int:
    try:
        app.run()
    finally:
        app.close_searcher()
    for place in app.locations:
        print(printable(place), file=out)
    return EXIT_ERROR if app.return_code else EXIT_OK


# -- eval and tune -----------------------------------------------------------------


def _eval_parser(commands: Any) -> None:
    evaluate = commands.add_parser(
        "eval", help="measure how well search finds this repository's held-out docstrings",
        description="Recall checks: hold out a share of the documented units, search for each "
                    "by its doc summary among code with the docs removed, and report recall@1, "
                    "@5, @10 and MRR for keyword, dense, HNSW and served search; the same "
                    "with each unit's identifiers removed from its doc (name-blind); and, "
                    "with a question file, hit@1, @5, @10 and MRR@10 of its questions as "
                    "search serves them.")
    _repo_arguments(evaluate)
    _split_arguments(evaluate)
    evaluate.add_argument("--questions", metavar="FILE",
                          help="also score a JSON Lines file of questions and their answers "
                               "(default: questions.jsonl in the index folder, if present)")
    evaluate.add_argument("--json", action="store_true", help="one JSON document")
    evaluate.add_argument("--html", metavar="FILE",
                          help="also write a small self-contained HTML report to FILE")
    _common_index_options(evaluate, tier=True)


def _tune_parser(commands: Any) -> None:
    tune = commands.add_parser(
        "tune", help="adapt search to this repository with a query adapter",
        description="Train a query-side adapter on the training share of the repository's "
                    "docstrings (in-batch negatives, held near the plain model); keep it only "
                    "if it raises the held-out MRR of served search beyond noise and lowers "
                    "neither the name-blind figure nor a question file's. Fewer than 300 "
                    "training pairs: no adapter, and tune says why.")
    _repo_arguments(tune)
    _split_arguments(tune)
    tune.add_argument("--batch-size", type=int, metavar="N",
                      help="pairs per training batch (default: 256)")
    tune.add_argument("--questions", metavar="FILE",
                      help="a JSON Lines file of questions and their answers the adapter must "
                           "not make worse (default: questions.jsonl in the index folder, if "
                           "present)")
    tune.add_argument("--remove", action="store_true",
                      help="delete the adapter; search goes back to the plain model")
    tune.add_argument("--json", action="store_true", help="one JSON document")
    _common_index_options(tune, tier=True)


def _repo_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("path", nargs="?", default=None, metavar="PATH",
                        help="repository root (default: the current folder's repository)")
    parser.add_argument("--repo", metavar="PATH", help="repository root (the same as PATH)")


def _split_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--holdout", type=float, metavar="SHARE",
                        help="share of the documented units held out (default: 0.2, or the "
                             "adapter's)")
    parser.add_argument("--seed", type=_seed, metavar="N",
                        help="changes which units are held out (default: 0, or the adapter's)")
    parser.add_argument("--by-file", action="store_true", default=None,
                        help="hold out whole files, so no held-out unit shares a file with a "
                             "training unit")


def _seed(text: str) -> int:
    """A split seed: a whole number, 0 or more (the split hashes it; numpy needs it >= 0)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number, not {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be 0 or more, not {value}")
    return value


def _one_repo(args: argparse.Namespace) -> str | None:
    if args.path and args.repo and Path(args.path).resolve() != Path(args.repo).resolve():
        raise InvalidQuery("name the repository once: PATH or --repo, not both")
    chosen: str | None = args.repo or args.path
    return chosen


def cmd_eval(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.evaluate import check_report_path, write_html

    if args.html:
        check_report_path(Path(args.html))
    with _open(_one_repo(args), args, create=False) as index:
        report = index.evaluate(holdout=args.holdout, seed=args.seed, by_file=args.by_file,
                                questions=Path(args.questions) if args.questions else None,
                                progress=_LineProgress(err))
    if args.html:
        write_html(report, Path(args.html))
    if args.json:
        out.write(json.dumps(report.to_json(), ensure_ascii=False) + "\n")
    else:
        print(printable_block(report.to_text()), file=out)  # it names the repository
    return EXIT_OK


def cmd_tune(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    with _open(_one_repo(args), args, create=False) as index:
        if args.remove:
            removed = index.remove_adapter()
            print("removed the query adapter; search uses the plain model" if removed
                  else "there is no query adapter to remove", file=out)
            return EXIT_OK
        report = index.tune(holdout=args.holdout, seed=args.seed, by_file=args.by_file,
                            batch_size=args.batch_size,
                            questions=Path(args.questions) if args.questions else None,
                            progress=_LineProgress(err))
    if args.json:
        out.write(json.dumps(report.to_json(), ensure_ascii=False) + "\n")
    else:
        print(printable_block(report.to_text()), file=out)  # it names the repository
    return EXIT_OK


# -- mcp ---------------------------------------------------------------------------


def _mcp_parser(commands: Any) -> None:
    mcp = commands.add_parser(
        "mcp", help="serve coding agents and editors: a Model Context Protocol server on stdio",
        description="Answer Model Context Protocol requests on stdin and stdout with the tools "
                    "search, neighbours, outline and status, through the running daemon when "
                    "one watches the index (none is started), else in this process. Needs the "
                    "mcp extra: pip install 'codeseek[mcp]'.")
    mcp.add_argument("--repo", action="append", dest="repos", default=[], metavar="PATH",
                     help="a repository to serve (repeatable; default: the current folder's "
                          "repository); with several, the tools take a repo argument")
    _common_index_options(mcp)


def cmd_mcp(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    if args.index_dir and len(args.repos) > 1:
        raise UsageError("--index-dir names one index; give it with one --repo")
    roots = [_root(repo) for repo in args.repos] or [_root(None)]
    import importlib.util

    if importlib.util.find_spec("mcp") is None:  # the optional extra
        raise CodeseekError("codeseek mcp needs the mcp package: pip install 'codeseek[mcp]'")
    from codeseek.mcp_server import Tools, open_repositories, serve_stdio

    tools = Tools(open_repositories(roots, index_dir=args.index_dir, model=args.model,
                                    backend=args.backend))
    tools.warm_in_background()  # the model loads while the SDK does
    serve_stdio(tools)
    return EXIT_OK


COMMANDS = {"index": cmd_index, "search": cmd_search, "status": cmd_status,
            "watch": cmd_watch, "outline": cmd_outline, "ui": cmd_ui,
            "eval": cmd_eval, "tune": cmd_tune, "mcp": cmd_mcp}


def main(argv: Sequence[str] | None = None, out: TextIO | None = None,
         err: TextIO | None = None) -> int:
    """Run one command; returns the exit status."""
    out = out or sys.stdout
    err = err or sys.stderr
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(out)
        return EXIT_USAGE
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    try:
        return COMMANDS[args.command](args, out, err)
    except UsageError as exc:
        print(f"error: {printable(str(exc))}", file=err)
        return EXIT_USAGE
    except CodeseekError as exc:
        print(f"error: {printable(str(exc))}", file=err)  # it may quote a file name
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("error: interrupted; the index keeps what was committed", file=err)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        return EXIT_OK


def run() -> None:
    """Console-script entry point."""
    sys.exit(main())


if __name__ == "__main__":
    run()
