"""Question checks (``codeseek eval --questions``) and the name-blind docstring protocol."""

from __future__ import annotations

import ast
import io
import json
import keyword
import re
import textwrap
import tokenize
from pathlib import Path

import numpy as np
import pytest
from test_cli import run_cli

from codeseek.api import Index
from codeseek.evaluate import (
    DEPTH,
    Split,
    blind_words,
    name_blind_cases,
    name_blind_query,
    select_cases,
    unit_identifiers,
)
from codeseek.evaluate.questions import DEPTH as QUESTION_DEPTH
from codeseek.evaluate.questions import QUESTIONS_NAME, question_rows
from codeseek.search import SearchHit
from codeseek.units import CodeUnit, split_identifier

# -- name-blind queries: exact cases ---------------------------------------------------------

PY_CODE = '''\
def drain_upload_queue(batchSize, retries=3):
    """Drain the upload queue in batches."""
    # send every pending ride
    pending = fetch_pending("rides")
    for item in pending:
        return item
'''


def py_unit(code: str = PY_CODE, name: str = "drain_upload_queue",
            qualname: str = "Uploader.drain_upload_queue", language: str = "python") -> CodeUnit:
    return CodeUnit(path="m.py", language=language, kind="function", name=name,
                    qualname=qualname, signature=code.splitlines()[0],
                    doc="Drain the upload queue in batches.", start_line=1,
                    end_line=code.count("\n"), code=code)


def test_the_identifiers_of_a_python_unit() -> None:
    # keywords (def, for, in, return), the doc, the comment and the string are not names
    assert unit_identifiers(py_unit()) == {
        "drain_upload_queue", "Uploader", "batchSize", "retries", "pending", "fetch_pending",
        "item"}
    assert blind_words(py_unit()) == {
        "drain_upload_queue", "drain", "upload", "queue", "uploader", "batchsize", "batch",
        "size", "retries", "pending", "fetch_pending", "fetch", "item"}


@pytest.mark.parametrize(("query", "expected"), [
    ("Drain the upload queue in batches.", "the in batches."),
    # a compound word loses the split words that are names and keeps the rest
    ("Send each upload_queue entry and fetch_size rides", "Send each entry and rides"),
    ("Retry every pending ride for the Uploader, in batch sizes", "Retry every ride for the ,"
                                                                 " in sizes"),
    ("Return the items for every RIDE", "Return the items for every RIDE"),
])
def test_the_query_a_doc_and_code_become(query: str, expected: str) -> None:
    assert name_blind_query(query, py_unit()) == expected


def test_camel_case_names_of_javascript_and_their_words() -> None:
    code = ("function findNearestDock(riderPosition, stations) {\n"
            "  // skip stations that are offline\n"
            "  return stations.filter((s) => s.isOnline).sort(byDistanceTo(riderPosition));\n"
            "}\n")
    unit = py_unit(code, "findNearestDock", "findNearestDock", "javascript")
    assert unit_identifiers(unit) == {"findNearestDock", "riderPosition", "stations", "s",
                                      "isOnline", "filter", "sort", "byDistanceTo"}
    assert name_blind_query("Find the nearest dock to a rider's position that is online",
                            unit) == "the a ' that"  # to, s, is, online: names' words


def test_a_language_without_a_grammar_falls_back_to_identifier_like_words() -> None:
    unit = py_unit("PERFORM tally-fares UNTIL done-flag\n", "tally", "tally", "cobol")
    assert unit_identifiers(unit) == {"tally", "PERFORM", "fares", "UNTIL", "done", "flag"}


SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"


def _python_names(unit: CodeUnit) -> set[str]:
    """Reference: the NAME tokens of Python's own tokenizer, less its keywords, and the
    names of the expressions inside f-strings (through Python's ast: before 3.12 the
    tokenizer gives an f-string as one STRING token)."""
    source = textwrap.dedent(unit.code_without_doc)
    names = set()
    for token in tokenize.generate_tokens(io.StringIO(source).readline):
        if token.type == tokenize.NAME and not keyword.iskeyword(token.string):
            names.add(token.string)
        elif token.type == tokenize.STRING and "f" in re.split("['\"]", token.string)[0].lower():
            for node in ast.walk(ast.parse(token.string, mode="eval")):
                if isinstance(node, ast.Name):
                    names.add(node.id)
                elif isinstance(node, ast.Attribute):
                    names.add(node.attr)
    return names


