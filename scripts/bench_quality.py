"""Search quality on held-out docstrings: every ranking choice, measured side by side.

Runs the recall checks of ``codeseek eval`` (:mod:`codeseek.evaluate`) on a
copy of the Python standard library without its test folders (as
``scripts/bench_index.py`` copies it), on ``sample_repo/`` and on the packaged
repositories the tests read (``tests/corpora.py``: Go, C++ and Ruby packages
take part in the choices; the Java and C ones are too small to split and are
only checked, every documented unit held out), and prints, for each choice
codeseek makes, its figure on the training split (where the choice is made)
and on the held-out split (what it is worth). A choice is the best mean training
MRR over the corpora; the shipped one stands unless beaten by more than TIE:

1. the unit text the model embeds (the documents have no doc: see codeseek/evaluate/),
   among them the unit's module context: the words of its file's path on the first line
   (``function copytree (copytree) in shutil``), the first sentence of its module's doc
   (a Python module's docstring, a Go package comment; at most :data:`SUMMARY_CHARS`
   characters, never told to a unit whose own doc holds it), or both. ``--corpus context``
   runs only these against the shipped text: dense and served MRR on the docstrings, and
   the question sets through real indexes built with each text (kept in the cache folder
   beside those of 3c), chosen and reported as 3c is;
2. the keyword side (fields, identifier splitting, stemming, stopwords);
3. the fusion of the two (reciprocal rank fusion against scaled scores, weights),
   and how many candidates of each side it fuses; 3c: what the ranking does with a
   nested helper (a function defined in a function or method): no rule, the enclosing
   unit lifted above its helper, the helper's score times a factor or lowered by an
   amount, on the docstrings and on the public question sets
   (``tests/data/questions/``, split in halves by a hash of each question: training
   and held-out), each asked through a real index kept in the cache folder; the rule
   with the best training figure is printed with its held-out differences to no rule
   (paired bootstrap 95% intervals). ``--corpus nested`` runs only this stage;
   3d: the words of each unit's path (folders and file name) added to one keyword field
   (names x4, signature x2, code x1) or to none, on the docstrings and on the question
   sets through the same real indexes (their keyword entries rewritten each way, then
   as served), chosen and reported as 3c is. ``--corpus paths`` runs only this stage;
4. the served ranking, every method under every protocol, as ``codeseek eval`` prints it;
5. the query adapter of ``codeseek tune`` at batch sizes 32, 256 and 2048;
6. ``codeseek tune`` itself, through a real index of each corpus with its public
   question file (``tests/data/questions/``): plain against adapted on every
   protocol (docstring pools, whole index, name-blind, questions), the penalty and
   mix chosen, and whether the rules kept it. ``--corpus tune`` runs only this
   section, on sample_repo, Go pflag, Ruby thor and a subset of the standard library
   (the modules most of the questions ask about, :data:`STDLIB_SUBSET`;
   ``--tune-stdlib whole``: all of it).

With ``--tiers`` it compares the embedding tiers (codeseek/tiers.py) instead: each
tier's index of ``sample_repo/`` and of a small standard-library copy (the modules the
standard-library question set answers from) is checked as ``codeseek eval --questions``
checks it (every docstring protocol, the name-blind one and the question set), and each
derived tier's MRR is set against the full tier's on the same queries: the difference
and its paired bootstrap 95% interval (queries resampled in pairs). A tier is within the
noise of full on a check when that interval reaches 0 or lies above it.

Prints figures and asserts nothing. Real-model vectors of every text are kept
in ``--cache`` (default ``/tmp/codeseek-bench-quality``), so a second run
embeds nothing; the first embeds the standard library about twice (minutes).

Reproduce: ``.venv/bin/python scripts/bench_quality.py`` (``--tiers`` for the tiers;
section 6 alone: ``--corpus tune``; stage 3c alone: ``--corpus nested``, 5 minutes once
the cache holds the vectors; stage 3d alone: ``--corpus paths``, 3 to 4 minutes; the
module context of stage 1 alone: ``--corpus context``, about 16 minutes the first time,
3 to 4 once the cache holds the vectors and the question indexes)
"""

from __future__ import annotations

import argparse
import contextlib
import hashlib
import inspect
import re
import shlex
import shutil
import sqlite3
import sys
import sysconfig
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

PROJECT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(PROJECT))
sys.path.insert(0, str(PROJECT / "tests"))

from corpora import (  # noqa: E402
    CORPORA,
    CorpusUnavailable,
    fetch,
    stdlib_question_subset,
    units_of,
)

from codeseek import open_index  # noqa: E402
from codeseek.adapter import QueryAdapter  # noqa: E402
from codeseek.api import Index  # noqa: E402
from codeseek.config import load_settings  # noqa: E402
from codeseek.embed import Embedder, load_embedder  # noqa: E402
from codeseek.errors import TooFewExamples  # noqa: E402
from codeseek.evaluate import (  # noqa: E402
    DEPTH,
    Case,
    CaseSignals,
    DocumentIndex,
    EvalReport,
    PoolSampler,
    Prepared,
    Split,
    VectorCache,
    ann_signals,
    build_report,
    dense_signals,
    encode_cached,
    lexical_signals,
    mean_reciprocal_rank,
    mrr_difference,
    protocols_for,
    recall_at,
    select_cases,
    without_doc,
)
from codeseek.evaluate.questions import CUTOFF  # noqa: E402
from codeseek.search import (  # noqa: E402
    CANDIDATES,
    DEFAULT_FUSION,
    RRF_K,
    Fusion,
    lexical_match,
)
from codeseek.tiers import TIERS  # noqa: E402
from codeseek.tune import TrainSettings, fusion_for, train_adapter, training_data  # noqa: E402
from codeseek.units import (  # noqa: E402
    PATH_WORDS_IN,
    CodeUnit,
    code_words,
    lexical_codes,
    path_words,
    split_identifier,
    summarize_doc,
)

SMALL = 200  # a corpus with fewer held-out docstrings is also checked with all of them
CHOOSING = 100  # training pairs a corpus needs to take part in the choices
# common practice: another choice replaces the shipped one only if it wins by more than
# noise; here more than a tenth of a point of mean training MRR
TIE = 0.001
# packaged repositories of the tests: (language in tests/corpora.py, takes part in choices)
PACKAGED = (("go", True), ("cpp", True), ("ruby", True), ("java", False), ("c", False))
SKIP = shutil.ignore_patterns("test", "tests", "idle_test", "site-packages", "__pycache__")
# published reference points for the 1,000-pool protocol, from memory (via the CodeBERT
# paper's table of CodeSearchNet results): not measured here
REFERENCE = ("published, from memory (CodeBERT paper's table, CodeSearchNet Python, pool "
             "1000): neural bag-of-words MRR 0.58, CodeBERT fine-tuned 0.87")


def log(message: str) -> None:
    print(f"  .. {message}", file=sys.stderr, flush=True)


# -- corpora ------------------------------------------------------------------------


def copy_stdlib(target: Path, only: Sequence[str] = ()) -> Path:
    """A copy of the standard library without its test folders (``only``: just these
    top-level modules and packages)."""
    source = Path(sysconfig.get_paths()["stdlib"])
    if not only:
        shutil.copytree(source, target, ignore=SKIP, symlinks=True)
        return target
    target.mkdir(parents=True)
    for name in only:
        if (source / name).is_dir():
            shutil.copytree(source / name, target / name, ignore=SKIP, symlinks=True)
        else:
            shutil.copy2(source / f"{name}.py", target / f"{name}.py")
    return target


STDLIB_SUBSET = ("email", "shutil", "logging", "datetime", "functools", "urllib", "pathlib",
                 "json", "difflib", "argparse", "http", "statistics", "traceback", "csv",
                 "textwrap", "zipfile", "collections", "tarfile", "tempfile", "ipaddress",
                 "configparser", "inspect", "posixpath", "fnmatch", "calendar", "shlex",
                 "random", "dataclasses", "pprint", "timeit", "gzip")
"""The standard-library modules most of tests/data/questions/stdlib.jsonl asks about."""


# -- the choices --------------------------------------------------------------------

