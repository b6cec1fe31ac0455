"""Search across several repositories (codeseek/multi.py, ``search --repo A --repo B``)."""

from __future__ import annotations

import json
import shutil
import sysconfig
from collections.abc import Iterator, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
from test_cli import run_cli

from codeseek import FakeEmbedder, open_index
from codeseek.api import Index
from codeseek.bm25 import CorpusStats
from codeseek.hits import SearchHit
from codeseek.multi import MERGE_KINDS, MultiService, merge, standardised
from codeseek.query import Filters, Query
from codeseek.search import lexical_match

SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"


def _split_sample(tmp_path: Path) -> tuple[Path, Path]:
    """sample_repo's Python files in one repository, every other file in another."""
    first, second = tmp_path / "first", tmp_path / "second"
    for source in sorted(p for p in SAMPLE_REPO.rglob("*") if p.is_file()):
        relative = source.relative_to(SAMPLE_REPO)
        target = (first if relative.parts[0] == "python" else second) / relative
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(source, target)
    for repo in (first, second):
        code, _, err = run_cli("index", str(repo), "--backend", "fake", "-q")
        assert code == 0, err
    return first, second


def test_two_repositories_give_hits_from_both_with_their_repo(tmp_path: Path) -> None:
    first, second = _split_sample(tmp_path)
    code, out, err = run_cli("search", "fare for a ride", "--repo", str(first), "--repo",
                             str(second), "--backend", "fake", "--json", "-k", "20")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    assert [r["rank"] for r in records] == list(range(1, 21))
    assert {r["repo"] for r in records} == {str(first.resolve()), str(second.resolve())}
    for record in records:  # each hit's file is in the repository it names
        assert (Path(record["repo"]) / record["path"]).is_file()
        assert record["path"].startswith("python/") == (record["repo"] == str(first.resolve()))
    scores = [r["score"] for r in records]
    assert scores == sorted(scores, reverse=True)
    # plain output names each hit under its repository's root
    code, plain, _ = run_cli("search", "fare for a ride", "--repo", str(first), "--repo",
                             str(second), "--backend", "fake", "-k", "20")
    assert code == 0
    assert str(first.resolve() / "python") in plain and str(second.resolve()) in plain


def test_one_repository_keeps_its_records_without_repo(tmp_path: Path) -> None:
    first, _ = _split_sample(tmp_path)
    code, out, _ = run_cli("search", "fare", "--repo", str(first), "--backend", "fake",
                           "--json", "-k", "3")
    assert code == 0
    assert all("repo" not in json.loads(line) for line in out.splitlines())


def test_batch_over_several_repositories_matches_one_by_one(tmp_path: Path) -> None:
    first, second = _split_sample(tmp_path)
    queries = ["fare for a ride", "", "retry an upload with backoff"]
    batch = tmp_path / "queries.txt"
    batch.write_text("\n".join(queries) + "\n", encoding="utf-8")
    repos = ["--repo", str(first), "--repo", str(second), "--backend", "fake", "-k", "5"]
    code, out, err = run_cli("search", "--batch", str(batch), *repos)
    assert code == 0, err
    lines = out.splitlines()
    assert json.loads(lines[5]) == {"query": "", "rank": None, "hits": 0}
    for query, chunk in ((queries[0], lines[:5]), (queries[2], lines[6:])):
        _, single, _ = run_cli("search", query, *repos, "--json")
        assert chunk == single.splitlines()


def test_workspace_file_lists_repositories_relative_to_it(tmp_path: Path) -> None:
    first, second = _split_sample(tmp_path)
    folder = tmp_path / "ws"
    folder.mkdir()
    workspace = folder / "team.toml"
    workspace.write_text('[workspace]\nrepos = ["../first", "../second"]\n', encoding="utf-8")
    code, out, err = run_cli("search", "fare for a ride", "--workspace", str(workspace),
                             "--backend", "fake", "--json", "-k", "20")
    assert code == 0, err
    _, direct, _ = run_cli("search", "fare for a ride", "--repo", str(first), "--repo",
                           str(second), "--backend", "fake", "--json", "-k", "20")
    assert out == direct


