"""Search across several repositories: :class:`MultiService`, one
:class:`~codeseek.service.SearchService` over the services of several indexes.

Each repository's index is asked on its own (each service comes from
:func:`codeseek.service.connect`, so a repository with a running daemon is
answered by it: the client fans out, one daemon per repository) and the
answers are merged into one ranking.

The merge (``shared``, the default) ranks the indexes as ONE index of all their
units would: fused scores of different indexes are not comparable (each side
is standardised over that index's own candidates, and BM25 depends on each
index's term statistics), but the raw signals can be made so. Three steps,
each one request to each index (:class:`MergeSource`):

1. ``merge_basis``: each index's model, fusion and BM25 statistics for each
   query's phrases (:class:`~codeseek.bm25.CorpusStats`); they are summed;
2. ``merge_sides``: each index's best dense candidates (cosines, comparable
   across indexes of one model) and best keyword candidates scored with the
   summed statistics (:meth:`codeseek.search.Searcher.shared_lexical`): BM25
   as one index of the union computes it (:class:`Sides`);
3. the pooled candidates go through ONE :func:`codeseek.fusion.fuse`, exactly
   as one index fuses its own (each side's best ``max(200, 3 k)`` of the union,
   standardised over them; the indexes' fusion when they share one, else the
   default), and ``merge_hits`` fetches the picked units (:class:`Pick`) from
   their indexes, confidences against the off-topic questions' best cosines over
   all of them (the baseline one index of the union would have).

With exact dense search (a filtered search, or an HNSW that finds the true
nearest) the merged answer equals the union index's answer
(``tests/test_multi.py``). Indexes of different models have no comparable
cosines: they, and services without the three steps, are merged by the older
rules, kept for comparison (``scripts/bench_multi.py``): ``served`` (each
index's fused score as it is) and ``restandardised`` (those standardised once
more over each index's candidates).

Each merged hit's ``score`` is the merge value and its ``repo`` the repository
root it comes from. Neighbours and status belong to one index: they are
refused here (:meth:`MultiService.neighbours_in` asks the index of a hit's
repository, :meth:`MultiService.statuses` gives each index's).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

from codeseek.bm25 import CorpusStats
from codeseek.errors import InvalidQuery
from codeseek.hits import SearchHit
from codeseek.query import Query
from codeseek.service import IndexStatus, SearchService

MIN_CANDIDATES = 50
"""Each index is asked for at least this many candidates (and at least 3 k)."""
MAX_CANDIDATES = 2**31 - 1  # the daemon's largest k (codeseek.query.MAX_K)


MERGE_KINDS = ("shared", "served", "restandardised")
MERGE_KIND = "shared"


@dataclass(frozen=True)
class Basis:
    """What one index tells a merge first: its model, its fusion (the JSON of a
    :class:`~codeseek.fusion.Fusion`), its BM25 statistics for each query, and each
    off-topic question's best cosine in it (:mod:`codeseek.confidence`; None: none)."""

    model_id: str
    fusion: dict[str, object]
    stats: list[CorpusStats]
    off_topic: list[float | None]

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"model_id": self.model_id, "fusion": self.fusion,
                "stats": [s.to_json() for s in self.stats], "off_topic": self.off_topic}

    @classmethod
    def from_json(cls, data: object) -> Basis:
        """The basis a :meth:`to_json` dict describes (ValueError if malformed)."""
        if not isinstance(data, dict) or not isinstance(data.get("model_id"), str) \
                or not isinstance(data.get("fusion"), dict) \
                or not isinstance(data.get("stats"), list):
            raise ValueError("a merge basis holds model_id, fusion, stats and off_topic")
        off_topic = data.get("off_topic")
        if not isinstance(off_topic, list) or not all(
                c is None or isinstance(c, int | float) for c in off_topic):
            raise ValueError("a merge basis holds off_topic: cosines or nulls")
        return cls(data["model_id"], data["fusion"],
                   [CorpusStats.from_json(s) for s in data["stats"]],
                   [_maybe(c) for c in off_topic])


