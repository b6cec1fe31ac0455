"""The query-side adapter: a linear map applied to query vectors before dense search.

``codeseek tune`` (:mod:`codeseek.tune`) learns the map on the repository's own
(doc summary, code) pairs. Only the query side changes, so the vectors in the
store and the HNSW index stay valid. The adapter lives in the index folder as
one ``adapter.npz`` (the matrix, and a JSON header: model, split, fusion and
the training report); ``adapter.json`` beside it is a readable copy of that
header. Applying it is one matrix product in numpy: the search path never
imports torch.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from codeseek import safefs
from codeseek.errors import CodeseekError, IndexCorrupt, IndexWriteError
from codeseek.store import unlink_all

ADAPTER_NAME = "adapter.npz"
REPORT_NAME = "adapter.json"


@dataclass(frozen=True, eq=False)
class QueryAdapter:
    """A linear map of query vectors, rows re-normalised to unit length.

    Attributes:
        matrix: a (dim, dim) float32 array; a query row ``q`` becomes ``q @ matrix``.
        model_id: the embedding model the map was learned for.
        header: what the adapter file records beside the matrix (split,
            fusion, training report); JSON-ready.
    """

    matrix: np.ndarray
    model_id: str
    header: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def identity(cls, dim: int, model_id: str) -> QueryAdapter:
        """The map that changes nothing."""
        return cls(np.eye(dim, dtype=np.float32), model_id)

    @property
    def dim(self) -> int:
        """The vector dimension."""
        return int(self.matrix.shape[0])

    def apply(self, queries: np.ndarray) -> np.ndarray:
        """The mapped query rows, each of unit length."""
        mapped = np.asarray(queries, dtype=np.float32) @ self.matrix
        norms = np.linalg.norm(mapped, axis=1, keepdims=True)
        norms[norms == 0] = 1.0
        return (mapped / norms).astype(np.float32)

    def with_header(self, header: dict[str, Any]) -> QueryAdapter:
        """The same map with another header."""
        return QueryAdapter(self.matrix, self.model_id, header)


def save_adapter(index_dir: Path, adapter: QueryAdapter) -> None:
    """Write ``adapter.npz`` atomically, then its readable copy ``adapter.json``."""
    header = {"model_id": adapter.model_id, "dim": adapter.dim, **adapter.header}
    text = json.dumps(header, indent=2, sort_keys=True)
    target = index_dir / ADAPTER_NAME
    try:
        with safefs.replacing(target) as pending:
            np.savez(pending.file, matrix=adapter.matrix.astype(np.float32),
                     header=np.array(text))
        safefs.write_atomic(index_dir / REPORT_NAME, (text + "\n").encode("utf-8"))
    except OSError as exc:
        raise IndexWriteError(f"{target}: cannot save the adapter: {exc}") from exc


def load_adapter(index_dir: Path, model_id: str) -> QueryAdapter | None:
    """The index's adapter for this model; None when there is none (or it is another model's)."""
    path = index_dir / ADAPTER_NAME
    if not safefs.is_regular_file(path):  # missing, or a link: never followed
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            matrix = np.asarray(data["matrix"], dtype=np.float32)
            header = json.loads(str(data["header"]))
    except (OSError, ValueError, KeyError) as exc:
        raise IndexCorrupt(f"{path}: the adapter cannot be read ({exc}); run `codeseek tune` "
                           "again or remove it with `codeseek tune --remove`") from exc
    if not isinstance(header, dict) or matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1]:
        raise IndexCorrupt(f"{path}: the adapter is malformed; run `codeseek tune` again or "
                           "remove it with `codeseek tune --remove`")
    if header.get("model_id") != model_id:
        return None  # made for another model: the plain model serves
    return QueryAdapter(matrix, model_id, {k: v for k, v in header.items()
                                           if k not in ("model_id", "dim")})


def adapter_summary(index_dir: Path) -> dict[str, Any] | None:
    """What ``status`` says of the index's adapter (None without one); reads only the
    readable header copy, never the matrix.

    Keys: ``model_id``, ``saved_at`` (seconds since the epoch), ``held_out`` and
    ``served_mrr_before``/``served_mrr_after`` (the held-out check that kept it),
    ``batch_size``, ``pairs``, and ``penalty``/``mix`` (the regularisation chosen);
    those the header lacks are None.
    """
    path = index_dir / ADAPTER_NAME
    if not safefs.is_regular_file(path):
        return None
    saved_at = path.stat().st_mtime
    try:
        header = json.loads(safefs.read_bytes(index_dir / REPORT_NAME).decode("utf-8"))
    except (OSError, ValueError, CodeseekError):
        header = {}
    header = header if isinstance(header, dict) else {}
    report = _mapping(header.get("report"))
    training = _mapping(report.get("training"))
    choice = _mapping(report.get("choice"))
    return {"model_id": header.get("model_id"), "saved_at": saved_at,
            "held_out": report.get("held_out"),
            "served_mrr_before": report.get("served_mrr_before"),
            "served_mrr_after": report.get("served_mrr_after"),
            "batch_size": training.get("batch_size"), "pairs": training.get("pairs"),
            "penalty": choice.get("penalty"), "mix": choice.get("mix")}


def _mapping(value: object) -> dict[str, Any]:
    return value if isinstance(value, dict) else {}


def remove_adapter(index_dir: Path) -> bool:
    """Delete the adapter files; whether there was an adapter."""
    existed = (index_dir / ADAPTER_NAME).exists()
    unlink_all(index_dir, (ADAPTER_NAME, REPORT_NAME))
    return existed
