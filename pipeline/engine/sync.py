"""The incremental sync: from a source listing to committed index versions.

For each source: list items with cheap fingerprints, compare with the documents table, read and
hash only items whose fingerprint changed, extract and chunk only items whose content hash
changed, embed only chunk texts whose hash has never been embedded, and commit each batch as one
version of the chunks table (plus the log rows that describe it).

Checks run cheapest first (stat fingerprint -> content hash -> chunk hashes -> embedding), and
each level skips the rest when nothing changed. Every step is idempotent: a batch interrupted at
any point is recomputed by the next run, which finds its vectors in the cache, its chunks already
written and its tombstones already logged, and writes only what is missing.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import logging
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa

from connectors.base import Source
from pipeline import defaults, formats
from pipeline.chunking import chunk_segments
from pipeline.embedding.base import Embedder
from pipeline.engine.cluster import Cluster, LazyCluster, Prepared, prepare_document
from pipeline.engine.recovery import recover_interrupted_batch
from pipeline.engine.reports import OUTCOMES, CommitResult, Counts, Failure, SyncReport
from pipeline.errors import ConfirmationRequired, ExtractionError, SourceError
from pipeline.hashing import sha256_hex
from pipeline.progress import Progress
from pipeline.records import (
    Chunk,
    ChunkSettings,
    Extracted,
    Limits,
    SourceItem,
    segments_from_json,
    segments_to_json,
)
from pipeline.store.ids import chunk_ids, new_commit_id, tombstone_id, utc_now
from pipeline.store.schema import DocumentBriefs, chunks_schema, commit_row, vectors_schema
from pipeline.store.tables import Store

log = logging.getLogger("upwell.engine")

#: Texts per embedder call in process (the cluster sends the same number per task).
EMBED_STEP = 64


@dataclass
class Listing:
    """A source's listing against the index: every key listed, and the items whose fingerprint
    is not the one at which the index counts them unchanged (new ones included)."""

    keys: set[str]
    changed: list[SourceItem]


def _list_changes(source: Source, briefs: DocumentBriefs) -> Listing:
    """List a source and keep only what changed. A connector may do both in one pass
    (``list_changes``, as the folder walk does, given the stored fingerprints as stat tuples,
    so an unchanged file costs one stat and one tuple, not two objects); any other is listed
    whole and compared here."""
    fast = getattr(source, "list_changes", None)
    if fast is not None:
        keys, changed = fast(briefs.stat_fingerprints)
        return Listing(keys, changed)
    unchanged_if = briefs.unchanged_if
    keys = set()
    changed = []
    for item in source.list_items():
        keys.add(item.key)
        if unchanged_if.get(item.key) != item.fingerprint.key():
            changed.append(item)
    return Listing(keys, changed)


class _Ahead:
    """One batch being read, hashed, extracted and chunked on the engine's producer thread
    while the writer embeds and commits the batch before it; taken in the batch's order, as a
    cluster's ``Prepared`` is. The thread is the only user of the source meanwhile."""

    def __init__(self, futures: dict[str, Future[dict[str, Any]]]) -> None:
        self._futures = futures

    def take(self, item: SourceItem) -> dict[str, Any]:
        return self._futures.pop(item.doc_id).result()

    def cancel(self) -> None:
        for future in self._futures.values():
            future.cancel()
        self._futures.clear()


@dataclass
class _DocWork:
    item: SourceItem
    outcome: str  # added | modified | moved
    content_hash: str
    extracted: Extracted
    segments_json: str
    chunks: list[Chunk]
    moved_from: str | None = None


