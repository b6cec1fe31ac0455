"""Served search against its single methods, on real repositories (marker: model).

The recall checks of ``codeseek eval`` (held-out docstrings, the default
split) run with the packaged model on repositories the tests read elsewhere
(tests/corpora.py: pinned packages of real Go, C++, Ruby, Java and C code) and
on sample_repo. The fusion codeseek serves was chosen on these repositories'
training pairs (scripts/bench_quality.py prints every rule's figures); here
its held-out MRR must be at least that of every single method it fuses
(keywords alone, dense exact, dense through HNSW) under every protocol.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from corpora import CORPORA, fetch_or_skip, units_of

from codeseek.config import load_settings
from codeseek.embed import Embedder, load_embedder
from codeseek.evaluate import EvalReport, Split, evaluate_units

SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"


@pytest.fixture(scope="module")
def model(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Embedder]:
    yield load_embedder(load_settings(tmp_path_factory.mktemp("quality")))


def shortfalls(report: EvalReport) -> list[str]:
    """Each protocol where a single method beats served search, in words."""
    found: list[str] = []
    for pool in report.pools:
        served = report.result("served", pool)
        assert served is not None
        for single in report.results:
            if single.pool == pool and single.method != "served" and single.mrr > served.mrr:
                found.append(f"pool {pool}: {single.method} {single.mrr:.4f} > served "
                             f"{served.mrr:.4f}")
    return found


@pytest.mark.model
@pytest.mark.parametrize("language", ["go", "cpp", "ruby"])
def test_served_is_at_least_the_best_single_method(language: str, model: Embedder) -> None:
    corpus = CORPORA[language]
    report = evaluate_units(units_of(fetch_or_skip(corpus)), model, repository=corpus.label)
    assert report.holdout >= 19
    assert {r.method for r in report.results} == {"lexical", "dense", "dense-ann", "served"}
    assert shortfalls(report) == []


@pytest.mark.model
def test_served_is_at_least_the_best_single_method_on_sample_repo(model: Embedder) -> None:
    report = evaluate_units(units_of(SAMPLE_REPO), model, repository="sample_repo")
    assert report.holdout == 38
    assert shortfalls(report) == []


@pytest.mark.model
@pytest.mark.parametrize("language", ["sample", "java", "c"])
def test_served_is_at_least_the_best_single_method_with_every_doc_held_out(
        language: str, model: Embedder) -> None:
    """Repositories too small to split (Java cordova-plugin-file, C v4l2loopback) and
    sample_repo, checked with every documented unit held out (no training side)."""
    if language == "sample":
        units, label = units_of(SAMPLE_REPO), "sample_repo"
    else:
        corpus = CORPORA[language]
        units, label = units_of(fetch_or_skip(corpus)), corpus.label
    report = evaluate_units(units, model, repository=label, split=Split(1.0))
    assert report.training == 0 and report.holdout >= 27
    assert shortfalls(report) == []