@pytest.mark.parametrize(("text", "problem"), [
    (None, "no such workspace file"),
    ("[workspace\nrepos = 1", "not valid TOML"),
    ('[workspace]\nrepos = "first"\n', "wants [workspace] repos"),
    ("[other]\n", "wants [workspace] repos"),
])
def test_bad_workspace_file_is_a_one_line_usage_error(tmp_path: Path, text: str | None,
                                                      problem: str) -> None:
    workspace = tmp_path / "team.toml"
    if text is not None:
        workspace.write_text(text, encoding="utf-8")
    code, _, err = run_cli("search", "fare", "--workspace", str(workspace), "--backend", "fake")
    assert code == 2
    assert problem in err and str(workspace) in err and len(err.strip().splitlines()) == 1


def test_missing_repository_or_index_is_a_one_line_usage_error(tmp_path: Path) -> None:
    first, _ = _split_sample(tmp_path)
    bare = tmp_path / "bare"
    bare.mkdir()
    for other, problem in ((tmp_path / "gone", "no such repository folder"),
                           (bare, "no index here")):
        code, _, err = run_cli("search", "fare", "--repo", str(first), "--repo", str(other),
                               "--backend", "fake")
        assert code == 2
        assert problem in err and str(other) in err and len(err.strip().splitlines()) == 1
    code, _, err = run_cli("search", "--neighbours", "python/kestrune/config.py:1", "--repo",
                           str(first), "--repo", str(first), "--backend", "fake")
    assert code == 2 and "one --repo" in err


def _hit(score: float, name: str, similarity: float | None = 0.5) -> SearchHit:
    return SearchHit(query="q", rank=1, score=score, similarity=similarity, path=f"{name}.py",
                     start_line=1, end_line=2, language="python", kind="function", name=name,
                     qualname=name, signature="", doc_summary="", snippet="", unit_id=1)


def test_merge_orders_by_served_or_restandardised_scores() -> None:
    low = [_hit(s, f"low{i}") for i, s in enumerate([3.0, 2.0, 1.0])]
    high = [_hit(s, f"high{i}") for i, s in enumerate([30.0, 20.0, 10.0])]
    served = merge([("a", low), ("b", high)], 4)
    assert [h.name for h in served] == ["high0", "high1", "high2", "low0"]
    assert [h.score for h in served] == [30.0, 20.0, 10.0, 3.0]
    # the second index's scores are ten times the first's; standardised, its best is
    # no better than the first's best, so the first (given first) wins the tie
    merged = merge([("a", low), ("b", high)], 4, "restandardised")
    assert [h.name for h in merged] == ["low0", "high0", "low1", "high1"]
    assert [h.repo for h in merged] == ["a", "b", "a", "b"]
    assert [h.rank for h in merged] == [1, 2, 3, 4]
    # reference: the population z-score by hand, (3 - 2) / sqrt(2/3)
    assert standardised(low)[0] == pytest.approx(1 / (2 / 3) ** 0.5)
    assert standardised([_hit(1.0, "x")]) == [0.0]


def _top(hits: list[SearchHit]) -> set[str]:
    return {f"{h.path}:{h.qualname}:{h.start_line}" for h in hits}


# Real open-source code: these packages of the Python standard library installed on this
# machine (sysconfig's "stdlib" path), split into two halves by alternate file.
STDLIB_PACKAGES = ("json", "email", "logging", "http", "urllib", "xml/dom")
STDLIB_QUERIES = [
    "parse a JSON document from a string", "encode an object as JSON text",
    "decode a quoted printable header", "format a log record with a timestamp",
    "rotate log files when they grow too large", "send an HTTP request and read the response",
    "parse cookies from a header", "split a URL into its parts", "quote special characters "
    "in a URL", "build a multipart email message", "parse an email address list",
    "handler that writes log records to a stream", "read the status line of a server reply",
    "create a DOM element with attributes", "serialize a DOM tree to XML text",
    "guess the character set of a message", "follow a redirect", "basic authentication "
    "with a password", "escape HTML characters", "find a logger by its dotted name",
]


