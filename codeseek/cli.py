"""The command line: thin, one library call per command.

Each command parses its options, calls the library, prints, and turns a
:class:`~codeseek.errors.CodeseekError` into one ``error: ...`` line on stderr
and exit status 1. Heavy modules are imported inside the commands, so
``codeseek --help`` answers at once.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from codeseek import __version__
from codeseek.errors import CodeseekError, IndexLocked, InvalidQuery, RepositoryNotFound

if TYPE_CHECKING:
    from codeseek.api import Index
    from codeseek.client import DaemonClient
    from codeseek.indexer import UpdateSummary
    from codeseek.search import SearchHit

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
  codeseek search "parse the config file" --lang python -k 5 --json
  codeseek outline src/billing.py     list the units codeseek extracts from a file"""


def _common_index_options(parser: argparse.ArgumentParser, *, model: bool = True) -> None:
    parser.add_argument("--index-dir", metavar="DIR",
                        help="index folder (default: <repo>/.codeseek)")
    if model:
        parser.add_argument("--model", metavar="PATH",
                            help="local sentence-transformers model folder "
                                 "(default: the packaged all-MiniLM-L6-v2)")
        parser.add_argument("--backend", choices=("onnx", "torch", "fake"),
                            help="embedding backend (default: onnx)")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every command."""
    parser = argparse.ArgumentParser(
        prog="codeseek", description=DESCRIPTION, epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"codeseek {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")

    index = commands.add_parser("index", help="build or bring up to date the index of a repository",
                                description="Build the index of a repository, or bring it up "
                                            "to date; only changed files are parsed and only "
                                            "new code is embedded.")
    index.add_argument("path", nargs="?", default=".", metavar="PATH",
                       help="repository root (default: the current folder)")
    _common_index_options(index)
    index.add_argument("--rebuild", action="store_true",
                       help="discard the existing index and build it from scratch")
    index.add_argument("-q", "--quiet", action="store_true", help="no progress bar")

    search = commands.add_parser("search", help="rank the units that match a query",
                                 description="Rank the functions, methods and classes that "
                                             "match a natural-language query.")
    search.add_argument("query", nargs="?", metavar="QUERY", help="what you are looking for")
    search.add_argument("--repo", metavar="PATH",
                        help="repository root (default: the current folder's repository)")
    search.add_argument("-k", type=int, default=10, metavar="N",
                        help="number of results (default: 10)")
    search.add_argument("--lang", action="append", default=[], metavar="L",
                        help="only this language (repeatable)")
    search.add_argument("--path", action="append", default=[], metavar="GLOB",
                        help="only files matching this gitignore-style glob (repeatable)")
    search.add_argument("--kind", action="append", default=[], metavar="K",
                        help="only this kind: function, method or class (repeatable)")
    search.add_argument("--json", action="store_true", help="one JSON object per hit (JSON Lines)")
    search.add_argument("--batch", metavar="FILE",
                        help="read one query per line from FILE (- for stdin); "
                             "answers in JSON Lines")
    _common_index_options(search)

    status = commands.add_parser("status", help="what the index holds and how fresh it is",
                                 description="Show what the index holds, what was left out "
                                             "and why, and whether it is up to date.")
    status.add_argument("path", nargs="?", default=None, metavar="PATH",
                        help="repository root (default: the current folder's repository)")
    _common_index_options(status, model=False)
    status.add_argument("--json", action="store_true", help="one JSON object")

    watch = commands.add_parser("watch", help="index, then keep the index fresh and answer "
                                              "queries (runs in the foreground)",
                                description="Index the repository, then watch it: every saved "
                                            "change is indexed within a second, and searches "
                                            "are answered by this warm process through a "
                                            "socket in the index folder. Stop with Ctrl-C.")
    watch.add_argument("path", nargs="?", default=".", metavar="PATH",
                       help="repository root (default: the current folder)")
    _common_index_options(watch)
    watch.add_argument("--poll", action="store_true",
                       help="watch by polling instead of inotify (network file systems)")

    outline = commands.add_parser("outline", help="list the units extracted from a file or tree",
                                  description="List the units codeseek extracts from a file or "
                                              "a folder, without an index or a model.")
    outline.add_argument("path", metavar="PATH", help="a source file or a folder")
    outline.add_argument("--json", action="store_true", help="one JSON object per unit")

    ui = commands.add_parser("ui", help="search as you type in the terminal and read the hits",
                             description="Search as you type, read each hit's code, and open "
                                         "it in your editor ($VISUAL or $EDITOR).")
    ui.add_argument("path", nargs="?", default=None, metavar="PATH",
                    help="repository root (default: the current folder's repository)")
    ui.add_argument("--repo", metavar="PATH", help="repository root (the same as PATH)")
    _common_index_options(ui)
    _add_check_parsers(commands)
    return parser


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

    return open_index(_root(repo), index_dir=args.index_dir,
                      model=getattr(args, "model", None),
                      backend=getattr(args, "backend", None), create=create)


def _running_daemon_pid(repo: str | None, args: argparse.Namespace) -> int | None:
    """The pid of a daemon that answers on this index's socket, if one does."""
    from codeseek.client import DaemonClient, DaemonUnavailable
    from codeseek.config import load_settings

    client = DaemonClient(load_settings(_root(repo), index_dir=args.index_dir).index_dir)
    try:
        return int(client.status()["daemon"]["pid"])
    except (DaemonUnavailable, CodeseekError, KeyError, TypeError, ValueError):
        return None


