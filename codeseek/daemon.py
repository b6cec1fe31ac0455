"""The background service: index, watch, and answer queries on a local socket.

``codeseek watch`` runs a :class:`Daemon` in the foreground. It holds
``daemon.lock`` in the index folder for its whole life (a second daemon on the
same index is refused), listens on ``daemon.sock`` (mode 0600; a connection
from another user is refused; a socket left by a crashed daemon is replaced),
starts watching, indexes the repository, then applies what changed meanwhile and
keeps it fresh with a :class:`~codeseek.watch.Watcher` (so an edit made during the
first build is never missed). The model is loaded once; queries are answered while
indexing goes on.

The protocol is JSON Lines: one request object per line, one response per
line. Every message carries ``"v": PROTOCOL_VERSION`` (2); a request of
another version gets an error that names both. A query is the JSON of a
:class:`~codeseek.query.Query` (``{"text": "...", "k": 10, "filters":
{"languages": [], "paths": [], "kinds": [], "since": null}}``, or ``unit_id``
in place of ``text``), a hit the fields of a :class:`~codeseek.hits.SearchHit`.
Requests:

* ``{"v": 2, "op": "search", "queries": [query, ...]}`` ->
  ``{"v": 2, "ok": true, "results": [[hit, ...], ...]}``
* ``{"v": 2, "op": "neighbours", "query": query}`` -> the neighbours of the
  query's unit (the units whose meaning is nearest its own), as ``results``
* ``{"v": 2, "op": "status"}`` -> ``{"v": 2, "ok": true, "index": {...}, "daemon": {...}}``
* the three steps of a search across several repositories (:mod:`codeseek.multi`; a
  client fans out to one daemon per repository):
  ``{"v": 2, "op": "merge_basis", "queries": [...]}`` -> ``"basis"``: the JSON of a
  :class:`~codeseek.multi.Basis`; ``{"op": "merge_sides", "queries": [...], "stats":
  [...]}`` (one :class:`~codeseek.bm25.CorpusStats` per query) -> ``"results"``: one
  :class:`~codeseek.multi.Sides` per query; ``{"op": "merge_hits", "queries": [...],
  "picks": [[pick, ...], ...], "off_topic": [cosine, ...]}`` (``pick``: the JSON of a
  :class:`~codeseek.multi.Pick`) -> ``"results"``: hits, as ``search`` gives them
* ``{"v": 2, "op": "shutdown"}`` -> ``{"v": 2, "ok": true}``

An error is ``{"v": 2, "ok": false, "error": "...", "kind": "InvalidQuery"}``, its
message one line. Every request line gets one answer, whatever it holds: text
that is not UTF-8 or not JSON, nesting too deep to parse, a whole number outside
64 bits or a lone surrogate in the text (outside path patterns, which may name
files whose names are not UTF-8) are malformed requests; an unexpected failure
is answered as a ``DaemonError`` and logged on one line. A request line over
:data:`MAX_REQUEST_BYTES` is refused and the connection closed; the limits
(:data:`MAX_REQUEST_BYTES`, :data:`MAX_QUERIES`) live in :mod:`codeseek.client`,
which splits a batch to fit them (:data:`MAX_K` in :mod:`codeseek.query`). The daemon only ever
returns what the index holds; it reads no file on request.
"""

from __future__ import annotations

import dataclasses
import fcntl
import json
import os
import signal
import socket
import socketserver
import struct
import sys
import threading
import time
from collections.abc import Callable
from contextlib import suppress
from typing import Any

from codeseek import safefs
from codeseek.api import Index
from codeseek.bm25 import CorpusStats
from codeseek.client import (
    CLIENT_TIMEOUT,
    MAX_QUERIES,
    MAX_REQUEST_BYTES,
    PROTOCOL_VERSION,
    SOCKET_NAME,
)
from codeseek.display import printable
from codeseek.errors import CodeseekError, IndexLocked
from codeseek.multi import Pick
from codeseek.query import MAX_K, Query
from codeseek.refine import refinement_of
from codeseek.watch import RECONCILE_SECONDS, Watcher

LOCK_NAME = "daemon.lock"
MERGE_OPS = ("merge_basis", "merge_sides", "merge_hits")
INT64 = range(-(2**63), 2**63)  # what SQLite and the index's ids can hold
UNCHECKED_TEXT = frozenset({"paths"})  # patterns may name files whose names are not UTF-8

Log = Callable[[str], None]


