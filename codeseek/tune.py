"""Repository adaptation: a query-side linear map learned with in-batch negatives.

The training split's (doc summary, code) pairs teach a map ``W`` (initialised
to the identity, trained with Adam in numpy) so that ``normalise(q @ W)``
lands near the vector of the code the doc describes. The loss is InfoNCE
(van den Oord et al. 2018, as used for retrieval with in-batch negatives):
in a batch of N pairs, each query's own document is the positive and the
N - 1 others are negatives,

    loss = mean_i [ -log( exp(s_ii / t) / sum_j exp(s_ij / t) ) ],  s_ij = cos(q_i W, d_j).

Document vectors are frozen and computed once, so a batch of thousands costs
little on a CPU. Two pairs that share a doc or a body never meet in a batch
(each would be the other's false negative). A small share of the training
pairs is set aside to choose when to stop; the held-out pairs decide whether
the adapter is kept at all. Applying the map is one matrix product
(:mod:`codeseek.adapter`); neither training nor search needs torch.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from codeseek.adapter import QueryAdapter
from codeseek.embed import Embedder
from codeseek.errors import TooFewExamples
from codeseek.evaluate import (
    WHOLE,
    Case,
    CaseSignals,
    EvalReport,
    Pool,
    Prepared,
    Progress,
    Split,
    VectorCache,
    body_key,
    build_report,
    choose_fusion,
    collect_signals,
    doc_key,
    mean_reciprocal_rank,
    prepare,
    query_matrix,
    rank_of_true,
)
from codeseek.search import DEFAULT_FUSION, Fusion
from codeseek.units import CodeUnit

DEFAULT_BATCH_SIZE = 256
TEMPERATURE = 0.05
LEARNING_RATE = 1e-3
MAX_EPOCHS = 200
PATIENCE = 8
IDENTITY_DECAY = 1e-4
VALIDATION_SHARE = 0.1
MIN_TRAINING_PAIRS = 32
MIN_FUSION_PAIRS = 100


@dataclass(frozen=True)
class TrainSettings:
    """How the adapter is trained.

    Attributes:
        batch_size: pairs per batch (each query sees batch_size - 1 negatives).
        temperature: the softmax temperature of InfoNCE.
        learning_rate: Adam's step size.
        max_epochs: the most passes over the training pairs.
        patience: stop after this many epochs without a better validation MRR.
        identity_decay: weight of ``||W - I||^2`` in the loss (keeps W near the identity).
        seed: shuffling and batching.
    """

    batch_size: int = DEFAULT_BATCH_SIZE
    temperature: float = TEMPERATURE
    learning_rate: float = LEARNING_RATE
    max_epochs: int = MAX_EPOCHS
    patience: int = PATIENCE
    identity_decay: float = IDENTITY_DECAY
    seed: int = 0


@dataclass(frozen=True)
class TrainingLog:
    """What one training run did.

    Attributes:
        pairs: training pairs used for the gradient.
        validation_pairs: training pairs set aside to choose the stopping epoch.
        batch_size: pairs per batch.
        epochs: epochs run.
        best_epoch: the epoch whose map was kept (0: the identity).
        losses: mean training loss per epoch.
        validation_mrr: validation MRR (whole corpus, dense) after each epoch; [0] is the identity.
        seconds: wall time.
    """

    pairs: int
    validation_pairs: int
    batch_size: int
    epochs: int
    best_epoch: int
    losses: tuple[float, ...]
    validation_mrr: tuple[float, ...]
    seconds: float

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"pairs": self.pairs, "validation_pairs": self.validation_pairs,
                "batch_size": self.batch_size, "epochs": self.epochs,
                "best_epoch": self.best_epoch,
                "losses": [round(x, 5) for x in self.losses],
                "validation_mrr": [round(x, 5) for x in self.validation_mrr],
                "seconds": round(self.seconds, 2)}


# -- the loss and the batches -----------------------------------------------------------


def _log_softmax(logits: np.ndarray) -> np.ndarray:
    shifted = logits - logits.max(axis=1, keepdims=True)
    return shifted - np.log(np.exp(shifted).sum(axis=1, keepdims=True))


def info_nce(queries: np.ndarray, documents: np.ndarray, temperature: float) -> float:
    """InfoNCE with in-batch negatives: row i's positive is document i."""
    logits = np.asarray(queries, np.float64) @ np.asarray(documents, np.float64).T / temperature
    return float(-np.mean(np.diag(_log_softmax(logits))))


