"""Whether ``codeseek tune`` keeps an adapter: the plain model against the adapted one on
every protocol, and the rules that decide.

Every comparison is paired: the same queries ranked by the plain model (as search
serves it without an adapter) and by the adapter with its fusion; the difference of
each query's value is averaged, with a percentile-bootstrap 95% interval (queries
resampled in pairs). An adapter is kept only when all of these hold:

1. ``mix``: the mix weight chosen on the training pairs set aside is above 0 (at 0 the
   plain model serves them best, :mod:`codeseek.tune`);
2. ``docstrings``: on the held-out docstrings, whole index, served ranking, the 95%
   interval of the MRR gain lies above 0. The gain is taken over the better of the
   plain model as served and the plain model with its fusion weight chosen the same
   way as the adapter's (a better weight alone is not the adapter's doing);
3. ``name-blind``: on the same docstrings with their unit's identifiers removed, the
   served MRR does not fall: adapted minus plain is at least ``-TOLERANCE``;
4. ``questions`` (when a question file is given or found in the index folder): neither
   hit@10 nor MRR@10 falls, by the same rule.

``TOLERANCE`` is 0: "does not fall" is a point estimate at least the plain one. A
question set is small (tens of questions), so a tolerance wide enough to cover its
noise would let through the very loss this rule is there to stop (0.08 of hit@10 on
40 questions is three questions); rejecting an adapter whose true effect on questions
is nil costs nothing, since the plain model then serves.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from codeseek.evaluate import (
    WHOLE,
    EvalReport,
    MethodResult,
    Pool,
    QuestionReport,
    bootstrap_ci,
    mrr_difference,
    question_rows,
)

TOLERANCE = 0.0
QUESTION_METRICS = ("hit@10", "mrr@10")


@dataclass(frozen=True)
class Comparison:
    """One protocol's figure, plain against adapted, on the same queries.

    Attributes:
        protocol: ``docstrings, pool 1000``, ``docstrings, whole index``, ``name-blind,
            whole index`` or ``questions``.
        metric: ``MRR``, ``hit@10`` or ``MRR@10``.
        n: queries compared.
        plain: the plain model's figure.
        adapted: the adapter's.
        ci95: a paired bootstrap 95% interval of adapted minus plain.
    """

    protocol: str
    metric: str
    n: int
    plain: float
    adapted: float
    ci95: tuple[float, float]

    @property
    def difference(self) -> float:
        """Adapted minus plain."""
        return self.adapted - self.plain

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"protocol": self.protocol, "metric": self.metric, "n": self.n,
                "plain": round(self.plain, 4), "adapted": round(self.adapted, 4),
                "difference": round(self.difference, 4),
                "ci95": [round(self.ci95[0], 4), round(self.ci95[1], 4)]}

    def row(self) -> str:
        """One line of the text table."""
        low, high = (round(bound, 3) + 0.0 for bound in self.ci95)  # + 0.0: no "-0.000"
        label = f"{self.protocol}, {self.metric}"
        return (f"{label:<34} {self.n:>5}  {self.plain:6.3f}  {self.adapted:7.3f}  "
                f"{self.difference + 0.0:+7.3f}  {low:.3f} to {high:.3f}")


@dataclass(frozen=True)
class Gate:
    """One rule of keeping and whether it held.

    Attributes:
        name: ``mix``, ``docstrings``, ``name-blind`` or ``questions``.
        passed: whether it held (a protocol that was not measured passes, and says so).
        detail: why, in words.
    """

    name: str
    passed: bool
    detail: str

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"name": self.name, "passed": self.passed, "detail": self.detail}


def _where(pool: Pool) -> str:
    return "whole index" if pool == WHOLE else f"pool {pool}"


def mrr_comparison(protocol: str, plain: MethodResult, adapted: MethodResult,
                   seed: int) -> Comparison:
    """Plain against adapted MRR on the same queries."""
    _, ci = mrr_difference(adapted.ranks, plain.ranks, seed)
    return Comparison(protocol, "MRR", plain.n, plain.mrr, adapted.mrr, ci)


def docstring_comparisons(plain: EvalReport, adapted: EvalReport,
                          seed: int) -> list[Comparison]:
    """Served MRR under every docstring protocol (the pools, the whole index), then the
    name-blind one when both reports measured it."""
    found = []
    for pool in plain.pools:
        before, after = plain.result("served", pool), adapted.result("served", pool)
        if before is not None and after is not None:
            found.append(mrr_comparison(f"docstrings, {_where(pool)}", before, after, seed))
    blind_before = plain.name_blind.result("served") if plain.name_blind else None
    blind_after = adapted.name_blind.result("served") if adapted.name_blind else None
    if blind_before is not None and blind_after is not None:
        found.append(mrr_comparison("name-blind, whole index", blind_before, blind_after,
                                    seed))
    return found


def question_comparisons(plain: QuestionReport, adapted: QuestionReport,
                         seed: int) -> list[Comparison]:
    """hit@10 and MRR@10 of the same questions, plain against adapted."""
    before, after = question_rows(plain.ranks), question_rows(adapted.ranks)
    found = []
    for metric in QUESTION_METRICS:
        difference = after[metric] - before[metric]
        found.append(Comparison("questions", metric.replace("mrr", "MRR"), len(difference),
                                float(before[metric].mean()), float(after[metric].mean()),
                                bootstrap_ci(difference, seed)))
    return found


def docstring_gate(plain: EvalReport, adapted: EvalReport, reweighted: EvalReport | None,
                   seed: int) -> tuple[Gate, Comparison | None]:
    """Rule 2: the held-out served MRR gain over the better plain ranking, whole index
    (or the first protocol measured), must have its 95% interval above 0."""
    pool = WHOLE if adapted.result("served", WHOLE) is not None else adapted.pools[0]
    after = adapted.result("served", pool)
    baselines = [(name, report.result("served", pool)) for name, report in
                 (("the plain model", plain), ("the plain model reweighted", reweighted))
                 if report is not None]
    measured = [(name, result) for name, result in baselines if result is not None]
    if after is None or not measured:
        return Gate("docstrings", False, "no held-out docstrings were measured"), None
    name, before = max(measured, key=lambda item: item[1].mrr)
    gain = mrr_comparison(f"docstrings, {_where(pool)}", before, after, seed)
    low, high = gain.ci95
    passed = low > 1e-12
    detail = (f"held-out served MRR, {_where(pool)}: {before.mrr:.3f} ({name}) -> "
              f"{after.mrr:.3f}, gain {gain.difference:+.3f}, 95% interval "
              f"{low + 0.0:.3f} to {high + 0.0:.3f}: "
              + ("above 0" if passed else "below 0: the adapter is worse" if high < -1e-12
                 else "includes 0: no gain beyond noise"))
    return Gate("docstrings", passed, detail), gain


def no_loss_gate(name: str, comparisons: Sequence[Comparison], missing: str) -> Gate:
    """Rules 3 and 4: no figure falls by more than TOLERANCE (none measured: it holds)."""
    if not comparisons:
        return Gate(name, True, missing)
    fallen = [c for c in comparisons if c.difference < -TOLERANCE - 1e-12]
    words = "; ".join(f"{c.metric} {c.plain:.3f} -> {c.adapted:.3f}" for c in comparisons)
    if fallen:
        return Gate(name, False, f"{name} figures fall: {words}")
    return Gate(name, True, f"{name} figures do not fall: {words}")


def mix_gate(plain_won: bool, plain_mrr: float, shown_mrr: float, mix: float) -> Gate:
    """Rule 1: the mix chosen on the pairs set aside is above 0."""
    if plain_won:
        return Gate("mix", False, f"on the training pairs set aside the plain model does best "
                                  f"(MRR {plain_mrr:.3f}; the best adapter, mix {mix:g}, "
                                  f"{shown_mrr:.3f}): mix 0 chosen")
    return Gate("mix", True, f"mix {mix:g} chosen on the training pairs set aside (MRR "
                             f"{plain_mrr:.3f} -> {shown_mrr:.3f})")


def all_passed(gates: Sequence[Gate]) -> bool:
    """Whether every rule held."""
    return all(gate.passed for gate in gates)