def halved_stdlib(folder: Path, everything: bool = False) -> tuple[Path, list[Path], int]:
    """The STDLIB_PACKAGES (or, with ``everything``, the whole standard library, tests
    left out) copied into ``folder/whole`` and, by alternate file, into two halves;
    returns the whole, the halves and the number of files."""
    stdlib = Path(sysconfig.get_paths()["stdlib"])
    whole, halves = folder / "whole", [folder / "half0", folder / "half1"]
    roots = [stdlib] if everything else [stdlib / package for package in STDLIB_PACKAGES]
    files = sorted(p for root in roots for p in root.rglob("*.py")
                   if not {"test", "tests", "site-packages", "idlelib"} & set(p.parts))
    for number, source in enumerate(files):
        relative = source.relative_to(stdlib)
        for target in (whole / relative, halves[number % 2] / relative):
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(source, target)
    return whole, halves, len(files)


def agreement(merged: Sequence[list[SearchHit]],
              single: Sequence[list[SearchHit]]) -> tuple[float, float, float]:
    """(top-1 agreement, mean top-10 overlap, MRR agreement) of merged answers with one
    index's: the share of queries with the same best hit, the mean share of the single
    answer's hits found in the merged one, and the mean reciprocal rank in the merged
    answer of the single answer's best hit."""
    top1 = overlap = mrr = 0.0
    for mine, theirs in zip(merged, single, strict=True):
        keys = [f"{h.path}:{h.qualname}:{h.start_line}" for h in mine]
        best = f"{theirs[0].path}:{theirs[0].qualname}:{theirs[0].start_line}"
        top1 += keys[:1] == [best]
        overlap += len(set(keys) & _top(theirs)) / len(theirs)
        mrr += 1 / (keys.index(best) + 1) if best in keys else 0.0
    return top1 / len(single), overlap / len(single), mrr / len(single)


@pytest.fixture(scope="module")
def stdlib_halves(tmp_path_factory: pytest.TempPathFactory) -> Iterator[list[Index]]:
    """Indexes (fake embedder) of the whole STDLIB_PACKAGES tree and of its two halves."""
    whole, halves, files = halved_stdlib(tmp_path_factory.mktemp("stdlib"))
    assert files > 40
    indexes = [open_index(root, create=True, embedder=FakeEmbedder())
               for root in (whole, *halves)]
    for index in indexes:
        index.update()
    yield indexes
    for index in indexes:
        index.close()


def test_merged_halves_agree_with_one_index_of_the_whole(stdlib_halves: list[Index]) -> None:
    """The merged top-10 of two halves of a tree against the top-10 of one index of it."""
    whole, *halves = stdlib_halves
    multi = MultiService([(str(h.settings.repo), h) for h in halves])
    queries = [Query(text=text, k=10) for text in STDLIB_QUERIES]
    single = list(whole.search_many(queries))
    figures = {}
    for kind in MERGE_KINDS:
        multi.kind = kind
        figures[kind] = agreement(list(multi.search_many(queries)), single)
    print(f"(top-1, top-10 overlap, MRR agreement) {figures}")
    # the target: top-10 overlap >= 0.9 with one index of the whole (measured with
    # this fake embedder: shared 1.0; the older rules, per-index standardised scores,
    # served 0.75 and restandardised 0.73; scripts/bench_multi.py prints them all)
    top1, overlap, mrr = figures["shared"]
    assert overlap >= 0.9 and top1 >= 0.9 and mrr >= 0.9
    # the older rules stay what they were (regression floors, not the target)
    assert figures["served"][1] >= OLD_FLOOR and figures["restandardised"][1] >= OLD_FLOOR


