"""Keeping the index folder healthy: compaction, version retention, scalar indexes, erasure.

Every sync adds versions and small data files; many small commits slow search down (measured
with lancedb 0.40: 1,000 commits of 10 rows leave 4,000 files and take a flat query from 8 ms to
71 ms; compaction with cleanup brings it back). ``compact_and_clean`` rewrites small fragments
and removes versions past retention. Tagged versions and the state a paused rollback replaced
are pinned by Lance tags, which cleanup skips.

Erasure is the one operation that rewrites history: it deletes a document's rows, compacts with
deletions materialised, and removes every old version that still holds them.
"""

from __future__ import annotations

import json
import logging
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import timedelta
from typing import Any

from .errors import StoreError
from .hashing import sha256_hex
from .store import MAINTAINED_VERSIONS, TABLES, Store, in_filter

log = logging.getLogger(__name__)

# Scalar indexes worth having once a table is this large (smaller tables scan faster).
SCALAR_INDEX_MIN_ROWS = 5_000
SCALAR_INDEXES = {"chunks": ("doc_id", "text_hash", "source"), "vectors": ("text_hash",)}
# Past this many chunks an exact scan costs tens of milliseconds a query: build an ANN index.
# Measured with lancedb 0.40 at 100,000 rows on 2 cores: exact scan 150-190 ms; IVF_SQ builds
# in 8-11 s and answers in about 6 ms with recall@10 1.00 at nprobes 20, refine_factor 5.
VECTOR_INDEX_MIN_ROWS = 20_000


@dataclass
class MaintenanceReport:
    tables: dict[str, dict[str, Any]] = field(default_factory=dict)
    indexes_created: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {"tables": self.tables, "indexes_created": self.indexes_created}


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def compact_and_clean(
    store: Store,
    older_than: timedelta,
    *,
    materialize_deletions: bool = False,
    tables: Sequence[str] = TABLES,
) -> MaintenanceReport:
    """Compact every table, then remove versions older than ``older_than`` (tags are kept).

    With ``materialize_deletions`` deleted rows are rewritten out of the data files too, and
    files no version references are removed at once (erasure needs both).
    """
    report = MaintenanceReport()
    for name in tables:
        table = store.table(name)
        table.checkout_latest()
        ds = table.to_lance()
        before_files = _data_files(ds)
        try:
            ds.optimize.compact_files(
                materialize_deletions=materialize_deletions or None,
                materialize_deletions_threshold=0.0 if materialize_deletions else None,
            )
            # Each step makes a new version; the table handle must see it before the next step
            # (a cleanup through a stale handle keeps every version newer than its own).
            table.checkout_latest()
            ds = table.to_lance()
            if ds.describe_indices():
                ds.optimize.optimize_indices()
                table.checkout_latest()
                ds = table.to_lance()
            stats = ds.cleanup_old_versions(
                older_than=older_than,
                delete_unverified=materialize_deletions,
                error_if_tagged_old_versions=False,
            )
        except (ValueError, RuntimeError, OSError) as exc:
            raise StoreError(
                f"maintenance of the {name} table failed: {_first_line(exc)}"
            ) from None
        table.checkout_latest()
        ds = table.to_lance()
        if name in MAINTAINED_VERSIONS:
            store.update_setting(MAINTAINED_VERSIONS[name], int(table.version))
        report.tables[name] = {
            "versions_removed": int(stats.old_versions),
            "bytes_removed": int(stats.bytes_removed),
            "data_files_before": before_files,
            "data_files_after": _data_files(ds),
            "versions_kept": len(ds.versions()),
        }
    return report


# Every commit appends a small fragment to the documents and commits tables, and a rescan reads
# both whole: measured at 20,000 documents built in batches of 200 (100 fragments), the brief
# scan of the documents table took 33 ms, and 6 ms once compacted. Compacting them costs about
# 0.5 s at that size and removes no version, so a sync does it itself past this many fragments.
TIDY_MIN_FRAGMENTS = 32
TIDY_TABLES = ("documents", "commits")


def tidy_small_tables(store: Store, min_fragments: int = TIDY_MIN_FRAGMENTS) -> list[str]:
    """Compact the documents and commits tables once either has many fragments.

    Only files are merged: every version stays readable, so history, ``--as-of`` and rollback
    see no difference. Returns the tables compacted. A failure is logged, never raised: the
    sync that calls this has already committed.
    """
    done = []
    for name in TIDY_TABLES:
        table = store.table(name)
        try:
            ds = table.to_lance()
            if len(ds.get_fragments()) < min_fragments:
                continue
            ds.optimize.compact_files()
        except (ValueError, RuntimeError, OSError) as exc:
            log.warning("could not compact the %s table: %s", name, _first_line(exc))
            continue
        table.checkout_latest()
        done.append(name)
    return done


