"""The daemon's client: what ``codeseek search``, ``status`` and the UI use to
ask a running ``codeseek watch`` instead of loading the index themselves.

It imports nothing heavy (no numpy, no model), so a search through the
daemon costs little more than starting Python. The protocol is described in
:mod:`codeseek.daemon`.

A search through the daemon takes the same inputs as one in process: a batch
goes in as many requests as it takes to keep each one small (at most
:data:`QUERIES_PER_REQUEST` queries, about :data:`HITS_PER_REQUEST` hits and
:data:`REQUEST_BYTES`, all within the daemon's limits), the answers are read
as they arrive, one request after another on one connection, and nothing caps
their size. Only a single query larger than a whole request
(:data:`MAX_REQUEST_BYTES`) does not fit; it raises :class:`TooLargeForDaemon`
before anything is sent. A daemon that is listening but fails (breaks off,
times out, answers garbage) raises :class:`~codeseek.errors.DaemonError`; only
"no daemon listens" is :class:`DaemonUnavailable`, which callers answer in
process.
"""

from __future__ import annotations

import json
import socket
from collections.abc import Callable, Iterator, Sequence
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

from codeseek import errors, safefs
from codeseek.bm25 import CorpusStats
from codeseek.errors import CodeseekError, DaemonError
from codeseek.hits import SearchHit
from codeseek.multi import Basis, Pick, Sides
from codeseek.query import DEFAULT_K, MAX_K, Filters, Query, as_queries, filters_of
from codeseek.service import IndexStatus, Notice

if TYPE_CHECKING:
    from codeseek.api import Index

T = TypeVar("T")

PROTOCOL_VERSION = 2
SOCKET_NAME = "daemon.sock"
CLIENT_TIMEOUT = 30.0

# The daemon's limits (codeseek.daemon enforces them; the client fits its requests to them).
MAX_REQUEST_BYTES = 16 * 1024 * 1024  # one request line
MAX_QUERIES = 1000  # queries in one search request
# MAX_K (the largest k) lives in codeseek.query, beside the Query it bounds.

# How much the client puts in one request, so that each answer stays a few MB and
# comes well within CLIENT_TIMEOUT, even from a real model on a busy machine.
QUERIES_PER_REQUEST = 250
REQUEST_BYTES = 1024 * 1024
HITS_PER_REQUEST = 10_000
# A search across repositories sends its three steps (codeseek.multi) in chunks of this
# many queries: each query's candidates are up to 2 x 200 pairs, so an answer stays small.
MERGE_QUERIES_PER_REQUEST = 50


class DaemonUnavailable(Exception):
    """No daemon listens on this index's socket (the caller works without it)."""


class TooLargeForDaemon(DaemonUnavailable):
    """One query does not fit in a daemon request; the caller answers it in process
    (and says why)."""