class SyncEngine:
    """Runs syncs against one store with one embedder. Callers hold the writer lock."""

    def __init__(
        self,
        store: Store,
        embedder: Embedder,
        chunking: ChunkSettings,
        limits: Limits,
        *,
        batch_documents: int = defaults.BATCH_DOCUMENTS,
        max_removal_fraction: float = defaults.MAX_REMOVAL_FRACTION,
        progress: Progress | None = None,
        removal_reason: str = "gone at source",
        vector_sources: Sequence[Store] = (),
        cluster: LazyCluster | None = None,
        model_spec: str | None = None,
    ) -> None:
        self.store = store
        # Extraction, chunking and embedding go to this Dask cluster for a source with at least
        # ``settings.min_documents`` changed documents; the commits stay here. Workers load the
        # model ``model_spec`` names themselves.
        self._lazy_cluster = cluster
        self.model_spec = model_spec
        self.cluster: Cluster | None = None
        self._on_cluster = False
        # Other indexes built with the same model whose vectors may be reused (rebuild).
        self.vector_sources = list(vector_sources)
        self._revisions: dict[str, str] = {}
        self.embedder = embedder
        self.chunking = chunking
        self.limits = limits
        self.batch_documents = batch_documents
        self.max_removal_fraction = max_removal_fraction
        self.progress = progress or Progress(enabled=False)
        self.removal_reason = removal_reason  # what the tombstone of a removal says

    # --- the whole sync -------------------------------------------------------------------------

    def sync(
        self,
        sources: Sequence[Source],
        *,
        yes: bool = False,
        confirm: Callable[[str], bool] | None = None,
        trigger: str = "sync",
        should_stop: Callable[[], bool] | None = None,
        on_commit: Callable[[CommitResult], None] | None = None,
    ) -> SyncReport:
        """Bring the index in line with every source; each source independently.

        Listing all sources happens before anything is written, so an unreachable source stops
        the run before any change is made. ``should_stop`` is asked before each batch: once it
        says yes, no further batch starts (those done are committed whole) and the report says
        ``interrupted``. ``on_commit`` is called as each commit lands.
        """
        report = SyncReport()
        listings = []
        for source in sources:
            # Only the few columns that decide "changed?" are read for every document; whole
            # rows are fetched later for the documents that are read again or removed.
            briefs = self.store.document_briefs(source.name)
            # A connector that can ask its server "changed since?" (ETag, Last-Modified) gets
            # the fingerprints stored for its items before it lists them.
            prime = getattr(source, "prime", None)
            if prime is not None:
                prime(self.store.stored_fingerprints(source.name))
            try:
                listings.append((source, briefs, _list_changes(source, briefs)))
            except SourceError as exc:
                exc.source = source.name  # which source, for status
                raise
        # A writer killed mid-batch shows as a version no commit recorded. Clean up after it
        # before any batch, in a commit of its own, so the next crash cannot hide the first.
        recovered = recover_interrupted_batch(self.store, trigger)
        if recovered is not None:
            report.commits.append(recovered)
            report.counts.add(recovered.counts)
            if on_commit is not None:
                on_commit(recovered)
        # A source that knows its revision (a git commit) has it written into the commit row.
        revisions = {s.name: getattr(s, "revision", None) for s, _, _ in listings}
        self._revisions = {name: str(rev) for name, rev in revisions.items() if rev}
        for source, briefs, listing in listings:
            self._sync_source(
                source,
                briefs,
                listing,
                report,
                yes=yes,
                confirm=confirm,
                trigger=trigger,
                should_stop=should_stop or (lambda: False),
                on_commit=on_commit,
            )
            if report.interrupted:
                break
        report.version = self.store.version("chunks")
        return report

    def _sync_source(
        self,
        source: Source,
        briefs: DocumentBriefs,
        listing: Listing,
        report: SyncReport,
        *,
        yes: bool,
        confirm: Callable[[str], bool] | None,
        trigger: str,
        should_stop: Callable[[], bool],
        on_commit: Callable[[CommitResult], None] | None,
    ) -> None:
        prefix = source.name + ":"  # a doc_id is SOURCE:KEY
        stored_hash = briefs.content_hash
        listed = listing.keys
        # A set difference in C first: in the usual rescan nothing is missing, and walking
        # 20,000 stored keys in Python to find that out cost more than the rest of the compare.
        missing = stored_hash.keys() - listed
        removed = [prefix + key for key in stored_hash if key in missing] if missing else []
        gone = [d for d in removed if stored_hash[d[len(prefix) :]]]
        searchable = sum(1 for h in stored_hash.values() if h) if gone else 0
        if searchable and len(gone) > self.max_removal_fraction * searchable and not yes:
            message = (
                f"source {source.name!r}: this sync would remove {len(gone)} of its "
                f"{searchable} documents from the index (more than "
                f"{self.max_removal_fraction:.0%}). If the folder is unmounted or moved, stop now."
            )
            if confirm is None or not confirm(message + " Remove them?"):
                raise ConfirmationRequired(
                    message + " Nothing was changed; re-run with --yes if the removal is intended."
                )

        to_read = listing.changed
        unchanged = len(listed) - len(to_read)
        known = self.store.documents_by_id(
            source.name, [i.doc_id for i in to_read if i.key in stored_hash] + removed
        )

        removed_by_hash = {stored_hash[d[len(prefix) :]]: d for d in gone}
        pending_removals = dict.fromkeys(removed)  # ordered set
        batches = [
            to_read[i : i + self.batch_documents]
            for i in range(0, len(to_read), self.batch_documents)
        ] or [[]]
        cluster = self.cluster_for(len(to_read))
        self._on_cluster = cluster is not None
        ocr = getattr(source, "ocr", True)
        ahead: Prepared | _Ahead | None = None
        if cluster is not None and self._on_cluster:
            log.info(
                f"source {source.name!r}: {len(to_read)} documents to read, extracted and "
                f"embedded on {cluster.settings.describe()} ({cluster.address})",
                extra={"fields": {"event": "cluster", "source": source.name}},
            )
            ahead = cluster.submit_extract(
                source, batches[0], known, chunking=self.chunking, limits=self.limits, ocr=ocr
            )
        producer = None
        if ahead is None and len(batches) > 1:
            # In process, a producer thread reads and extracts the next batch while this one
            # is embedded and committed (the model releases the GIL while it runs). One batch
            # ahead at most, so memory stays bounded as on a cluster.
            producer = ThreadPoolExecutor(1, thread_name_prefix="upwell-extract")
            ahead = self._submit_local(producer, source, batches[0], known, ocr)
        try:
            self._sync_batches(
                source,
                batches,
                known,
                removed_by_hash,
                pending_removals,
                unchanged,
                report,
                ahead,
                should_stop=should_stop,
                trigger=trigger,
                on_commit=on_commit,
                producer=producer,
            )
        finally:
            self._on_cluster = False
            if producer is not None:
                producer.shutdown(wait=True, cancel_futures=True)

    def cluster_for(self, documents: int) -> Cluster | None:
        """The cluster to use for this many changed documents, or None: in process."""
        lazy = self._lazy_cluster
        if lazy is None or not documents or documents < lazy.settings.min_documents:
            return None
        self.cluster = lazy.get(self.model_spec or "default", self.embedder.model_id)
        return self.cluster

    def _sync_batches(
        self,
        source: Source,
        batches: list[list[SourceItem]],
        known: dict[str, dict[str, Any]],
        removed_by_hash: dict[str, str],
        pending_removals: dict[str, None],
        unchanged: int,
        report: SyncReport,
        ahead: Prepared | _Ahead | None,
        *,
        should_stop: Callable[[], bool],
        trigger: str,
        on_commit: Callable[[CommitResult], None] | None,
        producer: ThreadPoolExecutor | None = None,
    ) -> None:
        """One commit per batch. On a cluster, or with a ``producer`` thread in process, the
        next batch is being extracted while this one is embedded and committed: at most two
        batches of results are held (backpressure)."""
        ocr = getattr(source, "ocr", True)
        for n, batch in enumerate(batches):
            prepared, ahead = ahead, None
            if should_stop():
                if prepared is not None:
                    prepared.cancel()
                report.interrupted = True
                return
            if prepared is not None and n + 1 < len(batches):
                if producer is not None:
                    ahead = self._submit_local(producer, source, batches[n + 1], known, ocr)
                elif self.cluster is not None:
                    ahead = self.cluster.submit_extract(
                        source,
                        batches[n + 1],
                        known,
                        chunking=self.chunking,
                        limits=self.limits,
                        ocr=ocr,
                    )
            last = n == len(batches) - 1
            counts = Counts()
            counts.documents["unchanged"] = unchanged if n == 0 else 0
            try:
                result = self._run_batch(
                    source,
                    batch,
                    known,
                    removed_by_hash,
                    pending_removals,
                    counts,
                    report,
                    take_all_removals=last,
                    trigger=trigger,
                    prepared=prepared,
                )
            except BaseException:
                if ahead is not None:
                    ahead.cancel()
                raise
            report.counts.add(counts)
            if result is not None:
                report.commits.append(result)
                if on_commit is not None:
                    on_commit(result)

    # --- one batch, one commit -------------------------------------------------------------

    def _run_batch(
        self,
        source: Source,
        items: list[SourceItem],
        known: dict[str, dict[str, Any]],
        removed_by_hash: dict[str, str],
        pending_removals: dict[str, None],
        counts: Counts,
        report: SyncReport,
        *,
        take_all_removals: bool,
        trigger: str,
        prepared: Prepared | _Ahead | None = None,
    ) -> CommitResult | None:
        started = time.monotonic()
        commit_id = new_commit_id()
        now = utc_now()
        work: list[_DocWork] = []
        doc_rows: list[dict[str, Any]] = []
        removals: list[str] = []
        changes: dict[str, list[Any]] = {k: [] for k in OUTCOMES if k != "unchanged"}

        for item in self.progress.iterate(items, f"reading {source.name}"):
            row = known.get(item.doc_id)
            fp = item.fingerprint.key()
            done: dict[str, Any] | None = None
            if prepared is not None:
                # Read, hashed, extracted and chunked on a worker; decided here as in process.
                done = prepared.take(item)
                if "error" in done and "content_hash" not in done:
                    self._record_failure(
                        item, row, fp, done["error"], commit_id, now, doc_rows, counts, report
                    )
                    changes["failed"].append(item.doc_id)
                    continue
                data = b""
                content_hash = done["content_hash"]
            else:
                try:
                    data = source.read(item.key, self.limits.max_file_bytes)
                except ExtractionError as exc:
                    self._record_failure(
                        item, row, fp, str(exc), commit_id, now, doc_rows, counts, report
                    )
                    changes["failed"].append(item.doc_id)
                    continue
                content_hash = sha256_hex(data)
            if row is not None and row["content_hash"] == content_hash:
                # Same bytes under a new fingerprint (touched, copied over, or a failed file put
                # back as it was): nothing to extract; refresh the row.
                doc_rows.append(self._touched_row(row, item, fp, now))
                counts.documents["unchanged"] += 1
                continue
            moved_from = None
            if row is None and content_hash in removed_by_hash:
                candidate = removed_by_hash[content_hash]
                if candidate in pending_removals:
                    moved_from = candidate
                    del pending_removals[candidate]
                    removals.append(candidate)
            try:
                if done is not None:
                    if "error" in done:
                        raise ExtractionError(done["error"])
                    extracted = done["extracted"]
                    seg_json = segments_to_json(extracted.segments)
                    chunks = done["chunks"]
                else:
                    extracted, seg_json = self._extract(
                        item, data, moved_from, ocr=getattr(source, "ocr", True)
                    )
                    chunks = chunk_segments(
                        item.doc_id,
                        extracted.segments,
                        self.embedder.tokens,
                        self.chunking,
                        self.embedder.max_input_tokens,
                    )
            except ExtractionError as exc:
                self._record_failure(
                    item, row, fp, str(exc), commit_id, now, doc_rows, counts, report
                )
                changes["failed"].append(item.doc_id)
                continue
            if moved_from is not None:
                outcome = "moved"
            elif row is not None and row["content_hash"]:
                outcome = "modified"
            else:
                outcome = "added"
            work.append(
                _DocWork(item, outcome, content_hash, extracted, seg_json, chunks, moved_from)
            )

        if take_all_removals:
            removals.extend(pending_removals)
            pending_removals.clear()

        if not work and not removals and not doc_rows:
            return None
        return self._apply(
            source.name,
            work,
            doc_rows,
            removals,
            known,
            counts,
            changes,
            commit_id=commit_id,
            now=now,
            trigger=trigger,
            started=started,
        )

    def _apply(
        self,
        source_name: str,
        work: list[_DocWork],
        doc_rows: list[dict[str, Any]],
        removals: list[str],
        known: dict[str, dict[str, Any]],
        counts: Counts,
        changes: dict[str, list[Any]],
        *,
        commit_id: str,
        now: str,
        trigger: str,
        started: float,
    ) -> CommitResult:
        """Embed what is new and commit one batch: the second half of a sync, and all of a
        rebuild (which brings its documents already extracted)."""
        # Vectors: reuse every one ever computed for the same text, embed the rest once.
        all_chunks = [c for w in work for c in w.chunks]
        found = self.store.find_vectors([c.text_hash for c in all_chunks])
        for other in self.vector_sources:
            missing = [c.text_hash for c in all_chunks if c.text_hash not in found]
            if missing:
                found.update(other.find_vectors(missing))
        to_embed: dict[str, str] = {}
        for c in all_chunks:
            if c.text_hash not in found and c.text_hash not in to_embed:
                to_embed[c.text_hash] = c.embed_text
        new_vectors = self._embed(list(to_embed.values()))
        for h, v in zip(to_embed, new_vectors, strict=True):
            found[h] = v
        counts.chunks["embedded"] += len(to_embed)
        counts.chunks["reused"] += len(all_chunks) - len(to_embed)

        # Which documents' chunks actually change (a re-run after a crash finds them written).
        existing = self.store.chunk_keys([w.item.doc_id for w in work] + removals)
        write_docs: list[str] = []
        rows: list[dict[str, Any]] = []
        vectors: list[np.ndarray] = []
        for w in work:
            ids = chunk_ids(w.chunks)
            planned = sorted(zip(ids, range(len(ids)), strict=True))
            before = existing.get(w.item.doc_id, [])
            if sorted(before) != planned:
                write_docs.append(w.item.doc_id)
                old_ids = {c for c, _ in before}
                counts.chunks["deleted"] += len(old_ids - set(ids))
                counts.chunks["added"] += len(set(ids) - old_ids)
                for cid, c in zip(ids, w.chunks, strict=True):
                    rows.append(_chunk_row(cid, w.item, c, w.extracted.media_type))
                    vectors.append(found[c.text_hash])
        for doc_id in removals:
            if existing.get(doc_id):
                write_docs.append(doc_id)
                counts.chunks["deleted"] += len(existing[doc_id])

        # Write order: the cache (so no embedding is lost), the tombstones (a removal is logged
        # before anything forgets the document), the chunks (the one atomic version that
        # readers see), then the documents and the commit row that describe it.
        self._write_vectors(to_embed, found)
        expected_version = int(self.store.table("chunks").version) + (1 if write_docs else 0)
        tombstones = []
        for doc_id in removals:
            row = known.get(doc_id)
            if row is None:
                continue  # chunks orphaned by an interrupted batch: never logged, not counted
            counts.documents["removed"] += 0 if _is_move_source(doc_id, work) else 1
            if not row["content_hash"]:
                continue  # never searchable: nothing to log
            moved_to = next((w.item.doc_id for w in work if w.moved_from == doc_id), None)
            tombstones.append(
                {
                    "tombstone_id": tombstone_id(
                        doc_id, row["content_hash"], row["last_commit"] or ""
                    ),
                    "doc_id": doc_id,
                    "source": row["source"],
                    "path": row["path"],
                    "content_hash": row["content_hash"],
                    "removed_at": now,
                    "reason": "moved" if moved_to else self.removal_reason,
                    "detail": json.dumps({"moved_to": moved_to}) if moved_to else None,
                    "chunk_count": row["chunk_count"],
                    "chunks_version": expected_version,
                    "commit_id": commit_id,
                }
            )
            if moved_to is None:
                changes["removed"].append(doc_id)
        self.store.add_tombstones(tombstones)

        version = None
        if write_docs:
            table = _chunk_table(rows, vectors, self.embedder.dimension)
            version = self.store.replace_chunks(table, write_docs)

        for w in work:
            counts.documents[w.outcome] += 1
            if w.outcome == "moved":
                changes["moved"].append([w.moved_from, w.item.doc_id])
            else:
                changes[w.outcome].append(w.item.doc_id)
            doc_rows.append(
                {
                    "doc_id": w.item.doc_id,
                    "source": w.item.source,
                    "path": w.item.key,
                    "size": w.item.fingerprint.size,
                    "fingerprint": w.item.fingerprint.key(),
                    "content_hash": w.content_hash,
                    "media_type": w.extracted.media_type,
                    "title": w.extracted.title,
                    "status": "ok",
                    "error": None,
                    "failed_fingerprint": None,
                    "warnings": json.dumps(list(w.extracted.warnings)),
                    "segments": w.segments_json,
                    "extractor_version": formats.EXTRACTOR_VERSION,
                    "chunk_count": len(w.chunks),
                    "last_commit": commit_id,
                    "updated_at": now,
                }
            )
        keep = [r["doc_id"] for r in doc_rows if r["segments"] is None]
        if keep:
            stored = self.store.segments_of(keep)
            for r in doc_rows:
                if r["segments"] is None:
                    r["segments"] = stored.get(r["doc_id"], "[]")
        self.store.upsert_documents(doc_rows, removals)

        versions = self.store.versions()
        seconds = time.monotonic() - started
        self.store.add_commit(
            commit_row(
                commit_id=commit_id,
                time=now,
                trigger=trigger,
                versions=versions,
                sources=[source_name],
                documents=counts.documents,
                chunks=counts.chunks,
                seconds=seconds,
                changes=changes,
                source_revision=self._revisions.get(source_name),
            )
        )
        return CommitResult(commit_id, version or versions["chunks"], counts)

    def ingest_extracted(
        self,
        source_name: str,
        documents: Sequence[tuple[SourceItem, str, Extracted, str]],
        report: SyncReport,
        *,
        trigger: str,
    ) -> CommitResult | None:
        """Commit already-extracted documents as additions, in one batch.

        Each document is (item, content hash, extracted text, its segments JSON). This is how a
        rebuild indexes stored text without reading any source.
        """
        started = time.monotonic()
        work = [
            _DocWork(
                item,
                "added",
                content_hash,
                extracted,
                seg_json,
                chunk_segments(
                    item.doc_id,
                    extracted.segments,
                    self.embedder.tokens,
                    self.chunking,
                    self.embedder.max_input_tokens,
                ),
            )
            for item, content_hash, extracted, seg_json in documents
        ]
        if not work:
            return None
        counts = Counts()
        changes: dict[str, list[Any]] = {k: [] for k in OUTCOMES if k != "unchanged"}
        self._on_cluster = self.cluster_for(len(work)) is not None
        try:
            result = self._apply_all(source_name, work, counts, changes, trigger, started)
        finally:
            self._on_cluster = False
        report.counts.add(counts)
        report.commits.append(result)
        report.version = result.version
        return result

    def _apply_all(
        self,
        source_name: str,
        work: list[_DocWork],
        counts: Counts,
        changes: dict[str, list[Any]],
        trigger: str,
        started: float,
    ) -> CommitResult:
        return self._apply(
            source_name,
            work,
            [],
            [],
            {},
            counts,
            changes,
            commit_id=new_commit_id(),
            now=utc_now(),
            trigger=trigger,
            started=started,
        )

    # --- pieces ---------------------------------------------------------------------------------

    def _submit_local(
        self,
        producer: ThreadPoolExecutor,
        source: Source,
        items: list[SourceItem],
        known: dict[str, dict[str, Any]],
        ocr: bool,
    ) -> _Ahead:
        # The model's tokenizer is loaded here, on the writer's thread, before the producer
        # needs it: a deferred embedder is not loaded from two threads at once.
        tokens, budget = self.embedder.tokens, self.embedder.max_input_tokens
        max_bytes = self.limits.max_file_bytes
        futures = {
            item.doc_id: producer.submit(
                prepare_document,
                item,
                functools.partial(source.read, item.key, max_bytes),
                (known.get(item.doc_id) or {}).get("content_hash"),
                ocr=ocr,
                limits=self.limits,
                chunking=self.chunking,
                tokens=tokens,
                budget=budget,
            )
            for item in items
        }
        return _Ahead(futures)

    def _extract(
        self, item: SourceItem, data: bytes, moved_from: str | None, *, ocr: bool = True
    ) -> tuple[Extracted, str]:
        if moved_from is not None:
            # Same bytes as a document already extracted: reuse its stored segments.
            stored = self.store.document_segments(moved_from)
            if stored is not None and stored[1] == formats.EXTRACTOR_VERSION:
                segments = segments_from_json(stored[0])
                media_type = formats.media_type_for(item.key) or "application/octet-stream"
                return Extracted(media_type=media_type, segments=segments), stored[0]
        limits = self.limits if ocr else dataclasses.replace(self.limits, ocr=False)
        extracted = formats.extract(item.key, data, limits)
        return extracted, segments_to_json(extracted.segments)

    def _embed(self, texts: list[str]) -> list[np.ndarray]:
        """Vectors of ``texts``, in their order. The model pads every text of a call to the
        longest one, so the batch's texts go to it longest first, in steps of similar length:
        measured on 924 chunk texts of the benchmark corpus with the bundled model, steps of
        64 in document order spent 25% more time in the model than the same texts sorted."""
        if not texts:
            return []
        # Characters stand in for tokens here (no second tokenisation); the embedder still
        # sorts each step by its own token count.
        order = sorted(range(len(texts)), key=lambda i: -len(texts[i]))
        ordered = [texts[i] for i in order]
        out: list[np.ndarray] = [np.empty(0, np.float32)] * len(texts)
        if self.cluster is not None and self._on_cluster:
            with self.progress.bar(len(texts), "embedding on the cluster") as bar:
                vectors = self.cluster.embed(ordered, on_done=bar.update)
            for i, v in zip(order, vectors, strict=True):
                out[i] = v
            return out
        step = EMBED_STEP
        with self.progress.bar(len(texts), "embedding") as bar:
            for start in range(0, len(ordered), step):
                part = self.embedder.embed(ordered[start : start + step])
                for i, v in zip(order[start : start + step], part, strict=True):
                    out[i] = v
                bar.update(len(part))
        return out

    def _write_vectors(self, to_embed: dict[str, str], found: dict[str, np.ndarray]) -> None:
        if not to_embed:
            return
        hashes = list(to_embed)
        flat = np.stack([found[h] for h in hashes]).astype(np.float32).ravel()
        vec = pa.FixedSizeListArray.from_arrays(pa.array(flat), self.embedder.dimension)
        table = pa.Table.from_arrays(
            [pa.array(hashes, pa.string()), vec], schema=vectors_schema(self.embedder.dimension)
        )
        self.store.add_vectors(table)

    def _touched_row(
        self, row: dict[str, Any], item: SourceItem, fp: str, now: str
    ) -> dict[str, Any]:
        return {
            **row,
            "size": item.fingerprint.size,
            "fingerprint": fp,
            "status": "ok",
            "error": None,
            "failed_fingerprint": None,
            "segments": None,  # filled in bulk before the write
            "updated_at": now,
        }

    def _record_failure(
        self,
        item: SourceItem,
        row: dict[str, Any] | None,
        fp: str,
        reason: str,
        commit_id: str,
        now: str,
        doc_rows: list[dict[str, Any]],
        counts: Counts,
        report: SyncReport,
    ) -> None:
        """Log the reason and keep the last good version (if any) searchable."""
        counts.documents["failed"] += 1
        report.failures.append(Failure(item.source, item.key, reason))
        if row is not None:
            doc_rows.append(
                {
                    **row,
                    "status": "failed",
                    "error": reason,
                    "failed_fingerprint": fp,
                    "segments": None,  # filled in bulk before the write
                    "updated_at": now,
                }
            )
            return
        doc_rows.append(
            {
                "doc_id": item.doc_id,
                "source": item.source,
                "path": item.key,
                "size": item.fingerprint.size,
                "fingerprint": "",
                "content_hash": "",
                "media_type": formats.media_type_for(item.key),
                "title": None,
                "status": "failed",
                "error": reason,
                "failed_fingerprint": fp,
                "warnings": "[]",
                "segments": "[]",
                "extractor_version": formats.EXTRACTOR_VERSION,
                "chunk_count": 0,
                "last_commit": commit_id,
                "updated_at": now,
            }
        )