def test_filtered_merge_equals_one_index_of_the_whole(stdlib_halves: list[Index]) -> None:
    """With exact dense search on both sides (a filtered search is an exact numpy search
    over the pool's vectors) and the summed BM25 statistics, the merge of the halves IS
    the whole index's ranking: the same units in the same order, the same scores."""
    whole, *halves = stdlib_halves
    multi = MultiService([(str(h.settings.repo), h) for h in halves])
    every = Filters(languages=("python",))
    queries = [Query(text=text, k=15, filters=every) for text in STDLIB_QUERIES]
    single = list(whole.search_many(queries))
    merged = list(multi.search_many(queries))
    for mine, theirs in zip(merged, single, strict=True):
        assert [(h.path, h.qualname, h.start_line) for h in mine] == [
            (h.path, h.qualname, h.start_line) for h in theirs]
        assert [h.score for h in mine] == pytest.approx([h.score for h in theirs], abs=1e-9)
        assert [h.similarity for h in mine] == pytest.approx([h.similarity for h in theirs])
        assert [h.confidence for h in mine] == [h.confidence for h in theirs]
        for hit in mine:  # each hit's file is in the half it names
            assert (Path(str(hit.repo)) / hit.path).is_file()


def test_shared_bm25_is_fts5_bm25(stdlib_halves: list[Index]) -> None:
    """The keyword score recomputed from the index's own statistics (codeseek.bm25) is
    SQLite FTS5's bm25() bit for bit on real code (the reference: FTS5 itself); with the
    summed statistics of the halves, each half's scores are the whole index's."""
    whole, *halves = stdlib_halves
    by_place = {}
    for text in STDLIB_QUERIES + ["HTTPServer json_dumps parse_header"]:
        searcher = whole.searcher()
        fts5 = searcher.store.lexical_search(lexical_match(text), -1)
        own = searcher.shared_lexical(text, searcher.corpus_stats(text), len(fts5) + 5, None)
        assert len(own) == len(fts5) > 0
        assert dict(own) == dict(fts5)  # exact floats
        stats = [h.searcher().corpus_stats(text) for h in halves]
        assert CorpusStats.combined(stats) == searcher.corpus_stats(text)
        units = {i: s.unit for i, s in searcher.store.units_by_ids([u for u, _ in fts5]).items()}
        by_place = {(units[u].path, units[u].qualname, units[u].start_line): score
                    for u, score in fts5}
        for half in halves:
            half_searcher = half.searcher()
            scored = half_searcher.shared_lexical(text, CorpusStats.combined(stats), 10**6,
                                                  None)
            half_units = half_searcher.store.units_by_ids([u for u, _ in scored])
            for unit_id, score in scored:
                unit = half_units[unit_id].unit
                assert score == by_place[(unit.path, unit.qualname, unit.start_line)]


OLD_FLOOR = 0.65