_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_DEF = re.compile(r"\b(?:def|fn|func|function|class|struct|interface|enum|trait)\s+([A-Za-z_]\w*)")


def header(unit: CodeUnit) -> str:
    return f"{unit.kind} {unit.qualname} ({' '.join(split_identifier(unit.qualname))})"


def text_before(unit: CodeUnit) -> str:
    """The unit text codeseek embedded before these checks: name, then the code as written."""
    return f"{header(unit)}\n{unit.code}"


def text_shipped(unit: CodeUnit) -> str:
    """What `CodeUnit.embed_text` gives a doc-less unit now."""
    return unit.embed_text()


def text_members(unit: CodeUnit) -> str:
    """Code words, plus the names a unit defines inside it up front (a class's methods)."""
    names = list(dict.fromkeys(m.group(1) for m in _DEF.finditer(unit.code)
                               if m.group(1) != unit.name))
    if not names:
        return text_words(unit)
    members = "defines " + ", ".join(" ".join(split_identifier(n)) for n in names)
    return "\n".join([header(unit), unit.signature, members, code_words(unit.code)])


def text_words(unit: CodeUnit) -> str:
    """Name, signature, then the code as its identifiers' words, whatever its length."""
    return "\n".join([header(unit), unit.signature, code_words(unit.code)])


def text_words_beyond(limit: int) -> Callable[[CodeUnit], str]:
    """Name and code as written below ``limit`` characters of code; words from there on."""
    def text(unit: CodeUnit) -> str:
        return text_before(unit) if len(unit.code) < limit else text_words(unit)
    return text


# -- module context (stage 1 candidates, ``--corpus context``) ---------------------------

SUMMARY_CHARS = 100  # at most this much of a module doc's first sentence (the model reads 256
# word pieces)
_SENTENCE_END = re.compile(r"(?<=[.!?])\s")
_GO_PACKAGE = re.compile(r"^package\s+\w+")
_SHIPPED_EMBED_TEXT = CodeUnit.embed_text  # the shipped text, before any patch of a trial index


def module_doc(path: Path) -> str:
    """The doc of the module a file is: for Python its docstring (``ast.get_docstring``), for
    Go the package comment (the ``//`` lines or the ``/* */`` block directly above the
    ``package`` clause), else ""
    (the other languages have no convention for a file's doc). "" when the file cannot be
    read."""
    import ast

    try:
        data = path.read_bytes()
    except OSError:
        return ""
    if path.suffix in (".py", ".pyi"):
        try:
            return ast.get_docstring(ast.parse(data)) or ""
        except (SyntaxError, ValueError, RecursionError, MemoryError):
            return ""
    if path.suffix == ".go":
        lines = data.decode("utf-8", "replace").splitlines()
        at = next((i for i, line in enumerate(lines) if _GO_PACKAGE.match(line)), 0)
        above = lines[:at]
        if above and above[-1].rstrip().endswith("*/"):  # a /* */ block
            start = next((i for i in range(len(above) - 1, -1, -1)
                          if above[i].lstrip().startswith("/*")), None)
            if start is None:
                return ""
            block = "\n".join(above[start:])
            return inspect.cleandoc(block.strip().removeprefix("/*").removesuffix("*/"))
        comment: list[str] = []
        for line in reversed(above):
            if not line.startswith("//"):
                break
            comment.insert(0, line[2:].strip())
        return "\n".join(comment)
    return ""


def first_sentence(doc: str, limit: int = SUMMARY_CHARS) -> str:
    """A doc's first sentence (of its summary, :func:`codeseek.units.summarize_doc`), cut at
    a word boundary to at most ``limit`` characters."""
    sentence = _SENTENCE_END.split(summarize_doc(doc), maxsplit=1)[0].strip()
    if len(sentence) > limit:
        sentence = sentence[:limit].rsplit(" ", 1)[0]
    return sentence


def module_context(unit: CodeUnit, summary: str) -> str:
    """The module-doc sentence a unit's text may carry: "" when the unit's own doc holds it
    (a doc that is the module's doc must not be told to its own document)."""
    own = " ".join(unit.doc.split())
    if not summary or not own:
        return summary
    mine = first_sentence(unit.doc)
    return "" if summary in own or (mine and mine in summary) else summary


def summaries(repo: Path) -> Callable[[str], str]:
    """path (relative to ``repo``) -> the first sentence of that file's module doc."""
    memo: dict[str, str] = {}

    def of(path: str) -> str:
        if path not in memo:
            memo[path] = first_sentence(module_doc(repo / path))
        return memo[path]
    return of


def context_text(unit: CodeUnit, summary: str, paths: bool, module: bool) -> str:
    """The shipped text with the unit's module context: the words of its file's path at the
    end of the first line (``function copytree (copytree) in shutil``) and/or, on a line of
    its own after it, ``summary`` (the module doc's first sentence)."""
    head, newline, rest = _SHIPPED_EMBED_TEXT(unit).partition("\n")
    if paths and (words := path_words(unit.path)):
        head = f"{head} in {words}"
    if module and summary:
        head = f"{head}\n{summary}"
    return head + newline + rest


# bare unit -> its module-doc sentence, leak-guarded with the unit's own doc (Bench fills it)
MODULE_CONTEXT: dict[CodeUnit, str] = {}


def text_context(paths: bool, module: bool) -> Callable[[CodeUnit], str]:
    """A stage-1 candidate: the shipped text with module context (:func:`context_text`)."""
    def text(unit: CodeUnit) -> str:
        return context_text(unit, MODULE_CONTEXT.get(unit, ""), paths, module)
    return text


def index_text(repo: Path, paths: bool, module: bool) -> Callable[[CodeUnit], str]:
    """The same candidate as a real index of ``repo`` embeds it (units keep their docs)."""
    of = summaries(repo)

    def text(unit: CodeUnit) -> str:
        return context_text(unit, module_context(unit, of(unit.path)) if module else "",
                            paths, module)
    return text


# candidate -> (path words on the first line, module doc's first sentence)
CONTEXTS: dict[str, tuple[bool, bool]] = {
    "+ path words on the first line": (True, False),
    "+ module doc's first sentence": (False, True),
    "+ path words and module doc": (True, True),
}


REPRESENTATIONS: dict[str, Callable[[CodeUnit], str]] = {
    "name + code (before)": text_before,
    "name + signature + code words": text_words,
    "... + defined names up front": text_members,
    "name + code, words from 400 chars": text_words_beyond(400),
    "name + code, words from 800 chars": text_words_beyond(800),
    "name + code, words from 1600 chars": text_words_beyond(1600),
    "shipped (CodeUnit.embed_text)": text_shipped,
    **{name: text_context(*flags) for name, flags in CONTEXTS.items()},
}
SHIPPED_TEXT = "shipped (CodeUnit.embed_text)"


def fields_shipped(unit: CodeUnit, folded: str) -> list[str]:
    """What the index writes: ``folded`` is the unit's code with inner units folded to
    their signatures (``units.lexical_codes``)."""
    fields = unit.lexical_fields(folded)
    return [fields["names"], fields["signature"], fields["doc"], fields["code"]]


def fields_path(column: str | None) -> Callable[[CodeUnit, str], list[str]]:
    """As the index writes them, with the words of the unit's path in one field (or none)."""
    def fields(unit: CodeUnit, folded: str) -> list[str]:
        made = unit.lexical_fields(folded, path_in=column)
        return [made["names"], made["signature"], made["doc"], made["code"]]
    return fields


def fields_members_kept(unit: CodeUnit, folded: str) -> list[str]:
    """As shipped, but a class's entry keeps its methods' bodies."""
    fields = unit.lexical_fields()
    return [fields["names"], fields["signature"], fields["doc"], fields["code"]]


def _split_every(text: str) -> str:
    out: list[str] = []
    for ident in _IDENT.findall(text):
        out.append(ident)
        pieces = split_identifier(ident)
        if len(pieces) > 1:
            out.extend(pieces)
    return " ".join(out)


