"""The query adapter: its loss, its batches, its training, and search with it."""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

import numpy as np
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
    info_nce,
    loss_and_gradient,
    make_batches,
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


def test_tune_keeps_the_adapter_only_if_it_helps(fake_index: Index) -> None:
    report = fake_index.tune(batch_size=32)
    before = report.served_mrr(report.before)
    after = report.served_mrr(report.after)
    assert report.kept == (after > before)
    assert (fake_index.settings.index_dir / ADAPTER_NAME).exists() == report.kept
    assert (fake_index.searcher().adapter is not None) == report.kept
    assert report.log.pairs > 0 and report.log.validation_mrr
    assert report.to_json()["served_mrr_after"] == round(after, 4)
    if report.kept:
        assert fake_index.evaluate().adapter
        with pytest.raises(InvalidSplit, match="trained with 20% held out by unit, seed 0"):
            fake_index.evaluate(seed=1)


def test_cli_tune_and_remove(sample_copy: Path) -> None:
    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "-q")
    assert code == 0, err
    code, out, err = run_cli("tune", str(sample_copy), "--backend", "fake", "--batch-size",
                             "32", "--json")
    assert code == 0, err
    data = json.loads(out)
    assert set(data) >= {"kept", "served_mrr_before", "served_mrr_after", "training"}
    code, out, _ = run_cli("tune", str(sample_copy), "--backend", "fake", "--remove")
    assert code == 0
    assert out == ("removed the query adapter; search uses the plain model\n" if data["kept"]
                   else "there is no query adapter to remove\n")
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

    monkeypatch.setattr(tune, "train_adapter", useless)  # a map that scrambles the queries
    # the weight stays the served one: this checks the rule "kept only if served MRR rises"
    monkeypatch.setattr(tune, "choose_fusion", lambda *args, **kwargs: (DEFAULT_FUSION, {}))
    report = fake_index.tune()
    assert not report.kept
    assert report.served_mrr(report.after) <= report.served_mrr(report.before)
    assert "not kept" in report.to_text()
    assert not (fake_index.settings.index_dir / ADAPTER_NAME).exists()
    assert fake_index.searcher().adapter is None


def test_a_better_weight_alone_does_not_keep_an_adapter(fake_index: Index,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.tune as tune

    dim = fake_index.searcher().vectors.dim

    def identity(data: TrainingData, settings: object = None,
                 progress: object = None) -> tuple[np.ndarray, object]:
        return np.eye(dim, dtype=np.float32), train_adapter(data, TrainSettings(max_epochs=1))[1]

    monkeypatch.setattr(tune, "train_adapter", identity)  # an adapter that changes nothing
    report = fake_index.tune()
    before, after = report.served_mrr(report.before), report.served_mrr(report.after)
    # with the fake embedder the keywords are the stronger side, so the weight chosen on the
    # training pairs differs from the served one and serves the held-out queries better
    assert report.reweighted is not None and report.reweighted.fusion == report.after.fusion
    assert after > before
    assert after == report.served_mrr(report.reweighted)
    assert not report.kept
    assert report.to_text().splitlines()[-1] == (
        f"not kept: the plain model with its weight chosen the same way does as well "
        f"({after:.3f}); search keeps the plain model")
    assert report.to_json()["served_mrr_plain_reweighted"] == round(after, 4)
    assert not (fake_index.settings.index_dir / ADAPTER_NAME).exists()


def test_the_tuned_fusion_is_chosen_on_training_pairs_only(
        fake_index: Index, monkeypatch: pytest.MonkeyPatch) -> None:
    import codeseek.tune as tune
    from codeseek.evaluate import FUSION_GRID

    # sample_repo sets aside fewer than MIN_FUSION_PAIRS: the weight is chosen on all of
    # the training pairs (never on the held-out ones, which judge the adapter)
    report = fake_index.tune(batch_size=32)
    log = report.log
    assert log.validation_pairs < tune.MIN_FUSION_PAIRS
    assert report.fusion_note == (f"chosen on all {log.pairs + log.validation_pairs} training "
                                  f"pairs: fewer than {tune.MIN_FUSION_PAIRS} set aside")
    assert report.after.fusion in FUSION_GRID
    assert report.before.fusion == DEFAULT_FUSION
    monkeypatch.setattr(tune, "MIN_FUSION_PAIRS", 1)
    report = fake_index.tune(batch_size=32)
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
    """tune imports from the ``codeseek.evaluate`` package itself (never a module of it),
    and only names that package exports."""
    import ast

    import codeseek.evaluate
    import codeseek.tune

    source = Path(codeseek.tune.__file__).read_text(encoding="utf-8")
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