def test_python_identifiers_match_the_standard_tokenizer(fake_index: Index) -> None:
    units = [s.unit for s in fake_index.store.iter_units() if s.unit.language == "python"]
    assert len(units) > 50
    for unit in units:
        # reference: Python's tokenize module (NAME tokens that are not keywords)
        expected = _python_names(unit) | {unit.name, *re.split(r"\W+", unit.qualname)} - {""}
        assert unit_identifiers(unit) == expected, unit.uid


def test_name_blind_queries_on_sample_repo_hold_no_name_of_their_unit(
        fake_index: Index) -> None:
    units = [s.unit for s in fake_index.store.iter_units()]
    held_out = select_cases(units, Split()).held_out
    blind = name_blind_cases(units, held_out)
    assert 0 < len(blind) <= len(held_out)
    checked = 0
    for case in blind:
        unit = units[case.position]
        if unit.language != "python":
            continue
        names = _python_names(unit) | set(re.split(r"\W+", unit.qualname))
        banned = {n.lower() for n in names} | {w for n in names for w in split_identifier(n)}
        words = {w.lower() for w in re.findall(r"[A-Za-z0-9]+", case.query)}
        assert not words & banned, (unit.uid, case.query)
        checked += 1
    assert checked >= 10


def test_eval_reports_name_blind_beside_the_present_protocols(fake_index: Index) -> None:
    report = fake_index.evaluate()
    units = [s.unit for s in fake_index.store.iter_units()]
    blind = name_blind_cases(units, select_cases(units, report.split).held_out)
    assert report.name_blind is not None
    assert [r.method for r in report.name_blind.results] == [
        "lexical", "dense", "dense-ann", "served"]
    for result in report.name_blind.results:
        assert result.n == len(blind) and result.pool == "all"
        assert result.pool_size == report.corpus
    assert report.name_blind.left_out == report.holdout - len(blind)
    data = report.to_json()
    assert data["name_blind"] == report.name_blind.to_json()
    assert [r["method"] for r in data["results"]] == [r.method for r in report.results]
    assert "questions" not in data  # no question file: no new key
    text = report.to_text()
    assert "\nname-blind: the same held-out docs with every identifier of their unit " in text
    assert re.search(rf"name-blind: .*\n(.*\n){{3}}served +\d+ +{len(blind)} ", text)


# -- question checks ---------------------------------------------------------------------------

QUESTIONS = [
    {"question": "send every waiting batch to storage and delete it",
     "answers": [{"path": "python/kestrune/uploads.py", "qualname": "drain_upload_queue"}],
     "name_words": []},
    {"question": "is a monthly pass still valid on a day?",
     "answers": [{"path": "python/kestrune/billing/passes.py",
                  "qualname": "MonthlyPass.is_active"}]},
    {"question": "how much does the rider pay with tax",
     "answers": [{"path": "python/kestrune/billing/passes.py",
                  "qualname": "Invoice.total_cents"},
                 {"path": "rust/fares/src/lib.rs", "qualname": "Fare"}]},
    {"question": "make rides that start in rush hour cost more",
     "answers": [{"path": "python/kestrune/billing/fares.py",
                  "qualname": "apply_peak_multiplier"}]},
    {"question": "which docks have gone quiet for too long",
     "answers": [{"path": "go/dockd/service.go", "qualname": "(*HeartbeatTracker).Silent"}]},
    {"question": "order the docks a technician should visit, broken ones first",
     "answers": [{"path": "ts/ops-dashboard/dockHealth.ts", "qualname": "technicianRound"}]},
    {"question": "choose the closest station the van has not called at",
     "answers": [{"path": "python/kestrune/rebalancing.py",
                  "qualname": "plan_van_route.nearest_unvisited"}]},
    {"question": "turn raw bytes from a dock into a status",
     "answers": [{"path": "python/kestrune/telemetry.py", "qualname": "decode_status_packet"},
                 {"path": "python/kestrune/telemetry.py", "qualname": "no_longer_here"}]},
    {"question": "quantum chromodynamics lattice",
     "answers": [{"path": "python/kestrune/config.py", "qualname": "Settings"}]},
    {"question": "a question whose answer was removed",
     "answers": [{"path": "python/old.py", "qualname": "removed"}]},
]


