"""Ranks and metrics: recall@k, MRR and percentile-bootstrap intervals, one result per method."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from codeseek.evaluate.documents import Pool

CUTOFFS = (1, 5, 10)
BOOTSTRAP_SAMPLES = 1000


def rank_of_true(scores: np.ndarray, true_index: int) -> int:
    """The true item's rank, ties counted against it (1 + the items scored at least as high)."""
    return int(np.count_nonzero(scores >= scores[true_index]))


def rank_in(ranking: Sequence[int] | np.ndarray, item: int) -> int:
    """The 1-based rank of an item in a ranking, 0 when it is absent."""
    found = np.flatnonzero(np.asarray(ranking) == item)
    return int(found[0]) + 1 if len(found) else 0


def reciprocal_ranks(ranks: np.ndarray) -> np.ndarray:
    """1 / rank, and 0 for an absent item (rank 0)."""
    ranks = np.asarray(ranks, dtype=np.float64)
    return np.divide(1.0, ranks, out=np.zeros_like(ranks), where=ranks > 0)


def mean_reciprocal_rank(ranks: np.ndarray) -> float:
    """MRR over cases."""
    return float(reciprocal_ranks(ranks).mean()) if len(ranks) else 0.0


def recall_at(ranks: np.ndarray, k: int) -> float:
    """The share of cases whose true item is in the top k."""
    ranks = np.asarray(ranks)
    return float(((ranks > 0) & (ranks <= k)).mean()) if len(ranks) else 0.0


def metric_rows(ranks: np.ndarray) -> dict[str, np.ndarray]:
    """Per-case values whose means are the metrics (recall@k and MRR)."""
    ranks = np.asarray(ranks)
    rows = {f"recall@{k}": ((ranks > 0) & (ranks <= k)).astype(np.float64) for k in CUTOFFS}
    rows["mrr"] = reciprocal_ranks(ranks)
    return rows


def bootstrap_ci(values: np.ndarray, seed: int,
                 samples: int = BOOTSTRAP_SAMPLES) -> tuple[float, float]:
    """A percentile-bootstrap 95% interval of the mean (cases resampled with replacement)."""
    values = np.asarray(values, dtype=np.float64)
    if len(values) == 0:
        return (0.0, 0.0)
    rng = np.random.default_rng(seed)
    means = np.empty(samples)
    for start in range(0, samples, 100):
        count = min(100, samples - start)
        picks = rng.integers(0, len(values), size=(count, len(values)))
        means[start : start + count] = values[picks].mean(axis=1)
    low, high = np.percentile(means, [2.5, 97.5])
    return float(low), float(high)


def mrr_difference(first: Sequence[int], second: Sequence[int], seed: int,
                   samples: int = BOOTSTRAP_SAMPLES) -> tuple[float, tuple[float, float]]:
    """How far the first method's MRR is above the second's on the same cases, and a
    percentile-bootstrap 95% interval of that difference (cases resampled in pairs)."""
    differences = (reciprocal_ranks(np.asarray(first, dtype=np.int64))
                   - reciprocal_ranks(np.asarray(second, dtype=np.int64)))
    mean = float(differences.mean()) if len(differences) else 0.0
    return mean, bootstrap_ci(differences, seed, samples)


@dataclass(frozen=True)
class MethodResult:
    """One method under one protocol.

    Attributes:
        method: ``lexical``, ``dense``, ``dense-ann`` or ``served``.
        pool: the pool size, or ``"all"`` for the whole index.
        pool_size: how many units each query competes with (the whole index's size for "all").
        n: held-out queries measured.
        metrics: ``recall@1``, ``recall@5``, ``recall@10`` and ``mrr``.
        ci95: a bootstrap 95% interval for each metric.
        ranks: each query's rank of its unit (0: not among the candidates).
    """

    method: str
    pool: Pool
    pool_size: int
    n: int
    metrics: dict[str, float]
    ci95: dict[str, tuple[float, float]]
    ranks: tuple[int, ...] = field(repr=False)

    @property
    def mrr(self) -> float:
        """Mean reciprocal rank."""
        return self.metrics["mrr"]

    def to_json(self) -> dict[str, object]:
        """The JSON record of this result."""
        record: dict[str, object] = {"method": self.method, "pool": self.pool,
                                     "pool_size": self.pool_size, "n": self.n}
        record.update({name: round(value, 4) for name, value in self.metrics.items()})
        record["ci95"] = {name: [round(low, 4), round(high, 4)]
                          for name, (low, high) in self.ci95.items()}
        return record


def summarise(method: str, pool: Pool, pool_size: int, ranks: np.ndarray,
              seed: int) -> MethodResult:
    """Metrics and bootstrap intervals of one method's ranks."""
    rows = metric_rows(ranks)
    metrics = {name: float(values.mean()) for name, values in rows.items()}
    ci = {name: bootstrap_ci(values, seed) for name, values in rows.items()}
    return MethodResult(method, pool, pool_size, len(ranks), metrics, ci,
                        tuple(int(r) for r in ranks))
