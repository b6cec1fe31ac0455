"""Embedding tiers (codeseek/tiers.py): the int8 graph and the static model on tiny models
built here, the cache, and an index that records its tier; the real model at the end."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest

from codeseek import open_index
from codeseek.config import load_settings
from codeseek.embed import onnx_path
from codeseek.errors import ConfigError, ModelMismatch, ModelUnavailable
from codeseek.hits import SearchHit
from codeseek.tiers import (
    Int8Embedder,
    StaticEmbedder,
    int8_path,
    static_dir,
    tier_model_id,
    tier_of,
)

WORDS = ["[UNK]", "dock", "bike", "fare", "zone", "rider"]
TEXTS = ["dock", "bike fare", "zone zone dock rider", "fare rider", "rider bike dock"]
WIDTH, HIDDEN = 8, 32


def _tokenizer(folder: Path) -> object:
    from tokenizers import Tokenizer, models, pre_tokenizers

    tokenizer = Tokenizer(models.WordLevel({w: i for i, w in enumerate(WORDS)},
                                           unk_token="[UNK]"))
    tokenizer.pre_tokenizer = pre_tokenizers.Whitespace()
    tokenizer.save(str(folder / "tokenizer.json"))
    return tokenizer


def tiny_transformer(folder: Path, cache_dir: Path) -> tuple[np.ndarray, np.ndarray]:
    """A sentence-transformers-shaped folder whose exported 'transformer' looks each token
    up in a table (an ONNX Gather) and multiplies by a weight (a MatMul), mean-pooled;
    the graph goes where the ONNX export would, so nothing is exported from torch.
    Returns (table, weight)."""
    onnx = pytest.importorskip("onnx")
    from onnx import TensorProto, helper, numpy_helper

    rng = np.random.default_rng(7)
    table = rng.normal(size=(len(WORDS), WIDTH)).astype(np.float32)
    weight = rng.normal(size=(WIDTH, HIDDEN)).astype(np.float32)
    folder.mkdir(parents=True)
    _tokenizer(folder)
    (folder / "config.json").write_text(json.dumps({"hidden_size": HIDDEN}), encoding="utf-8")
    (folder / "1_Pooling").mkdir()
    (folder / "1_Pooling" / "config.json").write_text(json.dumps(
        {"word_embedding_dimension": HIDDEN, "pooling_mode_mean_tokens": True}),
        encoding="utf-8")
    graph = helper.make_graph(
        [helper.make_node("Gather", ["table", "input_ids"], ["rows"], axis=0),
         helper.make_node("MatMul", ["rows", "weight"], ["hidden"])], "lookup",
        [helper.make_tensor_value_info("input_ids", TensorProto.INT64, ["batch", "tokens"])],
        [helper.make_tensor_value_info("hidden", TensorProto.FLOAT,
                                       ["batch", "tokens", HIDDEN])],
        [numpy_helper.from_array(table, "table"), numpy_helper.from_array(weight, "weight")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    target = onnx_path(cache_dir, "tiny")
    target.parent.mkdir(parents=True)
    onnx.save(model, str(target))
    return table, weight


def _unit(rows: np.ndarray) -> np.ndarray:
    return rows / np.linalg.norm(rows, axis=1, keepdims=True)


def test_tier_ids_name_their_tier() -> None:
    base = "all-MiniLM-L6-v2@0123456789abcdef"
    assert tier_model_id(base, "full") == base
    assert {tier_of(tier_model_id(base, t)) for t in ("full", "int8", "static")} == {
        "full", "int8", "static"}
    assert tier_model_id(base, "int8") != tier_model_id(base, "static")
    assert tier_of("some-model+other") == "full"  # a '+' in a folder's name is no tier
    assert tier_of(None) is None


def test_int8_quantises_matmul_weights_per_channel_and_keeps_the_table(tmp_path: Path) -> None:
    onnx = pytest.importorskip("onnx")
    from onnx import TensorProto

    table, weight = tiny_transformer(tmp_path / "model", tmp_path / "cache")
    embedder = Int8Embedder(tmp_path / "model", "tiny", tmp_path / "cache")
    assert embedder.model_id.endswith("+int8") and embedder.dim == HIDDEN
    quantised = onnx.load(str(int8_path(tmp_path / "cache", "tiny")))
    ops = [node.op_type for node in quantised.graph.node]
    assert "MatMulInteger" in ops and "MatMul" not in ops
    assert "Gather" in ops  # the lookup is not quantised...
    kinds = {init.name: (init.data_type, list(init.dims)) for init in quantised.graph.initializer}
    assert kinds["table"] == (TensorProto.FLOAT, [len(WORDS), WIDTH])  # ...nor its table
    # only the weight is int8, with one scale and one zero point per output channel: the
    # per-channel quantiser of the installed onnxruntime (quantization/base_quantizer.py,
    # quantize_weight_per_channel) stores the zero points in the weight's own int8 type
    int8 = {name: dims for name, (kind, dims) in kinds.items() if kind == TensorProto.INT8}
    assert sorted(int8.values(), key=len) == [[HIDDEN], [WIDTH, HIDDEN]]
    scales = [dims for name, (kind, dims) in kinds.items()
              if kind == TensorProto.FLOAT and name.endswith("_scale")]
    assert scales == [[HIDDEN]]  # one scale per output channel
    values = {init.name: onnx.numpy_helper.to_array(init)
              for init in quantised.graph.initializer}
    zero_point = next(values[name] for name, dims in int8.items() if dims == [HIDDEN])
    assert not zero_point.any()  # signed int8 weights are quantised symmetrically
    # reference: numpy; each column dequantised (int8 times its scale) is the float weight
    # to within half a step of that column's scale
    quantised_weight = next(values[name] for name, dims in int8.items() if dims != [HIDDEN])
    scale = next(values[name] for name in values if name.endswith("_scale"))
    assert (np.abs(quantised_weight * scale - weight) <= scale / 2 + 1e-7).all()

    vectors = embedder.encode(TEXTS)
    # reference: the float32 model in plain numpy (rows looked up, times the weight,
    # mean over tokens, unit length)
    expected = _unit(np.stack([(table[[WORDS.index(w) for w in t.split()]] @ weight).mean(0)
                               for t in TEXTS]))
    cosines = (vectors * expected).sum(axis=1)
    assert cosines.min() > 0.995
    assert np.abs(vectors - expected).max() > 1e-6  # quantised, not the float graph
    np.testing.assert_allclose(np.linalg.norm(vectors, axis=1), 1.0, rtol=1e-5)


def test_int8_graph_is_made_once_and_atomically(tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    from codeseek.tiers import INT8_NOTICE

    tiny_transformer(tmp_path / "model", tmp_path / "cache")
    Int8Embedder(tmp_path / "model", "tiny", tmp_path / "cache")
    assert capsys.readouterr().err == INT8_NOTICE + "\n"  # one line, the first time
    graph = int8_path(tmp_path / "cache", "tiny")
    made = graph.stat().st_mtime_ns
    again = Int8Embedder(tmp_path / "model", "tiny", tmp_path / "cache")
    assert graph.stat().st_mtime_ns == made  # cached, not quantised again
    assert capsys.readouterr().err == ""  # and nothing said
    assert again.encode(["dock"]).shape == (1, HIDDEN)
    assert sorted(p.name for p in graph.parent.iterdir()) == ["model.int8.onnx", "model.onnx"]


def test_a_failed_quantisation_leaves_no_graph(tmp_path: Path) -> None:
    tiny_transformer(tmp_path / "model", tmp_path / "cache")
    onnx_path(tmp_path / "cache", "tiny").write_bytes(b"not a graph")
    with pytest.raises(ModelUnavailable, match="int8"):
        Int8Embedder(tmp_path / "model", "tiny", tmp_path / "cache")
    assert [p.name for p in onnx_path(tmp_path / "cache", "tiny").parent.iterdir()] == [
        "model.onnx"]  # no int8 graph, no temp file


def _tiny_static(folder: Path, cache_dir: Path) -> np.ndarray:
    """A tiny static model saved where the distilled one would go; returns its rows."""
    from model2vec import StaticModel

    folder.mkdir(parents=True)
    (folder / "config.json").write_text("{}", encoding="utf-8")
    rows = np.random.default_rng(3).normal(size=(len(WORDS), 16)).astype(np.float32)
    model = StaticModel(vectors=rows, tokenizer=_tokenizer(folder), normalize=True)
    model.save_pretrained(static_dir(cache_dir, "tiny"))
    return rows


def test_static_tier_averages_token_rows(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    pytest.importorskip("model2vec")
    import codeseek.tiers as tiers

    rows = _tiny_static(tmp_path / "model", tmp_path / "cache")

    def no_distilling(*args: object, **kwargs: object) -> None:
        raise AssertionError("the cached static model must be used")

    monkeypatch.setattr(tiers, "distil_static", no_distilling)
    embedder = StaticEmbedder(tmp_path / "model", "tiny", tmp_path / "cache")
    assert capsys.readouterr().err == ""  # cached: no notice
    assert embedder.model_id.endswith("+static256") and embedder.dim == 16
    texts = [*TEXTS, "fare unheard"]
    vectors = embedder.encode(texts)
    # reference: numpy mean of the known words' rows (unknown words dropped), unit length
    expected = _unit(np.stack([rows[[WORDS.index(w) for w in t.split() if w in WORDS]].mean(0)
                               for t in texts]))
    assert vectors.dtype == np.float32
    np.testing.assert_allclose(vectors, expected, rtol=1e-5, atol=1e-6)
    assert embedder.encode([]).shape == (0, 16)


def test_a_failed_distillation_leaves_nothing_behind(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        capsys: pytest.CaptureFixture[str]) -> None:
    import types

    class HalfSaved:
        def save_pretrained(self, path: Path) -> None:
            Path(path).mkdir(parents=True)
            (Path(path) / "model.safetensors").write_bytes(b"half")
            raise OSError("disk full")

    # a stand-in for model2vec.distill (the real one imports torch: seconds)
    fake = types.ModuleType("model2vec.distill")
    fake.distill = lambda **kwargs: HalfSaved()  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, "model2vec.distill", fake)
    (tmp_path / "model").mkdir()
    (tmp_path / "model" / "config.json").write_text("{}", encoding="utf-8")
    with pytest.raises(ModelUnavailable, match="disk full"):
        StaticEmbedder(tmp_path / "model", "tiny", tmp_path / "cache")
    from codeseek.tiers import STATIC_NOTICE

    assert capsys.readouterr().err == STATIC_NOTICE + "\n"  # said before the long step
    assert list((tmp_path / "cache" / "static").iterdir()) == []


def test_tier_setting_from_option_environment_and_file(tmp_path: Path) -> None:
    assert load_settings(tmp_path).tier is None
    assert load_settings(tmp_path, tier="int8").tier == "int8"
    assert load_settings(tmp_path, env={"CODESEEK_TIER": "static"}).tier == "static"
    (tmp_path / "codeseek.toml").write_text('tier = "int8"\n', encoding="utf-8")
    assert load_settings(tmp_path, env={}).tier == "int8"
    assert load_settings(tmp_path, env={}, tier="full").tier == "full"
    (tmp_path / "codeseek.toml").write_text('tier = "tiny"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match=r"codeseek.toml: tier: unknown tier 'tiny'"):
        load_settings(tmp_path, env={})
    with pytest.raises(ConfigError, match="--tier: unknown tier 'fp16'"):
        load_settings(tmp_path, env={}, tier="fp16")


def test_an_index_keeps_its_tier_and_refuses_another(sample_copy: Path) -> None:
    with open_index(sample_copy, create=True, backend="fake", tier="static") as index:
        summary = index.update()
        assert index.status().tier == "static"
        hits = index.search("refund a rider")
        assert hits and {hit.tier for hit in hits} == {"static"}
    with open_index(sample_copy, backend="fake") as index:  # no tier named: the index's own
        assert index.search("refund a rider")[0].tier == "static"
    with open_index(sample_copy, backend="fake", tier="full") as index, \
            pytest.raises(ModelMismatch, match="static tier, not the full tier"):
        index.search("refund a rider")
    with open_index(sample_copy, backend="fake", tier="int8") as index:
        again = index.update()  # another tier: every vector is made anew, as for a model
        assert again.embedded == summary.embedded > 0
        assert index.status().tier == "int8"
        assert {hit.tier for hit in index.search("refund a rider")} == {"int8"}


def test_the_ui_embeds_queries_with_the_index_own_tier(sample_copy: Path) -> None:
    from codeseek.tui.backend import LocalIndexer

    with open_index(sample_copy, create=True, backend="fake", tier="int8") as index:
        index.update()
    builder = LocalIndexer(sample_copy, backend="fake")  # no tier named anywhere
    with builder.open_searcher() as searcher:
        assert {hit.tier for hit in searcher.search("refund a rider")} == {"int8"}
    assert builder.embedder.model_id.endswith("+int8")


def test_a_tier_from_the_environment_is_named_in_the_mismatch(
        sample_copy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    with open_index(sample_copy, create=True, backend="fake") as index:
        index.update()
    monkeypatch.setenv("CODESEEK_TIER", "static")
    with open_index(sample_copy, backend="fake") as index, pytest.raises(
            ModelMismatch, match=r"full tier, not the static tier asked for \(--tier, "
                                 r"CODESEEK_TIER or codeseek.toml `tier`\).*ask for the "
                                 r"full tier$"):
        index.search("refund a rider")


def test_tier_is_a_new_json_field_and_changes_no_other(sample_copy: Path) -> None:
    from dataclasses import replace

    with open_index(sample_copy, create=True, backend="fake") as index:
        index.update()
        hit = index.search("refund a rider")[0]
    assert hit.tier == "full"
    record = hit.to_json()
    assert record["tier"] == "full"
    without = replace(hit, tier=None).to_json()
    assert "tier" not in without
    assert {k: v for k, v in record.items() if k != "tier"} == without
    assert SearchHit(**{**hit.__dict__}).tier == "full"  # what the daemon's client rebuilds


def test_cli_tier_option(sample_copy: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from test_cli import run_cli

    from codeseek.cli import main

    code, _, err = run_cli("index", str(sample_copy), "--backend", "fake", "--tier", "int8",
                           "-q")
    assert code == 0, err
    code, out, err = run_cli("search", "refund a rider", "--repo", str(sample_copy),
                             "--backend", "fake", "--json", "-k", "3")
    assert code == 0, err
    assert [json.loads(line)["tier"] for line in out.splitlines()] == ["int8"] * 3
    code, out, err = run_cli("search", "refund a rider", "--repo", str(sample_copy),
                             "--backend", "fake", "--tier", "static")
    assert code == 1 and out == ""
    assert err.count("\n") == 1 and err.startswith("error: the index holds vectors of the "
                                                   "int8 tier, not the static tier")
    code, out, _ = run_cli("status", str(sample_copy))
    assert code == 0 and "\ntier         int8\n" in out
    code, out, _ = run_cli("status", str(sample_copy), "--json")
    assert code == 0 and json.loads(out)["tier"] == "int8"
    with pytest.raises(SystemExit) as stop:  # argparse's own usage error
        main(["index", str(sample_copy), "--tier", "fp16"])
    assert stop.value.code == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert err.splitlines()[-1] == ("codeseek index: error: argument --tier: invalid choice: "
                                    "'fp16' (choose from 'full', 'int8', 'static')")


# -- the real model ---------------------------------------------------------------------


@pytest.mark.model
def test_int8_of_the_packaged_model_stays_close_to_float32(tmp_path: Path) -> None:
    """The int8 tier of the packaged model against its float32 export, on real code."""
    import sysconfig

    from codeseek.embed import load_embedder
    from codeseek.outline import outline_path
    from codeseek.tiers import load_tier_embedder

    settings = load_settings(tmp_path)
    full = load_embedder(settings)
    int8 = load_tier_embedder(settings, "int8")
    assert int8.model_id == full.model_id + "+int8" and int8.dim == full.dim
    stdlib = Path(sysconfig.get_paths()["stdlib"])
    units = [u for name in ("shutil.py", "textwrap.py") for u in outline_path(stdlib / name)]
    texts = [u.embed_text() for u in units][:200]
    a, b = full.encode(texts), int8.encode(texts)
    cosines = (a * b).sum(axis=1)  # both unit length: cosine is the dot product (numpy)
    # issue 13 measured a mean of 0.9925 on 1,200 standard-library functions
    assert cosines.mean() > 0.98 and cosines.min() > 0.9
    onnx = pytest.importorskip("onnx")
    graph = onnx.load(str(int8_path(settings.cache_dir, full.model_id.split("@")[1])))
    floats = {init.name for init in graph.graph.initializer if init.data_type == 1}
    assert any("word_embeddings" in name for name in floats)  # the table stays float


@pytest.mark.model
def test_static_tier_distilled_from_the_packaged_model(tmp_path: Path) -> None:
    from codeseek.tiers import load_tier_embedder

    settings = load_settings(tmp_path)
    static = load_tier_embedder(settings, "static")
    assert static.dim == 256 and static.model_id.endswith("+static256")
    vectors = static.encode(["copy a folder with everything under it",
                             "def copytree(src, dst): ...", "parse a date"])
    np.testing.assert_allclose(np.linalg.norm(vectors, axis=1), 1.0, rtol=1e-5)
    # the question is nearer the function that does it than an unrelated one
    assert vectors[0] @ vectors[1] > vectors[0] @ vectors[2]