def fields_before(unit: CodeUnit, folded: str) -> list[str]:
    """Every identifier followed by its pieces (snake_case too, which the tokenizer splits)."""
    return [" ".join(split_identifier(unit.qualname)), _split_every(unit.signature), "",
            _split_every(unit.code)]


def fields_unsplit(unit: CodeUnit, folded: str) -> list[str]:
    return [unit.qualname, unit.signature, "", unit.code]


def match_with_stopwords(query: str) -> str:
    words: list[str] = []
    for token in re.findall(r"[A-Za-z0-9_]+", query):
        for word in [token.lower(), *split_identifier(token)]:
            if word not in words and len(word) > 1:
                words.append(word)
    return " OR ".join(f'"{w}"' for w in words)


@dataclass(frozen=True)
class KeywordVariant:
    """One way to build and query the BM25 side."""

    fields: Callable[[CodeUnit, str], list[str]]
    tokenizer: str = "porter unicode61"
    weights: tuple[float, ...] = (4.0, 2.0, 2.0, 1.0)
    match: Callable[[str], str] = lexical_match


KEYWORDS: dict[str, KeywordVariant] = {
    "camelCase words added, stemmed, names 4x (shipped)": KeywordVariant(fields_shipped),
    "a class's entry keeps its methods' bodies (before)": KeywordVariant(fields_members_kept),
    "every identifier's words added": KeywordVariant(fields_before),
    "no stemming": KeywordVariant(fields_shipped, tokenizer="unicode61"),
    "identifiers not split": KeywordVariant(fields_unsplit),
    "no name field": KeywordVariant(fields_shipped, weights=(0.0, 2.0, 2.0, 1.0)),
    "all fields weighted 1": KeywordVariant(fields_shipped, weights=(1.0, 1.0, 1.0, 1.0)),
    "stopwords kept in the query": KeywordVariant(fields_shipped, match=match_with_stopwords),
}
# stage 3d: the words of a unit's path (folders and file name) in one lexical field, or none
# (the field's weight in COLUMN_WEIGHTS is the path words' weight)
PATHS: dict[str, str | None] = {
    "no path words": None,
    "path words in names (x4)": "names",
    "path words in signature (x2)": "signature",
    "path words in code (x1)": "code",
}
SERVED_PATH = next(name for name, column in PATHS.items() if column == PATH_WORDS_IN)
KEYWORDS.update({f"3d: {name}": KeywordVariant(fields_path(column))
                 for name, column in PATHS.items()})


class KeywordIndex:
    """An FTS5 table of the units, docs removed, built one variant's way (the shipped one
    is the index's own table and query: checked against DocumentIndex in the run)."""

    def __init__(self, units: Sequence[CodeUnit], variant: KeywordVariant) -> None:
        self.variant = variant
        self.size = len(units)
        bare = [without_doc(u) for u in units]
        self.db = sqlite3.connect(":memory:")
        self.db.execute("CREATE VIRTUAL TABLE t USING fts5(names, signature, doc, code, "
                        f"tokenize = '{variant.tokenizer}')")
        self.db.executemany("INSERT INTO t (rowid, names, signature, doc, code) "
                            "VALUES (?, ?, ?, ?, ?)",
                            [(i + 1, *variant.fields(u, folded)) for i, (u, folded)
                             in enumerate(zip(bare, lexical_codes(units), strict=True))])
        self.weights = ", ".join(str(w) for w in variant.weights)

    def __len__(self) -> int:
        return self.size

    def lexical_scored(self, query: str) -> tuple[np.ndarray, np.ndarray]:
        match = self.variant.match(query)
        if not match:
            return np.zeros(0, dtype=np.int64), np.zeros(0)
        rows = self.db.execute(f"SELECT rowid, bm25(t, {self.weights}) AS s FROM t "
                               "WHERE t MATCH ? ORDER BY s", (match,)).fetchall()
        return (np.array([r[0] - 1 for r in rows], dtype=np.int64),
                np.array([-r[1] for r in rows]))


FUSIONS: dict[str, Fusion] = {
    # the nested-helper rule's amount is in standard deviations (the served kind's units):
    # the other kinds are measured without it
    "reciprocal rank fusion, k 60 (before)": Fusion("rrf", 0.5, 60, "none"),
    **{f"weighted RRF, k {k}, dense {w}": Fusion("rrf", w, k, "none")
       for k in (5, 20) for w in (0.5, 0.6, 0.7)},
    **{f"scaled to [0, 1], dense {w / 10:g}": Fusion("linear", w / 10, RRF_K, "none")
       for w in range(5, 10)},
    **{f"standardised, dense {w / 10:g}": Fusion("zscore", w / 10) for w in range(5, 10)},
}


# -- measuring ----------------------------------------------------------------------


@dataclass
class Bench:
    """One corpus: its units, pairs, documents and vectors."""

    name: str
    units: list[CodeUnit]
    embedder: Embedder
    cache: VectorCache
    split: Split
    train_sample: int
    chooses: bool = True
    repo: Path | None = None  # where the files are (for the module docs of stage 1)

    def __post_init__(self) -> None:
        self.selection = select_cases(self.units, self.split)
        self.test = self.selection.held_out
        unique = [c for c in self.selection.training if c.unique]
        rng = np.random.default_rng(self.split.seed)
        take = min(self.train_sample, len(unique))
        self.train = [unique[i] for i in sorted(rng.choice(len(unique), take, replace=False))]
        self.bare = [without_doc(u) for u in self.units]
        if self.repo is not None:
            # the documents have no doc, so the context is guarded with the unit's own
            of = summaries(self.repo)
            MODULE_CONTEXT.update({bare: module_context(unit, of(unit.path))
                                   for unit, bare in zip(self.units, self.bare, strict=True)})
        self.queries = self.encode([c.query for c in self.selection.cases], "queries")
        self.memo: dict[tuple[str, str], dict] = {}
        self.pools: list[object] = []

    def encode(self, texts: list[str], label: str) -> dict[str, np.ndarray]:
        vectors = encode_cached(self.embedder, texts, self.cache,
                                lambda _s, done, total: log(f"{self.name}: embed {label} "
                                                            f"{done}/{total}"))
        self.cache.save()
        return dict(zip(texts, vectors, strict=True))

    def texts(self, representation: str) -> list[str]:
        return [REPRESENTATIONS[representation](u) for u in self.bare]

    def docs(self, representation: str) -> DocumentIndex:
        texts = self.texts(representation)
        vectors = self.encode(texts, representation)
        return DocumentIndex(self.units, np.stack([vectors[t] for t in texts]),
                             self.embedder.model_id)

    def qmatrix(self, cases: Sequence[Case], adapter: QueryAdapter | None = None) -> np.ndarray:
        matrix = np.stack([self.queries[c.query] for c in cases])
        return matrix if adapter is None else adapter.apply(matrix)

    def sampler(self, docs: DocumentIndex) -> PoolSampler:
        return PoolSampler(docs, self.split.seed)


Table = dict[str, tuple[dict, dict]]
"""choice -> (training signals by pool, held-out signals by pool)."""


def mrr_cells(signals: dict, pools: Sequence[object]) -> str:
    return "  ".join(f"{mean_reciprocal_rank(signals[p].ranks):.4f}" if p in signals else "   -  "
                     for p in pools)


def print_table(bench: Bench, title: str, table: Table, recall: bool = False) -> None:
    extra = f" (then held-out R@10 at pool {bench.pools[0]})" if recall else ""
    print(f"\n[{bench.name}] {title} (train | held-out), pools "
          + ", ".join(str(p) for p in bench.pools) + extra)
    for name, (train, test) in table.items():
        tail = f"   {recall_at(test[bench.pools[0]].ranks, 10):.3f}" if recall else ""
        print(f"  {name:<52} {mrr_cells(train, bench.pools)} | {mrr_cells(test, bench.pools)}"
              f"{tail}")


