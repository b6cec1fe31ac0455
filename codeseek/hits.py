"""The :class:`SearchHit` record: one ranked result, as every layer passes it on.

Kept apart from the query path so that light callers (the daemon client in a
short-lived ``codeseek search`` process) can build hits without numpy.
"""

from __future__ import annotations

from dataclasses import dataclass

from codeseek.display import json_path


@dataclass(frozen=True)
class SearchHit:
    """One ranked result.

    Attributes:
        query: the query text.
        rank: 1 for the best hit.
        score: the fused score (higher is better; comparable within one query).
        similarity: cosine similarity of query and unit (None if not a dense candidate).
        path, start_line, end_line, language, kind, name, qualname, signature:
            where the unit is and what it is.
        doc_summary: the first paragraph of its doc.
        snippet: the first lines of its code.
        unit_id: the unit's row id in the index.
        confidence: how sure the hit is, in [0, 1]: where its cosine falls among the
            best cosines off-topic questions get on this index (see
            :mod:`codeseek.confidence`); None for neighbours answers.
        repo: the repository root the hit comes from, set only when several
            repositories are searched at once (:mod:`codeseek.multi`); None otherwise.
        tier: the embedding tier whose vectors scored the hit's dense side
            (``full``, ``int8`` or ``static``: :mod:`codeseek.tiers`); None when unknown.
    """

    query: str
    rank: int
    score: float
    similarity: float | None
    path: str
    start_line: int
    end_line: int
    language: str
    kind: str
    name: str
    qualname: str
    signature: str
    doc_summary: str
    snippet: str
    unit_id: int
    confidence: float | None = None
    repo: str | None = None
    tier: str | None = None

    def to_json(self) -> dict[str, object]:
        """The JSON Lines record of this hit (a path that is not UTF-8: see
        :func:`~codeseek.display.json_path`)."""
        return {
            "query": self.query, "rank": self.rank, "score": round(self.score, 6),
            "similarity": None if self.similarity is None else round(self.similarity, 6),
            **json_path(self.path), "start_line": self.start_line, "end_line": self.end_line,
            "language": self.language, "kind": self.kind, "name": self.name,
            "qualname": self.qualname, "signature": self.signature,
            "doc_summary": self.doc_summary, "snippet": self.snippet,
            "confidence": None if self.confidence is None else round(self.confidence, 6),
            **({} if self.repo is None else {"repo": self.repo}),
            **({} if self.tier is None else {"tier": self.tier}),
        }
