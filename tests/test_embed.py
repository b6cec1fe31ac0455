"""The embedding backends without the real model: a tiny exported graph built here."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from codeseek.embed import Embedder, OnnxEmbedder, onnx_path

WORDS = ["[UNK]", "dock", "bike", "fare", "zone"]
TABLE = np.array([[0.0, 0.0, 0.0, 0.0], [3.0, 4.0, 0.0, 0.0], [0.0, 0.0, 6.0, 8.0],
                  [1.0, 1.0, 1.0, 1.0], [-2.0, 0.0, 0.0, 0.0]], dtype=np.float32)


def tiny_model(folder: Path, cache_dir: Path, *, normalize_step: bool) -> OnnxEmbedder:
    """A sentence-transformers-shaped folder whose 'transformer' looks each token up in
    TABLE (an ONNX Gather), mean-pooled, with or without a Normalize module."""
    onnx = pytest.importorskip("onnx")
    from onnx import TensorProto, helper, numpy_helper
    from tokenizers import Tokenizer, models, pre_tokenizers

    folder.mkdir(parents=True)
    tokenizer = Tokenizer(models.WordLevel({w: i for i, w in enumerate(WORDS)},
                                           unk_token="[UNK]"))
    tokenizer.pre_tokenizer = pre_tokenizers.Whitespace()
    tokenizer.save(str(folder / "tokenizer.json"))
    modules = [{"idx": 0, "name": "0", "path": "",
                "type": "sentence_transformers.models.Transformer"},
               {"idx": 1, "name": "1", "path": "1_Pooling",
                "type": "sentence_transformers.models.Pooling"}]
    if normalize_step:
        modules.append({"idx": 2, "name": "2", "path": "2_Normalize",
                        "type": "sentence_transformers.models.Normalize"})
    (folder / "modules.json").write_text(json.dumps(modules), encoding="utf-8")
    (folder / "config.json").write_text(json.dumps({"hidden_size": 4}), encoding="utf-8")
    (folder / "1_Pooling").mkdir()
    (folder / "1_Pooling" / "config.json").write_text(json.dumps(
        {"word_embedding_dimension": 4, "pooling_mode_mean_tokens": True}), encoding="utf-8")
    graph = helper.make_graph(
        [helper.make_node("Gather", ["table", "input_ids"], ["hidden"], axis=0)], "lookup",
        [helper.make_tensor_value_info("input_ids", TensorProto.INT64, ["batch", "tokens"])],
        [helper.make_tensor_value_info("hidden", TensorProto.FLOAT,
                                       ["batch", "tokens", 4])],
        [numpy_helper.from_array(TABLE, "table")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    target = onnx_path(cache_dir, "tiny")
    target.parent.mkdir(parents=True)
    onnx.save(model, str(target))  # in place, so nothing is exported from torch
    return OnnxEmbedder(folder, "tiny", cache_dir)


@pytest.mark.parametrize("normalize_step", [False, True])
def test_onnx_vectors_are_unit_length_with_or_without_a_normalize_step(
        tmp_path: Path, normalize_step: bool) -> None:
    embedder = tiny_model(tmp_path / "model", tmp_path / "cache",
                          normalize_step=normalize_step)
    assert isinstance(embedder, Embedder)
    texts = ["dock", "bike fare", "zone zone dock", "fare"]
    vectors = embedder.encode(texts)
    # reference: the mean of the looked-up rows, divided by its norm, in plain numpy
    pooled = np.stack([TABLE[[WORDS.index(w) for w in t.split()]].mean(axis=0)
                       for t in texts])
    expected = pooled / np.linalg.norm(pooled, axis=1, keepdims=True)
    assert vectors.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(vectors, axis=1), 1.0, rtol=1e-6)
    np.testing.assert_allclose(vectors, expected, rtol=1e-6, atol=1e-7)
