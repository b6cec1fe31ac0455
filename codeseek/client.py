"""The daemon's client: what ``codeseek search``, ``status`` and the UI use to
ask a running ``codeseek watch`` instead of loading the index themselves.

It imports nothing heavy (no numpy, no model), so a search through the
daemon costs little more than starting Python. The protocol is described in
:mod:`codeseek.daemon`.
"""

from __future__ import annotations

import json
import socket
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from codeseek import errors, safefs
from codeseek.errors import CodeseekError
from codeseek.hits import SearchHit

PROTOCOL_VERSION = 1
SOCKET_NAME = "daemon.sock"
CLIENT_TIMEOUT = 30.0


class DaemonUnavailable(Exception):
    """No daemon answers on this index's socket (the caller works without it)."""


class DaemonClient:
    """Talks to a running daemon; every call raises DaemonUnavailable if none answers."""

    def __init__(self, index_dir: Path, timeout: float = CLIENT_TIMEOUT) -> None:
        self.socket_path = index_dir / SOCKET_NAME
        self.timeout = timeout

    def request(self, message: dict[str, Any]) -> dict[str, Any]:
        """Send one request and return the response (errors re-raised as CodeseekError)."""
        try:
            if not safefs.check_socket(self.socket_path):  # a link is never followed
                raise DaemonUnavailable(str(self.socket_path))
        except errors.IndexFolderUnsafe as exc:
            raise DaemonUnavailable(str(exc)) from exc
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        sock.settimeout(self.timeout)
        try:
            sock.connect(str(self.socket_path))
            sock.sendall(json.dumps({"v": PROTOCOL_VERSION, **message}).encode() + b"\n")
            data = sock.makefile("rb").readline()
        except OSError as exc:
            raise DaemonUnavailable(f"{self.socket_path}: {exc}") from exc
        finally:
            sock.close()
        if not data:
            raise DaemonUnavailable(f"{self.socket_path}: no answer")
        response: dict[str, Any] = json.loads(data)
        if not response.get("ok"):
            error_type = getattr(errors, str(response.get("kind")), None)
            if isinstance(error_type, type) and issubclass(error_type, CodeseekError):
                raise error_type(response.get("error", "daemon error"))
            raise CodeseekError(f"the daemon refused the request: {response.get('error')}")
        return response

    def search_many(self, queries: Sequence[str], k: int = 10, *,
                    languages: Sequence[str] = (), paths: Sequence[str] = (),
                    kinds: Sequence[str] = ()) -> list[list[SearchHit]]:
        """The daemon's answers, as the in-process search would give them."""
        response = self.request({"op": "search", "queries": list(queries), "k": k,
                                 "languages": list(languages), "paths": list(paths),
                                 "kinds": list(kinds)})
        return [[SearchHit(**hit) for hit in hits] for hits in response["results"]]

    def search(self, query: str, k: int = 10, **filters: Sequence[str]) -> list[SearchHit]:
        """One query's answer."""
        return self.search_many([query], k, **filters)[0]

    def similar(self, unit_id: int, k: int = 10, *, languages: Sequence[str] = (),
                paths: Sequence[str] = (), kinds: Sequence[str] = ()) -> list[SearchHit]:
        """The units nearest to one unit's own vector ("more like this")."""
        response = self.request({"op": "similar", "unit_id": unit_id, "k": k,
                                 "languages": list(languages), "paths": list(paths),
                                 "kinds": list(kinds)})
        return [SearchHit(**hit) for hit in response["results"][0]]

    def status(self) -> dict[str, Any]:
        """The daemon's status response."""
        return self.request({"op": "status"})

    def shutdown(self) -> None:
        """Ask the daemon to stop."""
        self.request({"op": "shutdown"})
