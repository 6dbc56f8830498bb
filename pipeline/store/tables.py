"""The index on disk: one LanceDB database folder holding six tables.

| table        | one row per          | role                                                     |
|--------------|----------------------|----------------------------------------------------------|
| chunks       | chunk                | the truth for what is searchable (text, anchors, vector)  |
| documents    | document             | fingerprint, content hash, status, extracted segments     |
| tombstones   | removal              | the log of every document that left the index             |
| commits      | commit               | the history: counts and the version of every table        |
| vectors      | text hash            | the embedding cache, so no text is embedded twice         |
| settings     | key                  | model, dimension and chunking the index was built with    |

This module only knows tables and rows. It does not decide what changed (the engine does) and it
never embeds. Every write that must not be repeated is keyed so that repeating it is a no-op,
which is what lets a crashed batch be re-run safely.
"""

from __future__ import annotations

import json
import os
import re
import time
from collections.abc import Callable, Mapping, Sequence
from datetime import timedelta
from pathlib import Path
from typing import Any

import lancedb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.errors import IndexMissing, ModelMismatch, StoreError
from pipeline.locations import is_remote
from pipeline.store.ids import IN_BATCH, batched, in_filter, quote
from pipeline.store.keyword import create_keyword_index
from pipeline.store.schema import (
    COMMITS_SCHEMA,
    DOCUMENT_SUMMARY_COLUMNS,
    DOCUMENTS_SCHEMA,
    SETTINGS_SCHEMA,
    TABLES,
    TOMBSTONES_SCHEMA,
    DocumentBriefs,
    chunks_schema,
    commit_order,
    vectors_schema,
)

# How stale a long-lived reader of an index on object storage may be: each read re-checks the
# latest version once this has passed. A local index is only re-read on ``refresh()``.
REMOTE_READ_CONSISTENCY = timedelta(seconds=5)
_S3_ERROR_CODE = re.compile(r"<Code>([A-Za-z]+)</Code>")


def _connect(path: str | os.PathLike[str], storage_options: Mapping[str, str] | None) -> Any:
    if not is_remote(path):
        return lancedb.connect(str(path))
    return lancedb.connect(
        os.fspath(path),
        storage_options=dict(storage_options or {}),
        read_consistency_interval=REMOTE_READ_CONSISTENCY,
    )


def _remote_problem(path: str | os.PathLike[str], exc: Exception) -> StoreError:
    """LanceDB's object-store error (a long Rust debug string) as one line naming the cause."""
    text = str(exc)
    code = _S3_ERROR_CODE.search(text)
    if code and code.group(1) == "NoSuchBucket":
        reason = "the bucket does not exist (upwell does not create buckets: create it first)"
    elif code and code.group(1) in ("AccessDenied", "InvalidAccessKeyId", "SignatureDoesNotMatch"):
        reason = f"the storage refused the credentials ({code.group(1)})"
    elif code:
        reason = f"the storage answered {code.group(1)}"
    elif "Connect" in text or "dns error" in text:
        reason = "the storage endpoint cannot be reached"
    else:
        reason = text.splitlines()[0][:200] if text else type(exc).__name__
    return StoreError(
        f"the index at {path}: {reason}; check index.storage_options or the AWS_* environment"
    )


