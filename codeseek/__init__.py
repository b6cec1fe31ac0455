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
    "Filters": "codeseek.search",
    "Index": "codeseek.api",
    "IndexStatus": "codeseek.api",
    "SearchHit": "codeseek.search",
    "UpdateSummary": "codeseek.indexer",
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
    "SearchHit",
    "UpdateSummary",
    "__version__",
    "open_index",
]

if TYPE_CHECKING:
    from codeseek.api import Index, IndexStatus, open_index
    from codeseek.embed import Embedder, FakeEmbedder
    from codeseek.errors import CodeseekError
    from codeseek.evaluate import EvalReport
    from codeseek.indexer import UpdateSummary
    from codeseek.search import Filters, SearchHit
    from codeseek.units import CodeUnit


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'codeseek' has no attribute {name!r}")
