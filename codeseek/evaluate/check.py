"""The whole check: prepare documents and pairs once, then measure every method."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from codeseek.adapter import QueryAdapter
from codeseek.embed import Embedder
from codeseek.errors import TooFewExamples
from codeseek.evaluate.blind import name_blind_query
from codeseek.evaluate.cache import Progress, VectorCache, encode_cached
from codeseek.evaluate.documents import WHOLE, DocumentIndex, PoolSampler, build_documents
from codeseek.evaluate.metrics import summarise
from codeseek.evaluate.queries import MIN_QUERY_WORDS, word_count
from codeseek.evaluate.report import EvalReport, NameBlind, build_report
from codeseek.evaluate.signals import collect_signals
from codeseek.evaluate.split import Case, Selection, Split, select_cases
from codeseek.search import DEFAULT_FUSION, Fusion
from codeseek.units import CodeUnit


@dataclass(frozen=True, eq=False)
class Prepared:
    """The parts of a check that training reuses: documents, pairs and their vectors."""

    units: tuple[CodeUnit, ...]
    documents: DocumentIndex
    selection: Selection
    sampler: PoolSampler
    query_vectors: dict[str, np.ndarray]
    blind: tuple[Case, ...] | None = None


def name_blind_cases(units: Sequence[CodeUnit], cases: Sequence[Case]) -> list[Case]:
    """The held-out cases with name-blind queries (:mod:`codeseek.evaluate.blind`); a
    query left with fewer than MIN_QUERY_WORDS words is left out."""
    blind = []
    for case in cases:
        query = name_blind_query(case.query, units[case.position])
        if word_count(query) >= MIN_QUERY_WORDS:
            blind.append(Case(case.position, query, True, case.name_stripped, case.unique))
    return blind


def prepare(units: Sequence[CodeUnit], embedder: Embedder, split: Split, *,
            cache: VectorCache | None = None, training: bool = False,
            name_blind: bool = False, progress: Progress | None = None) -> Prepared:
    """Select pairs, embed documents and queries (held-out, and training ones if asked;
    the name-blind held-out queries too with ``name_blind``)."""
    selection = select_cases(units, split)
    if not selection.held_out:
        raise TooFewExamples(
            f"no held-out docstrings to check: {len(selection.cases)} units have a doc of at "
            f"least {MIN_QUERY_WORDS} words; document more code or raise --holdout")
    documents = build_documents(units, embedder, cache, progress)
    wanted = [c.query for c in selection.cases if c.held_out or training]
    blind = name_blind_cases(units, selection.held_out) if name_blind else None
    wanted.extend(c.query for c in blind or ())
    vectors = encode_cached(embedder, wanted, cache, progress, "embed queries")
    if cache is not None:
        cache.save()
    return Prepared(tuple(units), documents, selection, PoolSampler(documents, split.seed),
                    dict(zip(wanted, vectors, strict=True)),
                    None if blind is None else tuple(blind))


def query_matrix(prepared: Prepared, cases: Sequence[Case],
                 adapter: QueryAdapter | None = None) -> np.ndarray:
    """The query vectors of some cases (through the adapter, if any)."""
    dim = prepared.documents.vectors.shape[1]
    matrix = (np.stack([prepared.query_vectors[c.query] for c in cases]) if cases
              else np.zeros((0, dim), dtype=np.float32))
    return matrix if adapter is None else adapter.apply(matrix)


def evaluate_prepared(prepared: Prepared, *, repository: str, model: str, split: Split,
                      fusion: Fusion = DEFAULT_FUSION, adapter: QueryAdapter | None = None,
                      progress: Progress | None = None) -> EvalReport:
    """Run every method under every protocol on the held-out pairs (and on the name-blind
    ones over the whole index, when they were prepared)."""
    cases = prepared.selection.held_out
    signals = collect_signals(cases, query_matrix(prepared, cases, adapter),
                              prepared.documents, prepared.sampler, progress=progress)
    report = build_report(repository=repository, model=model, split=split,
                          selection=prepared.selection, signals=signals,
                          corpus=len(prepared.documents), fusion=fusion,
                          adapter=adapter is not None)
    if prepared.blind is None:
        return report
    return replace(report, name_blind=name_blind_results(prepared, len(cases), split, fusion,
                                                         adapter, progress))


def name_blind_results(prepared: Prepared, held_out: int, split: Split, fusion: Fusion,
                       adapter: QueryAdapter | None,
                       progress: Progress | None = None) -> NameBlind:
    """Every method over the whole index on the name-blind held-out queries."""
    blind = list(prepared.blind or ())
    corpus = len(prepared.documents)
    if not blind:
        return NameBlind(held_out, ())
    signals = collect_signals(blind, query_matrix(prepared, blind, adapter), prepared.documents,
                              prepared.sampler, sizes=(), progress=progress)
    results = tuple(summarise(method, pool, corpus, ranks, split.seed)
                    for method, pool, ranks in signals.ranks(fusion) if pool == WHOLE)
    return NameBlind(held_out - len(blind), results)


def evaluate_units(units: Sequence[CodeUnit], embedder: Embedder, *, repository: str,
                   split: Split | None = None, fusion: Fusion = DEFAULT_FUSION,
                   adapter: QueryAdapter | None = None, cache: VectorCache | None = None,
                   name_blind: bool = True, progress: Progress | None = None) -> EvalReport:
    """The recall checks of a corpus of units (see the package docstring), with the
    name-blind protocol unless ``name_blind`` is False."""
    split = split or Split()
    prepared = prepare(units, embedder, split, cache=cache, name_blind=name_blind,
                       progress=progress)
    return evaluate_prepared(prepared, repository=repository, model=embedder.model_id,
                             split=split, fusion=fusion, adapter=adapter, progress=progress)