class Store:
    """Tables of one index folder. Readers need no lock; one writer at a time (see ``lock``)."""

    def __init__(self, path: str | os.PathLike[str], db: Any, tables: dict[str, Any]) -> None:
        self.path = os.fspath(path)
        self.db = db
        self._t = tables
        # What a sync reads every time (the settings, the briefs of a source, the last commit's
        # versions), kept with the version of the table it was read from: a table at the same
        # version holds the same rows, so a service that syncs a source again and again reads
        # them once per change, not once per sync. Not for an index on object storage, whose
        # handles re-check the latest version by themselves.
        self._cache_settings = not is_remote(self.path)
        self._memo: dict[tuple[str, str], tuple[int, Any]] = {}
        # The version of each local table's handle, kept with the stamp of its versions folder
        # (see ``_folder_stamp``): asking LanceDB for a version is a round trip to its event
        # loop thread (about 0.25 ms each, measured with lancedb 0.40), and a no-change sync
        # asked about twenty times; a stat of the folder is a few microseconds.
        self._known: dict[str, tuple[tuple[int, int], int]] = {}

    # --- opening ----------------------------------------------------------------------------

    @classmethod
    def exists(
        cls, path: str | os.PathLike[str], storage_options: Mapping[str, str] | None = None
    ) -> bool:
        """Whether a complete index is at ``path`` (a folder, or a URI such as s3://bucket/ix).

        For a URI, StoreError when the storage cannot be reached or refuses the credentials:
        an unreachable index is not a missing one.
        """
        if not is_remote(path):
            return (Path(path) / "settings.lance").is_dir()
        try:
            names = _connect(path, storage_options).list_tables().tables
        except (ValueError, OSError, RuntimeError) as exc:
            raise _remote_problem(path, exc) from None
        return "settings" in names

    @classmethod
    def open(
        cls, path: str | os.PathLike[str], storage_options: Mapping[str, str] | None = None
    ) -> Store:
        """Open an existing index; IndexMissing when the folder (or URI) holds none."""
        if not cls.exists(path, storage_options):
            raise IndexMissing(
                f"no upwell index at {path}: run `upwell sync FOLDER` to build one, "
                "or point --index (or UPWELL_INDEX) at an existing index"
            )
        db = _connect(path, storage_options)
        try:
            tables = {name: db.open_table(name) for name in TABLES}
        except ValueError as exc:  # lancedb: "Table 'x' was not found"
            raise StoreError(f"the index at {path} is incomplete ({exc})") from None
        return cls(path, db, tables)

    @classmethod
    def create(
        cls,
        path: str | os.PathLike[str],
        settings: dict[str, Any],
        storage_options: Mapping[str, str] | None = None,
    ) -> Store:
        """Create the tables and record the settings the index is built with.

        On object storage the bucket must exist already; nothing is created outside ``path``.
        """
        if is_remote(path):
            cls.exists(path, storage_options)  # a clear StoreError for a missing bucket
        else:
            Path(path).mkdir(parents=True, exist_ok=True)
        db = _connect(path, storage_options)
        dim = int(settings["dimension"])
        tables: dict[str, Any] = {}
        for name, schema, key in (
            ("chunks", chunks_schema(dim), "chunk_id"),
            ("documents", DOCUMENTS_SCHEMA, "doc_id"),
            ("tombstones", TOMBSTONES_SCHEMA, "tombstone_id"),
            ("commits", COMMITS_SCHEMA, "commit_id"),
            ("vectors", vectors_schema(dim), "text_hash"),
        ):
            table: Any = db.create_table(name, schema=schema, exist_ok=True)
            # Measured with lancedb 0.40: without a declared key, two concurrent inserts of one
            # new key both land.
            table.set_unenforced_primary_key(key)
            tables[name] = table
        # The keyword index exists from the first version on, so every version can be
        # searched by keyword (rows added later are searched unindexed until maintenance).
        create_keyword_index(tables["chunks"])
        # Settings last: its presence is what marks the folder as a complete index.
        settings_table = db.create_table("settings", schema=SETTINGS_SCHEMA, exist_ok=True)
        settings_table.add(
            pa.Table.from_pylist(
                [{"key": k, "value": json.dumps(v)} for k, v in settings.items()],
                schema=SETTINGS_SCHEMA,
            )
        )
        tables["settings"] = settings_table
        return cls(path, db, tables)

    def table(self, name: str) -> Any:
        return self._t[name]

    def settings(self) -> dict[str, Any]:
        """Every setting, decoded. Callers get their own copy to change freely."""
        decoded = self._at_version("settings", "all", self._read_settings)
        return json.loads(json.dumps(decoded))

    def _read_settings(self) -> dict[str, Any]:
        rows = self._t["settings"].to_arrow().to_pylist()
        return {r["key"]: json.loads(r["value"]) for r in rows}

    def check_settings(self, wanted: dict[str, Any], keys: Sequence[str]) -> None:
        """Raise ModelMismatch naming both sides when the index was built differently."""
        have = self.settings()
        for key in keys:
            if key in wanted and have.get(key) != wanted[key]:
                raise ModelMismatch(
                    f"the index at {self.path} was built with {key} = {have.get(key)!r}, "
                    f"but this run uses {wanted[key]!r}; open it with the settings it was built "
                    "with, or build a new index in another --index folder"
                )

    def versions(self) -> dict[str, int]:
        return {name: self.version(name) for name in ("chunks", "documents", "tombstones")}

    def version(self, name: str) -> int:
        """The version the handle of table ``name`` reads. For a local table whose versions
        folder has not changed since ``refresh()`` found the handle at the latest version, the
        one recorded then, without asking LanceDB."""
        known = self._known.get(name)
        if known is not None and known[0] == self._folder_stamp(name):
            return known[1]
        return int(self._t[name].version)

    def refresh(self) -> None:
        """See writes made by other processes since this store was opened (what is kept by
        version is read again where the version moved). A local table whose versions folder
        is as it was when its handle was last brought up to date is left as it is."""
        for name, table in self._t.items():
            stamp = self._folder_stamp(name)
            known = self._known.pop(name, None)
            if known is not None and known[0] == stamp:
                self._known[name] = known
                continue
            table.checkout_latest()
            if stamp is not None and _settled(stamp):
                # Taken before the checkout: a write landing in between changes the folder, so
                # the next look misses and asks LanceDB; a stale pair is never kept.
                self._known[name] = (stamp, int(table.version))

    def _folder_stamp(self, name: str) -> tuple[int, int] | None:
        """(inode, mtime in ns) of a local table's ``_versions`` folder, or None (object
        storage, or no such folder). Every commit, checkout-as-new-version, restore and cleanup
        adds or removes a manifest file there, which changes the folder's mtime."""
        if not self._cache_settings:
            return None
        try:
            st = os.stat(os.path.join(self.path, f"{name}.lance", "_versions"))
        except OSError:
            return None
        return st.st_ino, st.st_mtime_ns

    # --- reading ----------------------------------------------------------------------------

    def _scan(
        self, name: str, columns: list[str] | None = None, where: str | None = None
    ) -> pa.Table:
        # A plain dataset scan: LanceDB's query builder applies a default limit of 10 rows.
        ds = self._t[name].to_lance()
        return ds.to_table(columns=columns, filter=where)

    def documents_of_source(self, source: str) -> dict[str, dict[str, Any]]:
        """Summary rows (no segments) of one source's documents, by doc_id."""
        rows = self._scan("documents", DOCUMENT_SUMMARY_COLUMNS, f"source = {quote(source)}")
        return {r["doc_id"]: r for r in rows.to_pylist()}

    def _at_version(self, table: str, key: str, read: Callable[[], Any]) -> Any:
        """``read()``, or what it returned before while ``table`` is at the same version."""
        if not self._cache_settings:
            return read()
        version = self.version(table)
        hit = self._memo.get((table, key))
        if hit is not None and hit[0] == version:
            return hit[1]
        value = read()
        self._memo[(table, key)] = (version, value)
        return value

    def document_briefs(self, source: str) -> DocumentBriefs:
        """What a no-change rescan compares, for every document of one source; read again only
        when the documents table has changed since (callers must not modify it)."""
        return self._at_version("documents", f"briefs:{source}", lambda: self._briefs(source))

    def _briefs(self, source: str) -> DocumentBriefs:
        """Four narrow columns, combined in Arrow, converted column by column: at 20,000
        documents this is several times faster than reading the summary rows."""
        t = self._scan(
            "documents",
            ["path", "status", "fingerprint", "failed_fingerprint", "content_hash"],
            f"source = {quote(source)}",
        )
        status = t["status"]
        decisive = pc.if_else(
            pc.equal(status, "ok"),
            t["fingerprint"],
            pc.if_else(
                pc.equal(status, "failed"), t["failed_fingerprint"], pa.scalar(None, pa.string())
            ),
        )
        ids = t["path"].to_pylist()
        return DocumentBriefs(
            unchanged_if=dict(zip(ids, decisive.to_pylist(), strict=True)),
            content_hash=dict(zip(ids, t["content_hash"].to_pylist(), strict=True)),
        )

    def stored_fingerprints(self, source: str) -> dict[str, str | None]:
        """Item key -> fingerprint of the last good version, for one source."""
        t = self._scan("documents", ["path", "fingerprint"], f"source = {quote(source)}")
        return dict(zip(t["path"].to_pylist(), t["fingerprint"].to_pylist(), strict=True))

    def documents_by_id(self, source: str, doc_ids: Sequence[str]) -> dict[str, dict[str, Any]]:
        """Summary rows of some of one source's documents, by doc_id."""
        if not doc_ids:
            return {}
        if len(doc_ids) > IN_BATCH:
            wanted = set(doc_ids)
            rows = self.documents_of_source(source)
            return {d: r for d, r in rows.items() if d in wanted}
        where = in_filter("doc_id", doc_ids)
        return {
            r["doc_id"]: r
            for r in self._scan("documents", DOCUMENT_SUMMARY_COLUMNS, where).to_pylist()
        }

    def all_documents(self, columns: list[str] | None = None) -> list[dict[str, Any]]:
        return self._scan("documents", columns or DOCUMENT_SUMMARY_COLUMNS).to_pylist()

    def document_segments(self, doc_id: str) -> tuple[str, str] | None:
        """(segments JSON, extractor version) of one document, or None."""
        rows = self._scan(
            "documents", ["segments", "extractor_version"], f"doc_id = {quote(doc_id)}"
        ).to_pylist()
        if not rows:
            return None
        return rows[0]["segments"], rows[0]["extractor_version"]

    def segments_of(self, doc_ids: Sequence[str]) -> dict[str, str]:
        """Stored segments JSON of several documents, by doc_id."""
        out: dict[str, str] = {}
        for part in batched(list(doc_ids)):
            rows = self._scan("documents", ["doc_id", "segments"], in_filter("doc_id", part))
            out.update(zip(rows["doc_id"].to_pylist(), rows["segments"].to_pylist(), strict=True))
        return out

    def document_row(self, doc_id: str) -> dict[str, Any] | None:
        """The summary row (no segments) of one document, or None."""
        rows = self._scan("documents", DOCUMENT_SUMMARY_COLUMNS, f"doc_id = {quote(doc_id)}")
        found = rows.to_pylist()
        return found[0] if found else None

    def chunks_of(
        self, doc_id: str, columns: list[str], start: int = 0, stop: int | None = None
    ) -> list[dict[str, Any]]:
        """The chunks of one document whose ordinal is in [start, stop), in reading order."""
        where = f"doc_id = {quote(doc_id)} AND ordinal >= {int(start)}"
        if stop is not None:
            where += f" AND ordinal < {int(stop)}"
        rows = self._scan("chunks", [*columns, "ordinal"], where).to_pylist()
        rows.sort(key=lambda r: r["ordinal"] or 0)
        return rows

    def count_chunks_of(self, doc_id: str) -> int:
        return int(self._t["chunks"].count_rows(f"doc_id = {quote(doc_id)}"))

    def tombstones_of(self, doc_id: str) -> list[dict[str, Any]]:
        """Every tombstone one document left, oldest first."""
        rows = self._scan("tombstones", where=f"doc_id = {quote(doc_id)}").to_pylist()
        rows.sort(key=lambda r: r.get("removed_at") or "")
        return rows

    def chunk_keys(self, doc_ids: Sequence[str]) -> dict[str, list[tuple[str, int]]]:
        """(chunk_id, ordinal) pairs of the given documents, by doc_id."""
        out: dict[str, list[tuple[str, int]]] = {}
        for part in batched(list(doc_ids)):
            rows = self._scan(
                "chunks", ["doc_id", "chunk_id", "ordinal"], in_filter("doc_id", part)
            )
            for d, c, o in zip(
                rows["doc_id"].to_pylist(),
                rows["chunk_id"].to_pylist(),
                rows["ordinal"].to_pylist(),
                strict=False,
            ):
                out.setdefault(d, []).append((c, o))
        return out

    def search(
        self,
        vector: np.ndarray,
        k: int,
        columns: list[str],
        *,
        where: str | None = None,
        table: Any = None,
    ) -> list[dict[str, Any]]:
        """The k rows nearest to ``vector`` by cosine distance (``_distance`` = 1 - cosine).

        Exact while the table has no vector index; with one (see upkeep.ensure_indexes),
        IVF search refined on the original vectors: recall@10 1.00 in our measurement at
        100,000 rows, 0.99 at 1,000,000 (bench search_1m).
        """
        table = table if table is not None else self._t["chunks"]
        q = table.search(vector, vector_column_name="vector").metric("cosine")
        # Used only when an IVF index exists. Measured with lancedb 0.40 on 2 cores, 1,000,000
        # clustered rows, IVF_SQ with 1,000 partitions, one index and 200 queries: nprobes 20
        # gave recall@10 0.972 (14 queries below 0.9, the worst 0.4), 40 gives 0.990 (6 below
        # 0.9, the worst 0.7) and 60 gives 0.997, at p50 9.5, 10 and 11 ms. The misses are
        # partitions not probed: refine_factor 10 instead of 5 changed no recall.
        q = q.nprobes(40).refine_factor(5)
        if where is not None:
            q = q.where(where, prefilter=True)
        return q.select(columns).limit(k).to_arrow().to_pylist()

    def chunk_doc_id_column(self) -> list[str]:
        """The doc_id of every chunk (one entry per chunk)."""
        return self._scan("chunks", ["doc_id"])["doc_id"].to_pylist()

    def document_ids(self) -> set[str]:
        """The doc ids that have a document row (searchable or failed)."""
        return set(self._scan("documents", ["doc_id"])["doc_id"].to_pylist())

    def chunk_counts(self) -> dict[str, int]:
        """Number of chunks per source."""
        rows = self._scan("chunks", ["source"])
        counts: dict[str, int] = {}
        for s in rows["source"].to_pylist():
            counts[s] = counts.get(s, 0) + 1
        return counts

    def find_vectors(self, text_hashes: Sequence[str]) -> dict[str, np.ndarray]:
        """Vectors already computed for these text hashes: the cache first, then the chunks."""
        found: dict[str, np.ndarray] = {}
        wanted = list(dict.fromkeys(text_hashes))
        for name in ("vectors", "chunks"):
            missing = [h for h in wanted if h not in found]
            if not missing:
                break
            for part in batched(missing):
                rows = self._scan(name, ["text_hash", "vector"], in_filter("text_hash", part))
                if rows.num_rows == 0:
                    continue
                hashes = rows["text_hash"].to_pylist()
                vecs = _vectors_to_numpy(rows["vector"])
                for h, v in zip(hashes, vecs, strict=True):
                    found.setdefault(h, v)
        return found

    def last_commit_versions(self) -> dict[str, int] | None:
        """The chunks and tombstones versions the latest commit recorded (a few columns read,
        not the log); None before the first commit."""
        found = self._at_version("commits", "last", self._last_commit_versions)
        return dict(found) if found is not None else None

    def _last_commit_versions(self) -> dict[str, int] | None:
        columns = ["documents_version", "chunks_version", "tombstones_version", "time"]
        rows = self._scan("commits", columns)
        if rows.num_rows == 0:
            return None
        last = max(rows.to_pylist(), key=commit_order)
        return {
            "chunks": int(last["chunks_version"]),
            "tombstones": int(last["tombstones_version"]),
        }

    def commits(self) -> list[dict[str, Any]]:
        rows = self._scan("commits").to_pylist()
        rows.sort(key=commit_order)
        return rows

    def tombstone_ids(self, ids: Sequence[str]) -> set[str]:
        have: set[str] = set()
        for part in batched(list(ids)):
            rows = self._scan("tombstones", ["tombstone_id"], in_filter("tombstone_id", part))
            have.update(rows["tombstone_id"].to_pylist())
        return have

    def count(self, name: str) -> int:
        return int(self._t[name].count_rows())

    # --- writing (callers hold the writer lock) -----------------------------------------------

    def add_vectors(self, rows: pa.Table) -> None:
        """Insert cache rows whose text hash is new; a repeated call inserts nothing."""
        if rows.num_rows:
            (
                self._t["vectors"]
                .merge_insert("text_hash")
                .when_not_matched_insert_all()
                .execute(rows)
            )

    def add_tombstones(self, rows: list[dict[str, Any]]) -> None:
        """Insert tombstones whose id is new; ids are derived from what was removed."""
        if not rows:
            return
        fresh = set(r["tombstone_id"] for r in rows) - self.tombstone_ids(
            [r["tombstone_id"] for r in rows]
        )
        rows = [r for r in rows if r["tombstone_id"] in fresh]
        if rows:
            self._t["tombstones"].add(pa.Table.from_pylist(rows, schema=TOMBSTONES_SCHEMA))

    def replace_chunks(self, rows: pa.Table, doc_ids: Sequence[str]) -> int | None:
        """Make ``rows`` the complete set of chunks of ``doc_ids``, as ONE new table version.

        One merge_insert keyed on chunk_id: matching rows are updated, new ones inserted, and rows
        of these documents that are not in ``rows`` deleted in the same transaction, so a reader
        sees each document entirely before or entirely after. Returns the new version, or None
        when there was nothing to write.
        """
        if not doc_ids:
            return None
        # A by-source delete without a filter would delete every row not in the batch: the
        # filter always names the batch's documents.
        delete_filter = in_filter("doc_id", doc_ids)
        result = (
            self._t["chunks"]
            .merge_insert("chunk_id")
            .when_matched_update_all()
            .when_not_matched_insert_all()
            .when_not_matched_by_source_delete(delete_filter)
            .execute(rows)
        )
        return int(result.version)

    def upsert_documents(self, rows: list[dict[str, Any]], removed: Sequence[str]) -> None:
        """Write document rows and drop removed documents, as one version of the table."""
        if not rows and not removed:
            return
        table = pa.Table.from_pylist(rows, schema=DOCUMENTS_SCHEMA)
        builder = self._t["documents"].merge_insert("doc_id").when_matched_update_all()
        builder = builder.when_not_matched_insert_all()
        if removed:
            builder = builder.when_not_matched_by_source_delete(in_filter("doc_id", removed))
        builder.execute(table)

    def tombstones_of_lost_commits(self) -> list[dict[str, Any]]:
        """Tombstones naming a commit that never landed (a writer died after writing them)."""
        rows = self._scan("tombstones", ["tombstone_id", "doc_id", "commit_id", "reason", "detail"])
        landed = set(self._scan("commits", ["commit_id"])["commit_id"].to_pylist())
        return [r for r in rows.to_pylist() if r["commit_id"] not in landed]

    def drop_tombstones(self, tombstone_ids: Sequence[str]) -> None:
        """Delete tombstones by id; only for those of a commit that never landed."""
        for part in batched(list(tombstone_ids)):
            self._t["tombstones"].delete(in_filter("tombstone_id", part))

    def adopt_tombstones(self, tombstone_ids: Sequence[str], commit_id: str) -> None:
        """Make ``commit_id`` the commit of these tombstones (whose own commit never landed)."""
        for part in batched(list(tombstone_ids)):
            self._t["tombstones"].update(
                where=in_filter("tombstone_id", part), values={"commit_id": commit_id}
            )

    def add_commit(self, row: dict[str, Any]) -> None:
        self._t["commits"].add(pa.Table.from_pylist([row], schema=COMMITS_SCHEMA))

    def update_setting(self, key: str, value: Any) -> None:
        table = pa.Table.from_pylist(
            [{"key": key, "value": json.dumps(value)}], schema=SETTINGS_SCHEMA
        )
        (
            self._t["settings"]
            .merge_insert("key")
            .when_matched_update_all()
            .when_not_matched_insert_all()
            .execute(table)
        )
        self._memo.pop(("settings", "all"), None)