def choose_across(tables: dict[str, Table], benches: Sequence[Bench], shipped: str) -> str:
    """The choice with the best mean, over corpora, of its training MRR at the first pool;
    the shipped choice stands unless another beats it by more than :data:`TIE`."""
    benches = [b for b in benches if b.chooses]
    names = list(next(iter(tables.values())))
    means = {name: float(np.mean([mean_reciprocal_rank(tables[b.name][name][0][b.pools[0]].ranks)
                                  for b in benches]))
             for name in names}
    best = max(names, key=lambda name: means[name])
    print("\nmean training MRR over the corpora (first pool of each): "
          + "; ".join(f"{name}: {means[name]:.4f}" for name in names))
    if best != shipped and means[best] - means[shipped] <= TIE:
        print(f"best on training: {best} ({means[best]:.4f}), within {TIE} of the shipped "
              f"{shipped} ({means[shipped]:.4f}): a tie, so the shipped choice stands")
        best = shipped
    print(f"chosen: {best}")
    return best


def representation_table(bench: Bench, names: Sequence[str] = tuple(REPRESENTATIONS)) -> Table:
    table: Table = {}
    for name in names:
        docs = bench.docs(name)
        sampler = bench.sampler(docs)
        row = tuple(dense_signals(cases, bench.qmatrix(cases), docs, sampler,
                                  protocols_for(cases, sampler))
                    for cases in (bench.train, bench.test))
        bench.pools = list(row[1])
        table[name] = (row[0], row[1])
    print_table(bench, "1. unit text for the model: dense MRR, exact search", table)
    return table


def keyword_signals(bench: Bench, variant: str, which: str, docs: DocumentIndex) -> dict:
    if (variant, which) not in bench.memo:
        cases = bench.train if which == "train" else bench.test
        scorer = KeywordIndex(bench.units, KEYWORDS[variant])
        sampler = bench.sampler(docs)
        log(f"{bench.name}: keyword search, {variant}, {len(cases)} queries")
        bench.memo[(variant, which)] = lexical_signals(cases, scorer, sampler,
                                                       protocols_for(cases, sampler))
    return bench.memo[(variant, which)]


def keyword_table(bench: Bench, docs: DocumentIndex) -> Table:
    table: Table = {name: (keyword_signals(bench, name, "train", docs),
                           keyword_signals(bench, name, "test", docs)) for name in KEYWORDS}
    print_table(bench, "2. keyword side: BM25 MRR", table)
    shipped = next(iter(KEYWORDS))
    sampler = bench.sampler(docs)
    own = lexical_signals(bench.test, docs, sampler, protocols_for(bench.test, sampler))
    agree = all(np.array_equal(own[p].ranks, table[shipped][1][p].ranks) for p in own)
    print(f"  the index's own FTS5 table and query give the shipped variant's ranks: {agree}")
    return table


def full_signals(bench: Bench, cases: Sequence[Case], docs: DocumentIndex, lexical: dict,
                 adapter: QueryAdapter | None = None, depth: int = DEPTH) -> CaseSignals:
    sampler = bench.sampler(docs)
    queries = bench.qmatrix(cases, adapter)
    dense = dense_signals(cases, queries, docs, sampler, protocols_for(cases, sampler),
                          depth=depth)
    return CaseSignals(tuple(cases), lexical, dense,
                       ann_signals(cases, queries, docs, depth=depth), docs.enclosing)


@dataclass
class Served:
    """A corpus's documents and signals under the chosen text and keyword side."""

    docs: DocumentIndex
    lexical: dict
    train: CaseSignals
    test: CaseSignals


def served_signals(bench: Bench, representation: str, keyword: str) -> Served:
    docs = bench.docs(representation)
    train_lexical = keyword_signals(bench, keyword, "train", docs)
    test_lexical = keyword_signals(bench, keyword, "test", docs)
    return Served(docs, test_lexical, full_signals(bench, bench.train, docs, train_lexical),
                  full_signals(bench, bench.test, docs, test_lexical))


@dataclass(frozen=True, eq=False)
class Ranked:
    """The served ranks of some cases under one protocol."""

    ranks: np.ndarray


def fusion_ranks(signals: CaseSignals, fusion: Fusion) -> dict:
    return {p: Ranked(signals.served(p, fusion)) for p in signals.lexical}


def fusion_table(bench: Bench, served: Served) -> Table:
    table: Table = {name: (fusion_ranks(served.train, fusion), fusion_ranks(served.test, fusion))
                    for name, fusion in FUSIONS.items()}
    print_table(bench, "3. fusion: served MRR", table, recall=True)
    return table


DEPTHS = (50, 100, 200, 300)


def candidates_table(bench: Bench, served: Served, fusion: Fusion) -> Table:
    """Served MRR when each side gives its best N candidates. The signals are taken
    max(DEPTHS) deep and cut (whole-index HNSW candidates come from one search that
    deep, a little more thorough than served search's own)."""
    deep = []
    for cases in (bench.train, bench.test):
        sampler = bench.sampler(served.docs)
        lexical = lexical_signals(cases, served.docs, sampler, protocols_for(cases, sampler),
                                  depth=max(DEPTHS))
        deep.append(full_signals(bench, cases, served.docs, lexical, depth=max(DEPTHS)))
    table: Table = {
        f"best {n} of each side": tuple(  # type: ignore[misc]
            {p: Ranked(sig.served(p, fusion, n)) for p in sig.lexical} for sig in deep)
        for n in DEPTHS}
    print_table(bench, "3b. candidates fused: served MRR", table, recall=True)
    return table


# the nested-helper rules measured (codeseek/fusion.py NESTED_RULES), beside the served fusion
NESTED = {
    "no rule": replace(DEFAULT_FUSION, nested="none", nested_amount=0.0),
    "enclosing unit first": replace(DEFAULT_FUSION, nested="enclosing-first",
                                    nested_amount=0.0),
    **{f"helper's score x {f:g}": replace(DEFAULT_FUSION, nested="scaled", nested_amount=f)
       for f in (0.9, 0.75, 0.5)},
    **{f"helper's score - {a:g}": replace(DEFAULT_FUSION, nested="lowered", nested_amount=a)
       for a in (0.25, 0.5, 1.0)},
}
SERVED_NESTED = next(name for name, f in NESTED.items() if f == DEFAULT_FUSION)


def nested_table(bench: Bench, served: Served) -> Table:
    """Served MRR under each nested-helper rule, and how many cases it can touch."""
    enclosing = served.docs.enclosing
    outers = set(enclosing.values())
    table: Table = {name: (fusion_ranks(served.train, fusion), fusion_ranks(served.test, fusion))
                    for name, fusion in NESTED.items()}
    print_table(bench, "3c. nested-helper rule: served MRR", table, recall=True)
    for label, cases in (("training", bench.train), ("held-out", bench.test)):
        print(f"  {label}: {sum(c.position in enclosing for c in cases)} of {len(cases)} "
              f"answers are nested helpers, {sum(c.position in outers for c in cases)} "
              f"enclose one ({len(enclosing)} nested helpers among {len(served.docs)} units)")
    return table


def question_half(text: str) -> str:
    """A question's side of the split: ``training`` or ``held-out`` (by a hash of its text,
    half each), so a ranking rule is chosen on questions it is not judged on."""
    return "training" if hashlib.sha256(text.encode()).digest()[0] % 2 == 0 else "held-out"


def question_corpora(cache: Path) -> list[tuple[str, Path, Path]]:
    """(name, repository, question file) of every public question set that can be asked
    here: sample_repo, the standard-library subset its questions answer from (copied
    once into the cache folder, so its index there stays valid) and the packaged ones."""
    subset = cache / "nested" / "stdlib-subset"
    if not subset.is_dir():
        stdlib_question_subset(subset)
    found = [("sample_repo", PROJECT / "sample_repo", QUESTION_FILES / "sample_repo.jsonl"),
             ("standard-library subset", subset, QUESTION_FILES / "stdlib.jsonl")]
    for language, questions in (("go", "pflag"), ("ruby", "thor")):
        corpus = CORPORA[language]
        try:
            found.append((corpus.label, fetch(corpus), QUESTION_FILES / f"{questions}.jsonl"))
        except CorpusUnavailable as exc:
            print(f"left out {corpus.label}: {exc.args[0]}")
    return found