def _is_move_source(doc_id: str, work: list[_DocWork]) -> bool:
    return any(w.moved_from == doc_id for w in work)


def _chunk_row(chunk_id: str, item: SourceItem, c: Chunk, media_type: str) -> dict[str, Any]:
    return {
        "chunk_id": chunk_id,
        "doc_id": c.doc_id,
        "source": item.source,
        "path": item.key,
        "ordinal": c.ordinal,
        "text": c.text,
        "context": c.context,
        "text_hash": c.text_hash,
        "tokens": c.tokens,
        "page_start": c.page_start,
        "page_end": c.page_end,
        "heading": c.heading,
        "t_start": c.t_start,
        "t_end": c.t_end,
        "line_start": c.line_start,
        "line_end": c.line_end,
        "media_type": media_type,
    }


def _chunk_table(rows: list[dict[str, Any]], vectors: list[np.ndarray], dim: int) -> pa.Table:
    schema = chunks_schema(dim)
    if not rows:
        return schema.empty_table()
    flat = np.stack(vectors).astype(np.float32).ravel()
    columns = {name: [r[name] for r in rows] for name in schema.names if name != "vector"}
    arrays = [pa.array(columns[f.name], f.type) for f in schema if f.name != "vector"]
    arrays.append(pa.FixedSizeListArray.from_arrays(pa.array(flat), dim))
    return pa.Table.from_arrays(arrays, schema=schema)
