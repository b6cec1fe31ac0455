"""The terminal UI of codeseek (``codeseek ui``).

A thin textual layer over anything that answers ``search(query, k, languages=,
paths=, kinds=)``, ``neighbours(unit_id, k, ...)`` and ``status()``: the
in-process :class:`~codeseek.api.Index` or a client of the background service.
:class:`~codeseek.tui.app.CodeseekApp` takes that searcher in its constructor.
Names are imported on first use, so importing this package does not import
textual.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

_EXPORTS = {
    "CodeseekApp": "codeseek.tui.app",
    "LocalIndexer": "codeseek.tui.backend",
    "SearchBackend": "codeseek.tui.backend",
    "IndexBuilder": "codeseek.tui.backend",
}

__all__ = ["CodeseekApp", "IndexBuilder", "LocalIndexer", "SearchBackend"]

if TYPE_CHECKING:
    from codeseek.tui.app import CodeseekApp
    from codeseek.tui.backend import IndexBuilder, LocalIndexer, SearchBackend


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'codeseek.tui' has no attribute {name!r}")
