"""The command line: outputs, JSON Lines, batches, and error messages word for word."""

from __future__ import annotations

import ast
import io
import json
import os
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest
from sample_files import sample_source_files

from codeseek.api import IndexStatus
from codeseek.cli import main
from codeseek.hits import SearchHit


def run_cli(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


@pytest.fixture
def indexed(sample_copy: Path) -> Path:
    code, out, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    return sample_copy


def test_index_prints_one_summary_line(sample_copy: Path) -> None:
    code, out, _ = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0
    lines = out.strip().splitlines()
    assert len(lines) == 1
    assert lines[0].startswith(f"indexed {len(sample_source_files())} files, ")
    assert " 0 changed, 0 removed, " in lines[0]


def test_second_index_touches_nothing(indexed: Path) -> None:
    code, out, _ = run_cli("index", str(indexed), "--backend", "fake", "-q")
    assert code == 0
    assert "0 added, 0 changed, 0 removed, 0 embedded" in out


def test_search_json_lines_have_the_contract_fields(indexed: Path) -> None:
    code, out, err = run_cli("search", "refund a rider", "--repo", str(indexed),
                             "--backend", "fake", "--json", "-k", "4")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    assert [r["rank"] for r in records] == [1, 2, 3, 4]
    required = {"query", "rank", "score", "path", "start_line", "end_line", "language",
                "kind", "name", "qualname", "signature", "snippet"}
    for record in records:
        assert required <= set(record)
        assert record["query"] == "refund a rider"
        assert not Path(record["path"]).is_absolute()
        assert (indexed / record["path"]).is_file()
    scores = [r["score"] for r in records]
    assert scores == sorted(scores, reverse=True)


def test_batch_gives_the_same_ranking_as_one_by_one(indexed: Path, tmp_path: Path) -> None:
    queries = ["refund a rider", "decode the dock packet", "assign a mechanic to a ticket"]
    batch = tmp_path / "queries.txt"
    batch.write_text("\n".join(queries) + "\n\n", encoding="utf-8")
    code, out, _ = run_cli("search", "--batch", str(batch), "--repo", str(indexed),
                           "--backend", "fake", "-k", "5")
    assert code == 0
    batched = [json.loads(line) for line in out.splitlines()]
    for query in queries:
        _, single, _ = run_cli("search", query, "--repo", str(indexed), "--backend", "fake",
                               "--json", "-k", "5")
        expected = [(r["path"], r["qualname"]) for r in map(json.loads, single.splitlines())]
        got = [(r["path"], r["qualname"]) for r in batched if r["query"] == query]
        assert got == expected


def test_batch_answers_every_line(indexed: Path, tmp_path: Path) -> None:
    batch = tmp_path / "queries.txt"
    batch.write_text("refund a rider\n\n   \ndecode the dock packet\n", encoding="utf-8")
    code, out, err = run_cli("search", "--batch", str(batch), "--repo", str(indexed),
                             "--backend", "fake", "-k", "2")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    assert [(r["query"], r["rank"]) for r in records] == [
        ("refund a rider", 1), ("refund a rider", 2), ("", None), ("", None),
        ("decode the dock packet", 1), ("decode the dock packet", 2)]
    assert records[2] == {"query": "", "rank": None, "hits": 0}
    assert all("hits" not in r for r in records if r["rank"] is not None)


def test_batch_query_without_hits_gets_a_record(indexed: Path, tmp_path: Path) -> None:
    batch = tmp_path / "queries.txt"
    batch.write_text("refund a rider\ndecode the dock packet\n", encoding="utf-8")
    code, out, err = run_cli("search", "--batch", str(batch), "--repo", str(indexed),
                             "--backend", "fake", "--files", "no-such-folder/")
    assert code == 0, err
    assert out == ('{"query": "refund a rider", "rank": null, "hits": 0}\n'
                   '{"query": "decode the dock packet", "rank": null, "hits": 0}\n')


def test_batch_file_that_is_missing(indexed: Path, tmp_path: Path) -> None:
    missing = tmp_path / "nothing.txt"
    code, out, err = run_cli("search", "--batch", str(missing), "--repo", str(indexed),
                             "--backend", "fake")
    assert (code, out) == (1, "")
    assert err == f"error: {missing}: no such file\n"


def test_filters_narrow_results(indexed: Path) -> None:
    code, out, _ = run_cli("search", "decode packet", "--repo", str(indexed), "--backend",
                           "fake", "--json", "--language", "go", "-k", "20")
    assert code == 0
    records = [json.loads(line) for line in out.splitlines()]
    assert records and {r["language"] for r in records} == {"go"}
    code, out, _ = run_cli("search", "fare", "--repo", str(indexed), "--backend", "fake",
                           "--json", "--files", "python/kestrune/billing/", "--unit", "method")
    records = [json.loads(line) for line in out.splitlines()]
    assert records
    assert all(r["path"].startswith("python/kestrune/billing/") for r in records)
    assert {r["kind"] for r in records} == {"method"}


def test_the_old_filter_spellings_still_work(indexed: Path) -> None:
    new = run_cli("search", "fare", "--repo", str(indexed), "--backend", "fake", "--json",
                  "--language", "python", "--files", "python/kestrune/billing/",
                  "--unit", "method")
    old = run_cli("search", "fare", "--repo", str(indexed), "--backend", "fake", "--json",
                  "--lang", "python", "--path", "python/kestrune/billing/", "--kind", "method")
    assert old == new and new[0] == 0 and new[1]
    mixed = run_cli("search", "fare", "--repo", str(indexed), "--backend", "fake", "--json",
                    "--lang", "go", "--language", "python", "-k", "100")
    assert {json.loads(line)["language"] for line in mixed[1].splitlines()} == {"go", "python"}


def test_search_help_names_the_new_options_only() -> None:
    from codeseek.cli import build_parser

    parser = build_parser()
    subparsers = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    text = subparsers.choices["search"].format_help()  # type: ignore[attr-defined]
    for option in ("--language L", "--files GLOB", "--unit K"):
        assert option in text
    for old in ("--lang ", "--path ", "--kind "):
        assert old not in text


# -- --files read from where you stand -------------------------------------------------


def _json_paths(out: str) -> set[str]:
    return {json.loads(line)["path"] for line in out.splitlines()}


def test_files_is_read_from_the_current_folder(indexed: Path,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(indexed / "python" / "kestrune")
    billing = "python/kestrune/billing/"
    for pattern in ("billing/", "./billing", "./billing/", "../kestrune/billing/",
                    "billing/*.py", str(indexed / billing), "/billing/"):
        code, out, err = run_cli("search", "fare", "--backend", "fake", "--json", "-k", "50",
                                 "--files", pattern)
        assert code == 0, (pattern, err)
        paths = _json_paths(out)
        assert paths and all(p.startswith(billing) for p in paths), pattern
    # a plain pattern applies within the current folder only: no Go file is under it
    code, out, _ = run_cli("search", "decode packet", "--backend", "fake", "--json",
                           "--files", "*.go")
    assert (code, out) == (0, "")
    monkeypatch.chdir(indexed)
    for pattern in ("billing/", "/python/kestrune/billing/"):  # a leading / anchors, as before
        code, out, _ = run_cli("search", "fare", "--backend", "fake", "--json", "-k", "50",
                               "--files", pattern)
        assert code == 0 and _json_paths(out), pattern
        assert all(p.startswith(billing) for p in _json_paths(out)), pattern


def test_files_outside_the_repository_is_an_error(indexed: Path, tmp_path: Path,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(indexed / "python")
    code, out, err = run_cli("search", "fare", "--backend", "fake", "--files", "../../x")
    assert (code, out) == (2, "")
    assert err == (f"error: file pattern '../../x' points outside the repository "
                   f"{indexed.resolve()}\n")
    code, _, err = run_cli("search", "fare", "--backend", "fake", "--files", str(tmp_path))
    assert code == 2
    assert err == (f"error: file pattern '{tmp_path}' points outside the repository "
                   f"{indexed.resolve()}\n")


def test_files_from_outside_the_repository_reads_from_its_root(indexed: Path,
                                                               tmp_path: Path,
                                                               monkeypatch: pytest.MonkeyPatch
                                                               ) -> None:
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)  # as scripts call it: --repo from another folder
    code, out, _ = run_cli("search", "fare", "--repo", str(indexed), "--backend", "fake",
                           "--json", "--files", "billing/")
    assert code == 0
    assert all(p.startswith("python/kestrune/billing/") for p in _json_paths(out))


def _git(cwd: Path, *args: str) -> str:
    env = {"PATH": os.environ.get("PATH", ""), "HOME": str(cwd), "GIT_CONFIG_NOSYSTEM": "1",
           "GIT_CONFIG_GLOBAL": os.devnull}
    return subprocess.run(["git", *args], cwd=cwd, env=env, capture_output=True, text=True,
                          check=True).stdout


@pytest.mark.skipif(shutil.which("git") is None, reason="needs git")
def test_files_patterns_select_what_git_pathspecs_select(sample_copy: Path) -> None:
    """From a subfolder, each pattern picks the files git's pathspec picks there."""
    import pathspec

    from codeseek.filtering import files_pattern

    _git(sample_copy, "init", "-q", ".")
    _git(sample_copy, "add", "-A")
    every = [p for p in _git(sample_copy, "ls-files", "-z").split("\0") if p]
    root = sample_copy.resolve()
    cases = {  # folder you stand in -> patterns whose meaning git's pathspecs share
        "python/kestrune": ["billing/", "./billing", "../kestrune/billing", "*.py", ".",
                            "billing/fares.py", str(root / "go"), "../../rust/"],
        "python": ["kestrune/billing/", "*.py", "../ts", "./kestrune/uploads.py"],
        "": ["python/kestrune/billing/", "go/", "./rust", "."],
    }
    for folder, patterns in cases.items():
        cwd = root / folder if folder else root
        for pattern in patterns:
            ours = pathspec.GitIgnoreSpec.from_lines([files_pattern(pattern, root, cwd)])
            mine = {p for p in every if ours.match_file(p)}
            # reference: git ls-files with the same pathspec, run in the same folder
            theirs = {p for p in _git(cwd, "ls-files", "--full-name", "-z", "--",
                                      pattern).split("\0") if p}
            assert mine == theirs, (folder, pattern)
            assert theirs, (folder, pattern)


# -- usage errors exit 2 ---------------------------------------------------------------


@pytest.mark.parametrize(("argv", "message"), [
    ((), "give a QUERY or --batch FILE"),
    (("q", "--batch", "-"), "give a QUERY or --batch FILE, not both"),
    (("  ",), "the query is empty; type what you are looking for"),
    (("q", "-k", "0"), "-k must be at least 1, not 0"),
])
def test_search_usage_errors_exit_2(indexed: Path, argv: tuple[str, ...], message: str) -> None:
    code, out, err = run_cli("search", *argv, "--repo", str(indexed), "--backend", "fake")
    assert (code, out) == (2, "")
    assert err == f"error: {message}\n"


def test_language_names_are_read_in_any_case(indexed: Path) -> None:
    lower = run_cli("search", "refund", "--repo", str(indexed), "--backend", "fake", "--json",
                    "--language", "python")
    upper = run_cli("search", "refund", "--repo", str(indexed), "--backend", "fake", "--json",
                    "--language", "Python")
    assert upper == lower and lower[0] == 0 and lower[1]


def test_a_languages_own_word_for_a_class_selects_classes(indexed: Path) -> None:
    classes = run_cli("search", "tariff peak fare", "--repo", str(indexed), "--backend",
                      "fake", "--json", "--unit", "class", "-k", "50")
    for word in ("struct", "Trait", "interface", "enum"):
        same = run_cli("search", "tariff peak fare", "--repo", str(indexed), "--backend",
                       "fake", "--json", "--unit", word, "-k", "50")
        assert same == classes, word
    assert {json.loads(line)["kind"] for line in classes[1].splitlines()} == {"class"}


def test_unit_words_come_from_the_language_queries() -> None:
    """Each word is a grammar keyword naming a node type some language captures as a class."""
    import re as regex

    from codeseek.filtering import unit_words
    from codeseek.languages import all_specs

    words = unit_words()
    assert {"struct", "trait", "interface", "enum", "module", "union", "record"} <= set(words)
    for word, kind in words.items():
        if word in ("function", "method", "class"):
            assert kind == word
            continue
        assert kind == "class"
        spelled = [spec.name for spec in all_specs()
                   if regex.search(rf"\({word}(_\w+)?\b", spec.query_source())
                   and spec.language().id_for_node_kind(word, False) is not None]
        assert spelled, word


def test_human_output_names_file_and_line(indexed: Path) -> None:
    code, out, _ = run_cli("search", "refund", "--repo", str(indexed), "--backend", "fake",
                           "-k", "1")
    assert code == 0
    first = out.splitlines()[0]
    assert first.startswith(" 1. ")
    path_line = first.rsplit(" ", 1)[-1]
    path, line = path_line.rsplit(":", 1)
    assert (indexed / path).is_file() and int(line) >= 1


def _hit(snippet: str, doc: str, language: str = "python") -> SearchHit:
    return SearchHit(query="q", rank=1, score=1.0, similarity=0.5, path="a.py", start_line=10,
                     end_line=30, language=language, kind="function", name="f", qualname="f",
                     signature="def f(a)", doc_summary=doc, snippet=snippet, unit_id=1)


@pytest.mark.parametrize(("snippet", "expected"), [
    ('def f(a):\n    """Add one."""\n    b = a + 1\n    return b\n',
     [(10, "def f(a):"), (12, "    b = a + 1"), (13, "    return b")]),
    ('def f(\n    a,\n):\n    r"""Add\n    one.\n    """\n\n    return a + 1',
     [(10, "def f("), (11, "    a,"), (12, "):")]),
    ('class F:\n    """Add\n    one, and\n    more', [(10, "class F:")]),
    ('def f(a):\n    """Add one."""\n\n    # then\n    return a',
     [(10, "def f(a):"), (13, "    # then"), (14, "    return a")]),
    ('def f(a):\n    "a".join(a)\n    return a',
     [(10, "def f(a):"), (11, '    "a".join(a)'), (12, "    return a")]),
])
def test_plain_output_shows_code_after_the_docstring(snippet: str,
                                                     expected: list[tuple[int, str]]) -> None:
    from codeseek.cli import shown_code_lines

    assert shown_code_lines(_hit(snippet, "Add one.")) == expected


def test_plain_output_shows_no_docstring_twice(indexed: Path) -> None:
    code, out, _ = run_cli("search", "decode a dock status packet", "--repo", str(indexed),
                           "--backend", "fake", "--files", "python/kestrune/telemetry.py",
                           "-k", "20")
    assert code == 0
    source = (indexed / "python/kestrune/telemetry.py").read_text(encoding="utf-8")
    docstrings = {node.lineno: node.body[0]  # reference: Python's own ast
                  for node in ast.walk(ast.parse(source))
                  if isinstance(node, ast.FunctionDef | ast.ClassDef) and ast.get_docstring(node)}
    checked = 0
    for block in out.strip().split("\n\n"):
        lines = block.splitlines()
        start = int(lines[0].rsplit(":", 1)[1])
        shown = [int(line.split("|")[0]) for line in lines[1:] if " | " in line]
        assert shown and shown[0] == start
        if start in docstrings:
            doc = docstrings[start]
            assert lines[1].startswith("    ") and " | " not in lines[1]  # the summary
            assert not set(shown) & set(range(doc.lineno, (doc.end_lineno or 0) + 1)), start
            checked += 1
    assert checked >= 3


def test_plain_output_is_as_wide_as_the_terminal(indexed: Path,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    argv = ("search", "decode status packet", "--repo", str(indexed), "--backend", "fake",
            "--language", "go", "-k", "1")
    doc = ("DecodeStatusPacket parses the raw bytes of a dock status packet into a "
           "DockStatus. It verifies the length, the magic byte and the XOR checksum before "
           "reading fields.")
    monkeypatch.setenv("COLUMNS", "200")
    _, out, _ = run_cli(*argv)
    assert out.splitlines()[1] == f"    {doc}"
    monkeypatch.setenv("COLUMNS", "60")
    _, out, _ = run_cli(*argv)
    assert out.splitlines()[1] == f"    {doc[:53]}..."
    assert max(len(line) for line in out.splitlines()[1:]) <= 60  # the header is never cut


def test_status_json(indexed: Path) -> None:
    code, out, _ = run_cli("status", str(indexed), "--json")
    assert code == 0
    status = json.loads(out)
    sources = sample_source_files()
    assert status["files"] == len(sources)
    assert status["vectors_in_sync"] is True
    assert status["skipped"]["ignored by .gitignore or exclude rules"] == 1
    assert set(status["languages"]) == set(sources.values())


def test_status_lists_the_files_left_out(indexed: Path) -> None:
    code, out, _ = run_cli("status", str(indexed), "--skipped")
    assert code == 0
    assert out == (".gitignore  no supported language\n"
                   "README.md  no supported language\n"
                   "build/  ignored by .gitignore or exclude rules\n"
                   "go/go.mod  no supported language\n"
                   "rust/fares/Cargo.toml  no supported language\n")
    code, out, _ = run_cli("status", str(indexed), "--skipped", "--json")
    record = json.loads(out)
    assert record["skipped_files"][2] == {"path": "build/",
                                          "reason": "ignored by .gitignore or exclude rules"}
    assert len(record["skipped_files"]) == sum(record["skipped"].values())
    _, out, _ = run_cli("status", str(indexed), "--json")
    assert "skipped_files" not in json.loads(out)


@pytest.fixture
def utc(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    import time

    monkeypatch.setenv("TZ", "UTC")
    time.tzset()
    yield
    monkeypatch.undo()
    time.tzset()


def _status(**changes: object) -> IndexStatus:
    values: dict[str, object] = dict(
        repo="/src/fleet", index_dir="/src/fleet/.codeseek", files=12, units=140,
        languages={"python": 100, "go": 40}, skipped={"no supported language": 3,
                                                     "over the size limit": 5},
        files_with_syntax_errors=0, model_id="all-MiniLM-L6-v2@abc", dim=384, generation=7,
        vectors_in_sync=True, updated_at=1_800_000_000.0, bytes_on_disk=2_500_000,
        adapter=None)
    values.update(changes)
    return IndexStatus(**values)  # type: ignore[arg-type]


def test_format_status_word_for_word(utc: None) -> None:
    from codeseek.cli import format_status

    assert format_status(_status(), None) == (
        "repository   /src/fleet\n"
        "index        /src/fleet/.codeseek (2.5 MB)\n"
        "model        all-MiniLM-L6-v2@abc (384 dimensions)\n"
        "contents     12 files, 140 units\n"
        "                 40 go\n"
        "                100 python\n"
        "updated      2027-01-15 08:00:00 (generation 7; vector index in sync)\n"
        "adapter      none (search uses the plain model; `codeseek tune` trains one)\n"
        "daemon       not running (searches load the index in their own process)\n"
        "left out      (`codeseek status --skipped` lists the files)\n"
        "                  5 over the size limit\n"
        "                  3 no supported language\n")


def test_format_status_of_a_running_daemon(utc: None) -> None:
    from codeseek.cli import format_status

    daemon = {"pid": 4242, "state": "watching", "watcher": "inotify", "pending": 1,
              "last_update": 1_800_000_030.0, "last_error": None}
    text = format_status(_status(skipped={}, files_with_syntax_errors=2,
                                 vectors_in_sync=False, updated_at=None), daemon)
    assert text.splitlines()[-4:] == [
        "updated      never (generation 7; vector index will be rebuilt on next search)",
        "warnings     2 files with syntax errors",
        "adapter      none (search uses the plain model; `codeseek tune` trains one)",
        "daemon       pid 4242, watching for changes (inotify), 1 change pending, "
        "last update 08:00:30",
    ]
    daemon.update(state="indexing", watcher="starting", pending=0, last_update=None,
                  last_error="disk full")
    assert format_status(_status(skipped={}), daemon).splitlines()[-2:] == [
        "daemon       pid 4242, indexing (file watcher: starting), 0 changes pending, "
        "last update none yet",
        "             last error: disk full",
    ]


def test_outline_lists_units_without_an_index(sample_copy: Path) -> None:
    target = sample_copy / "python" / "kestrune" / "uploads.py"
    code, out, _ = run_cli("outline", str(target), "--json")
    assert code == 0
    records = [json.loads(line) for line in out.splitlines()]
    assert {"path", "language", "kind", "name", "qualname", "signature", "start_line",
            "end_line", "has_doc", "doc_summary"} <= set(records[0])
    assert "push_batch_with_backoff" in {r["qualname"] for r in records}
    assert not (sample_copy / ".codeseek").exists()


# -- errors: one line, the exact words, a non-zero exit --------------------------------


def test_search_before_any_index(sample_copy: Path) -> None:
    code, out, err = run_cli("search", "anything", "--repo", str(sample_copy))
    assert code == 1
    assert out == ""
    assert err == (f"error: no index at {sample_copy / '.codeseek'}; "
                   "build one with `codeseek index`; for an index built elsewhere, give "
                   "--index-dir DIR or set CODESEEK_INDEX_DIR\n")


def test_an_index_elsewhere_refuses_another_repository(sample_copy: Path,
                                                       tmp_path: Path) -> None:
    index_dir = tmp_path / "index"
    other = tmp_path / "other"
    other.mkdir()
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q",
                           "--index-dir", str(index_dir))
    assert code == 0, err
    code, out, _ = run_cli("search", "refund", "--repo", str(sample_copy), "--backend", "fake",
                           "--index-dir", str(index_dir))
    assert code == 0 and out
    for argv in (("search", "refund", "--repo", str(other), "--backend", "fake"),
                 ("status", str(other))):
        code, out, err = run_cli(*argv, "--index-dir", str(index_dir))
        assert (code, out) == (2, ""), argv
        assert err == (f"error: the index at {index_dir} was built for the repository "
                       f"{sample_copy}, not {other}; give --repo {sample_copy}, or another "
                       f"--index-dir for {other}\n")


def test_an_index_inside_its_repository_moves_with_it(indexed: Path) -> None:
    moved = indexed.with_name("moved")
    indexed.rename(moved)
    code, out, err = run_cli("search", "refund", "--repo", str(moved), "--backend", "fake")
    assert code == 0, err
    assert out


def test_unknown_language(indexed: Path) -> None:
    code, _, err = run_cli("search", "x", "--repo", str(indexed), "--backend", "fake",
                           "--language", "cobol")
    assert code == 2
    # the list of names comes from the registry, so it is checked against it too
    from codeseek.languages import language_names

    names = ", ".join(language_names())
    assert err == f"error: unknown language 'cobol'; choose one of: {names}\n"
    assert "python" in names and "go" in names


def test_unknown_unit(indexed: Path) -> None:
    code, _, err = run_cli("search", "x", "--repo", str(indexed), "--backend", "fake",
                           "--unit", "macro")
    assert code == 2
    # the words come from the registry (test_unit_words_come_from_the_language_queries);
    # these are the ones its queries give today
    assert err == ("error: unknown unit 'macro'; choose one of: function, method, class, "
                   "or a language's own word for a class: enum, interface, module, record, "
                   "struct, trait, type, union\n")


def test_missing_model_folder(indexed: Path, tmp_path: Path) -> None:
    missing = tmp_path / "no-such-model"
    code, _, err = run_cli("search", "x", "--repo", str(indexed), "--model", str(missing))
    assert code == 1
    assert err == (f"error: model folder {missing} does not exist; name a local "
                   "sentence-transformers folder with --model PATH\n")


def test_missing_repository(tmp_path: Path) -> None:
    code, _, err = run_cli("index", str(tmp_path / "nowhere"), "--backend", "fake")
    assert code == 1
    assert err == f"error: {tmp_path / 'nowhere'}: no such folder\n"


def test_corrupt_store_is_a_clear_error(indexed: Path) -> None:
    store = indexed / ".codeseek" / "index.sqlite3"
    for suffix in ("-wal", "-shm"):
        Path(str(store) + suffix).unlink(missing_ok=True)
    store.write_bytes(b"this is not a database" * 100)
    code, _, err = run_cli("search", "x", "--repo", str(indexed), "--backend", "fake")
    assert code == 1
    assert err.count("\n") == 1
    assert err.startswith(f"error: {store}: the index store is unreadable (")
    assert err.endswith("rebuild it with `codeseek index --rebuild`\n")
    code, out, _ = run_cli("index", str(indexed), "--backend", "fake", "--rebuild", "-q")
    assert code == 0 and out.startswith(f"indexed {len(sample_source_files())} files")


# -- the command line as a process ---------------------------------------------------


def test_help_does_not_import_torch() -> None:
    # reference: CPython's own import tracer (python -X importtime)
    result = subprocess.run([sys.executable, "-X", "importtime", "-m", "codeseek", "--help"],
                            capture_output=True, text=True, check=True)
    imported = {line.split("|")[-1].strip() for line in result.stderr.splitlines()
                if "|" in line}
    assert "codeseek.cli" in imported
    for heavy in ("torch", "onnxruntime", "sentence_transformers", "transformers", "numpy",
                  "hnswlib"):
        assert heavy not in imported
    assert "usage: codeseek" in result.stdout


def test_readme_cli_reference_matches_help() -> None:
    """Every option of every command appears in README's CLI reference, and back."""
    from codeseek.cli import build_parser

    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
    reference = readme.split("## Command line reference", 1)[1].split("\n## ", 1)[0]
    parser = build_parser()
    subparsers = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    for name, sub in subparsers.choices.items():  # type: ignore[attr-defined]
        assert f"codeseek {name}" in reference, name
        for action in sub._actions:
            for option in action.option_strings:
                if option in ("-h", "--help"):
                    continue
                assert option in reference, f"{name} {option} missing from README"
    documented = {line.split("`")[1].split()[1] for line in reference.splitlines()
                  if line.startswith("### `codeseek ")}
    assert documented == set(subparsers.choices)


# -- search --neighbours --------------------------------------------------------------


REFUND = "python/kestrune/billing/payments.py"


def _neighbour_places(indexed: Path, unit_qualname: str, k: int,
                      **filters: list[str]) -> list[tuple[str, int, str]]:
    """The reference: the library's own neighbours of the unit with that qualified name."""
    from codeseek.api import open_index
    from codeseek.embed import FakeEmbedder

    with open_index(indexed, embedder=FakeEmbedder()) as index:
        unit = next(s for s in index.store.units_of_file(REFUND)
                    if s.unit.qualname == unit_qualname)
        return [(h.path, h.start_line, h.qualname)
                for h in index.neighbours(unit.id, k, **filters)]


def test_neighbours_of_a_named_unit_print_like_a_search(indexed: Path) -> None:
    code, out, err = run_cli("search", "--neighbours", f"{REFUND}:PaymentService.issue_refund",
                             "--repo", str(indexed), "--backend", "fake", "--json", "-k", "5")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    assert [r["rank"] for r in records] == [1, 2, 3, 4, 5]
    assert {r["query"] for r in records} == {"neighbours of PaymentService.issue_refund"}
    assert [(r["path"], r["start_line"], r["qualname"]) for r in records] == _neighbour_places(
        indexed, "PaymentService.issue_refund", 5)
    assert "PaymentService.issue_refund" not in [r["qualname"] for r in records]
    code, plain, err = run_cli("search", "--neighbours", f"{REFUND}:issue_refund",
                               "--repo", str(indexed), "--backend", "fake", "-k", "5")
    assert code == 0, err
    assert plain.startswith(f" 1. {records[0]['qualname']}  [")


def test_neighbours_of_a_line_take_the_innermost_unit(indexed: Path,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    # line 110 is inside issue_refund (104-...), itself inside class PaymentService
    monkeypatch.chdir(indexed / "python" / "kestrune")  # PATH from where the user stands
    code, out, err = run_cli("search", "--neighbours", "billing/payments.py:110", "--json",
                             "--backend", "fake", "--lang", "go", "-k", "3")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    assert {r["query"] for r in records} == {"neighbours of PaymentService.issue_refund"}
    assert {r["language"] for r in records} == {"go"}
    assert [(r["path"], r["start_line"], r["qualname"]) for r in records] == _neighbour_places(
        indexed, "PaymentService.issue_refund", 3, languages=["go"])


@pytest.mark.parametrize(("place", "message", "status"), [
    (f"{REFUND}:no_such_unit", f"{REFUND}: no unit named 'no_such_unit'", 1),
    (f"{REFUND}:99999", f"{REFUND}: no unit holds line 99999", 1),
    ("python/kestrune/nowhere.py:run", "python/kestrune/nowhere.py: not a file of the index", 1),
    # a value that cannot name a unit at all is a usage error, as a malformed --files is
    ("issue_refund", "--neighbours wants PATH:QUALNAME or PATH:LINE, not 'issue_refund'", 2),
])
def test_neighbours_of_an_unknown_unit_is_a_one_line_error(indexed: Path, place: str,
                                                           message: str, status: int) -> None:
    code, out, err = run_cli("search", "--neighbours", place, "--repo", str(indexed),
                             "--backend", "fake")
    assert (code, out) == (status, "")
    assert err == f"error: {message}\n"


def test_neighbours_with_k_under_one_is_a_usage_error(indexed: Path) -> None:
    code, out, err = run_cli("search", "--neighbours", f"{REFUND}:issue_refund", "-k", "0",
                             "--repo", str(indexed), "--backend", "fake")
    assert (code, out, err) == (2, "", "error: -k must be at least 1, not 0\n")


def test_batch_from_a_folder_is_one_line(indexed: Path) -> None:
    code, out, err = run_cli("search", "--batch", str(indexed), "--repo", str(indexed),
                             "--backend", "fake")
    assert (code, out) == (1, "")
    assert err == (f"error: {indexed}: a folder, not a batch file; give one query per line in "
                   "a file, or - for standard input\n")


def test_neighbours_of_a_path_outside_the_repository(indexed: Path, tmp_path: Path,
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    (tmp_path / "elsewhere.py").write_text("def run():\n    pass\n", encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    code, out, err = run_cli("search", "--neighbours", "elsewhere.py:run", "--repo",
                             str(indexed), "--backend", "fake")
    assert (code, out) == (2, "")  # a usage error, as --files outside the repository is
    assert err == f"error: elsewhere.py: outside the repository {indexed.resolve()}\n"


def test_neighbours_and_a_query_together_are_refused(indexed: Path) -> None:
    code, _, err = run_cli("search", "refund", "--neighbours", f"{REFUND}:issue_refund",
                           "--repo", str(indexed), "--backend", "fake")
    assert code == 2  # a usage error
    assert err == ("error: give a QUERY, --batch FILE or --neighbours PATH:NAME, "
                   "only one\n")


def test_neighbours_of_a_name_two_units_share_asks_for_a_line(sample_copy: Path) -> None:
    (sample_copy / "python" / "shifts.py").write_text(
        "class Morning:\n    def run(self):\n        return 1\n\n\n"
        "class Evening:\n    def run(self):\n        return 2\n", encoding="utf-8")
    assert run_cli("index", str(sample_copy), "--backend", "fake", "-q")[0] == 0
    code, _, err = run_cli("search", "--neighbours", "python/shifts.py:run", "--repo",
                           str(sample_copy), "--backend", "fake")
    assert code == 1
    assert err == ("error: python/shifts.py: 2 units are named 'run' (lines 2, 7); "
                   "name one by its line, PATH:LINE\n")
    code, out, err = run_cli("search", "--neighbours", "python/shifts.py:Evening.run",
                             "--repo", str(sample_copy), "--backend", "fake", "--json", "-k", "1")
    assert code == 0, err
    assert json.loads(out)["query"] == "neighbours of Evening.run"


# -- --since: files modified at or after a time ----------------------------------------------


def aged_repo(sample_copy: Path, now: float) -> dict[str, float]:
    """Give the Go files an age of 10 days, the Rust files 2 days, the rest an hour, then
    index; each indexed file's modification time as the file system reports it."""
    for path in sample_copy.rglob("*"):
        if path.is_file() and ".codeseek" not in path.parts:
            age = {".go": 10 * 86400, ".rs": 2 * 86400}.get(path.suffix, 3600)
            os.utime(path, (now - age, now - age))
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    return {path.relative_to(sample_copy).as_posix(): path.stat().st_mtime
            for path in sample_copy.rglob("*") if path.is_file()}


def since_paths(repo: Path, when: str, query: str = "parse a packet") -> set[str]:
    code, out, err = run_cli("search", query, "--repo", str(repo), "--backend", "fake",
                             "-k", "500", "--json", "--since", when)
    assert code == 0, err
    return {json.loads(line)["path"] for line in out.splitlines()}


def test_since_keeps_only_files_modified_at_or_after_the_time(sample_copy: Path) -> None:
    import datetime
    import time

    now = time.time()
    mtimes = aged_repo(sample_copy, now)
    everything = since_paths(sample_copy, "30d")
    assert {p.rsplit(".", 1)[-1] for p in everything} >= {"go", "rs", "py"}
    for when, cutoff in [("3d", now - 3 * 86400), ("72h", now - 3 * 86400),
                         ("90m", now - 90 * 60), ("1w", now - 7 * 86400)]:
        # the files the file system (os.stat) calls that new, not what the index says
        assert since_paths(sample_copy, when) == \
            {p for p in everything if mtimes[p] >= cutoff}, when
    assert not any(p.endswith(".go") for p in since_paths(sample_copy, "3d"))
    assert any(p.endswith(".rs") for p in since_paths(sample_copy, "3d"))
    five_days_ago = datetime.datetime.fromtimestamp(now - 5 * 86400)  # local time, as typed
    day = five_days_ago.date().isoformat()
    midnight = datetime.datetime.fromisoformat(day).timestamp()
    assert since_paths(sample_copy, day) == {p for p in everything if mtimes[p] >= midnight}
    stamp = five_days_ago.isoformat(timespec="minutes")
    assert since_paths(sample_copy, stamp) == \
        {p for p in everything if mtimes[p] >= datetime.datetime.fromisoformat(stamp).timestamp()}
    tomorrow = (datetime.datetime.now(datetime.UTC) + datetime.timedelta(days=1))
    assert since_paths(sample_copy, tomorrow.isoformat()) == set()


def test_since_follows_a_file_touched_after_indexing(sample_copy: Path) -> None:
    import time

    now = time.time()
    mtimes = aged_repo(sample_copy, now)
    go_file = sorted(p for p in mtimes if p.endswith(".go"))[0]
    assert go_file not in since_paths(sample_copy, "1d", "dock")
    os.utime(sample_copy / go_file)  # touched now, its content the same
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    assert go_file in since_paths(sample_copy, "1d", "dock")


@pytest.mark.parametrize("value", ["yesterday", "3 days", "3d ago", "3y", "2026-13-01", ""])
def test_since_refuses_what_it_cannot_read(indexed: Path, value: str) -> None:
    code, out, err = run_cli("search", "refund", "--repo", str(indexed), "--backend", "fake",
                             "--since", value)
    assert (code, out) == (2, "")
    assert err == ("error: --since wants an ISO date (2026-11-30), a date and time "
                   "(2026-11-30T14:00) or an age (90m, 12h, 3d, 2w), not "
                   f"'{value}'\n")


@pytest.mark.parametrize(("extra", "message"), [
    (["--workers", "2"], "--workers goes with --ray"),
    (["--refine", "--ray"], "--refine goes without --ray"),
])
def test_ray_options_that_do_not_go_together_are_one_usage_line(
        sample_copy: Path, extra: list[str], message: str) -> None:
    code, out, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q", *extra)
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and message in lines[0]
    assert not (sample_copy / ".codeseek").exists()  # refused before anything is written
