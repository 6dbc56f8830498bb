"""Prometheus metrics of the service, in a registry of its own (never the process-global one).

The service records each sync it runs (``record_sync``), each failure (``record_failure``), each
automatic compaction (``record_compaction``) and its queue depth; ``render()`` is the text
exposition format that ``GET /metrics`` serves. Failure reasons are folded into a few fixed
classes, so the label set stays small however many different messages documents produce.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
)

CONTENT_TYPE = CONTENT_TYPE_LATEST

# (keyword in the reason, class). First match wins; the words are those the extractors and the
# folder connector put in their messages.
_REASON_CLASSES: tuple[tuple[str, str], ...] = (
    ("encrypted", "encrypted"),
    ("no text layer", "no_text_layer"),
    ("empty", "empty"),
    ("no text", "empty"),
    ("no cue text", "empty"),
    ("only whitespace", "empty"),
    ("limit", "too_large"),
    ("vanished", "unreadable"),
    ("permission", "unreadable"),
    ("could not read", "unreadable"),
    ("doctype", "unsupported"),
    ("not supported", "unsupported"),
    ("unsupported", "unsupported"),
)


def reason_class(reason: str) -> str:
    """A short, fixed label for a document failure message ("corrupt" when nothing else fits)."""
    text = reason.lower()
    for word, label in _REASON_CLASSES:
        if word in text:
            return label
    return "corrupt"


class ServiceMetrics:
    """The metric families of one service process."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.documents = Gauge(
            "upwell_documents", "Searchable documents in the index", ["source"], registry=r
        )
        self.chunks = Gauge("upwell_chunks", "Chunks in the index", ["source"], registry=r)
        self.commits = Counter("upwell_commits", "Commits written by this process", registry=r)
        self.chunks_embedded = Counter(
            "upwell_chunks_embedded", "Chunks whose text was embedded", registry=r
        )
        self.chunks_reused = Counter(
            "upwell_chunks_reused", "Chunks whose vector was reused", registry=r
        )
        self.failures = Counter(
            "upwell_failures",
            "Documents or sources that failed, by reason class",
            ["reason"],
            registry=r,
        )
        self.sync_seconds = Histogram(
            "upwell_sync_duration_seconds",
            "Time of one sync of one source, listing to last commit",
            buckets=(0.05, 0.1, 0.25, 0.5, 1, 2, 5, 10, 30, 60, 120, 300),
            registry=r,
        )
        self.queue_depth = Gauge(
            "upwell_queue_depth", "Paths waiting to settle or to be synced", registry=r
        )
        self.cluster_workers = Gauge(
            "upwell_cluster_workers", "Workers of the Dask cluster in use (0: none)", registry=r
        )
        self.cluster_tasks = Gauge(
            "upwell_cluster_tasks_in_flight",
            "Extraction and embedding tasks the cluster is running",
            registry=r,
        )
        self.last_commit = Gauge(
            "upwell_last_commit_timestamp_seconds",
            "Unix time of the last successful commit by this process",
            registry=r,
        )
        self.compactions = Counter(
            "upwell_compactions", "Automatic compactions run by this process", registry=r
        )
        self.compactions_deferred = Counter(
            "upwell_compactions_deferred",
            "Times a due automatic compaction waited for searches to pause",
            registry=r,
        )
        self.last_compaction = Gauge(
            "upwell_last_compaction_timestamp_seconds",
            "Unix time of the last automatic compaction by this process",
            registry=r,
        )

    def record_sync(self, report: Mapping[str, Any], seconds: float) -> None:
        """Count one sync report (``SyncReport.as_dict()``) and its duration."""
        self.sync_seconds.observe(seconds)
        commits = len(report["commits"])
        if commits:
            self.commits.inc(commits)
            self.last_commit.set(time.time())
        self.chunks_embedded.inc(report["chunks"]["embedded"])
        self.chunks_reused.inc(report["chunks"]["reused"])
        for failure in report["failures"]:
            self.failures.labels(reason=reason_class(failure["reason"])).inc()

    def record_compaction(self) -> None:
        """One automatic compaction done (a failed one is a ``compaction`` failure)."""
        self.compactions.inc()
        self.last_compaction.set(time.time())

    def record_failure(self, reason: str) -> None:
        """A failure that is not a document's: ``source_unreachable``, ``confirmation`` ..."""
        self.failures.labels(reason=reason).inc()

    def record_totals(self, status: Mapping[str, Any]) -> None:
        """Per-source gauges from ``Index.status()``."""
        for s in status["sources"]:
            self.documents.labels(source=s["name"]).set(s["documents"])
            self.chunks.labels(source=s["name"]).set(s["chunks"])

    def record_cluster(self, info: Mapping[str, Any] | None) -> None:
        self.cluster_workers.set((info or {}).get("workers", 0))
        self.cluster_tasks.set((info or {}).get("tasks_in_flight", 0))

    def render(self) -> bytes:
        return generate_latest(self.registry)
