"""What a sync reports: counts by outcome, failures, the commits it made."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

OUTCOMES = ("added", "modified", "removed", "moved", "unchanged", "failed")


@dataclass(frozen=True)
class Failure:
    source: str
    path: str
    reason: str

    def as_dict(self) -> dict[str, str]:
        return {"source": self.source, "path": self.path, "reason": self.reason}


@dataclass
class Counts:
    """Per-outcome document counts and chunk counts of a batch or a whole sync."""

    documents: dict[str, int] = field(default_factory=lambda: dict.fromkeys(OUTCOMES, 0))
    chunks: dict[str, int] = field(
        default_factory=lambda: {"embedded": 0, "reused": 0, "added": 0, "deleted": 0}
    )

    def add(self, other: Counts) -> None:
        for k, v in other.documents.items():
            self.documents[k] += v
        for k, v in other.chunks.items():
            self.chunks[k] += v


@dataclass(frozen=True)
class CommitResult:
    commit_id: str
    version: int
    counts: Counts


@dataclass
class SyncReport:
    """What one sync did, over all its sources and batches."""

    commits: list[CommitResult] = field(default_factory=list)
    counts: Counts = field(default_factory=Counts)
    failures: list[Failure] = field(default_factory=list)
    version: int = 0
    interrupted: bool = False
    # Per source, files its listing left out because upwell does not read their type: suffix
    # ("" for none) -> count.
    skipped: dict[str, dict[str, int]] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        last = self.commits[-1] if self.commits else None
        return {
            "commit": last.commit_id if last else None,
            "version": self.version,
            "commits": [c.commit_id for c in self.commits],
            "documents": dict(self.counts.documents),
            "chunks": dict(self.counts.chunks),
            "failures": [f.as_dict() for f in self.failures],
            "interrupted": self.interrupted,
            "skipped": {name: dict(counts) for name, counts in self.skipped.items()},
        }