class DaemonClient:
    """Talks to a running daemon.

    Every call raises :class:`DaemonUnavailable` if no daemon listens, and
    :class:`~codeseek.errors.DaemonError` if one listens but fails to answer.
    """

    def __init__(self, index_dir: Path, timeout: float = CLIENT_TIMEOUT) -> None:
        self.socket_path = index_dir / SOCKET_NAME
        self.timeout = timeout

    def request(self, message: dict[str, Any]) -> dict[str, Any]:
        """Send one request and return the response (errors re-raised as CodeseekError)."""
        connection = self.connect()
        try:
            return connection.exchange(message)
        finally:
            connection.close()

    def connect(self) -> Connection:
        """A connection to the daemon, for one request after another."""
        try:
            if not safefs.check_socket(self.socket_path):  # a link is never followed
                raise DaemonUnavailable(str(self.socket_path))
        except errors.IndexFolderUnsafe as exc:
            raise DaemonUnavailable(str(exc)) from exc
        return Connection(self.socket_path, self.timeout)

    def present(self) -> bool:
        """Whether the daemon's socket is there (whether a daemon listens on it is
        found by the first request: a crashed daemon leaves its socket behind)."""
        try:
            return safefs.check_socket(self.socket_path)
        except errors.IndexFolderUnsafe:
            return False

    def search_stream(self, queries: Sequence[str | Query], k: int = DEFAULT_K, *,
                      filters: Filters | None = None, languages: Sequence[str] = (),
                      paths: Sequence[str] = (), kinds: Sequence[str] = ()
                      ) -> Iterator[list[SearchHit]]:
        """Each query's answer in order, read as the daemon sends them (a text is
        searched with ``k`` and the filters; a :class:`Query` carries its own).

        Connects at once: DaemonUnavailable and TooLargeForDaemon come from this
        call, before any answer; a failure later in the batch is a DaemonError.
        Each request is answered from one committed state of the index, so a batch
        sent in several requests may straddle an update, as separate searches would.
        """
        batch = as_queries(queries, k, filters_of(filters, languages, paths, kinds))
        requests = search_requests(batch)
        return _answers(self.connect(), requests)

    def search_many(self, queries: Sequence[str | Query], k: int = DEFAULT_K, *,
                    filters: Filters | None = None, languages: Sequence[str] = (),
                    paths: Sequence[str] = (), kinds: Sequence[str] = ()
                    ) -> list[list[SearchHit]]:
        """The daemon's answers, as the in-process search would give them."""
        return list(self.search_stream(queries, k, filters=filters, languages=languages,
                                       paths=paths, kinds=kinds))

    def search(self, query: str | Query, k: int = DEFAULT_K, *,
               filters: Filters | None = None, languages: Sequence[str] = (),
               paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """One query's answer."""
        return self.search_many([query], k, filters=filters, languages=languages,
                                paths=paths, kinds=kinds)[0]

    def neighbours(self, unit: int | Query, k: int = DEFAULT_K, *,
                   filters: Filters | None = None, languages: Sequence[str] = (),
                   paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The unit's neighbours (the units whose meaning is nearest its own), found by
        the daemon."""
        query = unit if isinstance(unit, Query) else Query(
            unit_id=unit, k=k, filters=filters_of(filters, languages, paths, kinds))
        response = self.request({"op": "neighbours", "query": _sent(query).to_json()})
        results = response.get("results")
        if not isinstance(results, list) or len(results) != 1:
            raise DaemonError(f"the codeseek daemon on {self.socket_path} failed to answer "
                              "(its answer does not match the request); see its log, or "
                              "stop it to search without it")
        return [SearchHit(**hit) for hit in results[0]]

    def merge_basis(self, queries: Sequence[Query]) -> Basis:
        """The first step of a search across several repositories (:mod:`codeseek.multi`):
        the index's model, fusion, off-topic cosines and each query's BM25 statistics."""
        answers = self._merge_exchange("merge_basis", queries, lambda start, end: {})
        bases = [Basis.from_json(answer.get("basis")) for answer in answers]
        return replace(bases[0], stats=[s for basis in bases for s in basis.stats])

    def merge_sides(self, queries: Sequence[Query],
                    stats: Sequence[CorpusStats]) -> list[Sides]:
        """The second step: each query's candidates, keyword scores under ``stats``."""
        answers = self._merge_exchange(
            "merge_sides", queries,
            lambda start, end: {"stats": [s.to_json() for s in stats[start:end]]})
        return [Sides.from_json(item) for answer in answers
                for item in _results(answer, answer["_count"])]

    def merge_hits(self, queries: Sequence[Query], picks: Sequence[Sequence[Pick]],
                   off_topic: Sequence[float] | None = None) -> list[list[SearchHit]]:
        """The last step: each query's picked units as hits."""
        def extra(start: int, end: int) -> dict[str, Any]:
            return {"picks": [[p.to_json() for p in chosen] for chosen in picks[start:end]],
                    "off_topic": None if off_topic is None else list(off_topic)}

        answers = self._merge_exchange("merge_hits", queries, extra)
        try:
            return [[SearchHit(**hit) for hit in hits] for answer in answers
                    for hits in _results(answer, answer["_count"])]
        except TypeError as exc:
            raise DaemonError(f"the codeseek daemon on {self.socket_path} failed to answer "
                              "(its answer holds hits of another form)") from exc

    def _merge_exchange(self, op: str, queries: Sequence[Query],
                        extra: Callable[[int, int], dict[str, Any]]) -> list[dict[str, Any]]:
        """One request per chunk of MERGE_QUERIES_PER_REQUEST queries, on one connection;
        each answer is marked with its chunk's query count (``_count``)."""
        requests = []
        for start in range(0, len(queries), MERGE_QUERIES_PER_REQUEST):
            end = min(start + MERGE_QUERIES_PER_REQUEST, len(queries))
            request = {"op": op, "queries": [_sent(q).to_json() for q in queries[start:end]],
                       **extra(start, end)}
            if len(json.dumps({"v": PROTOCOL_VERSION, **request})) + 1 > MAX_REQUEST_BYTES:
                raise TooLargeForDaemon(f"a {op} request is larger than a daemon request "
                                        f"may be ({MAX_REQUEST_BYTES:,} bytes)")
            requests.append((request, end - start))
        connection = self.connect()
        try:
            return [{**connection.exchange(request), "_count": count}
                    for request, count in requests]
        finally:
            connection.close()

    def status(self) -> dict[str, Any]:
        """The daemon's status response."""
        return self.request({"op": "status"})

    def shutdown(self) -> None:
        """Ask the daemon to stop."""
        self.request({"op": "shutdown"})


class Connection:
    """One connection to the daemon: requests sent one after another, each answer
    read whole, however long its line."""

    def __init__(self, socket_path: Path, timeout: float) -> None:
        self.socket_path = socket_path
        self.timeout = timeout
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        sock.settimeout(timeout)
        try:
            sock.connect(str(socket_path))
        except (FileNotFoundError, ConnectionRefusedError) as exc:
            sock.close()  # a socket file nobody listens on: a crashed daemon's
            raise DaemonUnavailable(f"{socket_path}: {exc.strerror}") from exc
        except OSError as exc:
            sock.close()
            raise self._failed(exc) from exc
        self._sock = sock
        self._reader = sock.makefile("rb")

    def close(self) -> None:
        """Close the connection."""
        self._reader.close()
        self._sock.close()

    def exchange(self, message: dict[str, Any]) -> dict[str, Any]:
        """Send one request and read its answer (an error answer is raised)."""
        try:
            self._sock.sendall(json.dumps({"v": PROTOCOL_VERSION, **message}).encode() + b"\n")
            data = self._reader.readline()
        except OSError as exc:
            raise self._failed(exc) from exc
        if not data.endswith(b"\n"):
            raise self._failed("it closed the connection" if not data else
                               "its answer broke off")
        try:
            response = json.loads(data)
        except (ValueError, RecursionError) as exc:
            raise self._failed("its answer is not JSON") from exc
        if not isinstance(response, dict):
            raise self._failed("its answer is not a JSON object")
        if not response.get("ok"):
            error_type = errors.error_class(str(response.get("kind")))
            if error_type is not None:
                raise error_type(response.get("error", "daemon error"))
            raise CodeseekError(f"the daemon refused the request: {response.get('error')}")
        return response

    def _failed(self, reason: OSError | str) -> DaemonError:
        if isinstance(reason, TimeoutError):
            reason = f"no answer within {self.timeout:.0f} s"
        elif isinstance(reason, OSError):
            reason = reason.strerror or type(reason).__name__
        return DaemonError(f"the codeseek daemon on {self.socket_path} failed to answer "
                           f"({reason}); see its log, or stop it to search without it")


def _sent(query: Query) -> Query:
    """The query as sent: a k beyond every unit of the index has the same answer."""
    return query if query.k <= MAX_K else replace(query, k=MAX_K)


def search_requests(queries: Sequence[Query]) -> list[dict[str, Any]]:
    """The search requests that carry a batch within the daemon's limits, in order.

    Raises TooLargeForDaemon when one query alone is larger than a request may be.
    """
    most = min(QUERIES_PER_REQUEST, MAX_QUERIES)
    base: dict[str, Any] = {"op": "search", "queries": []}
    overhead = len(json.dumps({"v": PROTOCOL_VERSION, **base})) + 1  # + the newline
    requests: list[dict[str, Any]] = []
    chunk: list[dict[str, Any]] = []
    size, hits = overhead, 0
    for query in map(_sent, queries):
        record = query.to_json()
        cost = len(json.dumps(record)) + 2  # ASCII JSON (non-ASCII escaped) and ", "
        if overhead + cost > MAX_REQUEST_BYTES:
            text = query.text or ""
            raise TooLargeForDaemon(
                f"a query of {len(text.encode('utf-8', 'surrogatepass')):,} bytes is "
                f"larger than a daemon request may be ({MAX_REQUEST_BYTES:,} bytes)")
        wanted = max(query.k, 0)
        if chunk and (len(chunk) >= most or size + cost > REQUEST_BYTES
                      or hits + wanted > HITS_PER_REQUEST):
            requests.append({**base, "queries": chunk})
            chunk, size, hits = [], overhead, 0
        chunk.append(record)
        size += cost
        hits += wanted
    if chunk:
        requests.append({**base, "queries": chunk})
    return requests


def _results(answer: dict[str, Any], count: int) -> list[Any]:
    """An answer's ``results``, checked to hold one entry per query asked."""
    results = answer.get("results")
    if not isinstance(results, list) or len(results) != count:
        raise DaemonError("the codeseek daemon failed to answer (its answer does not match "
                          "the request); see its log, or stop it to search without it")
    return results


def _answers(connection: Connection, requests: list[dict[str, Any]]
             ) -> Iterator[list[SearchHit]]:
    try:
        for request in requests:
            results = connection.exchange(request).get("results")
            if not isinstance(results, list) or len(results) != len(request["queries"]):
                raise connection._failed("its answer does not match the request")
            for hits in results:
                try:
                    answer = [SearchHit(**hit) for hit in hits]
                except TypeError as exc:
                    raise connection._failed("its answer holds hits of another form") from exc
                yield answer
    finally:
        connection.close()


class DaemonService:
    """A running daemon as a :class:`~codeseek.service.SearchService` (what
    :func:`codeseek.connect` returns when one listens).

    Each call opens its own connection. When no daemon listens (a crashed daemon's
    socket, or one stopped since), the call and every later one are answered in
    process by the same index opened locally (``open_local``, called only then, so
    a search through a daemon never loads the index's modules); so is a query too
    large for any request (said to ``notice``). A daemon that listens but fails
    raises :class:`~codeseek.errors.DaemonError`.
    """

    def __init__(self, client: DaemonClient, open_local: Callable[[], Index],
                 notice: Notice | None = None) -> None:
        self.client = client
        self._open_local = open_local
        self._index: Index | None = None
        self.notice = notice
        self.gone = False  # no daemon listened at the last call: the index answers

    @property
    def index(self) -> Index:
        """The index in this process, opened on first need."""
        if self._index is None:
            self._index = self._open_local()
        return self._index

    def search(self, query: Query) -> list[SearchHit]:
        """One query's answer."""
        return next(iter(self.search_many([query])))

    def search_many(self, queries: Sequence[Query]) -> Iterator[list[SearchHit]]:
        """Each query's answer, read as the daemon sends them."""
        if not self.gone:
            try:
                return self.client.search_stream(queries)
            except TooLargeForDaemon as exc:
                if self.notice is not None:
                    self.notice(f"codeseek: {exc}; answering in this process")
            except DaemonUnavailable:
                self.gone = True
        return iter(self.index.search_many(queries))

    def neighbours(self, query: Query) -> list[SearchHit]:
        """The unit's neighbours, found by the daemon."""
        if not self.gone:
            try:
                return self.client.neighbours(query)
            except DaemonUnavailable:
                self.gone = True
        return self.index.neighbours(query)

    def merge_basis(self, queries: Sequence[Query]) -> Basis:
        """The first step of a search across repositories, by the daemon."""
        return self._either(lambda: self.client.merge_basis(queries),
                            lambda index: index.merge_basis(queries))

    def merge_sides(self, queries: Sequence[Query],
                    stats: Sequence[CorpusStats]) -> list[Sides]:
        """The second step of a search across repositories, by the daemon."""
        return self._either(lambda: self.client.merge_sides(queries, stats),
                            lambda index: index.merge_sides(queries, stats))

    def merge_hits(self, queries: Sequence[Query], picks: Sequence[Sequence[Pick]],
                   off_topic: Sequence[float] | None = None) -> list[list[SearchHit]]:
        """The last step of a search across repositories, by the daemon."""
        return self._either(lambda: self.client.merge_hits(queries, picks, off_topic),
                            lambda index: index.merge_hits(queries, picks, off_topic))

    def _either(self, remote: Callable[[], T], local: Callable[[Index], T]) -> T:
        """The daemon's answer; the index's in process when none listens (or the request
        is too large for one, said to ``notice``)."""
        if not self.gone:
            try:
                return remote()
            except TooLargeForDaemon as exc:
                if self.notice is not None:
                    self.notice(f"codeseek: {exc}; answering in this process")
            except DaemonUnavailable:
                self.gone = True
        return local(self.index)

    def status(self) -> IndexStatus:
        """The index's status, as the daemon reports it."""
        if not self.gone:
            try:
                return IndexStatus(**self.client.status()["index"])
            except DaemonUnavailable:
                self.gone = True
        return self.index.status()

    def daemon_status(self) -> dict[str, Any] | None:
        """The daemon's own status; None once it has gone."""
        if not self.gone:
            try:
                daemon: dict[str, Any] = self.client.status()["daemon"]
                return daemon
            except DaemonUnavailable:
                self.gone = True
        return None

    def close(self) -> None:
        """Close the local index, if it was opened."""
        if self._index is not None:
            self._index.close()
            self._index = None
