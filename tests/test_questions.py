"""The public question set (tests/data/questions/*.jsonl): well formed, and every answer real.

Each file holds hand-written newcomer questions over one repository, one JSON object a
line: ``question``, ``answers`` (every acceptable ``{"path", "qualname"}``, paths relative
to the root that gets indexed) and ``name_words`` (the question's words that also occur in
an answer's name). These tests check the files themselves, not codeseek's ranking:

* each line parses and has exactly those fields; no question is asked twice;
* ``name_words`` is exactly the set of the question's words (stop words left out) that are
  also words of an answer's qualified name, split at ``_``, ``.``, ``::`` and camelCase;
* every answer is a unit codeseek extracts from that repository, read with the same
  rules as ``codeseek index`` (for the standard library, from a copy of the answer files
  made the way scripts/bench_index.py copies it, test folders left out); for the standard
  library each qualified name is also checked against Python's own ``ast`` of the file.
"""

from __future__ import annotations

import ast
import json
import re
import shutil
import sysconfig
from collections.abc import Callable
from pathlib import Path, PurePosixPath

import pytest
from corpora import CORPORA, fetch_or_skip, units_of

QUESTIONS = Path(__file__).resolve().parent / "data" / "questions"
SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"
STDLIB = Path(sysconfig.get_paths()["stdlib"])
# The folders scripts/bench_index.py and scripts/bench_quality.py leave out of their copy.
STDLIB_SKIPPED = frozenset({"test", "tests", "idle_test", "site-packages", "__pycache__"})

# Words too common to say anything about a name ("is" in is_private, "to" in move_to_end).
STOP_WORDS = frozenset({"a", "an", "the", "is", "of", "to", "in", "on", "for", "and", "or",
                        "by", "at", "as", "be", "it", "if", "do", "we", "from", "with", "into"})
FIELDS = {"question", "answers", "name_words"}


def words(text: str) -> list[str]:
    """Lower-case words of a text or an identifier: split at non-alphanumerics and camelCase
    (``IPv4Network`` -> ``ipv4``, ``network``; ``readAsCSV`` -> ``read``, ``as``, ``csv``)."""
    text = re.sub(r"([a-z0-9])([A-Z])", r"\1 \2", text)
    text = re.sub(r"([A-Z]+)([A-Z][a-z]{2})", r"\1 \2", text)
    return [word.lower() for word in re.findall(r"[A-Za-z0-9]+", text)]


def stem(word: str) -> str:
    """A plural and its singular count as the same word (``docks`` gives ``dock`` away)."""
    return word[:-1] if len(word) > 3 and word.endswith("s") else word


def expected_name_words(record: dict) -> list[str]:
    name_stems = {stem(w) for answer in record["answers"] for w in words(answer["qualname"])}
    return sorted({w for w in words(record["question"])
                   if w not in STOP_WORDS and stem(w) in name_stems})


def load(name: str) -> list[dict]:
    path = QUESTIONS / f"{name}.jsonl"
    records = []
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        assert line.strip(), f"{path.name}:{number}: blank line"
        record = json.loads(line)
        assert isinstance(record, dict) and set(record) == FIELDS, f"{path.name}:{number}"
        records.append(record)
    return records


def stdlib_root(tmp_path: Path) -> Path:
    """A copy of the answer files of the standard library set, as the stdlib copy holds them."""
    root = tmp_path / "stdlib"
    for path in sorted({a["path"] for r in load("stdlib") for a in r["answers"]}):
        parts = PurePosixPath(path).parts
        assert not STDLIB_SKIPPED & set(parts), f"{path}: in a folder the stdlib copy leaves out"
        target = root / path
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(STDLIB / path, target)
    return root


ROOTS: dict[str, Callable[[Path], Path]] = {
    "sample_repo": lambda tmp_path: SAMPLE_REPO,
    "stdlib": stdlib_root,
    "pflag": lambda tmp_path: fetch_or_skip(CORPORA["go"]),
    "thor": lambda tmp_path: fetch_or_skip(CORPORA["ruby"]),
}


def test_every_file_is_covered_and_the_set_is_large_enough() -> None:
    files = sorted(p.stem for p in QUESTIONS.glob("*.jsonl"))
    assert files == sorted(ROOTS)
    counts = {name: len(load(name)) for name in ROOTS}
    assert sum(counts.values()) >= 150, counts
    assert min(counts.values()) >= 25, counts


