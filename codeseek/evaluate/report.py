"""The report of a check: every method under every protocol, as text and JSON."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from codeseek.evaluate.documents import POOL_SIZES, WHOLE, Pool
from codeseek.evaluate.metrics import MethodResult, mrr_difference, summarise
from codeseek.evaluate.queries import MIN_QUERY_WORDS
from codeseek.evaluate.signals import CaseSignals
from codeseek.evaluate.split import Case, Selection, Split
from codeseek.search import CANDIDATES, DEFAULT_FUSION, Fusion

if TYPE_CHECKING:
    from codeseek.evaluate.questions import QuestionReport

METHODS = ("lexical", "dense", "dense-ann", "served")


@dataclass(frozen=True)
class NameBlind:
    """The name-blind protocol: held-out docs with their unit's identifiers removed
    (:mod:`codeseek.evaluate.blind`), every method over the whole index.

    Attributes:
        left_out: held-out queries left with fewer than MIN_QUERY_WORDS words.
        results: one result per method (pool "all").
    """

    left_out: int
    results: tuple[MethodResult, ...]

    def result(self, method: str) -> MethodResult | None:
        """One method's result."""
        return next((r for r in self.results if r.method == method), None)

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"n": self.results[0].n if self.results else 0, "left_out": self.left_out,
                "results": [r.to_json() for r in self.results]}


@dataclass(frozen=True)
class Lead:
    """How far the best method under a protocol is ahead of another one.

    Attributes:
        other: the method behind (or level).
        difference: the best's MRR minus the other's, on the same queries.
        ci95: a paired bootstrap 95% interval of that difference.
    """

    other: MethodResult
    difference: float
    ci95: tuple[float, float]

    @property
    def significant(self) -> bool:
        """Whether the whole interval is above 0 (beyond rounding noise)."""
        return self.ci95[0] > 1e-12


@dataclass(frozen=True)
class EvalReport:
    """The recall checks of one repository.

    Attributes:
        repository: the repository root.
        model: the embedding model id.
        split: how the held-out side was chosen.
        holdout: held-out queries.
        training: training pairs (what ``codeseek tune`` learns from).
        corpus: units in the index (the whole-index pool).
        results: every method under every protocol.
        fusion: the served ranking rule.
        adapter: whether the served (and dense) queries went through the index's adapter.
        notes: how queries and documents were made, and what was left out.
        name_blind: the name-blind protocol (None when it was not measured).
        questions: the question checks (None without a question file).
    """

    repository: str
    model: str
    split: Split
    holdout: int
    training: int
    corpus: int
    results: tuple[MethodResult, ...]
    fusion: Fusion = DEFAULT_FUSION
    adapter: bool = False
    notes: tuple[str, ...] = ()
    name_blind: NameBlind | None = None
    questions: QuestionReport | None = None

    def result(self, method: str, pool: Pool) -> MethodResult | None:
        """One method's result under one protocol."""
        return next((r for r in self.results if r.method == method and r.pool == pool), None)

    @property
    def pools(self) -> list[Pool]:
        """The protocols measured, pools first."""
        return list(dict.fromkeys(r.pool for r in self.results))

    def best(self, pool: Pool) -> MethodResult:
        """The method with the highest MRR under a protocol."""
        return max((r for r in self.results if r.pool == pool), key=lambda r: r.mrr)

    def leads(self, pool: Pool) -> list[Lead]:
        """The best method's lead over each other method under a protocol, nearest first."""
        best = self.best(pool)
        others = sorted((r for r in self.results if r.pool == pool and r is not best),
                        key=lambda r: -r.mrr)
        return [Lead(other, *mrr_difference(best.ranks, other.ranks, self.split.seed))
                for other in others]

    def tied(self, pool: Pool) -> list[str]:
        """The methods not significantly behind the best under a protocol (none: it wins)."""
        return [lead.other.method for lead in self.leads(pool) if not lead.significant]

    def verdict(self, pool: Pool) -> str:
        """Which method wins under a protocol, or that none does significantly, in words."""
        best, leads = self.best(pool), self.leads(pool)
        where = "the whole index" if pool == WHOLE else f"pool {pool}"
        level = [lead for lead in leads if not lead.significant]
        if not leads:
            return (f"only one method on {where} ({best.pool_size} units): {best.method} "
                    f"(MRR {best.mrr:.3f}) on {best.n} docstrings")
        if not level:
            lead = leads[0]
            return (f"best on {where} ({best.pool_size} units): {best.method} (MRR "
                    f"{best.mrr:.3f}), ahead of {lead.other.method} (MRR {lead.other.mrr:.3f}) "
                    f"by {lead.difference:.3f} (95% interval of the difference "
                    f"{_interval(lead.ci95)}) on {best.n} docstrings")
        named = [f"{r.method} (MRR {r.mrr:.3f})" for r in [best] + [x.other for x in level]]
        listed = ", ".join(named[:-1]) + f" and {named[-1]}"
        why = (f"the 95% interval of the difference, {_interval(level[0].ci95)}, includes 0"
               if len(level) == 1 else
               f"the 95% interval of each one's difference from {best.method} includes 0")
        return (f"no significant difference on {where} ({best.pool_size} units) between "
                f"{listed} on {best.n} docstrings ({why})")

    def to_json(self) -> dict[str, object]:
        """One JSON document: repository, model, holdout, results, and how they were made."""
        record: dict[str, object] = {
            "repository": self.repository, "model": self.model, "holdout": self.holdout,
            "training": self.training, "corpus": self.corpus, "split": self.split.to_json(),
            "fusion": self.fusion.to_json(), "adapter": self.adapter,
            "results": [r.to_json() for r in self.results],
            "best": {str(pool): self.best(pool).method for pool in self.pools},
            "tied": {str(pool): self.tied(pool) for pool in self.pools},
            "notes": list(self.notes),
        }
        if self.name_blind is not None:
            record["name_blind"] = self.name_blind.to_json()
        if self.questions is not None:
            record["questions"] = self.questions.to_json()
        return record

    def to_text(self) -> str:
        """The readable table the command line prints."""
        adapter = (f", with the query adapter tuned on the {self.training} training pairs"
                   if self.adapter else "")
        lines = [f"recall checks on {self.holdout} held-out docstrings of {self.repository}",
                 f"({self.split.describe()}; model {self.model}; served ranking: "
                 f"{_fusion_words(self.fusion)}{adapter})"]
        if self.results:  # none: too few docs, only the questions were checked
            lines.extend(["", f"{'method':<10} {'pool':>7} {'n':>6}  {'R@1':>6} {'R@5':>6} "
                          f"{'R@10':>6}  {'MRR':>6}  95% interval"])
        lines.extend(_row(result) for result in self.results)
        blind = self.name_blind
        if blind is not None:
            lines.extend(["", "name-blind: the same held-out docs with every identifier of "
                          "their unit (and its split words) removed, over the whole index"])
            lines.extend(_row(result) for result in blind.results)
            if blind.left_out:
                lines.append(f"({blind.left_out} held-out docs left out: under "
                             f"{MIN_QUERY_WORDS} words once the names were removed)")
        lines.append("")
        lines.extend(self.verdict(pool) for pool in self.pools)
        lines.extend(f"note: {note}" for note in self.notes)
        if self.questions is not None:
            lines.extend(["", self.questions.to_text()])
        return "\n".join(lines)


