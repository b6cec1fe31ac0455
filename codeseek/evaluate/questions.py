"""Question checks: a team's own questions, each with its acceptable answers, over the index.

A question file is JSON Lines, one question a line::

    {"question": "where do we copy a folder with everything under it?",
     "answers": [{"path": "pkg/files.py", "qualname": "copy_tree"}]}

Other fields are allowed and ignored; blank lines are skipped. Each question
is asked of the index exactly as ``codeseek search`` asks it
(:meth:`codeseek.api.Index.search`, the served ranking), and its rank is the
rank of its best-ranked acceptable answer. The figures are hit@1, hit@5,
hit@10 and MRR@10 (the reciprocal rank, 0 past rank 10), each with a
percentile-bootstrap 95% interval. An answer that names no unit of the index
(the code moved or was renamed since the question was written) does not stop
the check: it is reported with its line, and a question none of whose answers
is in the index counts as missed.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from codeseek import safefs
from codeseek.display import printable
from codeseek.errors import CodeseekError, QuestionFileError
from codeseek.evaluate.metrics import bootstrap_ci, reciprocal_ranks
from codeseek.search import CANDIDATES

QUESTIONS_NAME = "questions.jsonl"
"""The question file read from the index folder when none is named."""
CUTOFF = 10
HIT_AT = (1, 5, 10)
DEPTH = CANDIDATES // 3
"""How deep each question is searched: the served ranking's candidates do not change up to
this depth (:meth:`~codeseek.search.Searcher.ranked` fuses max(CANDIDATES, 3k) of each
side), so its first 10 are exactly what ``search -k 10`` returns."""
BATCH = 64

Search = Callable[[list[str], int], list[list[tuple[str, str]]]]
"""Asks several questions, returns each one's ranked (path, qualname) to a depth."""


@dataclass(frozen=True)
class Answer:
    """An acceptable answer: a unit by repository-relative path and qualified name."""

    path: str
    qualname: str

    def __str__(self) -> str:
        return f"{self.path}:{self.qualname}"


@dataclass(frozen=True)
class Question:
    """One line of a question file."""

    line: int
    text: str
    answers: tuple[Answer, ...]


def _where(source: Path, line: int) -> str:
    return f"{source}, line {line}"


def _answer(value: object, source: Path, line: int, number: int) -> Answer:
    if (isinstance(value, dict) and isinstance(value.get("path"), str) and value["path"]
            and isinstance(value.get("qualname"), str) and value["qualname"]):
        return Answer(value["path"], value["qualname"])
    raise QuestionFileError(f"{_where(source, line)}: answer {number} is not "
                            '{"path": ..., "qualname": ...} with two non-empty strings')


def parse_questions(text: str, source: Path) -> list[Question]:
    """The questions of a file's text (``source`` names the file in errors)."""
    questions: list[Question] = []
    for line, raw in enumerate(text.splitlines(), start=1):
        if not raw.strip():
            continue
        try:
            record = json.loads(raw)
        except json.JSONDecodeError as exc:
            raise QuestionFileError(f"{_where(source, line)}: not JSON ({exc.msg})") from exc
        if not isinstance(record, dict):
            raise QuestionFileError(f"{_where(source, line)}: not a JSON object")
        question = record.get("question")
        if not isinstance(question, str) or not question.strip():
            raise QuestionFileError(
                f'{_where(source, line)}: no "question" (a non-empty string)')
        answers = record.get("answers")
        if not isinstance(answers, list) or not answers:
            raise QuestionFileError(
                f'{_where(source, line)}: no "answers" (a non-empty list of '
                '{"path": ..., "qualname": ...})')
        questions.append(Question(line, question, tuple(
            _answer(value, source, line, number)
            for number, value in enumerate(answers, start=1))))
    if not questions:
        raise QuestionFileError(f"{source}: no questions (one JSON object a line)")
    return questions


def load_questions(path: Path, *, in_index_dir: bool = False) -> list[Question]:
    """The questions of a file; ``in_index_dir``: the index folder's own, read without
    following a link."""
    try:
        data = safefs.read_bytes(path) if in_index_dir else path.read_bytes()
    except FileNotFoundError:
        raise QuestionFileError(f"{path}: no such question file") from None
    except IsADirectoryError:
        raise QuestionFileError(f"{path}: a folder, not a question file") from None
    except OSError as exc:
        raise QuestionFileError(
            f"{path}: cannot read the question file: {exc.strerror or exc}") from exc
    except CodeseekError as exc:  # a link or a special file in the index folder
        raise QuestionFileError(str(exc)) from exc
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise QuestionFileError(f"{_where(path, line)}: not UTF-8 text") from exc
    return parse_questions(text.removeprefix("\ufeff"), path)


@dataclass(frozen=True)
class Stale:
    """An answer of a question file that names no unit of the index."""

    line: int
    answer: Answer

    def describe(self, source: str) -> str:
        """One line that says where it is and what it names (escaped for a terminal)."""
        return printable(f"{source}, line {self.line}: {self.answer} is not in the index")