def _data_files(ds: Any) -> int:
    return sum(len(fragment.data_files()) for fragment in ds.get_fragments())


def ensure_indexes(
    store: Store,
    *,
    scalar_min_rows: int = SCALAR_INDEX_MIN_ROWS,
    vector_min_rows: int = VECTOR_INDEX_MIN_ROWS,
) -> list[str]:
    """Scalar indexes and the vector index, each once its table is large enough.

    Building an index makes a chunks version that no commit records; it is noted in the
    settings so the next sync does not take it for an interrupted batch.
    """
    created = ensure_scalar_indexes(store, scalar_min_rows)
    chunks = store.table("chunks")
    if not _has_vector_index(chunks) and chunks.count_rows() >= vector_min_rows:
        rows = chunks.count_rows()
        with warnings.catch_warnings():
            # lancedb 0.40 prefers a config object; these keyword arguments still work.
            warnings.simplefilter("ignore", DeprecationWarning)
            chunks.create_index(
                metric="cosine",
                vector_column_name="vector",
                index_type="IVF_SQ",
                num_partitions=max(1, int(math.sqrt(rows))),
            )
        created.append("chunks.vector (IVF_SQ)")
    if created:
        chunks.checkout_latest()
        store.update_setting(MAINTAINED_VERSIONS["chunks"], int(chunks.version))
    return created


def _has_vector_index(table: Any) -> bool:
    return any("vector" in tuple(ix.columns) for ix in table.list_indices())


def ensure_scalar_indexes(store: Store, min_rows: int = SCALAR_INDEX_MIN_ROWS) -> list[str]:
    """BTREE indexes on the columns every sync filters by, once a table is large enough.

    Measured with lancedb 0.40: a BTREE on doc_id takes a filtered lookup from 200 ms to 5 ms
    at 100,000 rows. Returns the indexes created.
    """
    created = []
    for name, columns in SCALAR_INDEXES.items():
        table = store.table(name)
        if table.count_rows() < min_rows:
            continue
        have = {tuple(ix.columns) for ix in table.list_indices()}
        for column in columns:
            if (column,) in have:
                continue
            with warnings.catch_warnings():
                # Deprecated in lancedb 0.40, but its replacement only builds vector indexes.
                warnings.simplefilter("ignore", DeprecationWarning)
                table.create_scalar_index(column, index_type="BTREE", replace=False)
            created.append(f"{name}.{column}")
    return created


# --- erasure -------------------------------------------------------------------------------------


def erased_token(doc_id: str) -> str:
    """What the logs keep of an erased document: a hash of its id, never its name or text.

    Whoever knows the document's id can check that it was erased; the logs alone cannot say
    what it was.
    """
    return "erased:" + sha256_hex(doc_id)[:16]


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
                "tombstone_id": sha256_hex(f"{doc_id}\x00erased\x00{commit_id}")[:32],
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
    if settings.get("paused"):
        store.update_setting("paused", None)

    # Compaction and cleanup first, then the commit row, so the versions it names still exist
    # (a REF to the erase commit, a tag on it, search as of it).
    report = compact_and_clean(store, timedelta(0), materialize_deletions=True)
    if not any(c["commit_id"] == commit_id for c in store.commits()):
        versions = store.versions()
        store.add_commit(
            {
                "commit_id": commit_id,
                "time": now,
                "trigger": "erase",
                "sources": json.dumps(sorted({s for s in intent["sources"].values() if s})),
                "source_revision": None,
                "documents_added": 0,
                "documents_modified": 0,
                "documents_removed": len(doc_ids),
                "documents_moved": 0,
                "documents_unchanged": 0,
                "documents_failed": 0,
                "chunks_embedded": 0,
                "chunks_reused": 0,
                "chunks_added": 0,
                "chunks_deleted": intent["chunks_deleted"],
                "seconds": 0.0,
                "chunks_version": versions["chunks"],
                "documents_version": versions["documents"],
                "tombstones_version": versions["tombstones"],
                "changes": json.dumps({"erased": [erased_token(d) for d in doc_ids]}),
            }
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
