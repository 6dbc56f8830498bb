"""Recovery: what a writer does before anything else, so a writer killed at any point leaves
nothing the next one cannot finish or undo."""

from __future__ import annotations

import json
import time
from collections import Counter
from typing import Any

from pipeline.engine.reports import OUTCOMES, CommitResult, Counts
from pipeline.history.erase import complete_pending_erase
from pipeline.history.rollback import complete_pending
from pipeline.store.ids import erased_token, new_commit_id, utc_now
from pipeline.store.schema import MAINTAINED_VERSIONS, chunks_schema, commit_row
from pipeline.store.tables import Store


def interrupted(store: Store) -> bool:
    """Whether a writer died mid-batch: the chunks or tombstones table is at a version that
    neither the last commit nor maintenance recorded."""
    last = store.last_commit_versions()
    current = store.versions()
    if last is None:
        return store.count("chunks") > 0 or store.count("tombstones") > 0
    settings = store.settings()
    return any(
        current[name] not in (last[name], settings.get(key))
        for name, key in MAINTAINED_VERSIONS.items()
    )


def recover_interrupted_batch(store: Store, trigger: str) -> CommitResult | None:
    """Finish the record of a batch whose writer died before its commit row. Every writer
    calls this first (the caller holds the writer lock); None when there is nothing to do.

    A batch writes tombstones, chunks, documents, then its commit row. Killed in between, it
    can leave (1) chunks of documents the documents table does not know: if the file was
    removed meanwhile, no later sync would name it again and its chunks would stay searchable;
    (2) tombstones naming a commit that never landed. Recovery deletes (1). Of (2), a
    tombstone whose document still has its row logs a removal that did not happen (the next
    sync logs it again if the file is still gone): it is deleted; one whose document row is
    gone logs a removal that did happen: the recovery commit adopts it. Then a commit row
    (trigger ``recover:TRIGGER``) records the versions as they now are. Until that row lands
    the versions still disagree, so a crash during recovery is recovered from next time. A
    writer that recorded versions first (a maintenance run, a rollback) would hide the crash:
    hence every writer, not only the next sync.
    """
    if not interrupted(store):
        return None
    started = time.monotonic()
    present = store.document_ids()
    chunks_of = Counter(store.chunk_doc_id_column())
    orphans = sorted(set(chunks_of) - present)
    counts = Counts()
    sources: set[str] = set()
    version = None
    if orphans:
        counts.chunks["deleted"] = sum(chunks_of[d] for d in orphans)
        sources = {d.split(":", 1)[0] for d in orphans}
        dimension = int(store.settings()["dimension"])
        version = store.replace_chunks(chunks_schema(dimension).empty_table(), orphans)
    commit_id = new_commit_id()
    changes: dict[str, Any] = {k: [] for k in OUTCOMES if k != "unchanged"}
    lost = store.tombstones_of_lost_commits()
    if lost:
        # An erasure's tombstones name the document by its token, not its id.
        present |= {erased_token(d) for d in present}
        store.drop_tombstones([t["tombstone_id"] for t in lost if t["doc_id"] in present])
        done = [t for t in lost if t["doc_id"] not in present]
        store.adopt_tombstones([t["tombstone_id"] for t in done], commit_id)
        for t in done:
            moved_to = json.loads(t["detail"] or "{}").get("moved_to")
            if moved_to:
                changes["moved"].append([t["doc_id"], moved_to])
            else:
                changes["removed"].append(t["doc_id"])
                counts.documents["removed"] += 1
            sources.add(t["doc_id"].split(":", 1)[0])
    versions = store.versions()
    store.add_commit(
        commit_row(
            commit_id=commit_id,
            time=utc_now(),
            trigger=f"recover:{trigger}",
            versions=versions,
            sources=sources,
            documents=counts.documents,
            chunks=counts.chunks,
            seconds=time.monotonic() - started,
            changes={**changes, "orphaned": orphans},
        )
    )
    return CommitResult(commit_id, version or versions["chunks"], counts)


def recover_for_writing(store: Store, trigger: str | None) -> None:
    """The one thing every writer does first, holding the lock: finish a rollback and an
    erasure that a crash interrupted (each is resumable), then, unless ``trigger`` is None (a
    sync does it itself, to report it), clean up what a writer killed mid-batch left, in a
    commit whose trigger is ``recover:TRIGGER``."""
    store.refresh()
    complete_pending(store)
    complete_pending_erase(store)
    if trigger is not None:
        recover_interrupted_batch(store, trigger)
