"""Embedding tiers: the same packaged model at three costs.

* ``full``: the model as exported to ONNX (float32), :class:`~codeseek.embed.OnnxEmbedder`.
* ``int8``: that export with the weights of its MatMul nodes quantised to int8, one
  scale per output channel, by onnxruntime's dynamic quantisation; the token
  embedding table (a Gather) stays float32, since quantising it costs far more
  accuracy than it saves time. Activations are quantised per batch at run time.
* ``static``: a static model distilled from the packaged one with model2vec
  (``distill``: each token of the vocabulary embedded once, PCA to 256
  dimensions): a text's vector is the mean of its tokens' rows, no network at all.

Each derived model is made locally from the packaged one on first need and kept
in the user's cache folder beside the ONNX export, under the model's fingerprint
and the recipe's tag, written atomically (a temp file or folder beside the
target, then a rename), so an interrupted or concurrent build never leaves a
half-written model that a later run would trust.

A tier's vectors live in their own space: the model id of a tier is the model's
id plus the recipe's tag (``...@<fingerprint>+int8``), so an index records the
tier its vectors were made with, and vectors of two tiers are never compared.
"""

from __future__ import annotations

import logging
import os
import secrets
import shutil
import sys
from collections.abc import Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from codeseek.config import DEFAULT_TIER, TIERS, Settings
from codeseek.embed import (
    Embedder,
    FakeEmbedder,
    OnnxEmbedder,
    Progress,
    _check_cache_folder,
    _model_name,
    _normalise,
    _offline,
    export_once,
    load_embedder,
    model_fingerprint,
    onnx_path,
    resolve_model_dir,
)
from codeseek.errors import ConfigError, ModelUnavailable
from codeseek.safefs import fsync_dir, replacing

__all__ = ["DEFAULT_TIER", "TIERS", "Int8Embedder", "StaticEmbedder", "load_tier_embedder",
           "tier_model_id", "tier_of"]

# the recipe of each derived tier, in its model id and cache names: change a recipe and
# bump its tag, so vectors made the old way are never taken for the new one's
TAGS = {"int8": "int8", "static": "static256"}
STATIC_DIMS = 256
INT8_NOTICE = "codeseek: quantising the embedding model to int8 (once, about 10 s)"
STATIC_NOTICE = ("codeseek: distilling the static embedding tier from the model "
                 "(once, about 2 min)")


def tier_model_id(model_id: str, tier: str) -> str:
    """The model id of ``tier`` of the model whose full id is ``model_id``."""
    return model_id if tier == "full" else f"{model_id}+{TAGS[tier]}"


def tier_of(model_id: str | None) -> str | None:
    """The tier a model id names (None for None)."""
    if model_id is None:
        return None
    _, plus, tag = model_id.rpartition("+")
    if plus:
        for tier, known in TAGS.items():
            if tag == known:
                return tier
    return "full"


def check_tier(tier: str) -> str:
    """``tier`` if codeseek knows it, else a clear error."""
    if tier not in TIERS:
        raise ConfigError(f"unknown tier {tier!r}; choose one of: {', '.join(TIERS)}")
    return tier


# -- int8 ----------------------------------------------------------------------------


def int8_path(cache_dir: Path, fingerprint: str) -> Path:
    """Where the int8 graph of a model lives (beside its ONNX export)."""
    return onnx_path(cache_dir, fingerprint).with_name(f"model.{TAGS['int8']}.onnx")


@contextmanager
def _quiet(name: str) -> Any:
    """Silence a library logger's warnings (onnxruntime's "consider pre-processing")."""
    logger = logging.getLogger(name)
    root = logging.getLogger()
    levels = logger.level, root.level
    logger.setLevel(logging.ERROR)
    root.setLevel(logging.ERROR)
    try:
        yield
    finally:
        logger.setLevel(levels[0])
        root.setLevel(levels[1])


def quantise_int8(source: Path, target: Path) -> None:
    """Write the int8 version of the float32 graph ``source`` to ``target`` atomically:
    dynamic quantisation of MatMul weights only, per channel, signed int8 weights."""
    try:
        from onnxruntime.quantization import QuantType, quantize_dynamic
    except ImportError as exc:
        raise ModelUnavailable("the int8 tier needs onnxruntime's quantisation tools "
                               "(the onnx package); run scripts/setup.sh") from exc
    target.parent.mkdir(parents=True, exist_ok=True)
    try:
        with replacing(target) as pending, _quiet("onnxruntime"):
            quantize_dynamic(
                model_input=source, model_output=pending.path,
                op_types_to_quantize=["MatMul"],  # not Gather: the embedding table stays
                per_channel=True, weight_type=QuantType.QInt8,
                extra_options={"MatMulConstBOnly": True},  # weights, not activations x
            )
    except Exception as exc:
        raise ModelUnavailable(f"quantising {source} to int8 failed: {exc}") from exc


class Int8Embedder(OnnxEmbedder):
    """The int8 tier: the quantised ONNX graph on onnxruntime."""

    tier = "int8"

    def __init__(self, folder: Path, fingerprint: str, cache_dir: Path,
                 batch_size: int = 32) -> None:
        graph = int8_path(cache_dir, fingerprint)
        if not graph.exists():
            full = onnx_path(cache_dir, fingerprint)
            export_once(folder, full)
            print(INT8_NOTICE, file=sys.stderr, flush=True)
            quantise_int8(full, graph)
        super().__init__(folder, fingerprint, cache_dir, batch_size, graph=graph)
        self.model_id = tier_model_id(self.model_id, self.tier)


