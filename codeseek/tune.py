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

Regularised toward the plain model twice over. Each run adds a penalty
``penalty * ||W - I||^2`` to the loss, for every penalty of :data:`PENALTY_GRID`;
and the served map mixes the adapted and the plain query,

    q' = normalise((1 - a) q + a A(q)),  A(q) = q W / s,

with ``s`` the mean length of ``q W`` over the training queries (so that both
terms weigh alike) and ``a`` from :data:`MIX_GRID`, 0 included. The mix is
linear before the final normalisation, so it is one matrix,
``(1 - a) I + a W / s``, and search applies it as it applied ``W``. The pair
(penalty, a) with the best MRR on the pairs set aside is chosen (ties go to the
smaller ``a``, then the larger penalty: the nearer the plain model); ``a = 0``
means the plain model serves those pairs best and no adapter is kept
(:mod:`codeseek.keeping` holds the rules that keep one).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace

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
    QuestionReport,
    Split,
    VectorCache,
    body_key,
    build_report,
    choose_fusion,
    collect_signals,
    doc_key,
    mean_reciprocal_rank,
    name_blind_results,
    prepare,
    query_matrix,
    rank_of_true,
    select_cases,
)
from codeseek.keeping import (
    TOLERANCE,
    Comparison,
    Gate,
    all_passed,
    docstring_comparisons,
    docstring_gate,
    mix_gate,
    no_loss_gate,
    question_comparisons,
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
MIN_FIT_PAIRS = 32
"""The fewest pairs :func:`training_data` fits a map on (``codeseek tune`` asks far more:
:data:`MIN_TRAINING_PAIRS`)."""
MIN_TRAINING_PAIRS = 300
"""The fewest training pairs ``codeseek tune`` trains on. With 300 the held-out side holds
about 75 docstrings (a 20% share), and the paired 95% interval of an MRR gain on 75 queries
is about +-0.04 to +-0.06 wide (1.96 sd / sqrt(75), with sd 0.19 to 0.25, the standard
deviation of the per-docstring difference of reciprocal rank that scripts/bench_quality.py
section 6 measured on the standard library and a subset of it), as wide as the gains
adapters have shown there (+0.04 to +0.05): under that no gain can be told from noise, and a
384 x 384 map fit on a hundred pairs learns their wording, not the code."""
MIN_FUSION_PAIRS = 100
PENALTY_GRID = (1e-4, 1e-2, 1e-1)
"""The weights of ``||W - I||^2`` tried: from barely held (the earlier single value) to
firmly held near the identity."""
MIX_GRID = (0.0, 0.25, 0.5, 0.75, 1.0)
"""The weights ``a`` of the adapted query in the mix tried; 0 is the plain model."""


@dataclass(frozen=True)
class TrainSettings:
    """How the adapter is trained.

    Attributes:
        batch_size: pairs per batch (each query sees batch_size - 1 negatives).
        temperature: the softmax temperature of InfoNCE.
        learning_rate: Adam's step size.
        max_epochs: the most passes over the training pairs.
        patience: stop after this many epochs without a better validation MRR.
        identity_decay: weight of ``||W - I||^2`` in the loss (keeps W near the identity)
            in one run of :func:`train_adapter`.
        seed: shuffling and batching.
        penalties: the identity_decay values :func:`choose_adapter` trains with, one run each.
        mixes: the mix weights it tries on each run's map.
    """

    batch_size: int = DEFAULT_BATCH_SIZE
    temperature: float = TEMPERATURE
    learning_rate: float = LEARNING_RATE
    max_epochs: int = MAX_EPOCHS
    patience: int = PATIENCE
    identity_decay: float = IDENTITY_DECAY
    seed: int = 0
    penalties: tuple[float, ...] = PENALTY_GRID
    mixes: tuple[float, ...] = MIX_GRID


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
    if len(fit) < MIN_FIT_PAIRS:
        raise TooFewExamples(
            f"only {len(fit)} training pairs (documented units outside the held-out share); "
            f"fitting a map needs at least {MIN_FIT_PAIRS}")
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


# -- regularising toward the plain model ------------------------------------------------


def mixed_matrix(matrix: np.ndarray, queries: np.ndarray, mix: float) -> np.ndarray:
    """The one matrix of ``q' = normalise((1 - mix) q + mix q W / s)``, ``s`` the mean
    length of ``q W`` over ``queries`` (mix 0: the identity; mix 1: ``W`` up to scale)."""
    dim = matrix.shape[0]
    lengths = np.linalg.norm(np.asarray(queries, np.float64) @ matrix, axis=1)
    scale = float(lengths.mean()) if len(lengths) and lengths.mean() > 0 else 1.0
    return ((1.0 - mix) * np.eye(dim) + mix * np.asarray(matrix, np.float64) / scale
            ).astype(np.float32)


@dataclass(frozen=True)
class Candidate:
    """One (penalty, mix) tried, and its MRR on the pairs set aside.

    Attributes:
        penalty: the weight of ``||W - I||^2`` in training.
        mix: the weight ``a`` of the adapted query.
        validation_mrr: dense MRR of the pairs set aside, over the whole corpus.
        distance: ``||M - I||`` (Frobenius) of the served matrix ``M``.
    """

    penalty: float
    mix: float
    validation_mrr: float
    distance: float

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"penalty": self.penalty, "mix": self.mix,
                "validation_mrr": round(self.validation_mrr, 5),
                "distance_from_identity": round(self.distance, 4)}