def asked_through_indexes(embedder: Embedder, cache: Path, rules: Sequence[str],
                          prepare: Callable[[Index, str], Fusion], title: str,
                          finish: Callable[[Index], None] | None = None,
                          texts: Callable[[str, Path], Callable[[CodeUnit], str] | None]
                          | None = None) -> dict[str, dict[str, dict]]:
    """Each question set asked through a real index (kept in the cache folder) under each
    rule, exactly as search serves it: ``prepare(index, rule)`` readies the index for a rule
    and gives its fusion, ``finish(index)`` restores it. With ``texts``, ``texts(rule, repo)``
    is the unit text a rule's index embeds instead of the shipped one (None: the shipped
    index): such a rule is asked through an index of its own, built with that text.
    corpus -> rule -> half -> figures."""
    from codeseek.evaluate import load_questions
    from codeseek.evaluate.questions import check_questions
    from codeseek.search import Searcher

    figures: dict[str, dict[str, dict]] = {}
    for name, repo, path in question_corpora(cache):
        # one index folder per corpus and repository path (sample_repo of each worktree)
        where = hashlib.sha256(str(repo.resolve()).encode()).hexdigest()[:8]
        folder = cache / "nested" / f"{re.sub(r'[^A-Za-z0-9]+', '-', name)}-{where}"
        questions = load_questions(path)
        halves = {half: [q for q in questions if question_half(q.text) == half]
                  for half in ("training", "held-out")}

        def figures_of(index: Index, rule: str, known: set[tuple[str, str]],
                       path: Path = path, halves: dict = halves) -> dict:
            plain = index.searcher()
            trial = Searcher(index.store, plain.vectors, plain.embedder, plain.model_id,
                             index.lock, fusion=prepare(index, rule))

            def ask(texts: list[str], depth: int) -> list[list[tuple[str, str]]]:
                return [[(h.path, h.qualname) for h in hits]
                        for hits in trial.search_many(texts, depth)]

            return {half: check_questions(asked, ask, known, source=path.name,
                                          corpus=len(known))
                    for half, asked in halves.items()}

        with current_index(repo, folder, embedder) as index:
            known = {(s.unit.path, s.unit.qualname) for s in index.store.iter_units()}
            figures[name] = {}
            try:
                for rule in rules:
                    text = texts(rule, repo) if texts is not None else None
                    if text is None:
                        figures[name][rule] = figures_of(index, rule, known)
                        continue
                    own = folder.with_name(f"{folder.name}-{re.sub(r'[^a-z0-9]+', '-', rule)}")
                    with embedding(text), current_index(repo, own, embedder) as other:
                        figures[name][rule] = figures_of(other, rule, known)
            finally:
                if finish is not None:
                    finish(index)
        counts = {half: len(asked) for half, asked in halves.items()}
        print(f"\n[{name}] {title}: {path.name} through a real index "
              f"({len(known)} units), questions training {counts['training']} | held-out "
              f"{counts['held-out']}: hit@10 and MRR@10")
        for rule, halves_of in figures[name].items():
            train, test = halves_of["training"].metrics, halves_of["held-out"].metrics
            print(f"  {rule:<30} {train['hit@10']:.3f}  {train['mrr@10']:.4f} | "
                  f"{test['hit@10']:.3f}  {test['mrr@10']:.4f}")
    return figures


@contextlib.contextmanager
def current_index(repo: Path, folder: Path, embedder: Embedder) -> Iterator[Index]:
    """The index of ``repo`` in ``folder``, brought up to date, every unit of it embedded
    with ``CodeUnit.embed_text`` as it is now: an update reads again only the files that
    changed, so an index kept from a run with another unit text is built again."""
    for attempt in range(2):
        with open_index(repo, index_dir=folder, create=True, embedder=embedder) as index:
            index.update()
            if attempt or all(s.content_hash == s.unit.content_hash
                              for s in index.store.iter_units()):
                yield index
                return
        log(f"{folder.name}: embedded with another unit text; built again")
        shutil.rmtree(folder)


@contextlib.contextmanager
def embedding(text: Callable[[CodeUnit], str]) -> Iterator[None]:
    """``CodeUnit.embed_text`` is ``text`` meanwhile (what an index built then embeds, and
    the content hashes it compares)."""
    original = CodeUnit.embed_text
    CodeUnit.embed_text = text  # type: ignore[method-assign]
    try:
        yield
    finally:
        CodeUnit.embed_text = original  # type: ignore[method-assign]


def nested_questions(embedder: Embedder, cache: Path) -> dict[str, dict[str, dict]]:
    """Each question set asked through a real index under each nested-helper rule."""
    return asked_through_indexes(embedder, cache, list(NESTED),
                                 lambda index, rule: NESTED[rule], "3c. nested-helper rule")


def choose_nested(tables: dict[str, Table], benches: Sequence[Bench],
                  questions: dict[str, dict[str, dict]]) -> str:
    """The nested-helper rule with the best training figure (:func:`choose_rule`)."""
    return choose_rule(tables, benches, questions, list(NESTED), SERVED_NESTED, "no rule",
                       "nested-helper rule")[0]


def choose_rule(tables: dict[str, Table], benches: Sequence[Bench],
                questions: dict[str, dict[str, dict]], rules: Sequence[str], served: str,
                baseline: str, title: str) -> tuple[str, bool]:
    """The rule with the best training figure: the mean, over corpora, of the docstring
    MRR (every pool) beside the mean, over question sets, of MRR@10, each half of the
    figure; and whether it holds (neither held-out mean falls below the baseline's)."""
    benches = [b for b in benches if b.chooses]

    def docstrings(name: str, side: int) -> float:
        return float(np.mean([np.mean([mean_reciprocal_rank(by_pool[p].ranks)
                                       for p in b.pools if p in by_pool])
                              for b in benches
                              for by_pool in (tables[b.name][name][side],)]))

    def asked(name: str, half: str) -> float:
        return float(np.mean([q[name][half].metrics["mrr@10"] for q in questions.values()]))

    print(f"\n{title}: docstring MRR (mean over corpora of the mean over pools) and "
          "question MRR@10 (mean over question sets), training | held-out")
    scores = {}
    for name in rules:
        scores[name] = (docstrings(name, 0) + asked(name, "training")) / 2
        print(f"  {name:<30} docstrings {docstrings(name, 0):.4f}  questions "
              f"{asked(name, 'training'):.4f}  (training figure {scores[name]:.4f}) | "
              f"docstrings {docstrings(name, 1):.4f}  questions {asked(name, 'held-out'):.4f}")
    best = max(rules, key=lambda name: scores[name])
    if best != served and scores[best] - scores[served] <= TIE:
        print(f"best on training: {best}, within {TIE} of the served {served}: a tie")
        best = served
    holds = (docstrings(best, 1) >= docstrings(baseline, 1)
             and asked(best, "held-out") >= asked(baseline, "held-out"))
    print(f"chosen on training: {best}; its held-out docstring and question figures at least "
          f"those of {baseline}: {holds}")
    for name in dict.fromkeys((best, served)):
        if name != baseline:
            nested_intervals(tables, benches, questions, name, baseline)
    return best, holds


def nested_intervals(tables: dict[str, Table], benches: Sequence[Bench],
                     questions: dict[str, dict[str, dict]], name: str, baseline: str) -> None:
    """The held-out difference of a rule to another, per query in pairs, with its
    percentile-bootstrap 95% interval: the whole-index docstrings of every corpus pooled,
    and every question set's held-out half pooled (MRR@10)."""
    def pooled(ranks: Sequence[np.ndarray]) -> np.ndarray:
        return np.concatenate([np.asarray(r, dtype=np.int64) for r in ranks])

    docs = [pooled([tables[b.name][rule][1]["all"].ranks for b in benches
                    if "all" in tables[b.name][rule][1]]) for rule in (name, baseline)]
    asked = [pooled([np.where(np.asarray(q[rule]["held-out"].ranks) <= CUTOFF,
                              q[rule]["held-out"].ranks, 0) for q in questions.values()])
             for rule in (name, baseline)]
    for label, (mine, theirs) in (("whole-index docstrings", docs), ("questions, MRR@10", asked)):
        difference, (low, high) = mrr_difference(mine, theirs, 0)  # type: ignore[arg-type]
        print(f"  held-out {label}: {name} - {baseline} = {difference:+.4f} "
              f"[{low:+.4f}, {high:+.4f}] over {len(mine)} queries, "
              f"{int(np.sum(mine != theirs))} ranked differently")