# -- static ----------------------------------------------------------------------------


def static_dir(cache_dir: Path, fingerprint: str) -> Path:
    """Where the static model distilled from a model lives."""
    return cache_dir / "static" / f"{fingerprint}-{TAGS['static']}"


def distil_static(folder: Path, target: Path, pca_dims: int = STATIC_DIMS) -> None:
    """Distil a static model from the sentence-transformers ``folder`` into the folder
    ``target`` (model2vec ``distill``, from the local folder only), atomically: it is
    written to a temp folder beside the target, then renamed into place."""
    _offline()
    try:
        from model2vec.distill import distill
    except ImportError as exc:
        raise ModelUnavailable("the static tier needs model2vec; install codeseek's "
                               "'static' extra (scripts/setup.sh does)") from exc
    target.parent.mkdir(parents=True, exist_ok=True)
    temp = target.parent / f".tmp-{secrets.token_hex(6)}-{target.name}"
    try:
        with _quiet("model2vec"):
            model = distill(model_name=str(folder), pca_dims=pca_dims, device="cpu")
            model.save_pretrained(temp)
        for path in temp.rglob("*"):
            if path.is_file():
                with path.open("rb+") as handle:
                    os.fsync(handle.fileno())
        fsync_dir(temp)
        try:
            os.rename(temp, target)  # a folder's rename: whole or absent
        except OSError:
            if not (target / "model.safetensors").is_file():
                raise
            # another process finished first: its model is the same recipe's
        fsync_dir(target.parent)
    except ModelUnavailable:
        raise
    except Exception as exc:
        raise ModelUnavailable(f"distilling the static tier from {folder} failed: "
                               f"{exc}") from exc
    finally:
        shutil.rmtree(temp, ignore_errors=True)


class StaticEmbedder:
    """The static tier: a model2vec static model (token rows averaged), numpy only."""

    tier = "static"

    def __init__(self, folder: Path, fingerprint: str, cache_dir: Path,
                 max_length: int = 512) -> None:
        target = static_dir(cache_dir, fingerprint)
        if not (target / "model.safetensors").is_file():
            print(STATIC_NOTICE, file=sys.stderr, flush=True)
            distil_static(folder, target)
        try:
            from model2vec import StaticModel

            # a local folder that exists: model2vec reads it and never asks a hub
            self._model = StaticModel.from_pretrained(target, normalize=True)
        except Exception as exc:
            raise ModelUnavailable(f"cannot load the static tier {target}: {exc}; delete "
                                   "it and it will be distilled again") from exc
        self.dim = int(self._model.dim)
        self.model_id = tier_model_id(f"{_model_name(folder)}@{fingerprint}", self.tier)
        self.max_length = max_length

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        if not texts:
            return np.zeros((0, self.dim), dtype=np.float32)
        vectors = self._model.encode(list(texts), max_length=self.max_length,
                                     use_multiprocessing=False)
        if progress:
            progress(len(texts))
        return _normalise(np.asarray(vectors, dtype=np.float32))


# -- stand-ins for tests ------------------------------------------------------------------


class FakeTierEmbedder(FakeEmbedder):
    """The fake backend's stand-in for a derived tier: the fake's vectors, rounded to a
    coarse grid for ``int8`` and made in half the dimensions for ``static``, so that each
    tier's vectors differ from the full one's as a real tier's do."""

    def __init__(self, tier: str) -> None:
        super().__init__(dim=128 if tier == "static" else 256)
        self.tier = tier
        self.model_id = tier_model_id(self.model_id, tier)

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        vectors = super().encode(texts, progress)
        if self.tier == "int8":
            vectors = _normalise(np.round(vectors * 16) / 16)
        return vectors


# -- choosing -------------------------------------------------------------------------------


def load_tier_embedder(settings: Settings, tier: str | None = None) -> Embedder:
    """The embedder of ``tier`` (default: the settings' tier, else DEFAULT_TIER)."""
    tier = check_tier(tier or settings.tier or DEFAULT_TIER)
    if tier == "full":
        return load_embedder(settings)
    if settings.backend == "fake":
        return FakeTierEmbedder(tier)
    if tier == "int8" and settings.backend != "onnx":
        raise ConfigError(f"the int8 tier runs on the onnx backend, not {settings.backend}; "
                          "use --backend onnx or another tier")
    folder = resolve_model_dir(settings.model)
    fingerprint = model_fingerprint(folder, settings.cache_dir)
    if tier == "int8":
        if not int8_path(settings.cache_dir, fingerprint).exists():
            _check_cache_folder(onnx_path(settings.cache_dir, fingerprint).parent,
                                settings.cache_dir)
        return Int8Embedder(folder, fingerprint, settings.cache_dir, settings.batch_size)
    if not static_dir(settings.cache_dir, fingerprint).exists():
        _check_cache_folder(static_dir(settings.cache_dir, fingerprint).parent,
                            settings.cache_dir)
    return StaticEmbedder(folder, fingerprint, settings.cache_dir)
