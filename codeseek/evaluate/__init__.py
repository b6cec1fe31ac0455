"""Recall checks on held-out docstrings: how well does search work on this repository?

The repository's own docs are the test set. A unit whose doc summary has at
least :data:`MIN_QUERY_WORDS` words is a candidate, unless its doc is
near-identical to another unit's (an ambiguous query) or its body duplicates
another unit's (an ambiguous answer). A deterministic split, by a hash of path
and qualified name (or of the path alone with ``by_file``), holds out a share
of the candidates. For each held-out unit:

* the query is its doc summary: the first paragraph, tags, parameter sections
  and markup removed, and a leading copy of the unit's name removed (Go's doc
  convention puts the name first; wherever it stands first it would give the
  answer away);
* the document is the unit without its doc. The index's own vectors include
  the doc, so the checks embed the doc-less documents themselves (with the
  index's embedder) and score BM25 over doc-less text in an in-memory SQLite
  FTS5 table built exactly like the index's, then fuse with the served rule
  (:func:`codeseek.search.fuse`).

Protocols, the pool size printed beside every figure: the true unit among
999 (and 9,999) distractors drawn at random from the same language, as in the
CodeSearchNet challenge (Husain et al. 2019), for languages that have that
many units; and the whole index. Methods side by side: ``lexical`` (BM25
only), ``dense`` (exact cosine), ``dense-ann`` (the same through an HNSW
index, whole index only) and ``served`` (the ranking search returns). Metrics:
recall@1/5/10 and MRR, each with a percentile-bootstrap 95% interval.

Beside them, the name-blind protocol: the same held-out docs with every
identifier of their unit (name, qualified-name parts, the code's identifier
tokens) and their split words removed, every method over the whole index, so
the figure no longer rewards a doc that repeats its code's names. And, given
a file of questions with their acceptable answers, the question checks:
each question asked exactly as search serves it, hit@1/5/10 and MRR@10.

Modules, one per concern: ``queries`` (cleaning docs into queries, duplicate
keys), ``split`` (held-out and training pairs), ``cache`` (vectors kept
between runs), ``documents`` (the doc-less index and the pools), ``metrics``
(ranks, recall@k, MRR, intervals), ``blind`` (name-blind queries),
``questions`` (question files and their checks), ``signals`` (what each side ranks, and the
served fusion), ``report`` (text and JSON), ``page`` (HTML) and ``check``
(the whole check). This module exports their public parts.
"""

from __future__ import annotations

from codeseek.evaluate.blind import blind_words, name_blind_query, unit_identifiers
from codeseek.evaluate.cache import CACHE_NAME, Progress, VectorCache, encode_cached, text_key
from codeseek.evaluate.check import (
    Prepared,
    evaluate_prepared,
    evaluate_units,
    name_blind_cases,
    name_blind_results,
    prepare,
    query_matrix,
)
from codeseek.evaluate.documents import (
    POOL_SIZES,
    WHOLE,
    DocumentIndex,
    Pool,
    PoolSampler,
    build_documents,
    without_doc,
)
from codeseek.evaluate.metrics import (
    MethodResult,
    bootstrap_ci,
    mean_reciprocal_rank,
    mrr_difference,
    rank_in,
    rank_of_true,
    recall_at,
    summarise,
)
from codeseek.evaluate.page import check_report_path, rank_histogram, render_html, write_html
from codeseek.evaluate.queries import (
    MIN_QUERY_WORDS,
    body_key,
    clean_summary,
    doc_key,
    query_of,
    strip_leading_name,
)
from codeseek.evaluate.questions import (
    QUESTIONS_NAME,
    Answer,
    Question,
    QuestionReport,
    QuestionResult,
    Stale,
    check_questions,
    load_questions,
    parse_questions,
    question_rows,
)
from codeseek.evaluate.report import EvalReport, Lead, NameBlind, build_report
from codeseek.evaluate.signals import (
    DEPTH,
    FUSION_GRID,
    CaseSignals,
    Signals,
    ann_signals,
    choose_fusion,
    collect_signals,
    dense_signals,
    lexical_signals,
    protocols_for,
    served_ranks,
)
from codeseek.evaluate.split import Case, Selection, Split, select_cases
from codeseek.search import CANDIDATES

__all__ = [
    "Answer", "NameBlind", "QUESTIONS_NAME", "Question", "QuestionReport", "QuestionResult",
    "Stale", "blind_words", "check_questions", "load_questions", "name_blind_cases",
    "name_blind_query", "name_blind_results", "parse_questions", "question_rows",
    "unit_identifiers",
    "CACHE_NAME", "CANDIDATES", "Case", "CaseSignals", "DEPTH", "DocumentIndex", "EvalReport",
    "FUSION_GRID", "Lead", "MIN_QUERY_WORDS", "MethodResult", "POOL_SIZES", "Pool",
    "PoolSampler", "Prepared", "Progress", "Selection", "Signals", "Split", "VectorCache",
    "WHOLE", "ann_signals", "body_key", "bootstrap_ci", "build_documents", "build_report",
    "check_report_path", "choose_fusion", "clean_summary", "collect_signals", "dense_signals",
    "doc_key", "encode_cached", "evaluate_prepared", "evaluate_units", "lexical_signals",
    "mean_reciprocal_rank", "mrr_difference", "prepare", "protocols_for", "query_matrix",
    "query_of", "rank_histogram", "rank_in", "rank_of_true", "recall_at", "render_html",
    "select_cases", "served_ranks", "strip_leading_name", "summarise", "text_key",
    "without_doc", "write_html",
]