#: A folder stamp is trusted once its mtime is this far in the past. File systems keep mtimes
#: to a clock tick, so two changes within one tick can leave the same mtime; a folder untouched
#: for longer than a tick gets a new mtime from its next change (the "racy timestamp" rule git
#: applies to its index). Linux file systems stamp with the kernel's coarse clock, one tick of
#: 1-10 ms (from memory: HZ is 100 to 1000), so a tenth of a second is ten ticks or more.
STAMP_SETTLE_NS = 100_000_000
#: A file system with whole-second (or 2-second, FAT) mtimes shows as an mtime that is a whole
#: multiple of 10 ms; such a stamp is trusted only after this long.
COARSE_STAMP_SETTLE_NS = 3_000_000_000


def _settled(stamp: tuple[int, int]) -> bool:
    mtime = stamp[1]
    settle = COARSE_STAMP_SETTLE_NS if mtime % 10_000_000 == 0 else STAMP_SETTLE_NS
    return time.time_ns() - mtime > settle


def _vectors_to_numpy(column: pa.ChunkedArray | pa.Array) -> np.ndarray:
    """A fixed-size-list column as a float32 (n, dim) array, without a Python loop."""
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    dim = column.type.list_size
    return column.flatten().to_numpy(zero_copy_only=False).reshape(-1, dim).astype(np.float32)
