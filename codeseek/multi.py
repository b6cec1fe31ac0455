"""Search across several repositories: :class:`MultiService`, one
:class:`~codeseek.service.SearchService` over the services of several indexes.

Each repository's index is asked on its own (each service comes from
:func:`codeseek.service.connect`, so a repository with a running daemon is
answered by it) and the answers are merged into one ranking.

Raw BM25 or cosine scores of different indexes are not comparable (BM25
depends on each index's own term statistics). The served fused score already
is a standardised one, though: with the served fusion (:mod:`codeseek.search`,
``zscore``) each side is in standard deviations over that index's own 200 best
candidates, so a fused score says how far a unit stands out of its own index's
candidates. Two merges were measured (``tests/test_multi.py``, the agreement
of two halves of standard-library packages with one index of the whole):

* ``served`` (the default): rank all candidates by their index's fused score
  as it is;
* ``restandardised``: standardise each repository's fused scores once more
  over its candidate list (score minus the list's mean, over its standard
  deviation), as the brief of the feature suggested.

The second standardises over the truncated top of a distribution, which
measured worse (see the figures in the test and README), so ``served`` is the
default. Each index is asked for more candidates than ``k``
(:func:`candidates_for`) either way. Each merged hit's ``score`` is the merge
value and its ``repo`` the repository root it comes from; ties go to the
higher cosine, then to the repository given first.

Neighbours and status belong to one index: they are refused here.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

from codeseek.errors import InvalidQuery
from codeseek.hits import SearchHit
from codeseek.query import Query
from codeseek.service import IndexStatus, SearchService

MIN_CANDIDATES = 50
"""Each index is asked for at least this many candidates (and at least 3 k)."""
MAX_CANDIDATES = 2**31 - 1  # the daemon's largest k (codeseek.client.MAX_K)


MERGE_KINDS = ("served", "restandardised")
MERGE_KIND = "served"


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
          kind: str = MERGE_KIND) -> list[SearchHit]:
    """The best ``k`` of several repositories' answers to one query (``answers``: the
    repository root and its candidates, best first), by ``kind``: ``served`` (each
    index's fused score as it is) or ``restandardised`` (:func:`standardised` over
    each repository's candidates)."""
    if kind not in MERGE_KINDS:
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
    merge rule (:func:`merge`).
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
        """Each query's merged answer, in order (each index answers the whole batch once)."""
        wider = [replace(q, k=candidates_for(q.k)) for q in queries]
        per_repo = [(repo, list(service.search_many(wider))) for repo, service in self.services]
        return [merge([(repo, answers[i]) for repo, answers in per_repo], query.k, self.kind)
                for i, query in enumerate(queries)]

    def neighbours(self, query: Query) -> list[SearchHit]:
        """Refused: a unit id names a unit of one index."""
        raise InvalidQuery("neighbours are looked up in one repository; give one --repo")

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
