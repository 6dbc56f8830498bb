"""Which old versions retention would remove, said before anything is removed."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from pipeline.history.log import Commit, commits, tags
from pipeline.history.rollback import PAUSED
from pipeline.store.tables import Store

# --- retention and compaction ------------------------------------------------------------------


@dataclass(frozen=True)
class RetentionPlan:
    """Versions older than the cut-off that retention would remove, per table."""

    cutoff: datetime
    commits_lost: tuple[Commit, ...]
    protected: tuple[str, ...]

    def describe(self) -> str:
        if not self.commits_lost:
            return f"No commit is older than {self.cutoff.isoformat(timespec='seconds')}."
        first, last = self.commits_lost[0], self.commits_lost[-1]
        return (
            f"Retention removes the stored versions of {len(self.commits_lost)} commits older "
            f"than {self.cutoff.isoformat(timespec='seconds')} ({first.id} at {first.time} to "
            f"{last.id} at {last.time}): you will no longer be able to search as of them, diff "
            "them or roll back to them. Kept whatever their age: "
            + (", ".join(self.protected) if self.protected else "the latest version")
            + "."
        )


def plan_retention(store: Store, keep: timedelta, now: datetime | None = None) -> RetentionPlan:
    now = now or datetime.now(UTC)
    cutoff = now - keep
    log = commits(store)
    named = tags(store)
    pinned_ids = set(named.values())
    paused = store.settings().get(PAUSED)
    protected = [f"tag {n}" for n in sorted(named)]
    if paused:
        protected.append(f"the paused rollback {paused['commit']}")
    lost = tuple(c for c in log[:-1] if c.when < cutoff and c.id not in pinned_ids)
    return RetentionPlan(cutoff=cutoff, commits_lost=lost, protected=tuple(protected))