@pytest.mark.parametrize("name", sorted(ROOTS))
def test_file_is_well_formed(name: str) -> None:
    for record in load(name):
        question = record["question"]
        assert isinstance(question, str) and question.strip() == question and question, record
        answers = record["answers"]
        assert isinstance(answers, list) and answers, question
        for answer in answers:
            assert isinstance(answer, dict) and set(answer) == {"path", "qualname"}, question
            path = answer["path"]
            assert isinstance(path, str) and isinstance(answer["qualname"], str), question
            pure = PurePosixPath(path)
            assert not pure.is_absolute() and ".." not in pure.parts and "\\" not in path, path
        pairs = [(a["path"], a["qualname"]) for a in answers]
        assert len(set(pairs)) == len(pairs), f"an answer is listed twice: {question}"
        assert isinstance(record["name_words"], list), question
        assert all(isinstance(w, str) for w in record["name_words"]), question


def test_no_question_is_asked_twice() -> None:
    seen: dict[str, str] = {}
    for name in ROOTS:
        for record in load(name):
            key = " ".join(words(record["question"]))
            assert key not in seen, f"{name}: {record['question']!r} repeats {seen[key]}"
            seen[key] = f"{name}: {record['question']!r}"


@pytest.mark.parametrize("name", sorted(ROOTS))
def test_name_words_are_the_words_question_and_answer_names_share(name: str) -> None:
    for record in load(name):
        question_words = set(words(record["question"]))
        for word in record["name_words"]:
            assert word in question_words, f"{word!r} is not a word of {record['question']!r}"
        assert record["name_words"] == expected_name_words(record), record["question"]


@pytest.mark.parametrize("name", sorted(ROOTS))
def test_every_answer_is_a_unit_codeseek_extracts(name: str, tmp_path: Path) -> None:
    root = ROOTS[name](tmp_path)
    units = {(unit.path, unit.qualname) for unit in units_of(root)}
    missing = [f"{a['path']} :: {a['qualname']}"
               for record in load(name) for a in record["answers"]
               if (a["path"], a["qualname"]) not in units]
    assert not missing, f"{name}: answers codeseek does not extract: {missing}"


def ast_qualnames(source: str) -> set[str]:
    """Dotted names of every function and class a module defines, nested ones included,
    also under module-level ``if``/``try`` blocks (Python's own parser, not codeseek's)."""
    names: set[str] = set()

    def visit(node: ast.AST, prefix: str) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.FunctionDef | ast.AsyncFunctionDef | ast.ClassDef):
                qualname = f"{prefix}{child.name}"
                names.add(qualname)
                visit(child, qualname + ".")
            else:
                visit(child, prefix)

    visit(ast.parse(source), "")
    return names


def test_stdlib_answers_are_defined_in_their_modules() -> None:
    # Reference outside the project: Python's ast of this machine's standard library.
    by_path: dict[str, set[str]] = {}
    for record in load("stdlib"):
        for answer in record["answers"]:
            path = answer["path"]
            if path not in by_path:
                by_path[path] = ast_qualnames((STDLIB / path).read_text(encoding="utf-8"))
            assert answer["qualname"] in by_path[path], f"{path}: no {answer['qualname']}"


def test_ast_qualnames_reads_nested_and_conditional_definitions() -> None:
    source = ("class A:\n    def m(self):\n        def inner():\n            pass\n"
              "if True:\n    def f():\n        pass\n")
    assert ast_qualnames(source) == {"A", "A.m", "A.m.inner", "f"}


def test_words_split_identifiers_and_plurals() -> None:
    assert words("IPv4Network") == ["ipv4", "network"]
    assert words("Thor::Actions#gsub_file") == ["thor", "actions", "gsub", "file"]
    assert words("(*FlagSet).parseArgs") == ["flag", "set", "parse", "args"]
    assert stem("docks") == stem("dock") and stem("is") == "is"
    record = {"question": "which docks went quiet?",
              "answers": [{"path": "x.py", "qualname": "HeartbeatMonitor.stale_docks"}]}
    assert expected_name_words(record) == ["docks"]