def adapted(queries: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """normalise(queries @ matrix): rows of unit length."""
    mapped = queries @ matrix
    norms = np.linalg.norm(mapped, axis=1, keepdims=True)
    return mapped / np.where(norms == 0, 1.0, norms)


def loss_and_gradient(matrix: np.ndarray, queries: np.ndarray, documents: np.ndarray,
                      temperature: float) -> tuple[float, np.ndarray]:
    """InfoNCE of ``normalise(queries @ matrix)`` against ``documents``, and its gradient in W."""
    mapped = queries @ matrix
    norms = np.linalg.norm(mapped, axis=1, keepdims=True)
    norms = np.where(norms == 0, 1.0, norms)
    unit = mapped / norms
    logits = unit @ documents.T / temperature
    log_p = _log_softmax(logits)
    count = len(queries)
    # d loss / d logits = (softmax - identity) / count
    d_logits = np.exp(log_p)
    d_logits[np.arange(count), np.arange(count)] -= 1.0
    d_unit = (d_logits / count) @ documents / temperature
    # through the normalisation: (d_unit - unit * <d_unit, unit>) / norm
    d_mapped = (d_unit - unit * (d_unit * unit).sum(axis=1, keepdims=True)) / norms
    return float(-np.mean(np.diag(log_p))), queries.T @ d_mapped


class Adam:
    """The Adam update (Kingma and Ba 2015) for one parameter array."""

    def __init__(self, shape: tuple[int, ...], learning_rate: float, beta1: float = 0.9,
                 beta2: float = 0.999, eps: float = 1e-8) -> None:
        self.learning_rate, self.beta1, self.beta2, self.eps = learning_rate, beta1, beta2, eps
        self.first = np.zeros(shape)
        self.second = np.zeros(shape)
        self.steps = 0

    def step(self, parameter: np.ndarray, gradient: np.ndarray) -> None:
        """Update ``parameter`` in place."""
        self.steps += 1
        self.first = self.beta1 * self.first + (1 - self.beta1) * gradient
        self.second = self.beta2 * self.second + (1 - self.beta2) * gradient**2
        first = self.first / (1 - self.beta1**self.steps)
        second = self.second / (1 - self.beta2**self.steps)
        parameter -= self.learning_rate * first / (np.sqrt(second) + self.eps)


def make_batches(query_keys: Sequence[str], doc_keys: Sequence[str], size: int,
                 rng: np.random.Generator) -> list[np.ndarray]:
    """Shuffled batches of pair indices in which no two pairs share a query or document key.

    A pair that clashes with its batch waits for the next one; every pair is
    placed exactly once.
    """
    if size < 1:
        raise ValueError(f"batch size must be positive, not {size}")
    waiting = [int(i) for i in rng.permutation(len(query_keys))]
    batches: list[np.ndarray] = []
    while waiting:
        batch: list[int] = []
        seen_q: set[str] = set()
        seen_d: set[str] = set()
        later: list[int] = []
        for index in waiting:
            if len(batch) < size and query_keys[index] not in seen_q \
                    and doc_keys[index] not in seen_d:
                batch.append(index)
                seen_q.add(query_keys[index])
                seen_d.add(doc_keys[index])
            else:
                later.append(index)
        batches.append(np.array(batch, dtype=np.int64))
        waiting = later
    return batches


# -- training ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class TrainingData:
    """Frozen vectors of the training pairs, and the validation pairs beside them.

    Attributes:
        queries: (n, dim) query vectors of the pairs that train.
        documents: (n, dim) their documents' vectors.
        query_keys, doc_keys: pairs sharing a key never share a batch.
        validation_queries: (m, dim) query vectors set aside.
        validation_targets: each one's document position in ``corpus``.
        corpus: every document vector (validation ranks against all of them).
    """

    queries: np.ndarray
    documents: np.ndarray
    query_keys: tuple[str, ...]
    doc_keys: tuple[str, ...]
    validation_queries: np.ndarray
    validation_targets: np.ndarray
    corpus: np.ndarray = field(repr=False)


def validation_score(matrix: np.ndarray, data: TrainingData) -> tuple[float, float]:
    """(MRR, loss) of the validation queries over the whole corpus, queries mapped by W.

    The loss is the softmax cross-entropy of each query's document among all
    documents; it breaks ties between epochs of equal MRR.
    """
    if len(data.validation_queries) == 0:
        return 0.0, 0.0
    mapped = adapted(data.validation_queries.astype(np.float64), matrix)
    ranks: list[int] = []
    losses: list[float] = []
    for start in range(0, len(mapped), 256):
        logits = mapped[start : start + 256] @ data.corpus.T.astype(np.float64)
        targets = data.validation_targets[start : start + 256]
        rows = np.arange(len(targets))
        losses.extend((-_log_softmax(logits / TEMPERATURE)[rows, targets]).tolist())
        ranks.extend(rank_of_true(row, int(t)) for row, t in zip(logits, targets, strict=True))
    return mean_reciprocal_rank(np.array(ranks)), float(np.mean(losses))


def validation_mrr(matrix: np.ndarray, data: TrainingData) -> float:
    """Dense MRR of the validation queries over the whole corpus, queries mapped by W."""
    return validation_score(matrix, data)[0]


def train_adapter(data: TrainingData, settings: TrainSettings | None = None,
                  progress: Progress | None = None) -> tuple[np.ndarray, TrainingLog]:
    """Learn W by InfoNCE with in-batch negatives; keep the epoch best on validation."""
    settings = settings or TrainSettings()
    if settings.batch_size < 2:
        raise TooFewExamples(f"--batch-size must be at least 2, not {settings.batch_size}: a "
                             "batch of N pairs gives each query N - 1 negatives")
    started = time.perf_counter()
    dim = data.queries.shape[1]
    weight = np.eye(dim)
    identity = np.eye(dim)
    optimiser = Adam(weight.shape, settings.learning_rate)
    queries = data.queries.astype(np.float64)
    documents = data.documents.astype(np.float64)
    rng = np.random.default_rng(settings.seed)
    scores = [validation_score(weight, data)]
    best, best_epoch, epoch = weight.copy(), 0, 0
    losses: list[float] = []
    for epoch in range(1, settings.max_epochs + 1):
        total = 0.0
        for batch in make_batches(data.query_keys, data.doc_keys, settings.batch_size, rng):
            loss, gradient = loss_and_gradient(weight, queries[batch], documents[batch],
                                               settings.temperature)
            gradient += 2 * settings.identity_decay * (weight - identity)
            optimiser.step(weight, gradient)
            total += loss * len(batch)
        losses.append(total / max(1, len(queries)))
        scores.append(validation_score(weight, data))
        if progress:
            progress("train", epoch, settings.max_epochs)
        if (scores[-1][0], -scores[-1][1]) > (scores[best_epoch][0], -scores[best_epoch][1]):
            best, best_epoch = weight.copy(), epoch
        elif epoch - best_epoch >= settings.patience:
            break
    log = TrainingLog(len(queries), len(data.validation_queries), settings.batch_size, epoch,
                      best_epoch, tuple(losses), tuple(mrr for mrr, _ in scores),
                      time.perf_counter() - started)
    return best.astype(np.float32), log


def validation_split(prepared: Prepared, split: Split,
                     share: float = VALIDATION_SHARE) -> tuple[list[Case], list[Case]]:
    """The training pairs that fit W, and the (unique) ones set aside by hash to validate."""
    units = prepared.units
    fit: list[Case] = []
    aside: list[Case] = []
    for case in prepared.selection.training:
        if split.fraction(units[case.position], "validation") >= share:
            fit.append(case)
        elif case.unique:
            aside.append(case)
    return fit, aside


def training_data(prepared: Prepared, split: Split,
                  share: float = VALIDATION_SHARE) -> TrainingData:
    """The training pairs' frozen vectors, a hashed share set aside for validation."""
    fit, aside = validation_split(prepared, split, share)
    if len(fit) < MIN_TRAINING_PAIRS:
        raise TooFewExamples(
            f"only {len(fit)} training pairs (documented units outside the held-out share); "
            f"tuning needs at least {MIN_TRAINING_PAIRS}")
    units = prepared.units
    vectors = prepared.documents.vectors
    return TrainingData(
        queries=query_matrix(prepared, fit),
        documents=vectors[[c.position for c in fit]],
        query_keys=tuple(doc_key(c.query) for c in fit),
        doc_keys=tuple(body_key(units[c.position]) for c in fit),
        validation_queries=query_matrix(prepared, aside),
        validation_targets=np.array([c.position for c in aside], dtype=np.int64),
        corpus=vectors,
    )


# -- the whole tuning run -----------------------------------------------------------------


@dataclass(frozen=True)
class TuneReport:
    """The outcome of ``codeseek tune``.

    Attributes:
        before: the recall checks with the plain model.
        after: the same checks with the new adapter.
        log: the training run.
        decided_on: the protocol whose served MRR decided.
        kept: whether the adapter raised the held-out served MRR (and was saved).
        fusion_note: how the fusion served with the adapter was chosen.
        reweighted: the plain model with its fusion weight chosen the same way, on
            the same pairs (None when that is the served fusion). The adapter must
            beat it too: a better weight alone is not the adapter's doing.
    """

    before: EvalReport
    after: EvalReport
    log: TrainingLog
    decided_on: Pool
    kept: bool
    fusion_note: str = ""
    reweighted: EvalReport | None = None

    def served_mrr(self, report: EvalReport) -> float:
        """The served MRR of a report under the deciding protocol."""
        return served_mrr(report, self.decided_on)

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict (also the adapter file's training report)."""
        return {
            "kept": self.kept, "decided_on": self.decided_on,
            "served_mrr_before": round(self.served_mrr(self.before), 4),
            "served_mrr_after": round(self.served_mrr(self.after), 4),
            "training": self.log.to_json(), "split": self.before.split.to_json(),
            "fusion": self.after.fusion.to_json(), "fusion_note": self.fusion_note,
            "served_mrr_plain_reweighted": (None if self.reweighted is None else
                                            round(self.served_mrr(self.reweighted), 4)),
            "held_out": self.before.holdout,
            "before": [r.to_json() for r in self.before.results],
            "after": [r.to_json() for r in self.after.results],
        }

    def to_text(self) -> str:
        """What the command line prints."""
        where = "whole index" if self.decided_on == WHOLE else f"pool {self.decided_on}"
        before, after = self.served_mrr(self.before), self.served_mrr(self.after)
        verdict = ("kept: search uses it from now on" if self.kept else
                   "not kept: it did not raise the held-out MRR; search keeps the plain model")
        if not self.kept and after > before and self.reweighted is not None:
            verdict = (f"not kept: the plain model with its weight chosen the same way does "
                       f"as well ({self.served_mrr(self.reweighted):.3f}); search keeps the "
                       "plain model")
        log = self.log
        return "\n".join([
            f"trained a query adapter on {log.pairs} pairs ({log.validation_pairs} set aside "
            f"to choose the epoch), batch {log.batch_size}, {log.epochs} epochs "
            f"(best {log.best_epoch}), {log.seconds:.1f} s",
            f"served ranking with it: dense weight {self.after.fusion.dense_weight:g} "
            f"({self.fusion_note})",
            f"held-out served MRR ({self.before.holdout} docstrings, {where}): "
            f"{before:.3f} -> {after:.3f}",
            verdict,
        ])


def served_mrr(report: EvalReport, pool: Pool) -> float:
    """The served MRR of a report under one protocol (0 when it was not measured)."""
    result = report.result("served", pool)
    return 0.0 if result is None else result.mrr


def deciding_protocol(report: EvalReport) -> Pool:
    """The whole index: every held-out query is measured there."""
    return WHOLE if report.result("served", WHOLE) is not None else report.pools[0]


def held_out_signals(prepared: Prepared, adapter: QueryAdapter | None,
                     reuse: CaseSignals | None = None,
                     progress: Progress | None = None) -> CaseSignals:
    """Signals of the held-out pairs; the keyword side is reused when given."""
    cases: list[Case] = prepared.selection.held_out
    return collect_signals(cases, query_matrix(prepared, cases, adapter), prepared.documents,
                           prepared.sampler, lexical=reuse.lexical if reuse else None,
                           progress=progress)


def tune_units(units: Sequence[CodeUnit], embedder: Embedder, *, repository: str,
               split: Split, fusion: Fusion = DEFAULT_FUSION,
               settings: TrainSettings | None = None, cache: VectorCache | None = None,
               progress: Progress | None = None) -> tuple[QueryAdapter, TuneReport]:
    """Train an adapter, choose its fusion on the validation pairs, and measure both
    against the plain model (with ``fusion``) on the held-out pairs."""
    prepared = prepare(units, embedder, split, cache=cache, training=True, progress=progress)
    matrix, log = train_adapter(training_data(prepared, split), settings, progress)
    adapter = QueryAdapter(matrix, embedder.model_id)
    cases, note = fusion_cases(prepared, split)
    plain_choice = collect_signals(cases, query_matrix(prepared, cases, None), prepared.documents,
                                   prepared.sampler, progress=progress)
    tuned_choice = collect_signals(cases, query_matrix(prepared, cases, adapter),
                                   prepared.documents, prepared.sampler,
                                   lexical=plain_choice.lexical, progress=progress)
    tuned_fusion, plain_fusion = choose_fusion(tuned_choice)[0], choose_fusion(plain_choice)[0]
    plain = held_out_signals(prepared, None, progress=progress)
    tuned = held_out_signals(prepared, adapter, reuse=plain, progress=progress)
    before, after, reweighted = (
        build_report(repository=repository, model=embedder.model_id, split=split,
                     selection=prepared.selection, signals=signals,
                     corpus=len(prepared.documents), fusion=used, adapter=signals is tuned)
        for signals, used in ((plain, fusion), (tuned, tuned_fusion), (plain, plain_fusion)))
    protocol = deciding_protocol(before)
    kept = served_mrr(after, protocol) > max(served_mrr(before, protocol),
                                             served_mrr(reweighted, protocol))
    report = TuneReport(before, after, log, protocol, kept, note,
                        None if plain_fusion == fusion else reweighted)
    header = {"split": split.to_json(), "fusion": tuned_fusion.to_json(),
              "report": report.to_json()}
    return adapter.with_header(header), report


def fusion_cases(prepared: Prepared, split: Split) -> tuple[list[Case], str]:
    """The training pairs a fusion weight is chosen on, and a note saying which.

    The pairs set aside when there are at least :data:`MIN_FUSION_PAIRS`;
    otherwise all the training pairs. The adapter was fit on most of those,
    so that choice leans towards the model, which is where an adapter that
    helps should lean (on a small repository the default weight left much of
    its gain unserved: ``scripts/bench_quality.py``). The held-out pairs,
    never used here, still decide whether the adapter is kept.
    """
    fit, aside = validation_split(prepared, split)
    if len(aside) >= MIN_FUSION_PAIRS:
        return aside, f"chosen on the {len(aside)} pairs set aside"
    cases = fit + aside
    return cases, (f"chosen on all {len(cases)} training pairs: fewer than {MIN_FUSION_PAIRS} "
                   "set aside")


def fusion_for(prepared: Prepared, split: Split, adapter: QueryAdapter | None,
               progress: Progress | None = None) -> tuple[Fusion, str]:
    """The fusion that serves the (adapted) queries best on :func:`fusion_cases`."""
    cases, note = fusion_cases(prepared, split)
    signals = collect_signals(cases, query_matrix(prepared, cases, adapter), prepared.documents,
                              prepared.sampler, progress=progress)
    return choose_fusion(signals)[0], note