def write_questions(path: Path, records: list[dict[str, object]]) -> Path:
    path.write_text("".join(json.dumps(r) + "\n" for r in records), encoding="utf-8")
    return path


def test_question_figures_are_the_served_ranking(fake_index: Index, tmp_path: Path) -> None:
    from sklearn.metrics import top_k_accuracy_score

    source = write_questions(tmp_path / "q.jsonl", QUESTIONS)
    report = fake_index.evaluate_questions(source)
    assert report is not None
    units = [s.unit for s in fake_index.store.iter_units()]
    keys = sorted({(u.path, u.qualname) for u in units})
    column = {key: i for i, key in enumerate(keys)}
    absent = len(keys)  # one more column: an answer that is not in the index
    expected_ranks, scores, truth = [], [], []
    for record in QUESTIONS:
        # the served ranking: what `codeseek search` returns for the question
        served = [(h.path, h.qualname) for h in fake_index.search(record["question"],
                                                                   k=QUESTION_DEPTH)]
        top10 = [(h.path, h.qualname) for h in fake_index.search(record["question"], k=10)]
        assert served[:10] == top10  # searching deeper does not change the first ten
        assert len(served) >= 10
        answers = {(a["path"], a["qualname"]) for a in record["answers"]}  # type: ignore
        ranks = [i for i, key in enumerate(served, start=1) if key in answers]
        expected_ranks.append(min(ranks, default=0))
        row = np.zeros(len(keys) + 1)
        for i, key in enumerate(served):
            row[column[key]] = len(served) + 1 - i
        # the acceptable answers as one label scored as its best-ranked member
        members = [column[a] for a in answers if a in column]
        best = max((row[m] for m in members), default=-1.0)
        row[members] = -1.0
        label = members[0] if members else absent
        row[label] = best
        scores.append(row)
        truth.append(label)
    assert report.ranks == tuple(expected_ranks)
    assert expected_ranks[-1] == 0 and any(0 < r <= 10 for r in expected_ranks)
    matrix, labels = np.array(scores), np.array(truth)
    # reference: scikit-learn's top_k_accuracy_score is hit@k
    hits = {k: top_k_accuracy_score(labels, matrix, k=k, labels=np.arange(len(keys) + 1))
            for k in range(0, 11) if k}
    for k in (1, 5, 10):
        assert report.metrics[f"hit@{k}"] == pytest.approx(hits[k], abs=1e-12)
    # reference: MRR@10 = sum over k of (hit@k - hit@(k-1)) / k, from the same scikit-learn
    # figures (the share first found at rank k, weighted 1/k)
    mrr = sum((hits[k] - hits.get(k - 1, 0.0)) / k for k in range(1, 11))
    assert report.metrics["mrr@10"] == pytest.approx(mrr, abs=1e-12)
    missed = [i + 1 for i, r in enumerate(expected_ranks) if not 0 < r <= 10]
    assert [r.question.line for r in report.missed] == missed
    assert [(s.line, str(s.answer)) for s in report.stale] == [
        (8, "python/kestrune/telemetry.py:no_longer_here"), (10, "python/old.py:removed")]


def test_question_rows_and_intervals() -> None:
    rows = question_rows([1, 3, 0, 12, 7])
    assert rows["hit@1"].tolist() == [1, 0, 0, 0, 0]
    assert rows["hit@5"].tolist() == [1, 1, 0, 0, 0]
    assert rows["hit@10"].tolist() == [1, 1, 0, 0, 1]
    assert rows["mrr@10"].tolist() == pytest.approx([1, 1 / 3, 0, 0, 1 / 7])  # 12: past 10


def test_question_depth_keeps_the_served_candidates() -> None:
    from codeseek.search import CANDIDATES

    # Searcher.ranked fuses max(CANDIDATES, 3k) of each side: the depth must not raise it
    assert 3 * QUESTION_DEPTH <= CANDIDATES and DEPTH == CANDIDATES


@pytest.fixture
def indexed(sample_copy: Path) -> Path:
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    return sample_copy