# -- requests ------------------------------------------------------------------------


def _error(message: str, kind: str = "ProtocolError") -> dict[str, Any]:
    return {"v": PROTOCOL_VERSION, "ok": False, "error": " ".join(message.splitlines()),
            "kind": kind}


def _check_values(request: dict[str, Any]) -> None:
    """Refuse what no field can use: a whole number outside 64 bits, a lone surrogate.

    Walks the request without recursion (it may nest as deep as the parser allows);
    a value is named by the innermost field that holds it.
    """
    stack: list[tuple[str, Any]] = [(key, key) for key in request]
    stack.extend(request.items())
    while stack:
        key, item = stack.pop()
        if isinstance(item, dict):
            stack.extend((inner, inner) for inner in item)
            stack.extend(item.items())
        elif isinstance(item, list):
            stack.extend((key, value) for value in item)
        elif isinstance(item, int) and not isinstance(item, bool) and item not in INT64:
            raise ValueError(f"{_name(key)} holds a whole number outside 64 bits")
        elif isinstance(item, str) and key not in UNCHECKED_TEXT and not _is_unicode(item):
            raise ValueError(f"{_name(key)} holds a lone surrogate (text that is not "
                             "valid Unicode)")


def _name(key: str) -> str:
    return f"'{printable(key)[:40]}'"


def _is_unicode(text: str) -> bool:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _queries(request: dict[str, Any]) -> list[Query]:
    value = request.get("queries")
    if not isinstance(value, list) or not 1 <= len(value) <= MAX_QUERIES:
        raise ValueError(f"'queries' must be a list of 1 to {MAX_QUERIES} queries")
    return [_checked(Query.from_json(item)) for item in value]


def _per_query(request: dict[str, Any], field: str, count: int) -> list[Any]:
    value = request.get(field)
    if not isinstance(value, list) or len(value) != count:
        raise ValueError(f"'{field}' must be a list with one entry per query")
    return value


def _checked(query: Query) -> Query:
    if query.k > MAX_K:
        raise ValueError(f"'k' must be a whole number up to {MAX_K}")
    return query  # below 1: the index refuses it with the same words as in process