def section_nested(benches: Sequence[Bench], served: dict[str, Served], embedder: Embedder,
                   cache: Path) -> None:
    tables = {b.name: nested_table(b, served[b.name]) for b in benches}
    questions = nested_questions(embedder, cache)
    chosen = choose_nested(tables, benches, questions)
    print(f"the served nested-helper rule ({DEFAULT_FUSION.nested}, "
          f"{DEFAULT_FUSION.nested_amount:g}) is this choice: {chosen == SERVED_NESTED}")


def path_table(bench: Bench, served: Served) -> Table:
    """Keyword-only and served MRR with the words of each unit's path in each field."""
    lexical: Table = {}
    table: Table = {}
    for name in PATHS:
        train, test = (keyword_signals(bench, f"3d: {name}", which, served.docs)
                       for which in ("train", "test"))
        lexical[name] = (train, test)
        table[name] = (fusion_ranks(replace(served.train, lexical=train), DEFAULT_FUSION),
                       fusion_ranks(replace(served.test, lexical=test), DEFAULT_FUSION))
    print_table(bench, "3d. path words: keyword side alone, BM25 MRR", lexical)
    print_table(bench, "3d. path words: served MRR", table, recall=True)
    return table


def rewrite_path_words(index: Index, column: str | None) -> None:
    """Rewrite an index's keyword entries with the words of each unit's path in ``column``
    (None: in no field)."""
    original = CodeUnit.lexical_fields

    def fields(unit: CodeUnit, code: str | None = None,
               path_in: str | None = column) -> dict[str, str]:
        return original(unit, code, path_in)

    CodeUnit.lexical_fields = fields  # type: ignore[method-assign]
    try:
        with index.lock.write(), index.store.transaction():
            index.store.rewrite_lexical()
    finally:
        CodeUnit.lexical_fields = original  # type: ignore[method-assign]


def path_questions(embedder: Embedder, cache: Path) -> dict[str, dict[str, dict]]:
    """Each question set asked through a real index (the one stage 3c keeps) with its
    keyword entries rewritten each stage-3d way, served ranking otherwise; the entries are
    rewritten as served at the end."""
    def prepare(index: Index, rule: str) -> Fusion:
        rewrite_path_words(index, PATHS[rule])
        return DEFAULT_FUSION

    return asked_through_indexes(embedder, cache, list(PATHS), prepare, "3d. path words",
                                 lambda index: rewrite_path_words(index, PATH_WORDS_IN))


def section_paths(benches: Sequence[Bench], served: dict[str, Served], embedder: Embedder,
                  cache: Path) -> None:
    tables = {b.name: path_table(b, served[b.name]) for b in benches}
    questions = path_questions(embedder, cache)
    chosen, holds = choose_rule(tables, benches, questions, list(PATHS), SERVED_PATH,
                                "no path words", "3d. path words")
    print("every placement against no path words, held-out:")
    for name in PATHS:
        if name != "no path words":
            nested_intervals(tables, benches, questions, name, "no path words")
    kept = chosen if holds else "no path words"
    print(f"to serve: {kept} (the training choice {'holds' if holds else 'falls'} on held-out)"
          f"; the served placement (PATH_WORDS_IN = {PATH_WORDS_IN!r}) is this: "
          f"{kept == SERVED_PATH}")


def context_questions(embedder: Embedder, cache: Path) -> dict[str, dict[str, dict]]:
    """Each question set asked through a real index per unit text: the shipped one (the index
    stage 3c keeps) and each module-context candidate (an index of its own, built with it)."""
    def texts(rule: str, repo: Path) -> Callable[[CodeUnit], str] | None:
        return index_text(repo, *CONTEXTS[rule]) if rule in CONTEXTS else None

    return asked_through_indexes(embedder, cache, [SHIPPED_TEXT, *CONTEXTS],
                                 lambda index, rule: DEFAULT_FUSION, "1. module context",
                                 texts=texts)


def withheld(bench: Bench) -> int:
    """How many of a corpus's units are in a file with a module doc but are not told it
    (their own doc holds it)."""
    if bench.repo is None:
        return 0
    of = summaries(bench.repo)
    return sum(1 for unit, bare in zip(bench.units, bench.bare, strict=True)
               if of(unit.path) and not MODULE_CONTEXT.get(bare))


def section_context(benches: Sequence[Bench], embedder: Embedder, cache: Path) -> None:
    """Stage 1's module-context candidates against the shipped text: dense (exact) and
    served MRR on the docstrings, MRR@10 on the question sets through real indexes; chosen
    on training, with the held-out differences to the shipped text."""
    names = [SHIPPED_TEXT, *CONTEXTS]
    for bench in benches:
        told = [MODULE_CONTEXT.get(u, "") for u in bench.bare]
        files = {u.path for u, sentence in zip(bench.bare, told, strict=True) if sentence}
        print(f"\n[{bench.name}] {sum(map(bool, told))} of {len(told)} units told a module "
              f"doc's first sentence ({len(files)} files; withheld from "
              f"{withheld(bench)} units whose own doc holds it)")
        representation_table(bench, names)
    tables: dict[str, Table] = {}
    for bench in benches:
        tables[bench.name] = {}
        for name in names:
            served = served_signals(bench, name, next(iter(KEYWORDS)))
            tables[bench.name][name] = (fusion_ranks(served.train, DEFAULT_FUSION),
                                        fusion_ranks(served.test, DEFAULT_FUSION))
        print_table(bench, "1. module context: served MRR", tables[bench.name], recall=True)
    questions = context_questions(embedder, cache)
    chosen, holds = choose_rule(tables, benches, questions, names, SHIPPED_TEXT, SHIPPED_TEXT,
                                "1. module context")
    print("every candidate against the shipped text, held-out:")
    for name in CONTEXTS:
        nested_intervals(tables, benches, questions, name, SHIPPED_TEXT)
    kept = chosen if holds else SHIPPED_TEXT
    print(f"to serve by these figures: {kept} (the training choice "
          f"{'holds' if holds else 'falls'} on held-out); the served CodeUnit.embed_text is "
          f"this: {kept == SHIPPED_TEXT}")
    if CONTEXTS.get(kept, (False, False))[0]:
        print("  (path words in the embedded text change its content hash when a file is "
              "renamed or moved: its units would be embedded again; see DEVELOPERS.md)")


def section_served(bench: Bench, served: Served) -> None:
    report = build_report(repository=bench.name, model=bench.embedder.model_id,
                          split=bench.split, selection=bench.selection, signals=served.test,
                          corpus=len(served.docs), fusion=DEFAULT_FUSION, adapter=False)
    print(f"\n[{bench.name}] 4. the served ranking, as `codeseek eval` prints it\n")
    print("\n".join("  " + line for line in report.to_text().splitlines()))
    print(f"  served at least as good as the best single method at every pool: "
          f"{served_holds(report)}")


def served_holds(report: EvalReport) -> bool:
    """Whether served MRR >= the best of lexical and dense under every protocol."""
    verdicts = []
    for pool in report.pools:
        served = report.result("served", pool)
        singles = [report.result(m, pool) for m in ("lexical", "dense")]
        verdicts.append(served is not None and served.mrr >= max(
            r.mrr for r in singles if r is not None))
    return all(verdicts)


def section_everything(bench: Bench, served: Served) -> None:
    """A small corpus again with every documented unit held out (more queries, no training)."""
    everything = Split(1.0, bench.split.seed)
    selection = select_cases(bench.units, everything)
    cases = selection.held_out
    sampler = bench.sampler(served.docs)
    lexical = lexical_signals(cases, served.docs, sampler, protocols_for(cases, sampler))
    signals = full_signals(bench, cases, served.docs, lexical)
    report = build_report(repository=bench.name, model=bench.embedder.model_id,
                          split=everything, selection=selection, signals=signals,
                          corpus=len(served.docs), fusion=DEFAULT_FUSION, adapter=False)
    print(f"\n[{bench.name}] 4b. every documented unit held out ({len(cases)} docstrings)")
    for result in report.results:
        print(f"  {result.method:<10} {result.pool_size:>6}  MRR {result.mrr:.4f}  "
              f"R@10 {result.metrics['recall@10']:.3f}")
    print(f"  served at least as good as the best single method at every pool: "
          f"{served_holds(report)}")