def test_cli_eval_questions_text_and_json(indexed: Path, tmp_path: Path) -> None:
    records = QUESTIONS + [{"question": "where \x1b[2J is the fare\nfor a day",
                            "answers": [{"path": "python/old.py", "qualname": "gone"}]}]
    source = write_questions(tmp_path / "q.jsonl", records)
    code, out, err = run_cli("eval", str(indexed), "--backend", "fake", "--questions",
                             str(source))
    assert code == 0, err
    tail = out[out.index("\nquestions: "):]
    assert tail.startswith(f"\nquestions: 11 from {source}, asked of the whole index (")
    assert "\n hit@1  hit@5 hit@10  MRR@10  95% interval\n" in tail
    assert "  line 10 (no answer in the index): a question whose answer was removed\n" in tail
    assert ("  line 11 (no answer in the index): where \\x1b[2J is the fare\\nfor a day\n"
            in tail)  # escaped for the terminal (codeseek/display.py)
    assert f"stale: {source}, line 10: python/old.py:removed is not in the index" in tail
    assert "\x1b" not in out
    code, out, _ = run_cli("eval", str(indexed), "--backend", "fake", "--questions",
                           str(source), "--json")
    data = json.loads(out)
    asked = data["questions"]
    assert asked["n"] == 11 and asked["file"] == str(source)
    assert set(asked) == {"file", "n", "corpus", "depth", "adapter", "hit@1", "hit@5",
                          "hit@10", "mrr@10", "ci95", "missed", "stale"}
    last = asked["missed"][-1]
    assert last["question"] == "where \x1b[2J is the fare\nfor a day"  # JSON: exact text
    assert (last["line"], last["rank"], last["answerable"]) == (11, None, False)
    for name in ("hit@1", "hit@5", "hit@10", "mrr@10"):
        low, high = asked["ci95"][name]
        assert low <= asked[name] <= high
    assert {"results", "best", "tied", "name_blind"} <= set(data)


def test_cli_eval_reads_the_index_folders_question_file(indexed: Path) -> None:
    own = indexed / ".codeseek" / QUESTIONS_NAME
    write_questions(own, QUESTIONS[:3])
    code, out, err = run_cli("eval", str(indexed), "--backend", "fake")
    assert code == 0, err
    assert f"\nquestions: 3 from {own}, asked of the whole index (" in out
    own.unlink()
    code, out, _ = run_cli("eval", str(indexed), "--backend", "fake")
    assert code == 0 and "\nquestions: " not in out


def test_a_linked_question_file_in_the_index_folder_is_refused(indexed: Path,
                                                                 tmp_path: Path) -> None:
    target = write_questions(tmp_path / "elsewhere.jsonl", QUESTIONS[:2])
    own = indexed / ".codeseek" / QUESTIONS_NAME
    own.symlink_to(target)
    code, _, err = run_cli("eval", str(indexed), "--backend", "fake")
    assert code == 1 and err.startswith(f"error: {own}: ")
    assert "\n" not in err[:-1]


@pytest.mark.parametrize(("content", "message"), [
    (b'{"question": "a", "answers": [{"path": "p", "qualname": "q"}]}\nnot json\n',
     "{file}, line 2: not JSON (Expecting value)"),
    (b'\n["a list"]\n', "{file}, line 2: not a JSON object"),
    (b'{"answers": [{"path": "p", "qualname": "q"}]}\n',
     '{file}, line 1: no "question" (a non-empty string)'),
    (b'{"question": "  ", "answers": [{"path": "p", "qualname": "q"}]}\n',
     '{file}, line 1: no "question" (a non-empty string)'),
    (b'{"question": "where", "answers": []}\n',
     '{file}, line 1: no "answers" (a non-empty list of {{"path": ..., "qualname": ...}})'),
    (b'{"question": "where"}\n',
     '{file}, line 1: no "answers" (a non-empty list of {{"path": ..., "qualname": ...}})'),
    (b'{"question": "where", "answers": [{"path": "p", "qualname": "q"}, {"path": "p"}]}\n',
     '{file}, line 1: answer 2 is not {{"path": ..., "qualname": ...}} with two non-empty '
     'strings'),
    (b"\n\n", "{file}: no questions (one JSON object a line)"),
    (b'{"question": "a", "answers": []}\n{"question": "\xff"}\n', "{file}, line 2: not UTF-8 "
                                                                  "text"),
])
def test_cli_question_file_errors(indexed: Path, tmp_path: Path, content: bytes,
                                  message: str) -> None:
    source = tmp_path / "bad.jsonl"
    source.write_bytes(content)
    code, out, err = run_cli("eval", str(indexed), "--backend", "fake", "--questions",
                             str(source))
    assert (code, out, err) == (1, "", f"error: {message.format(file=source)}\n")