@dataclass(frozen=True)
class Choice:
    """What regularisation was chosen on the pairs set aside.

    Attributes:
        chosen: the best candidate (mix 0: the plain model).
        shown: the best candidate with mix above 0, the adapter measured against the
            plain model on the held-out side (the chosen one unless mix 0 won).
        candidates: every candidate, penalty by penalty.
        logs: the training run of each penalty.
    """

    chosen: Candidate
    shown: Candidate
    candidates: tuple[Candidate, ...]
    logs: dict[float, TrainingLog]

    @property
    def plain_won(self) -> bool:
        """The plain model (mix 0) served the pairs set aside best."""
        return self.chosen.mix == 0.0

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"penalty": self.shown.penalty, "mix": self.shown.mix,
                "chosen_mix": self.chosen.mix, "plain_won": self.plain_won,
                "validation_mrr_plain": round(self.candidates[0].validation_mrr, 5)
                if self.candidates else None,
                "validation_mrr": round(self.shown.validation_mrr, 5),
                "candidates": [c.to_json() for c in self.candidates],
                "penalty_grid": list(self.logs),
                "mix_grid": list(dict.fromkeys(c.mix for c in self.candidates))}


def choose_adapter(data: TrainingData, settings: TrainSettings | None = None,
                   progress: Progress | None = None) -> tuple[np.ndarray, Choice]:
    """Train one map per penalty of ``settings.penalties``, mix each with the plain query
    at every weight of ``settings.mixes``, and choose on the pairs set aside; the matrix
    returned is the :attr:`Choice.shown` candidate's."""
    settings = settings or TrainSettings()
    penalties, mixes = settings.penalties, settings.mixes
    if not penalties or not mixes:
        raise ValueError("choose_adapter needs at least one penalty and one mix weight")
    candidates: list[Candidate] = []
    matrices: dict[tuple[float, float], np.ndarray] = {}
    logs: dict[float, TrainingLog] = {}
    for penalty in penalties:
        weight, logs[penalty] = train_adapter(data, replace(settings, identity_decay=penalty),
                                              progress)
        for mix in mixes:
            served = mixed_matrix(weight, data.queries, mix)
            matrices[penalty, mix] = served
            candidates.append(Candidate(
                penalty, mix, validation_mrr(served.astype(np.float64), data),
                float(np.linalg.norm(served - np.eye(len(served))))))

    def nearest_plain_first(c: Candidate) -> tuple[float, float, float]:
        return (round(c.validation_mrr, 9), -c.mix, c.penalty)

    chosen = max(candidates, key=nearest_plain_first)
    adapted_ones = [c for c in candidates if c.mix > 0] or candidates
    shown = chosen if chosen.mix > 0 else max(adapted_ones, key=nearest_plain_first)
    return matrices[shown.penalty, shown.mix], Choice(chosen, shown, tuple(candidates), logs)


# -- the whole tuning run -----------------------------------------------------------------


QuestionCheck = Callable[[QueryAdapter | None, Fusion], QuestionReport]
"""Asks a question file's questions of the index as search serves them, with the adapter
and fusion given (None: the plain model)."""