def section_adapter(bench: Bench, served: Served) -> None:
    docs = served.docs
    prepared = Prepared(tuple(bench.units), docs, bench.selection, bench.sampler(docs),
                        bench.queries)
    pools = list(served.test.lexical)
    print(f"\n[{bench.name}] 5. query adapter (codeseek tune): held-out MRR, pools "
          + ", ".join(str(p) for p in pools))
    plain = fusion_ranks(served.test, DEFAULT_FUSION)
    print(f"  {'no adapter':<14} dense {mrr_cells(served.test.dense, pools)} | served "
          f"{mrr_cells(plain, pools)}   R@10 {recall_at(plain[pools[0]].ranks, 10):.3f}")
    try:
        data = training_data(prepared, bench.split)
    except TooFewExamples as exc:
        print(f"  not trained: {exc}")
        return
    for size in (32, 256, 2048):
        matrix, run = train_adapter(data, TrainSettings(batch_size=size))
        adapter = QueryAdapter(matrix, bench.embedder.model_id)
        fusion, _ = fusion_for(prepared, bench.split, adapter)
        tuned = full_signals(bench, bench.test, docs, served.lexical, adapter)
        ranks = fusion_ranks(tuned, fusion)
        print(f"  {'batch ' + str(size):<14} dense {mrr_cells(tuned.dense, pools)} | served "
              f"{mrr_cells(ranks, pools)}   R@10 {recall_at(ranks[pools[0]].ranks, 10):.3f}; "
              f"dense weight {fusion.dense_weight:g}; {run.pairs} pairs, {run.epochs} epochs "
              f"(best {run.best_epoch}), {run.seconds:.1f} s")


def answerable_questions(source: Path, known: set[tuple[str, str]],
                         target: Path) -> tuple[Path, int, int]:
    """The questions of ``source`` with at least one answer among ``known`` units (a subset
    of a repository leaves some unanswerable for both sides alike), written to ``target``."""
    import json

    from codeseek.evaluate import load_questions

    questions = load_questions(source)
    lines = source.read_text(encoding="utf-8").splitlines()
    kept = [lines[q.line - 1] for q in questions
            if any((a.path, a.qualname) in known for a in q.answers)]
    target.write_text("".join(json.dumps(json.loads(line)) + "\n" for line in kept),
                      encoding="utf-8")
    return target, len(kept), len(questions)


def section_tune(name: str, repo: Path, questions: str, embedder: Embedder,
                 scratch: Path) -> None:
    """``codeseek tune`` through a real index of a copy of ``repo``, judged with its
    public question file: every protocol, plain against adapted."""
    copy = scratch / f"tune-{questions}"
    shutil.copytree(repo, copy, symlinks=True)
    started = time.perf_counter()
    with open_index(copy, create=True, embedder=embedder) as index:
        index.update()
        units = index.store.counts()["units"]
        known = {(s.unit.path, s.unit.qualname) for s in index.store.iter_units()}
    indexed = time.perf_counter() - started
    asked, usable, total = answerable_questions(
        PROJECT / "tests" / "data" / "questions" / f"{questions}.jsonl", known,
        scratch / f"questions-{questions}.jsonl")
    print(f"\n[{name}] 6. codeseek tune, judged on every protocol: {units} units (indexed "
          f"in {indexed:.0f} s), questions: {usable} of tests/data/questions/{questions}.jsonl "
          f"({total}) with an answer in this index")
    started = time.perf_counter()
    with open_index(copy, create=False, embedder=embedder) as index:
        report = index.tune(questions=asked)
    print("  " + report.to_text().replace("\n", "\n  "))
    before = report.before.result("served", "all") if report.before else None
    after = report.after.result("served", "all") if report.after else None
    if before is not None and after is not None:
        ranks = np.array([before.ranks, after.ranks], dtype=np.float64)
        rr = np.divide(1.0, ranks, out=np.zeros_like(ranks), where=ranks > 0)
        spread = float(np.std(rr[1] - rr[0], ddof=1))
        print(f"  per-docstring difference of reciprocal rank (whole index): standard "
              f"deviation {spread:.3f}; a paired 95% interval on n held-out docstrings is "
              f"about +-{1.96 * spread:.2f}/sqrt(n): +-{1.96 * spread / np.sqrt(75):.3f} at "
              f"n = 75 (300 training pairs)")
    print(f"  tune took {time.perf_counter() - started:.0f} s")


def shipped_is(bench: Bench, representation: str) -> bool:
    return bench.texts(representation) == bench.texts(SHIPPED_TEXT)


# -- the embedding tiers ----------------------------------------------------------------

QUESTION_FILES = PROJECT / "tests" / "data" / "questions"


def tier_checks(report: EvalReport) -> dict[str, tuple[float, np.ndarray]]:
    """Every check of an eval report: its name -> (figure, per-query ranks)."""
    checks: dict[str, tuple[float, np.ndarray]] = {}
    for result in report.results:
        if result.method in ("dense", "served"):
            checks[f"docstrings, {result.method}, pool {result.pool}"] = (
                result.mrr, np.asarray(result.ranks))
    if report.name_blind is not None:
        for result in report.name_blind.results:
            if result.method in ("dense", "served"):
                checks[f"name-blind docstrings, {result.method}"] = (
                    result.mrr, np.asarray(result.ranks))
    if report.questions is not None:
        ranks = np.asarray(report.questions.ranks)
        checks[f"questions ({Path(report.questions.source).name}), MRR@10"] = (
            report.questions.metrics["mrr@10"], np.where(ranks <= CUTOFF, ranks, 0))
    return checks