def test_client_fans_out_to_one_daemon_per_repository(tmp_path: Path) -> None:
    """Two live daemons, one per repository: the merged answer through them is the
    in-process merge's, hit for hit (the three steps go over each daemon's socket), and
    ``codeseek search --repo A --repo B`` uses them."""
    from codeseek.client import DaemonService
    from codeseek.daemon import Daemon
    from codeseek.service import connect

    first, second = _split_sample(tmp_path)
    indexes = [open_index(repo, embedder=FakeEmbedder()) for repo in (first, second)]
    daemons = [Daemon(index, reconcile_seconds=3600, debounce=0.05) for index in indexes]
    for running in daemons:
        running.start()
    try:
        services = [(str(repo.resolve()), connect(repo)) for repo in (first, second)]
        assert all(isinstance(service, DaemonService) for _, service in services)
        through = MultiService(services)
        local = MultiService([(str(repo.resolve()), open_index(repo, embedder=FakeEmbedder()))
                              for repo in (first, second)])
        queries = [Query(text=text, k=12) for text in (
            "fare for a ride", "retry an upload with backoff", "parse the config file")]
        served_before = [running.queries_served for running in daemons]
        answers = list(through.search_many(queries))
        assert answers == list(local.search_many(queries))
        assert {hit.repo for answer in answers for hit in answer} == {
            str(first.resolve()), str(second.resolve())}
        assert [r.queries_served - b for r, b in zip(daemons, served_before,
                                                       strict=True)] == [3, 3]
        assert not any(service.gone for _, service in services)  # type: ignore[attr-defined]
        # the command line over the same two daemons (no --backend: the daemons answer)
        code, out, err = run_cli("search", "fare for a ride", "--repo", str(first), "--repo",
                                 str(second), "--json", "-k", "12")
        assert code == 0, err
        assert [json.loads(line)["path"] for line in out.splitlines()] == [
            hit.path for hit in answers[0]]
        assert [r.queries_served - b for r, b in zip(daemons, served_before,
                                                       strict=True)] == [4, 4]
        # malformed steps get a one-line error, and the daemon goes on answering
        for line, words in (
                (b'{"v": 2, "op": "merge_sides", "queries": [{"text": "fare"}], "stats": []}',
                 "'stats' must be a list with one entry per query"),
                (b'{"v": 2, "op": "merge_sides", "queries": [{"text": "fare"}], '
                 b'"stats": [{"rows": -1, "tokens": 1, "matches": [1]}]}', "whole numbers"),
                (b'{"v": 2, "op": "merge_hits", "queries": [{"text": "fare"}], '
                 b'"picks": [[[1, "high", null, null]]]}', "a pick is"),
                (b'{"v": 2, "op": "merge_sides", "queries": [{"text": "fare"}], '
                 b'"stats": [{"rows": 9, "tokens": 9, "matches": []}]}', "another query")):
            response = daemons[0].handle_line(line)
            assert response["ok"] is False and words in response["error"], response
        assert through.search(queries[0]) == answers[0]
        through.close()
        local.close()
    finally:
        for running in daemons:
            running.stop()
        for index in indexes:
            index.close()


def test_status_lists_each_repository(tmp_path: Path) -> None:
    first, second = _split_sample(tmp_path)
    code, out, err = run_cli("status", "--repo", str(first), "--repo", str(second), "--json")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    assert [Path(r["repo"]) for r in records] == [first.resolve(), second.resolve()]
    for record, repo in zip(records, (first, second), strict=True):
        _, alone, _ = run_cli("status", str(repo), "--json")
        assert json.loads(alone)["units"] == record["units"] > 0  # each index its own
        assert record["daemon"] is None
    # the text names each repository in its own block; a workspace lists the same
    code, text, _ = run_cli("status", "--repo", str(first), "--repo", str(second))
    assert code == 0
    blocks = text.split("\n\n")
    assert len(blocks) == 2
    assert str(first.resolve()) in blocks[0] and str(second.resolve()) in blocks[1]
    workspace = tmp_path / "team.toml"
    workspace.write_text('[workspace]\nrepos = ["first", "second"]\n', encoding="utf-8")
    code, listed, _ = run_cli("status", "--workspace", str(workspace), "--json")
    assert code == 0 and [json.loads(line)["units"] for line in listed.splitlines()] == [
        r["units"] for r in records]
    # the files left out, each under its repository
    code, skipped, _ = run_cli("status", "--repo", str(first), "--repo", str(second),
                               "--skipped")
    assert code == 0 and skipped.splitlines()  # sample_repo holds files left out
    for line in skipped.splitlines():
        path = Path(line.split("  ")[0])
        assert path.is_relative_to(first.resolve()) or path.is_relative_to(second.resolve())
    # a repository without an index is named in a one-line usage error
    bare = tmp_path / "bare"
    bare.mkdir()
    code, _, err = run_cli("status", "--repo", str(first), "--repo", str(bare))
    assert code == 2 and "no index here" in err and str(bare) in err


