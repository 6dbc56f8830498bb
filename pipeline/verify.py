"""``upwell verify``: check that the tables agree with each other and with the sources.

Checks (each problem names its check, the document if there is one, and what is wrong):

- ``duplicate_chunk_id``: two rows of the chunks table share a chunk id;
- ``orphan_chunks``: chunks whose document has no row in the documents table;
- ``missing_chunks``: a searchable document whose chunk count differs from what its row says;
- ``bad_vector``: a vector that is null, not finite, or of another dimension than the index's;
- ``log_gap``: the logs disagree with the tables: a commit that names a chunks version the
  table never reached, a removal in the commit log without a tombstone, a tombstone whose
  document still has chunks although it was not added back after the removal;
- ``drift``: a file added, changed or gone since its last sync (a source that cannot be listed
  is reported too).

``repair`` re-syncs every source, then clears and re-indexes from the source files the
documents any structural check still names. It needs the writer lock.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from connectors.base import Source
from connectors.folder import FolderSource
from pipeline import formats
from pipeline.errors import SourceError
from pipeline.index import Index
from pipeline.store.keyword import keyword_index_names
from pipeline.store.schema import KEYWORD_COLUMNS, chunks_schema
from pipeline.store.tables import Store

STRUCTURAL = ("duplicate_chunk_id", "orphan_chunks", "missing_chunks", "bad_vector")


@dataclass(frozen=True)
class Problem:
    check: str
    detail: str
    doc_id: str | None = None


@dataclass
class VerifyReport:
    problems: list[Problem] = field(default_factory=list)
    counted: dict[str, int] = field(default_factory=dict)
    repaired: list[str] = field(default_factory=list)

    @property
    def consistent(self) -> bool:
        return not self.problems

    def as_dict(self) -> dict[str, Any]:
        return {
            "consistent": self.consistent,
            "problems": [asdict(p) for p in self.problems],
            "counted": self.counted,
            "repaired": self.repaired,
        }


def sources_from_index(store: Store) -> list[Any]:
    """Folder sources as last synced (the locations the index records), default patterns."""
    locations: dict[str, str] = store.settings().get("source_locations", {})
    return [
        FolderSource(
            name=name,
            root=Path(path),
            accept=lambda key: formats.media_type_for(key) is not None,
        )
        for name, path in sorted(locations.items())
    ]


def verify_index(
    index: Index, sources: Sequence[Source] | None = None, *, drift: bool = True
) -> VerifyReport:
    """Run every check; read-only, needs no lock. ``sources`` default to the recorded ones."""
    store = index.store()
    store.refresh()
    report = VerifyReport()
    docs = {d["doc_id"]: d for d in store.all_documents()}
    chunk_docs = _check_chunks(store, report)
    report.counted = {
        "documents": len(docs),
        "chunks": sum(chunk_docs.values()),
        "commits": store.count("commits"),
        "tombstones": store.count("tombstones"),
    }
    for doc_id, n in sorted(chunk_docs.items()):
        if doc_id not in docs:
            report.problems.append(
                Problem("orphan_chunks", f"{n} chunks but no document row", doc_id)
            )
    for doc_id, d in sorted(docs.items()):
        have = chunk_docs.get(doc_id, 0)
        if d["content_hash"] and have != (d["chunk_count"] or 0):
            report.problems.append(
                Problem(
                    "missing_chunks",
                    f"the document row says {d['chunk_count']} chunks, the table holds {have}",
                    doc_id,
                )
            )
    _check_logs(store, docs, chunk_docs, report)
    _check_keyword_index(store, report.counted["chunks"], report)
    if drift:
        wanted: list[Any] = list(sources) if sources is not None else sources_from_index(store)
        for source in wanted:
            _check_drift(store, source, report)
    return report


def _check_keyword_index(store: Store, chunks: int, report: VerifyReport) -> None:
    """The keyword index exists on every keyword column and covers every chunk (indexed, or
    waiting unindexed, which keyword search also reads)."""
    table = store.table("chunks")
    names = keyword_index_names(table)
    for column in KEYWORD_COLUMNS:
        if column not in names:
            report.problems.append(
                Problem("keyword_index", f"no keyword index on chunks.{column} (a sync builds it)")
            )
            continue
        stats = table.index_stats(names[column])
        covered = int(stats.num_indexed_rows) + int(stats.num_unindexed_rows)
        if covered != chunks:
            report.problems.append(
                Problem(
                    "keyword_index",
                    f"the keyword index on chunks.{column} covers {covered} rows of {chunks}",
                )
            )


def _check_chunks(store: Store, report: VerifyReport) -> dict[str, int]:
    """Chunk counts per document; records duplicate ids and bad vectors on the way."""
    dimension = int(store.settings()["dimension"])
    dataset = store.table("chunks").to_lance()
    ids: Counter[str] = Counter()
    per_doc: Counter[str] = Counter()
    vector_type = dataset.schema.field("vector").type
    if getattr(vector_type, "list_size", None) != dimension:
        report.problems.append(
            Problem("bad_vector", f"the vector column is {vector_type}, not {dimension} floats")
        )
    # In record batches, so memory stays bounded on a large index.
    for batch in dataset.to_batches(columns=["chunk_id", "doc_id", "vector"]):
        chunk_ids = batch.column("chunk_id").to_pylist()
        doc_ids = batch.column("doc_id").to_pylist()
        ids.update(chunk_ids)
        per_doc.update(doc_ids)
        vectors = batch.column("vector")
        nulls = vectors.is_null().to_numpy(zero_copy_only=False)
        flat = vectors.flatten().to_numpy(zero_copy_only=False)
        size = getattr(vectors.type, "list_size", dimension)
        rows = flat.reshape(-1, size) if size else flat.reshape(0, 0)
        finite = np.isfinite(rows).all(axis=1) if len(rows) else np.array([], bool)
        valid = [i for i in range(len(chunk_ids)) if not nulls[i]]
        for row_no, i in enumerate(valid):
            if not finite[row_no]:
                report.problems.append(
                    Problem("bad_vector", f"chunk {chunk_ids[i]}: not finite", doc_ids[i])
                )
        for i in np.flatnonzero(nulls).tolist():
            report.problems.append(
                Problem("bad_vector", f"chunk {chunk_ids[i]}: no vector", doc_ids[i])
            )
    duplicated = [cid for cid, n in ids.items() if n > 1]
    if duplicated:
        owners = _owners(dataset, duplicated)
        for cid in sorted(duplicated):
            report.problems.append(
                Problem(
                    "duplicate_chunk_id", f"chunk {cid} appears {ids[cid]} times", owners.get(cid)
                )
            )
    return dict(per_doc)


def _owners(dataset: Any, chunk_ids: list[str]) -> dict[str, str]:
    wanted = set(chunk_ids)
    out: dict[str, str] = {}
    for batch in dataset.to_batches(columns=["chunk_id", "doc_id"]):
        for cid, doc in zip(
            batch.column("chunk_id").to_pylist(), batch.column("doc_id").to_pylist(), strict=True
        ):
            if cid in wanted:
                out.setdefault(cid, doc)
    return out


def _check_logs(
    store: Store,
    docs: dict[str, dict[str, Any]],
    chunk_docs: dict[str, int],
    report: VerifyReport,
) -> None:
    version = int(store.table("chunks").version)
    commits = store.commits()
    tombstones = store.table("tombstones").to_lance().to_table().to_pylist()
    tombstoned = {t["doc_id"] for t in tombstones}
    for c in commits:
        if (c["chunks_version"] or 0) > version:
            report.problems.append(
                Problem(
                    "log_gap",
                    f"commit {c['commit_id']} names chunks version {c['chunks_version']}, "
                    f"but the table is at version {version}",
                )
            )
        changes = json.loads(c["changes"] or "{}")
        for doc_id in changes.get("removed", []):
            if doc_id not in tombstoned:
                report.problems.append(
                    Problem(
                        "log_gap",
                        f"commit {c['commit_id']} removed it, but no tombstone records that",
                        doc_id,
                    )
                )
    for t in tombstones:
        doc = docs.get(t["doc_id"])
        readded = doc is not None and (doc["updated_at"] or "") >= (t["removed_at"] or "")
        if chunk_docs.get(t["doc_id"]) and not readded:
            report.problems.append(
                Problem(
                    "log_gap",
                    f"tombstone {t['tombstone_id']} says it was removed at {t['removed_at']}, "
                    "but its chunks are still searchable",
                    t["doc_id"],
                )
            )


def _check_drift(store: Store, source: Source, report: VerifyReport) -> None:
    try:
        items = list(source.list_items())
    except SourceError as exc:
        report.problems.append(Problem("drift", f"cannot list the source: {exc}"))
        return
    known = store.documents_of_source(source.name)
    for item in items:
        row = known.pop(item.doc_id, None)
        fp = item.fingerprint.key()
        if row is None:
            report.problems.append(Problem("drift", "in the source, not in the index", item.doc_id))
        elif row["status"] == "ok" and row["fingerprint"] != fp:
            report.problems.append(Problem("drift", "changed since its last sync", item.doc_id))
        elif row["status"] == "failed" and row["failed_fingerprint"] != fp:
            report.problems.append(
                Problem("drift", "changed since it last failed to extract", item.doc_id)
            )
    for doc_id in sorted(known):
        report.problems.append(Problem("drift", "gone from the source, still indexed", doc_id))


def repair_index(
    index: Index, sources: Sequence[Source] | None = None, *, yes: bool = False
) -> VerifyReport:
    """Re-sync the sources, re-index every document a structural check names, check again.

    Takes the writer lock (IndexLocked, exit code 4, while a service runs). Problems that a
    re-sync cannot mend (a commit log ahead of the table, a missing tombstone) remain in the
    returned report.
    """
    with index.writing():
        store = index.store()
        wanted: list[Any] = list(sources) if sources is not None else sources_from_index(store)
        if wanted:
            index.sync(wanted, yes=yes, trigger="repair")
        before = verify_index(index, wanted, drift=False)
        affected = sorted(
            {
                p.doc_id
                for p in before.problems
                if p.doc_id and (p.check in STRUCTURAL or "still searchable" in p.detail)
            }
        )
        if affected:
            # Forget the damaged documents entirely, then let the engine index them afresh from
            # the files: it only rewrites chunks whose planned ids differ from what is stored.
            dimension = int(store.settings()["dimension"])
            empty: pa.Table = chunks_schema(dimension).empty_table()
            store.replace_chunks(empty, affected)
            store.upsert_documents([], affected)
            if wanted:
                index.sync(wanted, yes=yes, trigger="repair")
        after = verify_index(index, wanted)
        after.repaired = affected
        return after
