"""Rollback with a crash-safe intent, and the pause it may leave behind."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from pipeline.errors import StoreError, first_line
from pipeline.history.log import (
    PAUSE_TAG,
    TAGGED_TABLES,
    Commit,
    chunk_ids_at,
    dataset_at,
    documents_at,
)
from pipeline.store.ids import event_tombstone_id
from pipeline.store.schema import commit_row
from pipeline.store.tables import Store

# --- rollback ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class RollbackPlan:
    """What a rollback to ``target`` would change in what is searchable."""

    target: Commit
    current: Commit
    come_back: tuple[str, ...]
    go_away: tuple[str, ...]
    change: tuple[str, ...]

    def describe(self) -> str:
        def names(ids: tuple[str, ...]) -> str:
            shown = ", ".join(ids[:5])
            return shown + (f" and {len(ids) - 5} more" if len(ids) > 5 else "")

        lines = [
            f"Rolling back to commit {self.target.id} (version {self.target.version}, "
            f"{self.target.time}) from {self.current.id} (version {self.current.version}).",
            f"  {len(self.come_back)} documents come back"
            + (f": {names(self.come_back)}" if self.come_back else ""),
            f"  {len(self.go_away)} documents go away"
            + (f": {names(self.go_away)}" if self.go_away else ""),
            f"  {len(self.change)} documents change"
            + (f": {names(self.change)}" if self.change else ""),
            "The current state stays in history: this rollback can itself be rolled back.",
        ]
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        return {
            "target": self.target.as_dict(),
            "current": self.current.as_dict(),
            "documents": {
                "come_back": list(self.come_back),
                "go_away": list(self.go_away),
                "change": list(self.change),
            },
        }


def plan_rollback(store: Store, target: Commit, current: Commit) -> RollbackPlan:
    before = documents_at(store, current.documents_version)
    after = documents_at(store, target.documents_version)
    dataset_at(store, "chunks", target.version)  # fail now, not half-way, if it is gone
    return RollbackPlan(
        target=target,
        current=current,
        come_back=tuple(sorted(d for d in after if d not in before)),
        go_away=tuple(sorted(d for d in before if d not in after)),
        change=tuple(
            sorted(
                d
                for d in after
                if d in before and after[d]["content_hash"] != before[d]["content_hash"]
            )
        ),
    )


PENDING_ROLLBACK = "pending_rollback"
PAUSED = "paused"


def start_rollback(store: Store, plan: RollbackPlan, commit_id: str, now: str, pause: bool) -> None:
    """Record the intent, then carry it out. The intent makes an interrupted rollback finishable:
    the next writer to open the index completes it (``complete_pending``)."""
    versions = store.versions()
    intent = {
        "commit_id": commit_id,
        "time": now,
        "target": plan.target.id,
        "target_chunks_version": plan.target.version,
        "target_documents_version": plan.target.documents_version,
        "chunks_before": versions["chunks"],
        "documents_before": versions["documents"],
        "from_commit": plan.current.id,
        "go_away": list(plan.go_away),
        "come_back": list(plan.come_back),
        "change": list(plan.change),
        "pause": pause,
    }
    store.update_setting(PENDING_ROLLBACK, intent)
    finish_rollback(store, intent)


def complete_pending(store: Store) -> dict[str, Any] | None:
    """Finish a rollback that a crash interrupted; returns its intent, or None if none was."""
    intent = store.settings().get(PENDING_ROLLBACK)
    if intent:
        finish_rollback(store, intent)
    return intent or None


def finish_rollback(store: Store, intent: dict[str, Any]) -> None:
    """Idempotent: each step checks whether it already happened (one writer at a time)."""
    # Chunks first: they are what readers search.
    for table, key in (("chunks", "chunks_before"), ("documents", "documents_before")):
        handle = store.table(table)
        handle.checkout_latest()
        if int(handle.version) == int(intent[key]):
            try:
                handle.restore(int(intent[f"target_{table}_version"]))
            except (ValueError, RuntimeError, OSError) as exc:
                raise StoreError(f"cannot restore {table}: {first_line(exc)}") from None
    removed_at = intent["time"]
    tombstones = []
    before = documents_at(store, int(intent["documents_before"]))
    for doc_id in intent["go_away"]:
        row = before.get(doc_id)
        if row is None:
            continue
        tombstones.append(
            {
                "tombstone_id": event_tombstone_id(doc_id, "rollback", intent["commit_id"]),
                "doc_id": doc_id,
                "source": row["source"],
                "path": row["path"],
                "content_hash": row["content_hash"],
                "removed_at": removed_at,
                "reason": "rolled back",
                "detail": json.dumps({"rollback_to": intent["target"]}),
                "chunk_count": None,
                "chunks_version": int(store.table("chunks").version),
                "commit_id": intent["commit_id"],
            }
        )
    store.add_tombstones(tombstones)
    if not any(c["commit_id"] == intent["commit_id"] for c in store.commits()):
        versions = store.versions()
        before_chunks = chunk_ids_at(store, int(intent["chunks_before"]))
        after_chunks = chunk_ids_at(store, versions["chunks"])
        store.add_commit(
            commit_row(
                commit_id=intent["commit_id"],
                time=intent["time"],
                trigger=f"rollback to {intent['target']}",
                versions=versions,
                documents={
                    "added": len(intent["come_back"]),
                    "modified": len(intent["change"]),
                    "removed": len(intent["go_away"]),
                },
                chunks={
                    "added": len(after_chunks.keys() - before_chunks.keys()),
                    "deleted": len(before_chunks.keys() - after_chunks.keys()),
                },
                changes={
                    "added": intent["come_back"],
                    "modified": intent["change"],
                    "removed": intent["go_away"],
                    "rollback_to": intent["target"],
                },
            )
        )
    if intent.get("pause"):
        pause = {
            "since": intent["time"],
            "commit": intent["commit_id"],
            "rollback_to": intent["target"],
            "before_chunks_version": int(intent["chunks_before"]),
            "before_documents_version": int(intent["documents_before"]),
        }
        # Keep the state the rollback replaced until the pause is lifted, whatever retention says.
        for table, key in (("chunks", "chunks_before"), ("documents", "documents_before")):
            lance_tags = store.table(table).tags
            if PAUSE_TAG in lance_tags.list():
                lance_tags.delete(PAUSE_TAG)
            lance_tags.create(PAUSE_TAG, int(intent[key]))
        store.update_setting(PAUSED, pause)
    store.update_setting(PENDING_ROLLBACK, None)


def resume(store: Store) -> dict[str, Any] | None:
    """Lift a pause; returns what it was, or None if syncing was not paused."""
    paused = store.settings().get(PAUSED)
    if not paused:
        return None
    for table in TAGGED_TABLES:
        lance_tags = store.table(table).tags
        if PAUSE_TAG in lance_tags.list():
            lance_tags.delete(PAUSE_TAG)
    store.update_setting(PAUSED, None)
    return paused