@dataclass(frozen=True)
class Sides:
    """One index's candidates for one query of a merge: its best dense (unit id, cosine)
    and keyword (unit id, BM25 under the shared statistics) pairs, best first, and the
    cosine of each keyword candidate the dense side lacks; and which candidates are
    nested helpers, with the unit each is defined in (:meth:`~codeseek.store.Store.
    enclosing`: what the fusion's nested-helper rule reads; absent from an older
    daemon's answer, then empty)."""

    dense: list[tuple[int, float]]
    lexical: list[tuple[int, float]]
    cosines: dict[int, float]
    enclosing: dict[int, int] = field(default_factory=dict)

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict (pairs as two-element lists)."""
        return {"dense": [list(p) for p in self.dense],
                "lexical": [list(p) for p in self.lexical],
                "cosines": [[u, c] for u, c in self.cosines.items()],
                "enclosing": [[u, p] for u, p in self.enclosing.items()]}

    @classmethod
    def from_json(cls, data: object) -> Sides:
        """The sides a :meth:`to_json` dict describes (ValueError if malformed)."""
        if not isinstance(data, dict):
            raise ValueError("merge sides must be an object")
        enclosing = {u: int(p) for u, p in _pairs(data.get("enclosing", []))
                     if float(p).is_integer()}
        return cls(_pairs(data.get("dense")), _pairs(data.get("lexical")),
                   dict(_pairs(data.get("cosines"))), enclosing)


def _pairs(value: object) -> list[tuple[int, float]]:
    if not isinstance(value, list):
        raise ValueError("merge sides hold lists of [unit id, score]")
    pairs = []
    for item in value:
        if (not isinstance(item, list) or len(item) != 2 or not isinstance(item[0], int)
                or isinstance(item[0], bool) or not isinstance(item[1], int | float)):
            raise ValueError("merge sides hold lists of [unit id, score]")
        pairs.append((item[0], float(item[1])))
    return pairs


@dataclass(frozen=True)
class Pick:
    """A unit a merge took from one index: its merged score, its dense cosine when the
    pooled dense side holds it (the hit's ``similarity``), and its cosine to the query
    (what its confidence rests on; None without a stored vector)."""

    unit_id: int
    score: float
    similarity: float | None
    cosine: float | None

    def to_json(self) -> list[object]:
        """A JSON-ready list."""
        return [self.unit_id, self.score, self.similarity, self.cosine]

    @classmethod
    def from_json(cls, data: object) -> Pick:
        """The pick a :meth:`to_json` list describes (ValueError if malformed)."""
        if (not isinstance(data, list) or len(data) != 4 or not isinstance(data[0], int)
                or isinstance(data[0], bool)
                or not all(v is None or isinstance(v, int | float) for v in data[1:])
                or data[1] is None):
            raise ValueError("a pick is [unit id, score, similarity or null, cosine or null]")
        return cls(data[0], float(data[1]), _maybe(data[2]), _maybe(data[3]))


def _maybe(value: object) -> float | None:
    return None if value is None else float(value)  # type: ignore[arg-type]


@runtime_checkable
class MergeSource(Protocol):
    """The three steps of the ``shared`` merge, which :class:`~codeseek.api.Index` and
    :class:`~codeseek.client.DaemonService` answer."""

    def merge_basis(self, queries: Sequence[Query]) -> Basis:
        """The model, the fusion and each query's BM25 statistics."""
        ...

    def merge_sides(self, queries: Sequence[Query],
                    stats: Sequence[CorpusStats]) -> list[Sides]:
        """Each query's candidates, keyword scores under ``stats``."""
        ...

    def merge_hits(self, queries: Sequence[Query], picks: Sequence[Sequence[Pick]],
                   off_topic: Sequence[float] | None = None) -> list[list[SearchHit]]:
        """Each query's picked units as hits, in the order given, confidences against
        the off-topic questions' best cosines given."""
        ...


def pooled_ranking(sides: Sequence[Sides], k: int,
                   fusion: dict[str, object] | None = None) -> list[tuple[int, Pick]]:
    """The best ``k`` (index position, pick) of several indexes' candidates for one
    query, ranked as one index of them all ranks its own: each side's best
    ``max(200, 3 k)`` of the pool, one :func:`~codeseek.fusion.fuse`. Ties go to the
    higher cosine, then to the index given first, then to the lower unit id."""
    from codeseek.fusion import CANDIDATES, DEFAULT_FUSION, Fusion, fuse

    n = max(CANDIDATES, min(k, MAX_CANDIDATES) * 3)
    dense = sorted(((-c, r, u) for r, side in enumerate(sides) for u, c in side.dense))[:n]
    lexical = sorted(((-s, r, u) for r, side in enumerate(sides) for u, s in side.lexical))[:n]
    keys = sorted({(r, u) for _, r, u in dense} | {(r, u) for _, r, u in lexical})
    number = {key: i for i, key in enumerate(keys)}  # ascending number: index, then unit id
    similarity = {number[(r, u)]: -c for c, r, u in dense}
    # a helper's enclosing unit outside the pool is numbered -1: no candidate is
    enclosing = {number[(r, u)]: number.get((r, p), -1) for r, side in enumerate(sides)
                 for u, p in side.enclosing.items() if (r, u) in number}
    ranked = fuse([(number[(r, u)], -c) for c, r, u in dense],
                  [(number[(r, u)], -s) for s, r, u in lexical],
                  DEFAULT_FUSION if fusion is None else Fusion.from_json(fusion),
                  enclosing)[:k]
    own = [{**side.cosines, **dict(side.dense)} for side in sides]
    return [(keys[item][0], Pick(keys[item][1], score, similarity.get(item),
                                 own[keys[item][0]].get(keys[item][1])))
            for item, score in ranked]


def candidates_for(k: int) -> int:
    """How many candidates each index gives for a merged answer of ``k`` hits."""
    return min(max(MIN_CANDIDATES, 3 * k), MAX_CANDIDATES)


def standardised(hits: Sequence[SearchHit]) -> list[float]:
    """Each hit's fused score in standard deviations from its list's mean (a list of
    one hit, or a flat list: 0 for each)."""
    if len(hits) < 2:
        return [0.0] * len(hits)
    scores = [hit.score for hit in hits]
    mean = sum(scores) / len(scores)
    spread = math.sqrt(sum((s - mean) ** 2 for s in scores) / len(scores))
    if spread == 0:
        return [0.0] * len(hits)
    return [(s - mean) / spread for s in scores]


def merge(answers: Sequence[tuple[str, Sequence[SearchHit]]], k: int,
          kind: str = "served") -> list[SearchHit]:
    """The best ``k`` of several repositories' answers to one query (``answers``: the
    repository root and its candidates, best first), by ``kind``: ``served`` (each
    index's fused score as it is) or ``restandardised`` (:func:`standardised` over
    each repository's candidates)."""
    if kind not in ("served", "restandardised"):
        raise ValueError(f"unknown merge kind {kind!r}")
    pooled: list[tuple[float, float, int, int, SearchHit, str]] = []
    for order, (repo, hits) in enumerate(answers):
        values = standardised(hits) if kind == "restandardised" else [h.score for h in hits]
        for position, (hit, z) in enumerate(zip(hits, values, strict=True)):
            cosine = -2.0 if hit.similarity is None else hit.similarity
            pooled.append((-z, -cosine, order, position, hit, repo))
    pooled.sort(key=lambda row: row[:4])
    return [replace(hit, rank=rank, score=-negated, repo=repo)
            for rank, (negated, _, _, _, hit, repo) in enumerate(pooled[:k], 1)]


class MultiService:
    """The :class:`~codeseek.service.SearchService` of several repositories' indexes.

    ``services`` pairs each repository root (as it is shown in hits) with its
    service; the multi-service owns them and closes them all. ``kind`` is the
    merge rule: ``shared`` (the default; see the module's docstring) or one of
    :func:`merge`'s.
    """

    def __init__(self, services: Sequence[tuple[str, SearchService]],
                 kind: str = MERGE_KIND) -> None:
        if not services:
            raise InvalidQuery("no repository to search")
        self.services = list(services)
        self.kind = kind

    def search(self, query: Query) -> list[SearchHit]:
        """The best ``query.k`` units of all the repositories."""
        return next(iter(self.search_many([query])))

    def search_many(self, queries: Sequence[Query]) -> Iterable[list[SearchHit]]:
        """Each query's merged answer, in order (each index answers the whole batch once
        per step)."""
        if not queries:
            return []
        if self.kind == "shared":
            shared = self._shared(queries)
            if shared is not None:
                return shared
        kind = "served" if self.kind == "shared" else self.kind
        wider = [replace(q, k=candidates_for(q.k)) for q in queries]
        per_repo = [(repo, list(service.search_many(wider))) for repo, service in self.services]
        return [merge([(repo, answers[i]) for repo, answers in per_repo], query.k, kind)
                for i, query in enumerate(queries)]

    def _shared(self, queries: Sequence[Query]) -> list[list[SearchHit]] | None:
        """The ``shared`` merge (see the module's docstring); None when a service cannot
        take part or the indexes' models differ (their cosines are not comparable)."""
        sources: list[MergeSource] = []
        for _, service in self.services:
            if not isinstance(service, MergeSource):
                return None
            sources.append(service)
        bases = [source.merge_basis(queries) for source in sources]
        if len({basis.model_id for basis in bases}) > 1:
            return None
        fusions = [basis.fusion for basis in bases]
        fusion = fusions[0] if all(f == fusions[0] for f in fusions) else None
        stats = [CorpusStats.combined(basis.stats[i] for basis in bases)
                 for i in range(len(queries))]
        sides = [source.merge_sides(queries, stats) for source in sources]
        ranked = [pooled_ranking([own[i] for own in sides], query.k, fusion)
                  for i, query in enumerate(queries)]
        picks = [[[pick for r, pick in ranking if r == position] for ranking in ranked]
                 for position in range(len(sources))]
        # the union's baseline: each off-topic question's best cosine over all indexes
        off_topic = [max(known) for known in (
            [c for c in column if c is not None]
            for column in zip(*(basis.off_topic for basis in bases), strict=True)) if known]
        found = [source.merge_hits(queries, picks[position], off_topic)
                 for position, source in enumerate(sources)]
        return [self._assembled(ranking, [own[i] for own in found])
                for i, ranking in enumerate(ranked)]

    def _assembled(self, ranking: Sequence[tuple[int, Pick]],
                   found: Sequence[Sequence[SearchHit]]) -> list[SearchHit]:
        """One query's merged hits: each index's hits (``found``) in the pooled order,
        ranked afresh, with the merged score and the repository they come from."""
        hits = {(position, hit.unit_id): hit
                for position, own in enumerate(found) for hit in own}
        answer: list[SearchHit] = []
        for position, pick in ranking:
            hit = hits.get((position, pick.unit_id))
            if hit is not None:  # a unit gone between the steps is left out
                answer.append(replace(hit, rank=len(answer) + 1, score=pick.score,
                                      repo=self.services[position][0]))
        return answer

    def neighbours(self, query: Query) -> list[SearchHit]:
        """Refused: a unit id names a unit of one index (see :meth:`neighbours_in`)."""
        raise InvalidQuery("neighbours are looked up in one repository; give one --repo")

    def neighbours_in(self, repo: str, query: Query) -> list[SearchHit]:
        """The neighbours of a unit of the repository ``repo`` (as its hits name it),
        found in that repository's index, each hit naming it."""
        for root, service in self.services:
            if root == repo:
                return [replace(hit, repo=root) for hit in service.neighbours(query)]
        raise InvalidQuery(f"{repo}: not one of the repositories searched")

    def status(self) -> IndexStatus:
        """Refused: each index has its own status (see :meth:`statuses`)."""
        raise InvalidQuery("several indexes are open; ask each repository's status")

    def statuses(self) -> list[IndexStatus]:
        """Each repository's index status, in the order given."""
        return [service.status() for _, service in self.services]

    def daemon_status(self) -> dict[str, Any] | None:
        """None: several services answer (each one's own says whether a daemon did)."""
        return None

    def close(self) -> None:
        """Close every repository's service."""
        for _, service in self.services:
            service.close()


WORKSPACE_FILE = "codeseek.toml"
MAX_WORKSPACE_BYTES = 1024 * 1024  # as for codeseek.toml read as settings


def find_workspace(start: Path, repo_root: Path | None) -> Path | None:
    """The workspace file that governs ``start``: the nearest ``codeseek.toml`` at or
    above it holding a ``[workspace]`` table, unless the repository ``start`` lies in
    (``repo_root``, the folder a search of one repository would take; None: none) is
    nearer (a workspace file in the repository's root folder itself still counts). A
    file that is not a regular file, not UTF-8 or not TOML is passed over here (reading
    it as settings reports it)."""
    import tomllib

    from codeseek.errors import FileRefused
    from codeseek.safefs import read_regular_file

    start = start.resolve()
    root = None if repo_root is None else repo_root.resolve()
    for folder in (start, *start.parents):
        try:
            data = tomllib.loads(read_regular_file(folder / WORKSPACE_FILE,
                                                   MAX_WORKSPACE_BYTES).decode("utf-8"))
        except (OSError, FileRefused, UnicodeDecodeError, tomllib.TOMLDecodeError):
            data = {}
        if isinstance(data.get("workspace"), dict):
            return folder / WORKSPACE_FILE
        if folder == root:
            return None  # the repository is nearer than any workspace file above it
    return None


def workspace_repos(path: Path) -> list[Path]:
    """The repositories a workspace file lists: TOML with ``[workspace] repos = [...]``,
    each path relative to the file's folder. Raises ValueError with a one-line message
    naming the file for a missing or malformed file."""
    import tomllib

    try:
        data = tomllib.loads(path.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise ValueError(f"{path}: no such workspace file") from None
    except IsADirectoryError:
        raise ValueError(f"{path}: a folder, not a workspace file") from None
    except OSError as exc:
        raise ValueError(f"{path}: cannot read the workspace file: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise ValueError(f"{path}: not UTF-8 text (byte offset {exc.start})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ValueError(f"{path}: not valid TOML: {exc}") from None
    table = data.get("workspace")
    repos = table.get("repos") if isinstance(table, dict) else None
    if not isinstance(repos, list) or not repos or not all(isinstance(r, str) for r in repos):
        raise ValueError(f'{path}: wants [workspace] repos = ["PATH", ...] (a non-empty '
                         "list of folder paths)")
    return [path.parent / repo for repo in repos]
