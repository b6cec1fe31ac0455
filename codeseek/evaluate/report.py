"""The report of a check: every method under every protocol, as text and JSON."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from codeseek.evaluate.documents import POOL_SIZES, WHOLE, Pool
from codeseek.evaluate.metrics import MethodResult, summarise
from codeseek.evaluate.queries import MIN_QUERY_WORDS
from codeseek.evaluate.signals import CaseSignals
from codeseek.evaluate.split import Case, Selection, Split
from codeseek.search import CANDIDATES, DEFAULT_FUSION, Fusion

METHODS = ("lexical", "dense", "dense-ann", "served")


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

    def to_json(self) -> dict[str, object]:
        """One JSON document: repository, model, holdout, results, and how they were made."""
        return {
            "repository": self.repository, "model": self.model, "holdout": self.holdout,
            "training": self.training, "corpus": self.corpus, "split": self.split.to_json(),
            "fusion": self.fusion.to_json(), "adapter": self.adapter,
            "results": [r.to_json() for r in self.results],
            "best": {str(pool): self.best(pool).method for pool in self.pools},
            "notes": list(self.notes),
        }

    def to_text(self) -> str:
        """The readable table the command line prints."""
        lines = [f"recall checks on {self.holdout} held-out docstrings of {self.repository}",
                 f"({self.split.describe()}; model {self.model}; {self.training} training "
                 f"pairs; served ranking: {_fusion_words(self.fusion)}"
                 f"{', with the tuned query adapter' if self.adapter else ''})", "",
                 f"{'method':<10} {'pool':>7} {'n':>6}  {'R@1':>6} {'R@5':>6} {'R@10':>6}  "
                 f"{'MRR':>6}  95% interval"]
        for result in self.results:
            low, high = result.ci95["mrr"]
            metrics = result.metrics
            lines.append(
                f"{result.method:<10} {result.pool_size:>7} {result.n:>6}  "
                f"{metrics['recall@1']:6.3f} {metrics['recall@5']:6.3f} "
                f"{metrics['recall@10']:6.3f}  {result.mrr:6.3f}  {low:.3f}-{high:.3f}")
        lines.append("")
        for pool in self.pools:
            best = self.best(pool)
            where = "the whole index" if pool == WHOLE else f"pool {pool}"
            lines.append(f"best on {where} ({best.pool_size} units): {best.method} "
                         f"(MRR {best.mrr:.3f})")
        lines.extend(f"note: {note}" for note in self.notes)
        return "\n".join(lines)


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