def test_a_workspace_file_above_the_current_folder_is_found(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """``codeseek.toml`` with ``[workspace]`` in the current folder or a parent lists the
    repositories when no --repo is given, unless a repository is nearer."""
    first, second = _split_sample(tmp_path)
    (tmp_path / "codeseek.toml").write_text('[workspace]\nrepos = ["first", "second"]\n',
                                            encoding="utf-8")
    _, direct, _ = run_cli("search", "fare for a ride", "--repo", str(first), "--repo",
                           str(second), "--backend", "fake", "--json", "-k", "20")
    (tmp_path / "notes").mkdir()
    for where in (tmp_path, tmp_path / "notes"):
        monkeypatch.chdir(where)
        code, out, err = run_cli("search", "fare for a ride", "--backend", "fake", "--json",
                                 "-k", "20")
        assert code == 0, err
        assert out == direct
        code, listed, _ = run_cli("status", "--json")
        assert code == 0
        assert [json.loads(line)["repo"] for line in listed.splitlines()] == [
            str(first.resolve()), str(second.resolve())]
    # inside a repository (it holds an index) the repository is nearer: one index, as before
    monkeypatch.chdir(first / "python")
    code, out, _ = run_cli("search", "fare for a ride", "--backend", "fake", "--json", "-k", "5")
    assert code == 0
    assert out.splitlines() and all("repo" not in json.loads(line) for line in out.splitlines())
    code, one, _ = run_cli("status", "--json")
    assert code == 0 and len(one.splitlines()) == 1
    # an explicit repository or PATH wins over the workspace file
    monkeypatch.chdir(tmp_path)
    code, out, _ = run_cli("search", "fare", "--repo", str(second), "--backend", "fake",
                           "--json", "-k", "3")
    assert code == 0 and all("repo" not in json.loads(line) for line in out.splitlines())
    code, one, _ = run_cli("status", str(second), "--json")
    assert code == 0 and json.loads(one)["repo"] == str(second.resolve())


class _SearchOnly:
    """A search service without the merge steps (as a service of another kind might be)."""

    def __init__(self, index: Index) -> None:
        self.index = index

    def search_many(self, queries: Sequence[Query]) -> list[list[SearchHit]]:
        return self.index.search_many(queries)


class _OtherModel(_SearchOnly):
    """The merge steps, but the index reports another model: its cosines are not
    comparable with the other index's."""

    def merge_basis(self, queries: Sequence[Query]) -> Any:
        return replace(self.index.merge_basis(queries), model_id="another-model")

    def merge_sides(self, queries: Sequence[Query], stats: Any) -> Any:
        raise AssertionError("indexes of different models are not pooled")

    def merge_hits(self, queries: Sequence[Query], picks: Any, off_topic: Any = None) -> Any:
        raise AssertionError("indexes of different models are not pooled")


def test_without_the_merge_steps_or_with_two_models_hits_merge_by_served_scores(
        stdlib_halves: list[Index]) -> None:
    _, *halves = stdlib_halves
    queries = [Query(text=text, k=10) for text in STDLIB_QUERIES[:5]]
    served = list(MultiService([(str(h.settings.repo), h) for h in halves],
                               kind="served").search_many(queries))
    shared = list(MultiService([(str(h.settings.repo), h) for h in halves]).search_many(queries))
    assert served != shared  # the two rules differ on these queries, so the check can fail
    first, second = halves
    for wrap in (_SearchOnly, _OtherModel):  # the second index only: the first is as it is
        multi = MultiService([(str(first.settings.repo), first),
                              (str(second.settings.repo), wrap(second))])  # type: ignore[list-item]
        assert list(multi.search_many(queries)) == served