def test_cli_missing_question_file_and_folder(indexed: Path, tmp_path: Path) -> None:
    missing = tmp_path / "nope.jsonl"
    code, out, err = run_cli("eval", str(indexed), "--backend", "fake", "--questions",
                             str(missing))
    assert (code, out, err) == (1, "", f"error: {missing}: no such question file\n")
    code, out, err = run_cli("eval", str(indexed), "--backend", "fake", "--questions",
                             str(tmp_path))
    assert (code, out, err) == (1, "", f"error: {tmp_path}: a folder, not a question file\n")


def test_the_html_page_shows_name_blind_and_questions(fake_index: Index, tmp_path: Path) -> None:
    from codeseek.evaluate import render_html

    records = QUESTIONS[:2] + [{"question": "<script>x</script> where",
                                "answers": [{"path": "python/old.py", "qualname": "gone"}]}]
    report = fake_index.evaluate(questions=write_questions(tmp_path / "q.jsonl", records))
    page = render_html(report)
    assert "<h2>Name-blind: each held-out doc without its unit's identifiers</h2>" in page
    assert f"<h2>Questions: 3 from {tmp_path / 'q.jsonl'}</h2>" in page
    assert "<li>line 3 (not ranked): &lt;script&gt;x&lt;/script&gt; where</li>" in page
    assert "<script>" not in page


def test_c_identifiers_are_read_with_the_macros_blanked() -> None:
    # the grammar reads what the index's parser reads: an annotation macro blanked out
    code = ("static int count_free_docks(const struct dock *docks, int n) MUST_CHECK {\n"
            "    int free_slots = 0;\n"
            "    for (int i = 0; i < n; i++) free_slots += docks[i].free;\n"
            "    return free_slots;\n}\n")
    unit = py_unit(code, "count_free_docks", "count_free_docks", "c")
    assert unit_identifiers(unit) == {"count_free_docks", "dock", "docks", "n", "free_slots",
                                      "i", "free"}


def test_a_repository_with_too_few_docs_is_still_checked_on_its_questions(
        tmp_path: Path) -> None:
    root = tmp_path / "tiny"
    (root / "fares").mkdir(parents=True)
    (root / "fares" / "day.py").write_text(
        "def day_pass_price(zone):\n    return 4 + zone\n\n\n"
        "def refund_late_ride(ride):\n    ride.refunded = True\n", encoding="utf-8")
    code, _, err = run_cli("index", str(root), "--backend", "fake", "-q")
    assert code == 0, err
    code, out, err = run_cli("eval", str(root), "--backend", "fake")
    assert (code, err.splitlines()[-1]) == (1, (
        "error: no held-out docstrings to check: 0 units have a doc of at least 3 words; "
        "document more code or raise --holdout"))
    source = write_questions(tmp_path / "q.jsonl", [
        {"question": "how much is a pass for a whole day",
         "answers": [{"path": "fares/day.py", "qualname": "day_pass_price"}]}])
    code, out, err = run_cli("eval", str(root), "--backend", "fake", "--questions",
                             str(source), "--json")
    assert code == 0, err
    data = json.loads(out)
    assert data["results"] == [] and data["holdout"] == 0
    assert data["notes"] == ["no held-out docstrings to check: 0 units have a doc of at least "
                             "3 words; document more code or raise --holdout"]
    expected = [(h.path, h.qualname) for h in _search(root, "how much is a pass for a whole day")]
    rank = expected.index(("fares/day.py", "day_pass_price")) + 1
    assert data["questions"]["mrr@10"] == pytest.approx(1 / rank)
    code, out, _ = run_cli("eval", str(root), "--backend", "fake", "--questions", str(source))
    assert code == 0 and "\nquestions: 1 from " in out and "method " not in out


def _search(root: Path, query: str) -> list[SearchHit]:
    from codeseek import FakeEmbedder, open_index

    with open_index(root, embedder=FakeEmbedder()) as index:
        return list(index.search(query, k=10))
