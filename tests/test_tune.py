"""The query adapter: its loss, its batches, its training, and search with it."""

from __future__ import annotations

import io
import json
import math
from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path

import numpy as np
import planted as planted_repo
import pytest

from codeseek.adapter import ADAPTER_NAME, QueryAdapter, load_adapter, save_adapter
from codeseek.api import Index
from codeseek.cli import main
from codeseek.errors import IndexCorrupt, InvalidSplit, TooFewExamples
from codeseek.search import DEFAULT_FUSION, Searcher
from codeseek.tune import (
    Adam,
    TrainingData,
    TrainSettings,
    adapted,
    choose_adapter,
    info_nce,
    loss_and_gradient,
    make_batches,
    mixed_matrix,
    train_adapter,
    validation_mrr,
)


def run_cli(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


# -- the loss --------------------------------------------------------------------------


def test_info_nce_equals_the_hand_computed_value() -> None:
    queries = np.array([[1.0, 0.0], [0.0, 1.0]])
    documents = np.array([[1.0, 0.0], [0.6, 0.8]])
    # by hand, temperature 0.5: logits [[2, 1.2], [0, 1.6]];
    # row 1: -log(e^2 / (e^2 + e^1.2)) = log(1 + e^-0.8); row 2: log(1 + e^-1.6)
    by_hand = (math.log(1 + math.exp(-0.8)) + math.log(1 + math.exp(-1.6))) / 2
    assert info_nce(queries, documents, 0.5) == pytest.approx(by_hand, rel=1e-12)
    loss, _ = loss_and_gradient(np.eye(2), queries, documents, 0.5)
    assert loss == pytest.approx(by_hand, rel=1e-12)


def test_loss_and_gradient_match_torch_autograd() -> None:
    import torch

    rng = np.random.default_rng(0)
    q = rng.normal(size=(6, 4))
    d = rng.normal(size=(6, 4))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    w = np.eye(4) + rng.normal(scale=0.3, size=(4, 4))
    loss, gradient = loss_and_gradient(w, q, d, 0.07)
    # reference: torch's cross_entropy and autograd on the same InfoNCE
    weight = torch.tensor(w, requires_grad=True)
    mapped = torch.nn.functional.normalize(torch.tensor(q) @ weight, dim=1)
    expected = torch.nn.functional.cross_entropy(mapped @ torch.tensor(d).T / 0.07,
                                                 torch.arange(6))
    expected.backward()
    assert weight.grad is not None
    assert loss == pytest.approx(float(expected.detach()), rel=1e-9)
    assert np.allclose(gradient, weight.grad.numpy(), rtol=1e-7, atol=1e-10)


def test_adam_matches_torch() -> None:
    import torch

    rng = np.random.default_rng(2)
    start = rng.normal(size=(3, 3))
    grads = [rng.normal(size=(3, 3)) for _ in range(5)]
    mine = start.copy()
    adam = Adam(mine.shape, 0.01)
    for g in grads:
        adam.step(mine, g)
    # reference: torch.optim.Adam with the same hyperparameters
    theirs = torch.tensor(start, requires_grad=True)
    optimiser = torch.optim.Adam([theirs], lr=0.01)
    for g in grads:
        optimiser.zero_grad()
        theirs.grad = torch.tensor(g)
        optimiser.step()
    assert np.allclose(mine, theirs.detach().numpy(), rtol=1e-10, atol=1e-12)


# -- batches ---------------------------------------------------------------------------


def test_batches_never_pair_duplicates_and_place_every_pair_once() -> None:
    rng = np.random.default_rng(1)
    query_keys = [f"q{i % 40}" for i in range(200)]  # five pairs share each doc
    doc_keys = [f"d{i % 70}" for i in range(200)]
    batches = make_batches(query_keys, doc_keys, 32, rng)
    placed = np.concatenate(batches)
    assert sorted(placed.tolist()) == list(range(200))
    for batch in batches:
        assert 0 < len(batch) <= 32
        assert len({query_keys[i] for i in batch}) == len(batch)
        assert len({doc_keys[i] for i in batch}) == len(batch)


def test_a_batch_of_one_is_refused() -> None:
    data = planted(8, 40, 0)[0]
    with pytest.raises(TooFewExamples, match=r"^--batch-size must be at least 2, not 1"):
        train_adapter(data, TrainSettings(batch_size=1))


# -- training recovers a planted map ---------------------------------------------------


def planted(dim: int, n: int, seed: int) -> tuple[TrainingData, np.ndarray]:
    """Documents at random; each query is its document seen through a hidden rotation."""
    rng = np.random.default_rng(seed)
    rotation, _ = np.linalg.qr(rng.normal(size=(dim, dim)))
    docs = rng.normal(size=(n, dim))
    docs /= np.linalg.norm(docs, axis=1, keepdims=True)
    queries = docs @ rotation.T  # so queries @ rotation == docs
    queries += rng.normal(scale=0.05, size=queries.shape)
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    fit, aside = slice(0, n - n // 5), slice(n - n // 5, n)
    data = TrainingData(
        queries=queries[fit].astype(np.float32), documents=docs[fit].astype(np.float32),
        query_keys=tuple(f"q{i}" for i in range(n - n // 5)),
        doc_keys=tuple(f"d{i}" for i in range(n - n // 5)),
        validation_queries=queries[aside].astype(np.float32),
        validation_targets=np.arange(n - n // 5, n), corpus=docs.astype(np.float32))
    return data, rotation


def test_training_recovers_a_planted_rotation() -> None:
    data, rotation = planted(dim=16, n=600, seed=4)
    matrix, log = train_adapter(data, TrainSettings(batch_size=64, learning_rate=1e-2,
                                                    max_epochs=300, identity_decay=0.0))
    assert log.validation_mrr[0] < 0.3  # the identity cannot match rotated queries
    assert validation_mrr(matrix, data) > 0.95 and log.best_epoch > 0
    aside = data.validation_queries
    truth = data.corpus[data.validation_targets]
    assert float((aside * truth).sum(axis=1).mean()) < 0.1
    assert float((adapted(aside, matrix) * truth).sum(axis=1).mean()) > 0.95
    # the map equals the rotation up to scale (normalisation hides scale)
    learned = matrix / np.linalg.norm(matrix)
    target = rotation / np.linalg.norm(rotation)
    assert float((learned * target).sum()) > 0.95


# -- the adapter at search time --------------------------------------------------------


def test_the_identity_adapter_reproduces_plain_search(fake_index: Index) -> None:
    plain = fake_index.searcher()
    assert plain.adapter is None
    with_identity = Searcher(plain.store, plain.vectors, plain.embedder, plain.model_id,
                             adapter=QueryAdapter.identity(plain.vectors.dim, plain.model_id))
    queries = ["retry failed uploads with backoff", "refund a ride", "nearest dock",
               "parse the packet header"]
    for got, want in zip(with_identity.search_many(queries, 10), plain.search_many(queries, 10),
                         strict=True):
        assert [(h.unit_id, h.rank) for h in got] == [(h.unit_id, h.rank) for h in want]
        assert [h.score for h in got] == pytest.approx([h.score for h in want], abs=1e-6)
        assert [h.similarity for h in got] == pytest.approx([h.similarity for h in want],
                                                            abs=1e-6)


def test_a_saved_adapter_is_used_by_search(fake_index: Index) -> None:
    searcher = fake_index.searcher()
    dim, model = searcher.vectors.dim, searcher.model_id
    flip = np.eye(dim, dtype=np.float32)[::-1].copy()  # a permutation: search changes
    save_adapter(fake_index.settings.index_dir, QueryAdapter(flip, model, {
        "split": {"holdout": 0.2, "seed": 0, "by_file": False}}))
    assert load_adapter(fake_index.settings.index_dir, "another-model") is None
    fake_index._searcher = None
    adapted = fake_index.searcher()
    assert adapted.adapter is not None
    assert np.array_equal(adapted.adapter.matrix, flip)
    query = "retry failed uploads with backoff"
    vector = adapted.query_vectors([query])[0]
    expected = flip.T @ searcher.embedder.encode([query])[0]  # q @ W, then unit length
    assert np.allclose(vector, expected / np.linalg.norm(expected), atol=1e-6)


def test_a_damaged_adapter_is_a_clear_error(fake_index: Index) -> None:
    (fake_index.settings.index_dir / ADAPTER_NAME).write_bytes(b"not an npz file")
    fake_index._searcher = None
    with pytest.raises(IndexCorrupt, match="the adapter cannot be read"):
        fake_index.searcher()


# -- tune end to end -------------------------------------------------------------------


def test_tune_refuses_under_the_threshold_and_says_why(fake_index: Index) -> None:
    import codeseek.tune as tune

    searcher = fake_index.searcher()
    index_dir = fake_index.settings.index_dir
    # an adapter from an earlier, larger state of the repository: a refusal removes it
    save_adapter(index_dir, QueryAdapter.identity(searcher.vectors.dim, searcher.model_id))
    report = fake_index.tune(batch_size=32)
    # sample_repo's training pairs, counted outside the project: documented units whose
    # cleaned doc has 3 words or more, on the training side of the hash split
    from codeseek.evaluate import Split, select_cases

    units = [stored.unit for stored in fake_index.store.iter_units()]
    expected = sum(1 for c in select_cases(units, Split()).cases if not c.held_out)
    assert report.pairs == expected and 0 < expected < tune.MIN_TRAINING_PAIRS == 300
    assert not report.kept and report.before is None and report.log is None
    assert report.to_text() == f"no adapter kept: {report.refused}"
    assert report.refused.startswith(f"only {expected} training pairs ")
    assert "needs at least 300" in report.refused and "noise" in report.refused
    record = report.to_json()
    assert record["refused"] == report.refused and record["kept"] is False
    assert record["served_mrr_before"] is None and record["protocols"] == []
    assert not (index_dir / ADAPTER_NAME).exists()
    assert fake_index.searcher().adapter is None


def few_pairs(monkeypatch: pytest.MonkeyPatch) -> TrainSettings:
    """Let sample_repo's hundred-odd pairs train (the tests of the machinery, not of the
    threshold), with a short schedule so the test stays fast."""
    import codeseek.tune as tune

    monkeypatch.setattr(tune, "MIN_TRAINING_PAIRS", 10)
    return TrainSettings(batch_size=32, learning_rate=1e-2, max_epochs=20, patience=4,
                         penalties=(1e-4, 1e-1))


def test_cli_tune_and_remove(sample_copy: Path) -> None:
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    code, out, err = run_cli("tune", str(sample_copy), "--backend", "fake", "--batch-size",
                             "32", "--json")
    assert code == 0, err
    data = json.loads(out)
    # sample_repo has too few pairs: tune refuses, and says why (rewritten for issue 11:
    # it used to keep an adapter whose gain lay inside the noise)
    assert data["kept"] is False and data["min_pairs"] == 300
    assert data["refused"].startswith(f"only {data['pairs']} training pairs")
    code, out, _ = run_cli("tune", str(sample_copy), "--backend", "fake")
    assert (code, out) == (0, f"no adapter kept: {data['refused']}\n")
    code, out, _ = run_cli("tune", str(sample_copy), "--backend", "fake", "--remove")
    assert code == 0
    assert out == "there is no query adapter to remove\n"
    assert not (sample_copy / ".codeseek" / ADAPTER_NAME).exists()
    code, _, err = run_cli("tune", str(sample_copy), "--backend", "fake", "--batch-size", "1")
    assert (code, err.splitlines()[-1]) == (
        1, "error: --batch-size must be at least 2, not 1: a batch of N pairs gives each "
           "query N - 1 negatives")


def test_an_adapter_that_does_not_help_is_not_kept(fake_index: Index,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.tune as tune

    dim = fake_index.searcher().vectors.dim
    model = fake_index.searcher().model_id
    save_adapter(fake_index.settings.index_dir, QueryAdapter.identity(dim, model).with_header(
        {"split": {"holdout": 0.2, "seed": 0, "by_file": False}}))
    scramble = np.random.default_rng(0).normal(size=(dim, dim)).astype(np.float32)

    def useless(data: TrainingData, settings: object = None,
                progress: object = None) -> tuple[np.ndarray, object]:
        return scramble, train_adapter(data, TrainSettings(max_epochs=1))[1]

    settings = few_pairs(monkeypatch)
    monkeypatch.setattr(tune, "train_adapter", useless)  # a map that scrambles the queries
    # the weight stays the served one: this checks the rule "kept only if served MRR rises"
    monkeypatch.setattr(tune, "choose_fusion", lambda *args, **kwargs: (DEFAULT_FUSION, {}))
    report = fake_index.tune(settings=settings)
    assert not report.kept
    # on 11 pairs set aside a little of the scrambled query can look better by chance
    # (mix 0.25 here); the held-out docstrings then show no gain beyond noise
    assert report.choice is not None and report.choice.shown.mix > 0
    gate = next(g for g in report.gates if g.name == "docstrings")
    assert not gate.passed and "95% interval" in gate.detail
    assert "not kept (docstrings)" in report.to_text()
    assert not (fake_index.settings.index_dir / ADAPTER_NAME).exists()
    assert fake_index.searcher().adapter is None


def test_a_better_weight_alone_does_not_keep_an_adapter(fake_index: Index,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.tune as tune

    dim = fake_index.searcher().vectors.dim

    def identity(data: TrainingData, settings: object = None,
                 progress: object = None) -> tuple[np.ndarray, object]:
        return np.eye(dim, dtype=np.float32), train_adapter(data, TrainSettings(max_epochs=1))[1]

    settings = few_pairs(monkeypatch)
    monkeypatch.setattr(tune, "train_adapter", identity)  # an adapter that changes nothing
    # mix 1 only, so that the do-nothing adapter is measured (with mix 0 tried, the plain
    # model wins the tie on the pairs set aside and the mix rule alone rejects it)
    report = fake_index.tune(settings=replace(settings, mixes=(1.0,)))
    before, after = report.served_mrr(report.before), report.served_mrr(report.after)
    # with the fake embedder the keywords are the stronger side, so the weight chosen on the
    # training pairs differs from the served one and serves the held-out queries better
    assert report.reweighted is not None and report.reweighted.fusion == report.after.fusion
    assert after > before
    assert after == report.served_mrr(report.reweighted)
    assert not report.kept
    gate = next(g for g in report.gates if g.name == "docstrings")
    assert not gate.passed
    assert gate.detail.startswith(f"held-out served MRR, whole index: {after:.3f} (the plain "
                                  f"model reweighted) -> {after:.3f}, gain +0.000")
    assert report.to_text().splitlines()[-1] == (
        "not kept (docstrings): search keeps the plain model")
    assert report.to_json()["served_mrr_plain_reweighted"] == round(after, 4)
    assert not (fake_index.settings.index_dir / ADAPTER_NAME).exists()


def test_the_tuned_fusion_is_chosen_on_training_pairs_only(
        fake_index: Index, monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.tune as tune
    from codeseek.evaluate import FUSION_GRID

    # sample_repo sets aside fewer than MIN_FUSION_PAIRS: the weight is chosen on all of
    # the training pairs (never on the held-out ones, which judge the adapter)
    settings = few_pairs(monkeypatch)
    report = fake_index.tune(settings=settings)
    log = report.log
    assert log is not None and report.after is not None
    assert log.validation_pairs < tune.MIN_FUSION_PAIRS
    assert report.fusion_note == (f"chosen on all {log.pairs + log.validation_pairs} training "
                                  f"pairs: fewer than {tune.MIN_FUSION_PAIRS} set aside")
    assert report.after.fusion in FUSION_GRID
    assert report.before.fusion == DEFAULT_FUSION
    monkeypatch.setattr(tune, "MIN_FUSION_PAIRS", 1)
    report = fake_index.tune(settings=settings)
    assert report.log is not None
    assert report.fusion_note == f"chosen on the {report.log.validation_pairs} pairs set aside"


# -- an adapter saved beside a running searcher ------------------------------------------


def test_an_adapter_saved_by_another_process_reaches_a_running_searcher(
        fake_index: Index) -> None:
    from codeseek import FakeEmbedder, open_index

    query = "retry failed uploads with backoff"
    plain = [h.unit_id for h in fake_index.search(query, 10)]
    searcher = fake_index.searcher()
    dim, model = searcher.vectors.dim, searcher.model_id
    flip = np.eye(dim, dtype=np.float32)[::-1].copy()
    # a second Index on the same folder plays the part of `codeseek tune` in another process
    other = open_index(fake_index.settings.repo, embedder=FakeEmbedder())
    try:
        save_adapter(other.settings.index_dir, QueryAdapter(flip, model, {
            "split": {"holdout": 0.2, "seed": 0, "by_file": False},
            "fusion": {"kind": "zscore", "dense_weight": 0.9, "rrf_k": 5}}))
        adapted = [h.unit_id for h in fake_index.search(query, 10)]
        assert fake_index.searcher() is searcher  # the same searcher, its adapter swapped
        assert searcher.adapter is not None and np.array_equal(searcher.adapter.matrix, flip)
        assert searcher.fusion.kind == "zscore" and searcher.fusion.dense_weight == 0.9
        # the reference: a searcher built from scratch with that adapter and fusion
        fresh = Searcher(searcher.store, searcher.vectors, searcher.embedder, model,
                         adapter=searcher.adapter, fusion=searcher.fusion)
        assert adapted == [h.unit_id for h in fresh.search(query, 10)]
        assert adapted != plain
        assert other.remove_adapter()
        assert [h.unit_id for h in fake_index.search(query, 10)] == plain
        assert searcher.adapter is None and searcher.fusion == DEFAULT_FUSION
    finally:
        other.close()


def test_status_says_whether_an_adapter_serves(fake_index: Index, sample_copy: Path) -> None:
    assert fake_index.status().adapter is None
    code, out, err = run_cli("status", str(sample_copy))
    assert code == 0, err
    assert ("adapter      none (search uses the plain model; `codeseek tune` trains one)"
            in out.splitlines())
    searcher = fake_index.searcher()
    report = {"held_out": 38, "served_mrr_before": 0.4421, "served_mrr_after": 0.5012,
              "training": {"batch_size": 256, "pairs": 113}}
    save_adapter(fake_index.settings.index_dir, QueryAdapter.identity(
        searcher.vectors.dim, searcher.model_id).with_header(
        {"split": {"holdout": 0.2, "seed": 0, "by_file": False}, "report": report}))
    summary = fake_index.status().adapter
    assert summary is not None
    assert {k: summary[k] for k in ("model_id", "held_out", "served_mrr_before",
                                    "served_mrr_after", "batch_size", "pairs")} == {
        "model_id": searcher.model_id, "held_out": 38, "served_mrr_before": 0.4421,
        "served_mrr_after": 0.5012, "batch_size": 256, "pairs": 113}
    code, out, err = run_cli("status", str(sample_copy), "--json")
    assert code == 0, err
    assert json.loads(out)["adapter"]["served_mrr_after"] == 0.5012
    # the CLI's status reads the index without a model: the adapter counts as this index's
    # when it was made for the model the index was built with
    code, out, err = run_cli("status", str(sample_copy))
    line = next(x for x in out.splitlines() if x.startswith("adapter"))
    assert "in use, trained" in line
    assert line.endswith("held-out served MRR 0.442 -> 0.501 (38 docstrings)")


def test_tune_uses_only_the_public_parts_of_the_recall_checks() -> None:
    """tune (and its rules of keeping) import from the ``codeseek.evaluate`` package itself
    (never a module of it), and only names that package exports."""
    import ast

    import codeseek.evaluate
    import codeseek.keeping
    import codeseek.tune

    source = "\n".join(Path(module.__file__ or "").read_text(encoding="utf-8")
                       for module in (codeseek.tune, codeseek.keeping))
    imported: list[tuple[str, str]] = []
    for node in ast.walk(ast.parse(source)):  # reference: Python's own parser
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith(
                "codeseek.evaluate"):
            imported.extend((node.module or "", alias.name) for alias in node.names)
        elif isinstance(node, ast.Import):
            assert not any(a.name.startswith("codeseek.evaluate") for a in node.names)
    assert imported
    assert {module for module, _ in imported} == {"codeseek.evaluate"}
    assert {name for _, name in imported} <= set(codeseek.evaluate.__all__)


# -- regularising toward the plain model ---------------------------------------------------


def test_the_mixed_matrix_is_the_mix_of_plain_and_adapted_queries() -> None:
    rng = np.random.default_rng(5)
    queries = rng.normal(size=(30, 6))
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    weight = np.eye(6) + rng.normal(scale=0.8, size=(6, 6))
    scale = np.linalg.norm(queries @ weight, axis=1).mean()
    assert np.allclose(mixed_matrix(weight, queries, 0.0), np.eye(6))
    for mix in (0.25, 0.5, 1.0):
        served = mixed_matrix(weight, queries, mix)
        # reference: the formula written out in numpy, q' = normalise((1-a) q + a q W / s)
        by_hand = (1 - mix) * queries + mix * (queries @ weight) / scale
        by_hand /= np.linalg.norm(by_hand, axis=1, keepdims=True)
        assert np.allclose(adapted(queries, served), by_hand, atol=1e-6)


def _lrap_mrr(queries: np.ndarray, data: TrainingData) -> float:
    """MRR of the set-aside queries by scikit-learn: with one relevant document per query
    the label ranking average precision is the reciprocal rank (ties count against)."""
    from sklearn.metrics import label_ranking_average_precision_score

    truth = np.zeros((len(queries), len(data.corpus)), dtype=int)
    truth[np.arange(len(queries)), data.validation_targets] = 1
    return float(label_ranking_average_precision_score(truth, queries @ data.corpus.T))


def test_mix_zero_is_chosen_when_the_adapter_hurts_the_pairs_set_aside(
        monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.tune as tune

    # a map learned on planted pairs (it recovers their rotation)...
    data, _ = planted(dim=12, n=400, seed=6)
    learned, log = train_adapter(data, TrainSettings(batch_size=64, learning_rate=1e-2,
                                                     max_epochs=60, identity_decay=0.0))
    assert log.best_epoch > 0
    # ...judged on pairs set aside that the plain model answers (their queries are their
    # documents, lightly blurred): every share of the map moves them off their documents
    rng = np.random.default_rng(8)
    aside = data.corpus[data.validation_targets] + rng.normal(scale=0.3,
                                                               size=data.validation_queries.shape)
    aside /= np.linalg.norm(aside, axis=1, keepdims=True)
    data = replace(data, validation_queries=aside.astype(np.float32))
    monkeypatch.setattr(tune, "train_adapter", lambda *args: (learned, log))
    settings = TrainSettings(penalties=(1e-4,))
    matrix, choice = choose_adapter(data, settings)
    assert choice.plain_won and choice.chosen.mix == 0.0
    by_mix = {c.mix: c.validation_mrr for c in choice.candidates}
    assert list(by_mix) == list(settings.mixes)
    assert by_mix[1.0] < by_mix[0.5] < by_mix[0.0]  # the more of the map, the worse
    assert all(value < by_mix[0.0] for mix, value in by_mix.items() if mix > 0)
    # the figures are the ones scikit-learn computes for the same queries
    assert by_mix[0.0] == pytest.approx(_lrap_mrr(aside, data), abs=1e-9)
    assert choice.shown.mix == 0.25 and choice.shown.validation_mrr == pytest.approx(
        _lrap_mrr(adapted(aside.astype(np.float64), matrix.astype(np.float64)), data),
        abs=1e-9)


def test_a_helpful_map_is_chosen_with_a_share_above_zero() -> None:
    data, _ = planted(dim=12, n=400, seed=6)  # the pairs set aside are rotated too
    matrix, choice = choose_adapter(data, TrainSettings(batch_size=64, learning_rate=1e-2,
                                                        max_epochs=60, patience=60))
    assert not choice.plain_won and choice.chosen is choice.shown
    assert choice.chosen.mix >= 0.75
    assert choice.chosen.validation_mrr > 0.9 > 0.3 > choice.candidates[0].validation_mrr
    assert validation_mrr(matrix.astype(np.float64), data) == pytest.approx(
        choice.chosen.validation_mrr, abs=1e-9)


# -- the rules of keeping, end to end on a repository where an adapter must help ----------


FAST = TrainSettings(learning_rate=1e-2, max_epochs=30, patience=6, penalties=(1e-4, 1e-1))


@pytest.fixture
def planted_index(tmp_path: Path) -> Iterator[tuple[Index, list[tuple[int, int, int]]]]:
    from codeseek import open_index

    concepts = planted_repo.write_repo(tmp_path / "planted")
    index = open_index(tmp_path / "planted", create=True,
                       embedder=planted_repo.PlantedEmbedder())
    index.update()
    yield index, concepts
    index.close()


def _ranks_by_numpy(index: Index, questions: Path, adapter: QueryAdapter | None) -> np.ndarray:
    """Each question's rank of its answer by brute-force dense search in numpy (no
    keywords), for the reference figures below."""
    searcher = index.searcher()
    labels, matrix = index.store.unit_vectors(searcher.model_id, searcher.vectors.dim,
                                              [s.id for s in index.store.iter_units()])
    where = {s.id: (s.unit.path, s.unit.qualname) for s in index.store.iter_units()}
    ranks = []
    for line in questions.read_text(encoding="utf-8").splitlines():
        record = json.loads(line)
        vector = searcher.embedder.encode([record["question"]])
        vector = vector if adapter is None else adapter.apply(vector)
        order = np.argsort(-(matrix @ vector[0]), kind="stable")
        answer = (record["answers"][0]["path"], record["answers"][0]["qualname"])
        ranks.append(1 + [where[int(labels[i])] for i in order].index(answer))
    return np.array(ranks)


def test_an_adapter_that_truly_helps_is_kept(
        planted_index: tuple[Index, list[tuple[int, int, int]]], tmp_path: Path) -> None:
    index, concepts = planted_index
    asked = planted_repo.write_questions(tmp_path / "doc-words.jsonl", concepts, "wd")
    report = index.tune(questions=asked, settings=FAST)
    assert report.pairs >= 300 and report.choice is not None
    assert [(g.name, g.passed) for g in report.gates] == [
        ("mix", True), ("docstrings", True), ("name-blind", True), ("questions", True)]
    assert report.kept
    rows = {(c.protocol, c.metric): c for c in report.comparisons}
    assert set(rows) == {("docstrings, whole index", "MRR"), ("name-blind, whole index", "MRR"),
                         ("questions", "hit@10"), ("questions", "MRR@10")}
    gain = rows["docstrings, whole index", "MRR"]
    assert gain.plain < 0.1 < 0.5 < gain.adapted and gain.ci95[0] > 0
    # reference for the held-out figures: numpy's mean of reciprocal ranks
    before = report.before.result("served", "all") if report.before else None
    assert before is not None and gain.plain == pytest.approx(
        float(np.mean([1 / r if r else 0.0 for r in before.ranks])))
    saved = load_adapter(index.settings.index_dir, index.searcher().model_id)
    assert saved is not None and index.searcher().adapter is not None
    header = saved.header["report"]
    assert header["kept"] and header["choice"]["mix"] == report.choice.chosen.mix > 0
    assert header["choice"]["penalty"] == report.choice.chosen.penalty
    assert {c["protocol"] for c in header["protocols"]} >= {"questions", "name-blind, whole index"}
    assert header["questions_file"] == str(asked)
    summary = index.status().adapter  # what status reads back from adapter.json
    assert summary is not None
    assert (summary["mix"], summary["penalty"]) == (report.choice.chosen.mix,
                                                    report.choice.chosen.penalty)
    # eval then uses the adapter's split, and refuses another
    with pytest.raises(InvalidSplit, match="trained with 20% held out by unit, seed 0"):
        index.evaluate(seed=1)
    text = report.to_text()
    assert "kept: search uses it from now on" in text.splitlines()
    assert f"chosen: penalty {report.choice.chosen.penalty:g}, mix " in text


def test_an_adapter_that_lowers_the_index_folders_questions_is_rejected(
        planted_index: tuple[Index, list[tuple[int, int, int]]]) -> None:
    index, concepts = planted_index
    # questions in words that embed like the code's: the plain model finds them, an
    # adapter that turns every query loses them; put where tune looks without --questions
    found = planted_repo.write_questions(index.settings.index_dir / "questions.jsonl",
                                         concepts, "qx")
    report = index.tune(settings=FAST)
    assert report.before is not None and report.before.questions is not None
    assert report.before.questions.source == str(found)
    assert [(g.name, g.passed) for g in report.gates] == [
        ("mix", True), ("docstrings", True), ("name-blind", True), ("questions", False)]
    assert not report.kept
    assert not (index.settings.index_dir / ADAPTER_NAME).exists()
    assert index.searcher().adapter is None
    rows = {c.metric: c for c in report.comparisons if c.protocol == "questions"}
    assert rows["hit@10"].difference < 0 and rows["MRR@10"].difference < 0
    # reference: the plain figures recomputed by brute-force dense search in numpy (these
    # questions share no word with any unit, so the keyword side adds nothing)
    plain_ranks = _ranks_by_numpy(index, found, None)
    assert rows["hit@10"].plain == pytest.approx(float(np.mean(plain_ranks <= 10)))
    assert rows["MRR@10"].plain == pytest.approx(
        float(np.mean(np.where(plain_ranks <= 10, 1 / plain_ranks, 0.0))))
    assert report.to_text().splitlines()[-1] == "not kept (questions): search keeps the plain model"


def test_a_bad_question_file_is_one_clear_line_before_any_training(sample_copy: Path) -> None:
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    bad = sample_copy / "bad.jsonl"
    bad.write_text('{"question": "refund a ride", "answers": [{"path": "a.py", '
                   '"qualname": "f"}]}\n{"question": oops}\n', encoding="utf-8")
    code, out, err = run_cli("tune", str(sample_copy), "--backend", "fake", "--questions",
                             str(bad))
    assert (code, out) == (1, "")
    assert err.splitlines() == [f"error: {bad}, line 2: not JSON (Expecting value)"]
    missing = sample_copy / "nowhere.jsonl"
    code, _, err = run_cli("tune", str(sample_copy), "--backend", "fake", "--questions",
                           str(missing))
    assert (code, err.splitlines()) == (1, [f"error: {missing}: no such question file"])
    assert not (sample_copy / ".codeseek" / ADAPTER_NAME).exists()


def test_the_paired_question_comparison_matches_numpy_and_scipy() -> None:
    from scipy.stats import bootstrap

    from codeseek.evaluate import check_questions, parse_questions
    from codeseek.keeping import no_loss_gate, question_comparisons

    rng = np.random.default_rng(9)
    count = 120
    text = "".join(json.dumps({"question": f"question {i}", "answers": [
        {"path": "a.py", "qualname": f"f{i}"}]}) + "\n" for i in range(count))
    questions = parse_questions(text, Path("made.jsonl"))
    known = {("a.py", f"f{i}") for i in range(count)}
    plain_ranks = rng.integers(1, 16, size=count)  # 11 to 15: missed
    adapted_ranks = np.maximum(1, plain_ranks + rng.integers(-3, 3, size=count))

    def asked(ranks: np.ndarray) -> object:
        def search(texts: list[str], depth: int) -> list[list[tuple[str, str]]]:
            out = []
            for question in texts:
                i = int(question.split()[1])
                ranking = [("b.py", f"other{j}") for j in range(depth)]
                ranking.insert(int(ranks[i]) - 1, ("a.py", f"f{i}"))
                out.append(ranking[:depth])
            return out
        return check_questions(questions, search, known, source="made.jsonl", corpus=99)

    plain, tuned = asked(plain_ranks), asked(adapted_ranks)
    rows = {c.metric: c for c in question_comparisons(plain, tuned, seed=0)}
    # reference: the figures written out in numpy
    def hit(r: np.ndarray) -> np.ndarray:
        return (r <= 10).astype(float)

    def rr(r: np.ndarray) -> np.ndarray:
        return np.where(r <= 10, 1.0 / r, 0.0)

    for metric, of in (("hit@10", hit), ("MRR@10", rr)):
        row = rows[metric]
        assert row.n == count
        assert row.plain == pytest.approx(of(plain_ranks).mean())
        assert row.adapted == pytest.approx(of(adapted_ranks).mean())
        # reference: scipy's percentile bootstrap of the mean paired difference (another
        # random stream, so the bounds agree to within resampling noise)
        theirs = bootstrap((of(adapted_ranks) - of(plain_ranks),), np.mean, method="percentile",
                           n_resamples=4000, random_state=1).confidence_interval
        assert row.ci95[0] == pytest.approx(theirs.low, abs=0.02)
        assert row.ci95[1] == pytest.approx(theirs.high, abs=0.02)
    gate = no_loss_gate("questions", list(rows.values()), "not measured")
    fell = rows["hit@10"].difference < 0 or rows["MRR@10"].difference < 0
    assert gate.passed == (not fell)
    assert no_loss_gate("questions", [], "not measured").passed
