"""codeseek: search a local source repository by meaning.

The public surface is listed in ``__all__``; everything else is internal.
Names are imported on first use, so ``codeseek --help`` stays fast.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

_EXPORTS = {
    "CodeUnit": "codeseek.units",
    "CodeseekError": "codeseek.errors",
    "Embedder": "codeseek.embed",
    "EvalReport": "codeseek.evaluate",
    "FakeEmbedder": "codeseek.embed",
    "Filters": "codeseek.query",
    "Index": "codeseek.api",
    "IndexStatus": "codeseek.service",
    "Query": "codeseek.query",
    "SearchHit": "codeseek.hits",
    "SearchService": "codeseek.service",
    "UpdateSummary": "codeseek.indexer",
    "connect": "codeseek.service",
    "open_index": "codeseek.api",
}

__all__ = [
    "CodeUnit",
    "CodeseekError",
    "Embedder",
    "EvalReport",
    "FakeEmbedder",
    "Filters",
    "Index",
    "IndexStatus",
    "Query",
    "SearchHit",
    "SearchService",
    "UpdateSummary",
    "__version__",
    "connect",
    "open_index",
]

if TYPE_CHECKING:
    from codeseek.api import Index, open_index
    from codeseek.embed import Embedder, FakeEmbedder
    from codeseek.errors import CodeseekError
    from codeseek.evaluate import EvalReport
    from codeseek.hits import SearchHit
    from codeseek.indexer import UpdateSummary
    from codeseek.query import Filters, Query
    from codeseek.service import IndexStatus, SearchService, connect
    from codeseek.units import CodeUnit


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'codeseek' has no attribute {name!r}")
