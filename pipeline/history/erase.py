"""Erasure, the one operation that rewrites history: it deletes a document's rows everywhere,
scrubs its names from the logs, drops every tag, compacts with deletions materialised and
removes every old version that still holds them. Resumable: the next writer finishes an erase
that was killed."""

from __future__ import annotations

import json
from datetime import timedelta
from typing import Any

from pipeline.history.rollback import PAUSED
from pipeline.store.ids import erased_token, event_tombstone_id, in_filter
from pipeline.store.schema import TABLES, commit_row
from pipeline.store.tables import Store
from pipeline.store.upkeep import compact_and_clean

PENDING_ERASE = "pending_erase"


def erase_documents(
    store: Store, doc_ids: list[str], *, commit_id: str, now: str
) -> dict[str, Any]:
    """Delete the documents everywhere and rewrite history so no version holds them.

    First an intent goes into the settings (what to erase and what that takes, worked out while
    the rows still exist); ``finish_erase`` then does every step in a way that can be repeated,
    so a writer killed midway is finished by the next one (``complete_pending_erase``).
    """
    docs = {d["doc_id"]: d for d in store.all_documents() if d["doc_id"] in set(doc_ids)}
    chunk_rows = (
        store.table("chunks")
        .to_lance()
        .to_table(columns=["doc_id", "text_hash"], filter=in_filter("doc_id", doc_ids))
    )
    erased_hashes = set(chunk_rows["text_hash"].to_pylist())
    kept = (
        store.table("chunks")
        .to_lance()
        .to_table(columns=["text_hash"], filter=f"NOT ({in_filter('doc_id', doc_ids)})")
    )
    shared = erased_hashes & set(kept["text_hash"].to_pylist())
    intent = {
        "commit_id": commit_id,
        "time": now,
        "doc_ids": list(doc_ids),
        "sources": {d: docs.get(d, {}).get("source") for d in doc_ids},
        "chunk_counts": {d: docs.get(d, {}).get("chunk_count") for d in doc_ids},
        "chunks_deleted": chunk_rows.num_rows,
        "vector_hashes": sorted(erased_hashes - shared),
        "tags_dropped": sorted(store.settings().get("tags", {})),
    }
    store.update_setting(PENDING_ERASE, intent)
    return finish_erase(store, intent)


def complete_pending_erase(store: Store) -> dict[str, Any] | None:
    """Finish an erasure that a crash interrupted; its result, or None if none was pending."""
    intent = store.settings().get(PENDING_ERASE)
    return finish_erase(store, intent) if intent else None


def finish_erase(store: Store, intent: dict[str, Any]) -> dict[str, Any]:
    """The steps of an erasure, each safe to repeat: log it (without content), delete the
    rows, scrub the logs' mentions of the names, drop the tags (they pin versions that hold
    the text), compact with deletions materialised and remove every old version, write the
    commit row; then forget the intent, and the settings versions that held it."""
    doc_ids, commit_id, now = intent["doc_ids"], intent["commit_id"], intent["time"]
    store.add_tombstones(
        [
            {
                "tombstone_id": event_tombstone_id(doc_id, "erased", commit_id),
                "doc_id": erased_token(doc_id),
                "source": intent["sources"].get(doc_id),
                "path": None,
                "content_hash": None,
                "removed_at": now,
                "reason": "erased",
                "detail": None,
                "chunk_count": intent["chunk_counts"].get(doc_id),
                "chunks_version": int(store.table("chunks").version) + 1,
                "commit_id": commit_id,
            }
            for doc_id in doc_ids
        ]
    )
    store.table("chunks").delete(in_filter("doc_id", doc_ids))
    store.table("documents").delete(in_filter("doc_id", doc_ids))
    vector_hashes = intent["vector_hashes"]
    for i in range(0, len(vector_hashes), 400):
        store.table("vectors").delete(in_filter("text_hash", vector_hashes[i : i + 400]))
    _scrub_logs(store, doc_ids)

    for name in TABLES:
        lance_tags = store.table(name).tags
        for tag in list(lance_tags.list()):
            lance_tags.delete(tag)
    settings = store.settings()
    if settings.get("tags"):
        store.update_setting("tags", {})
    if settings.get(PAUSED):
        store.update_setting(PAUSED, None)

    # Compaction and cleanup first, then the commit row, so the versions it names still exist
    # (a REF to the erase commit, a tag on it, search as of it).
    report = compact_and_clean(store, timedelta(0), materialize_deletions=True)
    if not any(c["commit_id"] == commit_id for c in store.commits()):
        versions = store.versions()
        store.add_commit(
            commit_row(
                commit_id=commit_id,
                time=now,
                trigger="erase",
                versions=versions,
                sources={s for s in intent["sources"].values() if s},
                documents={"removed": len(doc_ids)},
                chunks={"deleted": intent["chunks_deleted"]},
                changes={"erased": [erased_token(d) for d in doc_ids]},
            )
        )
    # The intent names the documents: drop it, then the settings versions that held it. A
    # crash before this line repeats the erasure (harmless); after it, only names remain in
    # an old settings version, until the next maintenance.
    store.update_setting(PENDING_ERASE, None)
    compact_and_clean(store, timedelta(0), materialize_deletions=True, tables=("settings",))
    return {
        "documents": len(doc_ids),
        "chunks_deleted": intent["chunks_deleted"],
        "vectors_deleted": len(vector_hashes),
        "tags_dropped": intent["tags_dropped"],
        "maintenance": report.as_dict(),
    }


def _scrub_logs(store: Store, doc_ids: list[str]) -> None:
    """Replace the erased documents' ids and paths in the tombstone and commit logs."""
    tokens = {d: erased_token(d) for d in doc_ids}
    tomb = store.table("tombstones")
    rows = tomb.to_lance().to_table(filter=in_filter("doc_id", doc_ids)).to_pylist()
    if rows:
        for r in rows:
            r["doc_id"] = tokens[r["doc_id"]]
            r["path"] = None
            r["detail"] = None
        tomb.merge_insert("tombstone_id").when_matched_update_all().execute(_table_like(tomb, rows))
    commits = store.table("commits")
    changed = []
    for r in commits.to_lance().to_table().to_pylist():
        text = r["changes"] or ""
        if any(json.dumps(d) in text for d in doc_ids):
            for d, t in tokens.items():
                text = text.replace(json.dumps(d), json.dumps(t))
            r["changes"] = text
            changed.append(r)
    if changed:
        commits.merge_insert("commit_id").when_matched_update_all().execute(
            _table_like(commits, changed)
        )


def _table_like(table: Any, rows: list[dict[str, Any]]) -> Any:
    import pyarrow as pa

    return pa.Table.from_pylist(rows, schema=table.schema)
