"""The command line: outputs, JSON Lines, batches, and error messages word for word."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import pytest
from sample_files import sample_source_files

from codeseek.cli import main


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


def test_filters_narrow_results(indexed: Path) -> None:
    code, out, _ = run_cli("search", "decode packet", "--repo", str(indexed), "--backend",
                           "fake", "--json", "--lang", "go", "-k", "20")
    assert code == 0
    records = [json.loads(line) for line in out.splitlines()]
    assert records and {r["language"] for r in records} == {"go"}
    code, out, _ = run_cli("search", "fare", "--repo", str(indexed), "--backend", "fake",
                           "--json", "--path", "python/kestrune/billing/", "--kind", "method")
    records = [json.loads(line) for line in out.splitlines()]
    assert records
    assert all(r["path"].startswith("python/kestrune/billing/") for r in records)
    assert {r["kind"] for r in records} == {"method"}


def test_human_output_names_file_and_line(indexed: Path) -> None:
    code, out, _ = run_cli("search", "refund", "--repo", str(indexed), "--backend", "fake",
                           "-k", "1")
    assert code == 0
    first = out.splitlines()[0]
    assert first.startswith(" 1. ")
    path_line = first.rsplit(" ", 1)[-1]
    path, line = path_line.rsplit(":", 1)
    assert (indexed / path).is_file() and int(line) >= 1


def test_status_json(indexed: Path) -> None:
    code, out, _ = run_cli("status", str(indexed), "--json")
    assert code == 0
    status = json.loads(out)
    sources = sample_source_files()
    assert status["files"] == len(sources)
    assert status["vectors_in_sync"] is True
    assert status["skipped"]["ignored by .gitignore or exclude rules"] == 1
    assert set(status["languages"]) == set(sources.values())


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
                   "build one with `codeseek index`\n")


def test_unknown_language(indexed: Path) -> None:
    code, _, err = run_cli("search", "x", "--repo", str(indexed), "--backend", "fake",
                           "--lang", "cobol")
    assert code == 1
    # the list of names comes from the registry, so it is checked against it too
    from codeseek.languages import language_names

    names = ", ".join(language_names())
    assert err == f"error: unknown language 'cobol'; choose one of: {names}\n"
    assert "python" in names and "go" in names


def test_unknown_kind(indexed: Path) -> None:
    code, _, err = run_cli("search", "x", "--repo", str(indexed), "--backend", "fake",
                           "--kind", "macro")
    assert code == 1
    assert err == "error: unknown kind 'macro'; choose one of: function, method, class\n"


def test_missing_model_folder(indexed: Path, tmp_path: Path) -> None:
    missing = tmp_path / "no-such-model"
    code, _, err = run_cli("search", "x", "--repo", str(indexed), "--model", str(missing))
    assert code == 1
    assert err == (f"error: model folder {missing} does not exist; name a local "
                   "sentence-transformers folder with --model PATH\n")


def test_empty_query(indexed: Path) -> None:
    code, _, err = run_cli("search", "  ", "--repo", str(indexed), "--backend", "fake")
    assert code == 1
    assert err == "error: the query is empty; type what you are looking for\n"


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


@pytest.mark.parametrize(("place", "message"), [
    (f"{REFUND}:no_such_unit", f"{REFUND}: no unit named 'no_such_unit'"),
    (f"{REFUND}:99999", f"{REFUND}: no unit holds line 99999"),
    ("python/kestrune/nowhere.py:run", "python/kestrune/nowhere.py: not a file of the index"),
    ("issue_refund", "--neighbours wants PATH:QUALNAME or PATH:LINE, not 'issue_refund'"),
])
def test_neighbours_of_an_unknown_unit_is_a_one_line_error(indexed: Path, place: str,
                                                           message: str) -> None:
    code, out, err = run_cli("search", "--neighbours", place, "--repo", str(indexed),
                             "--backend", "fake")
    assert (code, out) == (1, "")
    assert err == f"error: {message}\n"


def test_neighbours_of_a_path_outside_the_repository(indexed: Path, tmp_path: Path,
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    (tmp_path / "elsewhere.py").write_text("def run():\n    pass\n", encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    code, out, err = run_cli("search", "--neighbours", "elsewhere.py:run", "--repo",
                             str(indexed), "--backend", "fake")
    assert (code, out) == (1, "")
    assert err == f"error: elsewhere.py: outside the repository {indexed.resolve()}\n"


def test_neighbours_and_a_query_together_are_refused(indexed: Path) -> None:
    code, _, err = run_cli("search", "refund", "--neighbours", f"{REFUND}:issue_refund",
                           "--repo", str(indexed), "--backend", "fake")
    assert code == 1
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
