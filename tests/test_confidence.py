"""Confidence per hit (codeseek.confidence) with the fake embedder: the mechanics."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from codeseek.confidence import OFF_TOPIC_QUERIES, WEAK_NOTE, WEAK_QUANTILE, Baseline, weak_note
from tests.test_cli import run_cli


def test_confidence_is_the_empirical_cdf_and_monotone() -> None:
    baseline = Baseline.of([0.3, 0.1, 0.2, 0.4])
    assert baseline.confidence(0.05) == 0.0
    assert baseline.confidence(0.25) == 0.5
    assert baseline.confidence(0.9) == 1.0
    assert baseline.confidence(None) is None
    assert Baseline.of([]).confidence(0.5) is None
    rng = np.random.default_rng(7)
    cosines = sorted(rng.uniform(-1, 1, 200))
    values = [baseline.confidence(c) for c in cosines]
    assert values == sorted(values)  # type: ignore[type-var]
    # the reference ECDF: numpy's searchsorted on the sorted sample (left side = strictly below)
    reference = np.searchsorted(np.sort([0.3, 0.1, 0.2, 0.4]), cosines, side="left") / 4
    assert np.allclose(values, reference)


def test_weak_note_uses_the_surest_hit() -> None:
    assert weak_note([0.2, WEAK_QUANTILE - 0.01]) == WEAK_NOTE
    assert weak_note([0.2, WEAK_QUANTILE]) is None
    assert weak_note([None, None]) is None
    assert weak_note([]) is None


def test_searcher_baseline_is_cached_per_index_state(fake_index) -> None:  # type: ignore[no-untyped-def]
    searcher = fake_index.searcher()
    with searcher.lock.read():
        first = searcher.baseline()
        assert searcher.baseline() is first
    assert len(first.cosines) == len(OFF_TOPIC_QUERIES)
    assert list(first.cosines) == sorted(first.cosines)
    (fake_index.settings.repo / "extra.py").write_text('def brew_tea():\n    """Tea."""\n')
    fake_index.update()
    with searcher.lock.read():
        assert searcher.baseline() is not first  # a new generation: computed again


def test_every_hit_carries_a_confidence(fake_index) -> None:  # type: ignore[no-untyped-def]
    hits = fake_index.search("refund a rider", 10)
    assert hits
    for hit in hits:
        assert hit.confidence is not None and 0.0 <= hit.confidence <= 1.0
        if hit.similarity is not None:
            assert hit.confidence == fake_index.searcher().baseline().confidence(hit.similarity)


def test_json_lines_carry_the_confidence_field(sample_copy: Path) -> None:
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    code, out, err = run_cli("search", "refund a rider", "--repo", str(sample_copy),
                             "--backend", "fake", "--json", "-k", "3")
    assert code == 0, err
    records = [json.loads(line) for line in out.splitlines()]
    assert records and all(0.0 <= r["confidence"] <= 1.0 for r in records)


def test_plain_output_prints_the_weak_note_only_for_weak_answers(
        sample_copy: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    import codeseek.confidence as confidence

    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    args = ("search", "refund a rider", "--repo", str(sample_copy), "--backend", "fake")
    monkeypatch.setattr(confidence, "WEAK_QUANTILE", 1.01)  # every answer counts as weak
    _, out, _ = run_cli(*args)
    assert out.splitlines()[0] == WEAK_NOTE
    monkeypatch.setattr(confidence, "WEAK_QUANTILE", -0.01)  # no answer counts as weak
    _, out, _ = run_cli(*args)
    assert WEAK_NOTE not in out and out.strip()