def section_tiers(corpora: Sequence[tuple[str, Path, Path]], scratch: Path) -> None:
    """Each tier's index of each corpus, checked as `codeseek eval --questions` checks it;
    each derived tier set against full on the same queries (paired bootstrap)."""
    verdicts: dict[str, list[bool]] = {tier: [] for tier in TIERS if tier != "full"}
    for name, repo, questions in corpora:
        checks: dict[str, dict[str, tuple[float, np.ndarray]]] = {}
        seed = 0
        for tier in TIERS:
            with open_index(repo, index_dir=scratch / f"{name}-{tier}", create=True,
                            tier=tier) as index:
                started = time.perf_counter()
                index.update()
                report = index.evaluate(questions=questions)
                seed = report.split.seed
                checks[tier] = tier_checks(report)
                log(f"{name}: {tier} indexed and checked in "
                    f"{time.perf_counter() - started:.0f} s ({report.model})")
        print(f"\n=== tiers on {name} ({report.corpus} units; questions {questions.name}): "
              "MRR, and each tier's difference to full with its paired bootstrap 95% "
              "interval")
        print(f"  {'check':<44} {'n':>5} {'full':>7}   "
              + "   ".join(f"{t:<34}" for t in TIERS if t != "full"))
        for check, (figure, ranks) in checks["full"].items():
            cells = []
            for tier in verdicts:
                other, other_ranks = checks[tier][check]
                difference, (low, high) = mrr_difference(other_ranks, ranks, seed)
                noise = high >= 0.0
                verdicts[tier].append(noise)
                cells.append(f"{other:.4f} {difference:+.4f} [{low:+.4f}, {high:+.4f}]"
                             f"{'' if noise else ' *'}")
            print(f"  {check:<44} {len(ranks):>5} {figure:7.4f}   " + "   ".join(
                f"{c:<34}" for c in cells))
    print("\n(* the interval lies wholly below 0: worse than full beyond the noise)")
    for tier, within in verdicts.items():
        print(f"{tier} within the noise of full on every check: {all(within)} "
              f"({sum(within)} of {len(within)} checks)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--cache", default="/tmp/codeseek-bench-quality",
                        help="folder of the vector cache (default /tmp/codeseek-bench-quality)")
    parser.add_argument("--train-sample", type=int, default=1500,
                        help="training pairs used to choose the keyword side and the fusion")
    parser.add_argument("--corpus", choices=("all", "stdlib", "sample", "packaged", "tune",
                                             "nested", "paths", "context"),
                        default="all",
                        help="the corpora (nested: every one, only stage 3c; paths: every "
                             "one, only stage 3d; context: every one, only stage 1's "
                             "module-context candidates)")
    parser.add_argument("--tiers", action="store_true",
                        help="compare the embedding tiers on sample_repo and a small "
                             "standard-library copy instead")
    parser.add_argument("--tune-stdlib", choices=("subset", "whole"), default="subset",
                        help="with --corpus tune: the standard-library subset (default) or "
                             "the whole copy")
    args = parser.parse_args()
    print("command: .venv/bin/python scripts/bench_quality.py "
          + " ".join(shlex.quote(a) for a in sys.argv[1:]))
    print(f"python {sys.version.split()[0]}, standard library at "
          f"{sysconfig.get_paths()['stdlib']}")
    if args.tiers:
        started = time.perf_counter()
        with tempfile.TemporaryDirectory() as scratch:
            subset = stdlib_question_subset(Path(scratch) / "stdlib-subset")
            section_tiers([("sample_repo", PROJECT / "sample_repo",
                            QUESTION_FILES / "sample_repo.jsonl"),
                           ("standard-library subset", subset,
                            QUESTION_FILES / "stdlib.jsonl")], Path(scratch))
        print(f"\n{time.perf_counter() - started:.0f} s")
        return
    print(REFERENCE)
    cache_dir = Path(args.cache)
    cache_dir.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as scratch:
        embedder = load_embedder(load_settings(scratch))
        print(f"model {embedder.model_id}")
        if args.corpus == "tune":
            whole = args.tune_stdlib == "whole"
            stdlib = copy_stdlib(Path(scratch) / "stdlib-copy", () if whole else STDLIB_SUBSET)
            section_tune("sample_repo", PROJECT / "sample_repo", "sample_repo", embedder,
                         Path(scratch))
            section_tune("python standard library" if whole else
                         f"python standard library, {len(STDLIB_SUBSET)} modules", stdlib,
                         "stdlib", embedder, Path(scratch))
            for language, questions in (("go", "pflag"), ("ruby", "thor")):
                corpus = CORPORA[language]
                try:
                    section_tune(corpus.label, fetch(corpus), questions, embedder,
                                 Path(scratch))
                except CorpusUnavailable as exc:
                    print(f"left out {corpus.label}: {exc.args[0]}")
            print(f"\n{time.perf_counter() - started:.0f} s")
            return
        cache = VectorCache(cache_dir / "vectors.npz", embedder.model_id, prune=False)
        corpora: list[tuple[str, Path, bool]] = []
        if args.corpus in ("all", "stdlib", "nested", "paths", "context"):
            corpora.append(("python standard library", copy_stdlib(Path(scratch) / "stdlib"),
                            True))
        if args.corpus in ("all", "sample", "nested", "paths", "context"):
            corpora.append(("sample_repo", PROJECT / "sample_repo", True))
        if args.corpus in ("all", "packaged", "nested", "paths", "context"):
            corpora.extend(packaged_corpora())
        # a corpus too small to split is held out whole (it takes no part in the choices)
        benches = [Bench(name, units_of(repo), embedder, cache,
                         Split() if chooses else Split(1.0), args.train_sample, chooses, repo)
                   for name, repo, chooses in corpora]
        choosing = [b for b in benches if b.chooses]
        if args.corpus == "context":
            for bench in choosing:
                bench.chooses = len(bench.train) >= CHOOSING
            section_context([b for b in choosing if b.chooses], embedder, cache_dir)
        elif args.corpus in ("nested", "paths"):
            run_nested(choosing, embedder, cache_dir, paths=args.corpus == "paths")
        else:
            run(choosing, [b for b in benches if not b.chooses], (embedder, cache_dir))
    print(f"\n{time.perf_counter() - started:.0f} s")


def packaged_corpora() -> list[tuple[str, Path, bool]]:
    """The packaged repositories the tests read (fetched once into their cache)."""
    found: list[tuple[str, Path, bool]] = []
    for language, chooses in PACKAGED:
        corpus = CORPORA[language]
        try:
            found.append((corpus.label, fetch(corpus), chooses))
        except CorpusUnavailable as exc:
            print(f"left out {corpus.label}: {exc.args[0]}")
    return found


def run_nested(benches: Sequence[Bench], embedder: Embedder, cache: Path,
               paths: bool = False) -> None:
    """Stage 3c (or with ``paths`` stage 3d) alone, on the shipped text and keyword side."""
    for bench in benches:
        if len(bench.train) < CHOOSING:
            bench.chooses = False
    served = {b.name: served_signals(b, SHIPPED_TEXT, next(iter(KEYWORDS))) for b in benches}
    for bench in benches:
        bench.pools = list(served[bench.name].test.lexical)
    if paths:
        section_paths(benches, served, embedder, cache)
    else:
        section_nested(benches, served, embedder, cache)


def run(benches: Sequence[Bench], checked: Sequence[Bench] = (),
        nested: tuple[Embedder, Path] | None = None) -> None:
    for bench in benches:
        if len(bench.train) < CHOOSING:
            bench.chooses = False
    for bench in benches:
        print(f"\n=== {bench.name}: {len(bench.units)} units, {len(bench.test)} held-out "
              f"docstrings, {len(bench.selection.training)} training pairs ({len(bench.train)} "
              f"of the unique ones used to choose); split: {bench.split.describe()}")
    print("\nEvery choice is made on the training pairs (mean over the corpora of the MRR at "
          f"each one's first pool; the shipped choice stands unless beaten by more than {TIE});"
          " the held-out figures say what it is worth.")
    tables = {b.name: representation_table(b) for b in benches}
    representation = choose_across(tables, benches, SHIPPED_TEXT)
    shipped_text = all(shipped_is(b, representation) for b in benches)
    print(f"the shipped CodeUnit.embed_text is this choice: {shipped_text}")
    if not shipped_text:  # what search serves is measured below, not what it could serve
        representation = SHIPPED_TEXT
        print(f"the stages below use the shipped text ({SHIPPED_TEXT}), as search does")
    documents = {b.name: b.docs(representation) for b in benches}
    tables = {b.name: keyword_table(b, documents[b.name]) for b in benches}
    keyword = choose_across(tables, benches, next(iter(KEYWORDS)))
    print(f"the shipped lexical fields are this choice: {keyword == next(iter(KEYWORDS))}")
    served = {b.name: served_signals(b, representation, keyword) for b in benches}
    tables = {b.name: fusion_table(b, served[b.name]) for b in benches}
    served_fusion = next(name for name, f in FUSIONS.items() if f == DEFAULT_FUSION)
    fusion = FUSIONS[choose_across(tables, benches, served_fusion)]
    print(f"the served default {DEFAULT_FUSION} is this choice: {fusion == DEFAULT_FUSION}")
    tables = {b.name: candidates_table(b, served[b.name], DEFAULT_FUSION) for b in benches}
    served_depth = f"best {CANDIDATES} of each side"
    depth = choose_across(tables, benches, served_depth)
    print(f"search's CANDIDATES ({CANDIDATES}) is this choice: {depth == served_depth}")
    if nested is not None:
        section_nested(benches, served, *nested)
        section_paths(benches, served, *nested)
    for bench in benches:
        section_served(bench, served[bench.name])
        if len(bench.test) < SMALL:
            section_everything(bench, served[bench.name])
    for bench in checked:
        print(f"\n=== {bench.name}: {len(bench.units)} units, {len(bench.selection.cases)} "
              "documented units: too few to split, so only checked")
        bench.train = bench.test[:1]  # nothing is chosen on it; the signals need one pair
        section_everything(bench, served_signals(bench, representation, keyword))
    for bench in benches:
        section_adapter(bench, served[bench.name])


if __name__ == "__main__":
    main()