@dataclass(frozen=True)
class QuestionResult:
    """One question's outcome: the rank of its best answer (0: not within the depth)."""

    question: Question
    rank: int
    top: tuple[tuple[str, str], ...]  # the first few served hits (path, qualname)
    answerable: bool  # at least one answer is in the index

    @property
    def missed(self) -> bool:
        """Not in the top 10."""
        return not 0 < self.rank <= CUTOFF


@dataclass(frozen=True)
class QuestionReport:
    """The question checks of one file over one index.

    Attributes:
        source: the question file.
        corpus: units in the index.
        results: each question's outcome, in file order.
        metrics: ``hit@1``, ``hit@5``, ``hit@10`` and ``mrr@10``.
        ci95: a bootstrap 95% interval for each metric.
        stale: answers that name no unit of the index.
        adapter: whether search went through the index's query adapter.
    """

    source: str
    corpus: int
    results: tuple[QuestionResult, ...]
    metrics: dict[str, float]
    ci95: dict[str, tuple[float, float]]
    stale: tuple[Stale, ...]
    adapter: bool = False

    @property
    def ranks(self) -> tuple[int, ...]:
        """Each question's rank of its best answer (0: not found within the depth)."""
        return tuple(r.rank for r in self.results)

    @property
    def missed(self) -> list[QuestionResult]:
        """The questions whose answer is not in the top 10."""
        return [r for r in self.results if r.missed]

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {
            "file": self.source, "n": len(self.results), "corpus": self.corpus,
            "depth": DEPTH, "adapter": self.adapter,
            **{name: round(value, 4) for name, value in self.metrics.items()},
            "ci95": {name: [round(low, 4), round(high, 4)]
                     for name, (low, high) in self.ci95.items()},
            "missed": [{"line": r.question.line, "question": r.question.text,
                        "rank": r.rank or None, "answerable": r.answerable,
                        "answers": [{"path": a.path, "qualname": a.qualname}
                                    for a in r.question.answers],
                        "top": [{"path": p, "qualname": q} for p, q in r.top]}
                       for r in self.missed],
            "stale": [{"line": s.line, "path": s.answer.path, "qualname": s.answer.qualname}
                      for s in self.stale],
        }

    def to_text(self) -> str:
        """The lines the command line prints (the file's text escaped for a terminal)."""
        n = len(self.results)
        lines = [f"questions: {n} from {printable(self.source)}, asked of the whole index "
                 f"({self.corpus} units) as search serves them",
                 f"{'hit@1':>6} {'hit@5':>6} {'hit@10':>6}  {'MRR@10':>6}  95% interval"]
        low, high = self.ci95["mrr@10"]
        lines.append(f"{self.metrics['hit@1']:6.3f} {self.metrics['hit@5']:6.3f} "
                     f"{self.metrics['hit@10']:6.3f}  {self.metrics['mrr@10']:6.3f}  "
                     f"{low:.3f}-{high:.3f}")
        missed = self.missed
        lines.append(f"missed (not in the top {CUTOFF}): {len(missed)} of {n}"
                     + (":" if missed else ""))
        for result in missed:
            where = (f"rank {result.rank}" if result.rank else
                     "not ranked" if result.answerable else "no answer in the index")
            lines.append(f"  line {result.question.line} ({where}): "
                         f"{printable(result.question.text)}")
        lines.extend(f"stale: {s.describe(self.source)}" for s in self.stale)
        return "\n".join(lines)


def question_rows(ranks: Sequence[int]) -> dict[str, np.ndarray]:
    """Per-question values whose means are the metrics (hit@k and MRR@10)."""
    ranks_array = np.asarray(ranks, dtype=np.int64)
    found = ranks_array > 0
    rows = {f"hit@{k}": (found & (ranks_array <= k)).astype(np.float64) for k in HIT_AT}
    rows["mrr@10"] = reciprocal_ranks(np.where(ranks_array <= CUTOFF, ranks_array, 0))
    return rows


def _batches(items: Sequence[Question], size: int) -> Iterable[Sequence[Question]]:
    for start in range(0, len(items), size):
        yield items[start : start + size]


def check_questions(questions: Sequence[Question], search: Search,
                    known: set[tuple[str, str]], *, source: str, corpus: int,
                    seed: int = 0, adapter: bool = False) -> QuestionReport:
    """Ask every question through ``search`` and score the best-ranked acceptable answer.

    ``known`` holds the (path, qualname) of every unit of the index.
    """
    stale = tuple(Stale(q.line, a) for q in questions for a in q.answers
                  if (a.path, a.qualname) not in known)
    results: list[QuestionResult] = []
    for batch in _batches(questions, BATCH):
        rankings = search([q.text for q in batch], DEPTH)
        for question, ranking in zip(batch, rankings, strict=True):
            wanted = {(a.path, a.qualname) for a in question.answers}
            rank = next((i for i, hit in enumerate(ranking, start=1) if hit in wanted), 0)
            results.append(QuestionResult(question, rank, tuple(ranking[:3]),
                                          bool(wanted & known)))
    rows = question_rows([r.rank for r in results])
    return QuestionReport(
        source=source, corpus=corpus, results=tuple(results),
        metrics={name: float(values.mean()) for name, values in rows.items()},
        ci95={name: bootstrap_ci(values, seed) for name, values in rows.items()},
        stale=stale, adapter=adapter)
