"""The row layout of each of the six tables, defined once, and the builder of commit rows."""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import pyarrow as pa

from pipeline.records import StatFingerprints

FORMAT_VERSION = 1


#: Settings keys where maintenance records the versions it left: compaction and index builds
#: make versions no commit records, and must not look like a writer that died mid-batch.
MAINTAINED_VERSIONS = {
    "chunks": "maintained_chunks_version",
    "tombstones": "maintained_tombstones_version",
}


def commit_order(row: dict[str, Any]) -> tuple[int, int, str]:
    """Sort key of commit rows, oldest first. Table versions only grow and every commit writes
    the documents or the chunks table (a recovery may write only chunks), so the pair orders
    commits even within one millisecond; the time breaks what ties remain."""
    return (int(row["documents_version"]), int(row["chunks_version"]), row["time"])


#: The chunk columns the full-text (keyword) index covers.
KEYWORD_COLUMNS = ("text", "heading")


def chunks_schema(dimension: int) -> pa.Schema:
    return pa.schema(
        [
            pa.field("chunk_id", pa.string(), nullable=False),
            pa.field("doc_id", pa.string(), nullable=False),
            pa.field("source", pa.string()),
            pa.field("path", pa.string()),
            pa.field("ordinal", pa.int32()),
            pa.field("text", pa.string()),
            pa.field("context", pa.string()),
            pa.field("text_hash", pa.string()),
            pa.field("tokens", pa.int32()),
            pa.field("page_start", pa.int32()),
            pa.field("page_end", pa.int32()),
            pa.field("heading", pa.string()),
            pa.field("t_start", pa.float64()),
            pa.field("t_end", pa.float64()),
            pa.field("line_start", pa.int32()),
            pa.field("line_end", pa.int32()),
            pa.field("media_type", pa.string()),
            pa.field("vector", pa.list_(pa.float32(), dimension)),
        ]
    )


DOCUMENTS_SCHEMA = pa.schema(
    [
        pa.field("doc_id", pa.string(), nullable=False),
        pa.field("source", pa.string()),
        pa.field("path", pa.string()),
        pa.field("size", pa.int64()),
        pa.field("fingerprint", pa.string()),
        pa.field("content_hash", pa.string()),
        pa.field("media_type", pa.string()),
        pa.field("title", pa.string()),
        pa.field("status", pa.string()),  # ok | failed
        pa.field("error", pa.string()),
        pa.field("failed_fingerprint", pa.string()),
        pa.field("warnings", pa.string()),  # JSON list
        pa.field("segments", pa.string()),  # JSON: the extracted text, so no source is re-read
        pa.field("extractor_version", pa.string()),
        pa.field("chunk_count", pa.int32()),
        pa.field("last_commit", pa.string()),
        pa.field("updated_at", pa.string()),
    ]
)

# Everything but the (large) segments column: what planning a sync needs.
DOCUMENT_SUMMARY_COLUMNS = [f.name for f in DOCUMENTS_SCHEMA if f.name != "segments"]


@dataclass(frozen=True)
class DocumentBriefs:
    """Per item key of one source: the fingerprint at which it counts as unchanged (the
    last good one if the document is ok, the one that failed if it failed) and its content
    hash (None if it was never searchable)."""

    unchanged_if: dict[str, str | None]
    content_hash: dict[str, str | None]

    @cached_property
    def stat_fingerprints(self) -> StatFingerprints:
        """``unchanged_if`` as stat tuples, parsed once per briefs (a folder walk's form)."""
        return StatFingerprints.parse(self.unchanged_if)


TOMBSTONES_SCHEMA = pa.schema(
    [
        pa.field("tombstone_id", pa.string(), nullable=False),
        pa.field("doc_id", pa.string()),
        pa.field("source", pa.string()),
        pa.field("path", pa.string()),
        pa.field("content_hash", pa.string()),
        pa.field("removed_at", pa.string()),
        pa.field("reason", pa.string()),
        pa.field("detail", pa.string()),
        pa.field("chunk_count", pa.int32()),
        pa.field("chunks_version", pa.int64()),
        pa.field("commit_id", pa.string()),
    ]
)

COMMITS_SCHEMA = pa.schema(
    [
        pa.field("commit_id", pa.string(), nullable=False),
        pa.field("time", pa.string()),  # UTC, ISO 8601
        pa.field("trigger", pa.string()),
        pa.field("sources", pa.string()),  # JSON list
        pa.field("source_revision", pa.string()),  # e.g. the git commit a source was read at
        pa.field("documents_added", pa.int32()),
        pa.field("documents_modified", pa.int32()),
        pa.field("documents_removed", pa.int32()),
        pa.field("documents_moved", pa.int32()),
        pa.field("documents_unchanged", pa.int32()),
        pa.field("documents_failed", pa.int32()),
        pa.field("chunks_embedded", pa.int32()),
        pa.field("chunks_reused", pa.int32()),
        pa.field("chunks_added", pa.int32()),
        pa.field("chunks_deleted", pa.int32()),
        pa.field("seconds", pa.float64()),
        pa.field("chunks_version", pa.int64()),
        pa.field("documents_version", pa.int64()),
        pa.field("tombstones_version", pa.int64()),
        pa.field("changes", pa.string()),  # JSON: doc ids by outcome
    ]
)


#: The outcome counters of a commit row, in column order.
COMMIT_DOCUMENT_COUNTS = ("added", "modified", "removed", "moved", "unchanged", "failed")
COMMIT_CHUNK_COUNTS = ("embedded", "reused", "added", "deleted")


def commit_row(
    *,
    commit_id: str,
    time: str,
    trigger: str,
    versions: Mapping[str, int],
    sources: Iterable[str] = (),
    documents: Mapping[str, int] | None = None,
    chunks: Mapping[str, int] | None = None,
    seconds: float = 0.0,
    changes: Mapping[str, Any] | None = None,
    source_revision: str | None = None,
) -> dict[str, Any]:
    """One row of the commits table (``COMMITS_SCHEMA``): the only place such a row is built.

    ``versions`` are the table versions after the commit (``Store.versions()``); counts not
    given are 0, and ``sources`` are stored sorted.
    """
    documents = documents or {}
    chunks = chunks or {}
    return {
        "commit_id": commit_id,
        "time": time,
        "trigger": trigger,
        "sources": json.dumps(sorted(sources)),
        "source_revision": source_revision,
        **{f"documents_{k}": int(documents.get(k, 0)) for k in COMMIT_DOCUMENT_COUNTS},
        **{f"chunks_{k}": int(chunks.get(k, 0)) for k in COMMIT_CHUNK_COUNTS},
        "seconds": float(seconds),
        "chunks_version": int(versions["chunks"]),
        "documents_version": int(versions["documents"]),
        "tombstones_version": int(versions["tombstones"]),
        "changes": json.dumps(dict(changes or {})),
    }


def vectors_schema(dimension: int) -> pa.Schema:
    return pa.schema(
        [
            pa.field("text_hash", pa.string(), nullable=False),
            pa.field("vector", pa.list_(pa.float32(), dimension)),
        ]
    )


SETTINGS_SCHEMA = pa.schema(
    [pa.field("key", pa.string(), nullable=False), pa.field("value", pa.string())]
)

TABLES = ("chunks", "documents", "tombstones", "commits", "vectors", "settings")
