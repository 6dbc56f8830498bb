"""upwell's Python API: keep a document vector index current, search it, walk its history.

    >>> from pipeline import Index
    >>> ix = Index(".upwell")
    >>> report = ix.sync(["sample_corpus"])
    >>> for hit in ix.search("torque for the crank bolts", k=3):
    ...     print(f"{hit.score:.3f} {hit.citation()}")

The names in ``__all__`` are the supported API; the sub-packages are the implementation and
may move. Each name is imported on first use, so importing one small module of the package
(``pipeline.errors``, say, from a connector) does not load the whole engine, and no module
below the facade can be caught in an import cycle through it.
"""

from __future__ import annotations

import importlib
from typing import Any

# name -> the module that defines it.
_API: dict[str, str] = {
    "Index": "pipeline.index",
    "Hit": "pipeline.index",
    "SyncReport": "pipeline.engine.reports",
    "Failure": "pipeline.engine.reports",
    "Commit": "pipeline.history.log",
    "Diff": "pipeline.history.log",
    "RollbackPlan": "pipeline.history.rollback",
    "RetentionPlan": "pipeline.history.retention",
    "Config": "pipeline.config",
    "load_config": "pipeline.config",
    "ChunkSettings": "pipeline.records",
    "Limits": "pipeline.records",
    "Progress": "pipeline.progress",
    "Embedder": "pipeline.embedding.base",
    "make_embedder": "pipeline.embedding",
    "UpwellError": "pipeline.errors",
    "UsageError": "pipeline.errors",
    "ConfirmationRequired": "pipeline.errors",
    "ExtractionError": "pipeline.errors",
    "SourceError": "pipeline.errors",
    "StoreError": "pipeline.errors",
    "IndexLocked": "pipeline.errors",
    "IndexMissing": "pipeline.errors",
    "ModelMismatch": "pipeline.errors",
    "UnknownVersion": "pipeline.errors",
    "SyncPaused": "pipeline.errors",
    "EmbedderError": "pipeline.errors",
}

__all__ = sorted(_API)


def __getattr__(name: str) -> Any:
    module = _API.get(name)
    if module is None:
        raise AttributeError(f"module 'pipeline' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