def _daemon_client(repo: str | None, args: argparse.Namespace) -> DaemonClient | None:
    """A client of the daemon serving this index, if one runs and fits the options."""
    from codeseek.client import DaemonClient
    from codeseek.config import load_settings

    if getattr(args, "model", None) or getattr(args, "backend", None):
        return None  # an explicit model or backend is answered in this process
    settings = load_settings(_root(repo), index_dir=args.index_dir)
    client = DaemonClient(settings.index_dir)
    return client if client.socket_path.exists() else None


# -- index -------------------------------------------------------------------------


def cmd_index(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.api import remove_index_files
    from codeseek.config import load_settings

    daemon_pid = _running_daemon_pid(args.path, args)
    if daemon_pid is not None:
        if args.rebuild:
            raise IndexLocked(f"a codeseek daemon (pid {daemon_pid}) watches this index; "
                              "stop it before rebuilding")
        print(f"a codeseek daemon (pid {daemon_pid}) keeps this index up to date; "
              "nothing to do", file=out)
        return EXIT_OK
    if args.rebuild:
        settings = load_settings(_root(args.path), index_dir=args.index_dir)
        remove_index_files(settings.index_dir)
    with _open(args.path, args, create=True) as index:
        _print_notes(index, err)
        if args.quiet or not err.isatty():
            summary = index.update(progress=_LineProgress(err) if not args.quiet else None)
        else:
            summary = _update_with_bar(index, err)
    print(format_summary(summary), file=out)
    for path in summary.syntax_warnings[:20]:
        print(f"warning: {path}: syntax errors; indexed the units that could be recovered",
              file=err)
    if len(summary.syntax_warnings) > 20:
        print(f"warning: {len(summary.syntax_warnings) - 20} more files with syntax errors "
              "(see `codeseek status`)", file=err)
    return EXIT_OK


def _print_notes(index: Index, err: TextIO) -> None:
    """The index folder's warnings (said once, when the index is made)."""
    for note in index.notes:
        print(f"warning: {note}", file=err)


class _LineProgress:
    """Progress for a non-terminal stderr: one line when each stage starts."""

    def __init__(self, err: TextIO) -> None:
        self.err = err
        self.stage = ""

    def __call__(self, stage: str, done: int, total: int) -> None:
        if stage != self.stage:
            self.stage = stage
            label = {"scan": "scanning files", "parse": "parsing changed files",
                     "embed": f"embedding {total} new units", "save": "saving"}.get(stage, stage)
            print(f"codeseek: {label}", file=self.err, flush=True)


def _update_with_bar(index: Index, err: TextIO) -> UpdateSummary:
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

        return index.update(progress=progress)


def format_summary(summary: UpdateSummary) -> str:
    """The one line printed after indexing."""
    skipped = sum(summary.skipped.values())
    return (f"indexed {summary.files} files, {summary.units} units: "
            f"{summary.added} added, {summary.changed} changed, {summary.removed} removed, "
            f"{summary.embedded} embedded, {skipped} files skipped, "
            f"{summary.seconds:.1f} s")


# -- search ------------------------------------------------------------------------


def cmd_search(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    if args.batch is None and args.query is None:
        raise InvalidQuery("give a QUERY or --batch FILE")
    if args.batch is not None and args.query is not None:
        raise InvalidQuery("give a QUERY or --batch FILE, not both")
    from codeseek.client import DaemonUnavailable

    queries = _read_batch(args.batch) if args.batch is not None else [args.query]
    options = {"languages": args.lang, "paths": args.path, "kinds": args.kind}
    results: list[list[SearchHit]] | None = None
    client = _daemon_client(args.repo, args)
    if client is not None and queries:
        try:
            results = client.search_many(queries, args.k, **options)
        except DaemonUnavailable:
            results = None  # a stale socket: answer in this process
    if results is None:
        with _open(args.repo, args, create=False) as index:
            results = index.search_many(queries, args.k, **options) if queries else []
    if args.batch is not None:
        for hits in results:
            _print_json(hits, out)
        return EXIT_OK
    hits = results[0]
    if args.json:
        _print_json(hits, out)
    else:
        _print_hits(hits, out)
    return EXIT_OK


def _read_batch(source: str) -> list[str]:
    try:
        text = sys.stdin.read() if source == "-" else Path(source).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InvalidQuery(f"{source}: cannot read the batch file: {exc}") from exc
    return [line.strip() for line in text.splitlines() if line.strip()]


def _print_json(hits: Sequence[SearchHit], out: TextIO) -> None:
    for hit in hits:
        out.write(json.dumps(hit.to_json(), ensure_ascii=False) + "\n")


def _print_hits(hits: Sequence[SearchHit], out: TextIO) -> None:
    if not hits:
        print("no matches; try other words or fewer filters", file=out)
        return
    for hit in hits:
        print(f"{hit.rank:>2}. {hit.qualname}  [{hit.kind}, {hit.language}]  "
              f"{hit.path}:{hit.start_line}", file=out)
        if hit.doc_summary:
            print(f"    {_clip(hit.doc_summary, 100)}", file=out)
        for number, line in enumerate(hit.snippet.splitlines()[:3], hit.start_line):
            print(f"    {number:>5} | {_clip(line, 90)}", file=out)
        print(file=out)


def _clip(text: str, width: int) -> str:
    return text if len(text) <= width else text[: width - 3] + "..."


# -- status ------------------------------------------------------------------------


def cmd_status(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.client import DaemonUnavailable

    with _open(args.path, args, create=False) as index:
        status = index.status()
    daemon: dict[str, Any] | None = None
    client = _daemon_client(args.path, args)
    if client is not None:
        try:
            daemon = client.status()["daemon"]
        except DaemonUnavailable:
            daemon = None
    if args.json:
        record = status.to_json()
        record["daemon"] = daemon
        out.write(json.dumps(record, ensure_ascii=False) + "\n")
        return EXIT_OK
    updated = (time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(status.updated_at))
               if status.updated_at else "never")
    print(f"repository   {status.repo}", file=out)
    print(f"index        {status.index_dir} ({status.bytes_on_disk / 1e6:.1f} MB)", file=out)
    print(f"model        {status.model_id or 'none yet'} ({status.dim or '-'} dimensions)",
          file=out)
    print(f"contents     {status.files} files, {status.units} units", file=out)
    for language, count in sorted(status.languages.items()):
        print(f"             {count:>6} {language}", file=out)
    print(f"updated      {updated} (generation {status.generation}; vector index "
          f"{'in sync' if status.vectors_in_sync else 'will be rebuilt on next search'})",
          file=out)
    if status.files_with_syntax_errors:
        print(f"warnings     {status.files_with_syntax_errors} files with syntax errors",
              file=out)
    print(f"adapter      {_adapter_words(status.adapter, status.model_id)}", file=out)
    if daemon is None:
        print("daemon       not running (searches load the index in their own process)",
              file=out)
    else:
        last = (time.strftime("%H:%M:%S", time.localtime(daemon["last_update"]))
                if daemon["last_update"] else "none yet")
        print(f"daemon       pid {daemon['pid']}, {daemon['state']}, watching by "
              f"{daemon['watcher']}, {daemon['pending']} changes pending, last update {last}",
              file=out)
        if daemon["last_error"]:
            print(f"             last error: {daemon['last_error']}", file=out)
    if status.skipped:
        print("left out", file=out)
        for reason, count in sorted(status.skipped.items(), key=lambda kv: -kv[1]):
            print(f"             {count:>6} {reason}", file=out)
    return EXIT_OK


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
                "path": unit.path, "language": unit.language, "kind": unit.kind,
                "name": unit.name, "qualname": unit.qualname, "signature": unit.signature,
                "start_line": unit.start_line, "end_line": unit.end_line,
                "has_doc": bool(unit.doc), "doc_summary": unit.doc_summary,
            }
            out.write(json.dumps(record, ensure_ascii=False) + "\n")
        else:
            out.write(f"{unit.path}:{unit.start_line}-{unit.end_line} {unit.kind} "
                      f"{unit.qualname}\n")
    return EXIT_OK


def cmd_watch(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.daemon import run_foreground

    def log(message: str) -> None:
        print(message, file=err, flush=True)

    with _open(args.path, args, create=True) as index:
        _print_notes(index, err)
        run_foreground(index, log, poll=args.poll)
    return EXIT_OK


# -- ui ----------------------------------------------------------------------------


def cmd_ui(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from codeseek.errors import IndexNotFound

    if args.path and args.repo and Path(args.path).resolve() != Path(args.repo).resolve():
        raise InvalidQuery("name the repository once: PATH or --repo, not both")
    if not (sys.stdin.isatty() and sys.stdout.isatty()):
        print("error: codeseek ui needs a terminal; in scripts use `codeseek search --json`",
              file=err)
        return EXIT_ERROR
    from codeseek.client import DaemonUnavailable
    from codeseek.tui.app import CodeseekApp
    from codeseek.tui.backend import DaemonSearcher, LocalIndexer, SearchBackend

    chosen = args.repo or args.path
    root = Path(chosen) if chosen else find_repo_root(Path.cwd())
    if not root.is_dir():
        raise RepositoryNotFound(f"{root}: no such folder")
    searcher: SearchBackend | None = None
    builder: LocalIndexer | None = None
    client = _daemon_client(str(root), args)
    if client is not None:
        try:
            client.status()
            searcher = DaemonSearcher(client)  # a running daemon answers, warm and fresh
        except DaemonUnavailable:
            searcher = None
    if searcher is None:
        builder = LocalIndexer(root, index_dir=args.index_dir, model=args.model,
                               backend=args.backend)
        try:
            searcher = builder.open_searcher()
        except IndexNotFound:
            searcher = None
    app = CodeseekApp(searcher, repo=root.resolve(), builder=builder)
    try:
        app.run()
    finally:
        app.close_searcher()
    for place in app.locations:
        print(place, file=out)
    return EXIT_ERROR if app.return_code else EXIT_OK


# -- eval and tune -----------------------------------------------------------------


def _add_check_parsers(commands: Any) -> None:
    """The parsers of ``eval`` and ``tune``."""
    evaluate = commands.add_parser(
        "eval", help="measure how well search finds this repository's held-out docstrings",
        description="Recall checks: hold out a share of the documented units, search for each "
                    "by its doc summary among code with the docs removed, and report recall@1, "
                    "@5, @10 and MRR for keyword, dense, HNSW and served search.")
    _repo_arguments(evaluate)
    _split_arguments(evaluate)
    evaluate.add_argument("--json", action="store_true", help="one JSON document")
    evaluate.add_argument("--html", metavar="FILE",
                          help="also write a small self-contained HTML report to FILE")
    _common_index_options(evaluate)
    tune = commands.add_parser(
        "tune", help="adapt search to this repository with a query adapter",
        description="Train a query-side adapter on the training share of the repository's "
                    "docstrings (in-batch negatives); keep it only if it raises the held-out "
                    "MRR of served search.")
    _repo_arguments(tune)
    _split_arguments(tune)
    tune.add_argument("--batch-size", type=int, metavar="N",
                      help="pairs per training batch (default: 256)")
    tune.add_argument("--remove", action="store_true",
                      help="delete the adapter; search goes back to the plain model")
    tune.add_argument("--json", action="store_true", help="one JSON document")
    _common_index_options(tune)


def _repo_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("path", nargs="?", default=None, metavar="PATH",
                        help="repository root (default: the current folder's repository)")
    parser.add_argument("--repo", metavar="PATH", help="repository root (the same as PATH)")


def _split_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--holdout", type=float, metavar="SHARE",
                        help="share of the documented units held out (default: 0.2, or the "
                             "adapter's)")
    parser.add_argument("--seed", type=int, metavar="N",
                        help="changes which units are held out (default: 0, or the adapter's)")
    parser.add_argument("--by-file", action="store_true", default=None,
                        help="hold out whole files, so no held-out unit shares a file with a "
                             "training unit")


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
                                progress=_LineProgress(err))
    if args.html:
        write_html(report, Path(args.html))
    if args.json:
        out.write(json.dumps(report.to_json(), ensure_ascii=False) + "\n")
    else:
        print(report.to_text(), file=out)
    return EXIT_OK


def cmd_tune(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    with _open(_one_repo(args), args, create=False) as index:
        if args.remove:
            removed = index.remove_adapter()
            print("removed the query adapter; search uses the plain model" if removed
                  else "there is no query adapter to remove", file=out)
            return EXIT_OK
        report = index.tune(holdout=args.holdout, seed=args.seed, by_file=args.by_file,
                            batch_size=args.batch_size, progress=_LineProgress(err))
    if args.json:
        out.write(json.dumps(report.to_json(), ensure_ascii=False) + "\n")
    else:
        print(report.to_text(), file=out)
    return EXIT_OK


COMMANDS = {"index": cmd_index, "search": cmd_search, "status": cmd_status,
            "watch": cmd_watch, "outline": cmd_outline, "ui": cmd_ui,
            "eval": cmd_eval, "tune": cmd_tune}


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
    except CodeseekError as exc:
        print(f"error: {exc}", file=err)
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