class Daemon:
    """Index + watcher + socket server for one repository."""

    def __init__(self, index: Index, *, log: Log | None = None, poll: bool = False,
                 reconcile_seconds: float = RECONCILE_SECONDS,
                 debounce: float | None = None, refine: bool = False) -> None:
        self.index = index
        self.refine = refine  # build with the static tier first (codeseek/refine.py)
        self.log = log or (lambda message: None)
        folder = index.settings.index_dir
        self.socket_path = folder / SOCKET_NAME
        self.lock_path = folder / LOCK_NAME
        kwargs: dict[str, Any] = {"log": self.log, "poll": poll,
                                  "reconcile_seconds": reconcile_seconds}
        if debounce is not None:
            kwargs["debounce"] = debounce
        self.watcher = Watcher(index, **kwargs)
        self.state = "starting"
        self.started_at = time.time()
        self.queries_served = 0
        self._lock_handle: Any = None
        self._server: socketserver.UnixStreamServer | None = None
        self._server_thread: threading.Thread | None = None
        self._stopped = threading.Event()

    # -- lifecycle -------------------------------------------------------------------

    def start(self) -> None:
        """Take the lock, listen, watch, index, then apply what changed meanwhile.

        Returns once watching. The watcher collects changes from before the first
        build starts, so a file written during the build is applied right after it.
        """
        self._take_lock()
        self._listen()
        self.watcher.observe()
        self.state = "indexing"
        self.log(f"codeseek: indexing {self.index.settings.repo}")
        summary = self.index.update(refine=self.refine)
        self.log(f"codeseek: {summary.files} files, {summary.units} units indexed "
                 f"({summary.embedded} embedded, {summary.seconds:.1f} s)")
        refinement = refinement_of(self.index.store)
        if refinement is not None:
            self.log(f"codeseek: searchable now; refining with the {refinement.tier} tier "
                     f"behind ({refinement.refined} of {refinement.total} units so far)")
        self.watcher.start()  # applies what arrived during the build first
        self.state = "watching"
        self.log(f"codeseek: watching ({self.watcher.state.mode}); queries on {self.socket_path}")

    def wait(self) -> None:
        """Block until a shutdown request or stop()."""
        while not self._stopped.wait(0.5):
            continue

    def stop(self) -> None:
        """Stop watching and serving; save; release the socket and the lock."""
        if self.state == "stopped":
            return
        self.state = "stopping"
        self.watcher.stop()
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
        if self._lock_handle is not None:  # only the lock's owner made the socket
            with suppress(FileNotFoundError):
                self.socket_path.unlink()
            self._lock_handle.close()
            self._lock_handle = None
        self.state = "stopped"
        self._stopped.set()

    def _take_lock(self) -> None:
        handle = safefs.open_lock(self.lock_path)  # held for the daemon's life; no link
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            handle.seek(0)
            pid = handle.read().decode("utf-8", "replace").strip() or "?"
            handle.close()
            raise IndexLocked(
                f"a codeseek daemon (pid {pid}) already watches the index at "
                f"{self.index.settings.index_dir}; stop it first or use it as it is"
            ) from None
        handle.seek(0)
        handle.truncate()
        handle.write(str(os.getpid()).encode())
        self._lock_handle = handle

    def _listen(self) -> None:
        # we hold the daemon lock, so a socket of ours left here is a crashed daemon's;
        # anything else under its name (a link, a file) is refused, never removed
        if safefs.check_socket(self.socket_path):
            with suppress(FileNotFoundError):
                self.socket_path.unlink()
        daemon = self

        class Handler(socketserver.StreamRequestHandler):
            timeout = CLIENT_TIMEOUT

            def handle(self) -> None:
                daemon._serve_connection(self)

        class Server(socketserver.ThreadingMixIn, socketserver.UnixStreamServer):
            daemon_threads = True
            request_queue_size = 128  # many clients may connect at once

            def handle_error(self, request: Any, client_address: Any) -> None:
                daemon._log_unexpected("serving a connection")  # one line, no traceback

        old_umask = os.umask(0o177)
        try:
            server = Server(str(self.socket_path), Handler)
        finally:
            os.umask(old_umask)
        os.chmod(self.socket_path, 0o600)
        self._server = server
        self._server_thread = threading.Thread(target=server.serve_forever,
                                               name="codeseek-socket", daemon=True)
        self._server_thread.start()

    # -- serving ---------------------------------------------------------------------

    def _serve_connection(self, handler: socketserver.StreamRequestHandler) -> None:
        if not _same_user(handler.request):
            _send(handler, _error("refused: the daemon serves only its own user", "Refused"))
            return
        while True:
            try:
                line = handler.rfile.readline(MAX_REQUEST_BYTES + 1)
            except (OSError, ValueError):
                return
            if not line:
                return
            if len(line) > MAX_REQUEST_BYTES:
                _send(handler, _error(f"request too large (over {MAX_REQUEST_BYTES} bytes)"))
                return
            response = self.handle_line(line)
            if not _send(handler, response):
                return
            if response.get("op") == "shutdown":
                threading.Thread(target=self.stop, daemon=True).start()
                return

    def handle_line(self, line: bytes) -> dict[str, Any]:
        """The response to one request line (never raises)."""
        try:
            return self._answer(line)
        except Exception:  # noqa: BLE001 - one bad request must not take the daemon down
            return _error(self._log_unexpected("answering a request"), "DaemonError")

    def _log_unexpected(self, doing: str) -> str:
        """Log the exception being handled on one line; return the line."""
        exc = sys.exc_info()[1]
        message = printable(f"the daemon failed {doing}: unexpected "
                            f"{type(exc).__name__}: {exc}")
        self.log(f"error: {message}")
        return message

    def _answer(self, line: bytes) -> dict[str, Any]:
        try:
            request = json.loads(line.decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            return _error("malformed request: not a JSON object on one line")
        except RecursionError:
            return _error("malformed request: nested too deeply")
        if not isinstance(request, dict):
            return _error("malformed request: not a JSON object on one line")
        try:
            _check_values(request)
        except ValueError as exc:
            return _error(f"malformed request: {exc}")
        if request.get("v") != PROTOCOL_VERSION:
            return _error(f"unsupported protocol version {request.get('v')!r}; "
                          f"this daemon speaks {PROTOCOL_VERSION} (a codeseek of another "
                          "version sent the request; use the same codeseek for both)")
        op = request.get("op")
        try:
            if op == "search":
                return self._search(request)
            if op == "neighbours":
                return self._neighbours(request)
            if op == "status":
                return {"v": PROTOCOL_VERSION, "ok": True, "index": self.index.status().to_json(),
                        "daemon": self.daemon_status()}
            if op == "shutdown":
                return {"v": PROTOCOL_VERSION, "ok": True, "op": "shutdown"}
            if op in MERGE_OPS:
                return self._merge_step(op, request)
        except ValueError as exc:
            return _error(f"malformed request: {exc}")
        except CodeseekError as exc:
            return _error(str(exc), type(exc).__name__)
        # the merge steps are a client's, not named to people
        return _error(f"unknown op {op!r}; use search, neighbours, status or shutdown")

    def _search(self, request: dict[str, Any]) -> dict[str, Any]:
        queries = _queries(request)
        results = self.index.search_many(queries)
        self.queries_served += len(queries)
        return {"v": PROTOCOL_VERSION, "ok": True,
                "results": [[dataclasses.asdict(hit) for hit in hits] for hits in results]}

    def _merge_step(self, op: str, request: dict[str, Any]) -> dict[str, Any]:
        queries = _queries(request)
        if op == "merge_basis":
            basis = self.index.merge_basis(queries)
            return {"v": PROTOCOL_VERSION, "ok": True, "basis": basis.to_json()}
        if op == "merge_sides":
            stats = _per_query(request, "stats", len(queries))
            sides = self.index.merge_sides(queries, [CorpusStats.from_json(s) for s in stats])
            self.queries_served += len(queries)
            return {"v": PROTOCOL_VERSION, "ok": True,
                    "results": [side.to_json() for side in sides]}
        picks = _per_query(request, "picks", len(queries))
        off_topic = request.get("off_topic")
        if off_topic is not None and (not isinstance(off_topic, list) or not all(
                isinstance(c, int | float) and not isinstance(c, bool) for c in off_topic)):
            raise ValueError("'off_topic' must be a list of cosines")
        chosen = []
        for item in picks:
            if not isinstance(item, list):
                raise ValueError("'picks' holds one list of picks per query")
            chosen.append([Pick.from_json(pick) for pick in item])
        hits = self.index.merge_hits(queries, chosen, off_topic)
        return {"v": PROTOCOL_VERSION, "ok": True,
                "results": [[dataclasses.asdict(hit) for hit in answer] for answer in hits]}

    def _neighbours(self, request: dict[str, Any]) -> dict[str, Any]:
        query = _checked(Query.from_json(request.get("query")))
        if query.unit_id is None:
            raise ValueError("a neighbours query holds 'unit_id', not 'text'")
        hits = self.index.neighbours(query)
        return {"v": PROTOCOL_VERSION, "ok": True,
                "results": [[dataclasses.asdict(hit) for hit in hits]]}

    def daemon_status(self) -> dict[str, Any]:
        """What the daemon is doing."""
        watch = self.watcher.state
        return {
            "pid": os.getpid(), "state": self.state, "started_at": self.started_at,
            "watcher": watch.mode, "pending": len(self.watcher.queue),
            "last_update": watch.last_update, "last_change": watch.last_summary,
            "last_error": watch.last_error, "queries_served": self.queries_served,
            "units_embedded": watch.embedded, "batches": watch.batches,
        }


def _same_user(sock: socket.socket) -> bool:
    try:
        raw = sock.getsockopt(socket.SOL_SOCKET, socket.SO_PEERCRED, struct.calcsize("3i"))
    except OSError:
        return False
    _pid, uid, _gid = struct.unpack("3i", raw)
    return uid == os.getuid()


def _send(handler: socketserver.StreamRequestHandler, message: dict[str, Any]) -> bool:
    try:
        handler.wfile.write(json.dumps(message).encode("utf-8") + b"\n")
        handler.wfile.flush()
    except OSError:
        return False
    return True


def run_foreground(index: Index, log: Log, *, poll: bool = False,
                   refine: bool = False) -> None:
    """``codeseek watch``: run until Ctrl-C, SIGTERM or a shutdown request."""
    daemon = Daemon(index, log=log, poll=poll, refine=refine)

    def on_signal(signum: int, frame: object) -> None:
        threading.Thread(target=daemon.stop, daemon=True).start()

    previous = {sig: signal.signal(sig, on_signal) for sig in (signal.SIGTERM, signal.SIGINT)}
    try:
        daemon.start()
        daemon.wait()
    finally:
        began = daemon.state != "starting"  # "starting": refused, nothing to stop
        daemon.stop()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        if began:
            log("codeseek: stopped")