@dataclass(frozen=True)
class TuneReport:
    """The outcome of ``codeseek tune``.

    Attributes:
        kept: whether every rule of :mod:`codeseek.keeping` held (and the adapter was saved).
        pairs: training pairs of the split (documented units outside the held-out share).
        refused: why nothing was trained (empty when it was).
        before: the recall checks with the plain model (None when refused).
        after: the same checks with the adapter measured (the best with mix above 0).
        log: the training run of the adapter measured.
        choice: the penalties and mixes tried on the pairs set aside, and the one chosen.
        fusion_note: how the fusion served with the adapter was chosen.
        reweighted: the plain model with its fusion weight chosen the same way, on
            the same pairs (None when that is the served fusion). The adapter must
            beat it too: a better weight alone is not the adapter's doing.
        comparisons: plain against adapted on every protocol measured.
        gates: the rules of keeping, in order, and whether each held.
    """

    kept: bool
    pairs: int
    refused: str = ""
    before: EvalReport | None = None
    after: EvalReport | None = None
    log: TrainingLog | None = None
    choice: Choice | None = None
    fusion_note: str = ""
    reweighted: EvalReport | None = None
    comparisons: tuple[Comparison, ...] = ()
    gates: tuple[Gate, ...] = ()

    @property
    def decided_on(self) -> Pool:
        """The docstring protocol whose served MRR decided."""
        return WHOLE if self.before is None else deciding_protocol(self.before)

    def served_mrr(self, report: EvalReport | None) -> float:
        """The served MRR of a report under the deciding protocol (0 when not measured)."""
        return 0.0 if report is None else served_mrr(report, self.decided_on)

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict (also the adapter file's training report)."""
        record: dict[str, object] = {
            "kept": self.kept, "pairs": self.pairs, "min_pairs": MIN_TRAINING_PAIRS,
            "refused": self.refused or None, "decided_on": self.decided_on,
            "served_mrr_before": (None if self.before is None else
                                  round(self.served_mrr(self.before), 4)),
            "served_mrr_after": (None if self.after is None else
                                 round(self.served_mrr(self.after), 4)),
            "served_mrr_plain_reweighted": (None if self.reweighted is None else
                                            round(self.served_mrr(self.reweighted), 4)),
            "protocols": [c.to_json() for c in self.comparisons],
            "gates": [g.to_json() for g in self.gates],
            "tolerance": TOLERANCE,
        }
        if self.before is None or self.after is None or self.log is None:
            return record
        record.update({
            "choice": None if self.choice is None else self.choice.to_json(),
            "training": self.log.to_json(), "split": self.before.split.to_json(),
            "fusion": self.after.fusion.to_json(), "fusion_note": self.fusion_note,
            "held_out": self.before.holdout,
            "questions_file": (None if self.before.questions is None
                               else self.before.questions.source),
            "before": [r.to_json() for r in self.before.results],
            "after": [r.to_json() for r in self.after.results],
        })
        return record

    def to_text(self) -> str:
        """What the command line prints."""
        if self.refused:
            return f"no adapter kept: {self.refused}"
        assert self.log is not None and self.after is not None and self.choice is not None
        log, choice = self.log, self.choice
        lines = [
            f"trained query adapters on {log.pairs} pairs ({log.validation_pairs} set aside "
            f"to choose), batch {log.batch_size}, one per identity penalty "
            + ", ".join(f"{p:g}" for p in choice.logs),
            "  set-aside dense MRR by penalty and mix " + " / ".join(
                f"{m:g}" for m in dict.fromkeys(c.mix for c in choice.candidates)) + ":",
        ]
        for penalty, run in choice.logs.items():
            cells = " ".join(f"{c.validation_mrr:.3f}" for c in choice.candidates
                             if c.penalty == penalty)
            lines.append(f"  penalty {penalty:<7g} {cells}   ({run.epochs} epochs, best "
                         f"{run.best_epoch}, {run.seconds:.1f} s)")
        shown = choice.shown
        lines.append(f"chosen: penalty {choice.chosen.penalty:g}, mix {choice.chosen.mix:g}"
                     + ("" if not choice.plain_won else
                        f" (the plain model); measured below: the best adapter, penalty "
                        f"{shown.penalty:g}, mix {shown.mix:g}"))
        lines.append(f"served ranking with it: dense weight "
                     f"{self.after.fusion.dense_weight:g} ({self.fusion_note})")
        lines.extend(["", f"{'protocol, metric':<34} {'n':>5}  {'plain':>6}  {'adapted':>7}  "
                      f"{'gain':>7}  95% interval"])
        lines.extend(c.row() for c in self.comparisons)
        lines.append("")
        lines.extend(f"{'yes' if g.passed else 'NO ':<3} {g.name}: {g.detail}"
                     for g in self.gates)
        failed = [g.name for g in self.gates if not g.passed]
        lines.append("kept: search uses it from now on" if self.kept else
                     f"not kept ({', '.join(failed)}): search keeps the plain model")
        return "\n".join(lines)


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


def refusal(pairs: int, documented: int) -> str:
    """Why no adapter is trained on too few pairs, in words."""
    return (f"only {pairs} training pairs (documented units outside the held-out share, of "
            f"{documented} usable docstrings in all); tune needs at least "
            f"{MIN_TRAINING_PAIRS}. With fewer, the held-out check has too few docstrings to "
            "tell a gain from noise, and a map fit on so few pairs learns their wording rather "
            "than the code; search keeps the plain model")


def tune_units(units: Sequence[CodeUnit], embedder: Embedder, *, repository: str,
               split: Split, fusion: Fusion = DEFAULT_FUSION,
               settings: TrainSettings | None = None, cache: VectorCache | None = None,
               questions: QuestionCheck | None = None,
               progress: Progress | None = None) -> tuple[QueryAdapter | None, TuneReport]:
    """Train adapters regularised toward the plain model, choose one on the pairs set aside,
    and measure it against the plain model (with ``fusion``) on every protocol: the
    held-out docstrings, their name-blind form and, with ``questions``, a question file.
    The adapter returned (None when refused) carries the report in its header."""
    settings = settings or TrainSettings()
    if settings.batch_size < 2:
        raise TooFewExamples(f"--batch-size must be at least 2, not {settings.batch_size}: a "
                             "batch of N pairs gives each query N - 1 negatives")
    selection = select_cases(units, split)
    pairs = len(selection.training)
    if pairs < MIN_TRAINING_PAIRS:
        return None, TuneReport(False, pairs, refusal(pairs, len(selection.cases)))
    prepared = prepare(units, embedder, split, cache=cache, training=True, name_blind=True,
                       progress=progress)
    data = training_data(prepared, split)
    matrix, choice = choose_adapter(data, settings, progress)
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
    held = len(plain.cases)
    before = replace(before, name_blind=name_blind_results(prepared, held, split, fusion, None,
                                                           progress),
                     questions=None if questions is None else questions(None, fusion))
    after = replace(after, name_blind=name_blind_results(prepared, held, split, tuned_fusion,
                                                         adapter, progress),
                    questions=None if questions is None else questions(adapter, tuned_fusion))
    comparisons, gates = judge(before, after, None if plain_fusion == fusion else reweighted,
                               choice, split.seed)
    report = TuneReport(all_passed(gates), pairs, "", before, after,
                        choice.logs[choice.shown.penalty], choice, note,
                        None if plain_fusion == fusion else reweighted,
                        tuple(comparisons), tuple(gates))
    header = {"split": split.to_json(), "fusion": tuned_fusion.to_json(),
              "report": report.to_json()}
    return adapter.with_header(header), report


def judge(before: EvalReport, after: EvalReport, reweighted: EvalReport | None,
          choice: Choice, seed: int) -> tuple[list[Comparison], list[Gate]]:
    """Plain against adapted on every protocol, and the rules of :mod:`codeseek.keeping`."""
    comparisons = docstring_comparisons(before, after, seed)
    if before.questions is not None and after.questions is not None:
        comparisons.extend(question_comparisons(before.questions, after.questions, seed))
    plain_mrr = choice.candidates[0].validation_mrr if choice.candidates else 0.0
    gates = [mix_gate(choice.plain_won, plain_mrr, choice.shown.validation_mrr,
                      choice.shown.mix),
             docstring_gate(before, after, reweighted, seed)[0],
             no_loss_gate("name-blind", [c for c in comparisons
                                         if c.protocol.startswith("name-blind")],
                          "not measured: no held-out doc keeps 3 words once its names "
                          "are removed"),
             no_loss_gate("questions", [c for c in comparisons if c.protocol == "questions"],
                          "not measured: no question file (give one with --questions, or "
                          "put questions.jsonl in the index folder)")]
    return comparisons, gates


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