def _row(result: MethodResult) -> str:
    low, high = result.ci95["mrr"]
    metrics = result.metrics
    return (f"{result.method:<10} {result.pool_size:>7} {result.n:>6}  "
            f"{metrics['recall@1']:6.3f} {metrics['recall@5']:6.3f} "
            f"{metrics['recall@10']:6.3f}  {result.mrr:6.3f}  {low:.3f}-{high:.3f}")


def _interval(bounds: tuple[float, float]) -> str:
    low, high = (round(bound, 3) + 0.0 for bound in bounds)  # + 0.0: no "-0.000"
    return f"{low:.3f} to {high:.3f}"


def _fusion_words(fusion: Fusion) -> str:
    weight = f"dense weight {fusion.dense_weight:g}"
    if fusion.kind == "rrf":
        return f"reciprocal rank fusion (k {fusion.rrf_k:g}, {weight})"
    scale = "standardised" if fusion.kind == "zscore" else "scaled"
    return f"fusion of {scale} scores ({weight})"


def report_notes(selection: Selection, cases: Sequence[Case], signals: CaseSignals,
                 corpus: int) -> tuple[str, ...]:
    """How the queries and documents were made, in a few sentences."""
    stripped = sum(1 for c in cases if c.name_stripped)
    notes = [
        "queries are each held-out doc's first paragraph with tags, parameter sections and "
        f"markup removed; a leading copy of the unit's name was removed from {stripped}",
        "documents are the units without their docs, embedded and keyword-indexed for this "
        "check (the index's own vectors include the docs and are not used)",
        f"left out: {selection.short} docs under {MIN_QUERY_WORDS} words, "
        f"{selection.undocumented} undocumented units, {selection.duplicate_docs} held-out "
        f"docs shared by another unit, {selection.duplicate_bodies} held-out bodies shared "
        "by another unit",
        f"dense-ann and served rank the best {CANDIDATES} candidates of each side; a unit "
        "outside them counts as a miss",
    ]
    for pool, members in signals.lexical.items():
        if pool != WHOLE and len(members.cases) < len(cases):
            notes.append(f"pool {pool}: {len(cases) - len(members.cases)} queries left out "
                         f"(their language has fewer than {pool} units)")
    if WHOLE in signals.lexical and len(signals.lexical) == 1:
        notes.append(f"no pool protocol: no language has {min(POOL_SIZES)} units "
                     f"(the whole index holds {corpus})")
    return tuple(notes)


def build_report(*, repository: str, model: str, split: Split, selection: Selection,
                 signals: CaseSignals, corpus: int, fusion: Fusion,
                 adapter: bool) -> EvalReport:
    """Summarise signals into a report."""
    results = []
    for method, pool, ranks in signals.ranks(fusion):
        pool_size = corpus if pool == WHOLE else int(pool)
        results.append(summarise(method, pool, pool_size, ranks, split.seed))
    return EvalReport(
        repository=repository, model=model, split=split, holdout=len(signals.cases),
        training=len(selection.training), corpus=corpus, results=tuple(results),
        fusion=fusion, adapter=adapter,
        notes=report_notes(selection, signals.cases, signals, corpus),
    )
