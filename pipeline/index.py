"""The Python face of upwell: an ``Index`` with sync, search and status.

Everything the command line does is a method here, so all of it is scriptable and testable from
Python; ``cli.py`` only parses arguments and prints.

    >>> from pipeline.index import Index
    >>> ix = Index(".upwell")
    >>> report = ix.sync(["sample_corpus"])
    >>> for hit in ix.search("torque for the crank bolts", k=3):
    ...     print(f"{hit.score:.3f} {hit.citation()}")
"""

from __future__ import annotations

import dataclasses
import fnmatch
import json
import os
import re
import shutil
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from connectors.base import Source
from connectors.folder import FolderSource
from pipeline import defaults, formats, history, retrieval
from pipeline.embedding import make_embedder
from pipeline.embedding.base import Embedder
from pipeline.engine.cluster import LazyCluster
from pipeline.engine.recovery import recover_for_writing
from pipeline.engine.reports import CommitResult, SyncReport
from pipeline.engine.sync import SyncEngine
from pipeline.errors import (
    ConfirmationRequired,
    ModelMismatch,
    SourceError,
    SyncPaused,
    UnknownVersion,
    UsageError,
)
from pipeline.history import erase as erasure
from pipeline.history.log import Commit, Diff
from pipeline.history.retention import RetentionPlan
from pipeline.history.rollback import RollbackPlan
from pipeline.locations import is_remote
from pipeline.locking import machine_folder, uri_key, writer_lock
from pipeline.progress import Progress
from pipeline.records import (
    ChunkSettings,
    ClusterSettings,
    Extracted,
    Fingerprint,
    Limits,
    SourceItem,
    segments_from_json,
)
from pipeline.status import index_status
from pipeline.store import upkeep
from pipeline.store.ids import new_commit_id, utc_now
from pipeline.store.schema import FORMAT_VERSION
from pipeline.store.tables import Store

DEFAULT_INDEX = defaults.INDEX_FOLDER
_NAMED_PATH = re.compile(r"^([A-Za-z0-9][A-Za-z0-9_.-]*)=(.+)$")
DEFAULT_MODEL = defaults.MODEL
#: Where in its document a chunk is: the columns every citation is built from.
ANCHOR_COLUMNS = ["page_start", "page_end", "heading", "t_start", "t_end", "line_start", "line_end"]
SEARCH_COLUMNS = ["_distance", "chunk_id", "doc_id", "source", "path", "ordinal", "text"]
SEARCH_COLUMNS += ANCHOR_COLUMNS
KEYWORD_SEARCH_COLUMNS = [c for c in SEARCH_COLUMNS if c != "_distance"]
#: What a document's page shows of each of its chunks.
CHUNK_VIEW_COLUMNS = ["chunk_id", "text", "tokens", *ANCHOR_COLUMNS]


def default_index_path() -> str:
    return os.environ.get("UPWELL_INDEX") or DEFAULT_INDEX


@dataclass(frozen=True)
class Hit:
    """One search result: the chunk text, its cosine similarity and its citation."""

    score: float
    source: str
    path: str
    text: str
    page: int | None
    page_end: int | None
    heading: str | None
    start: float | None
    end: float | None
    line_start: int | None
    line_end: int | None
    doc_id: str
    chunk_id: str
    ordinal: int
    vector_rank: int | None = None  # rank in the vector list (1 = best); None if absent
    keyword_rank: int | None = None  # rank in the keyword list; None if absent

    def citation(self) -> str:
        """``path, p. 3``, ``path > Heading``, ``path @ 00:01:05-00:01:20`` and so on."""
        parts = [f"{self.source}/{self.path}"]
        if self.page is not None:
            pages = (
                f"p. {self.page}"
                if self.page_end in (None, self.page)
                else f"pp. {self.page}-{self.page_end}"
            )
            parts.append(pages)
        if self.heading:
            parts.append(f"§ {self.heading}")
        if self.start is not None:
            parts.append(f"{_clock(self.start)}-{_clock(self.end or self.start)}")
        elif self.line_start is not None and self.page is None and not self.heading:
            parts.append(f"lines {self.line_start}-{self.line_end}")
        return ", ".join(parts)

    def as_json(self) -> dict[str, Any]:
        """The keys of ``upwell search --json`` and ``GET /search``: anchors that do not apply
        are null, ``score`` is the cosine similarity, ``start``/``end`` are seconds."""
        return {
            "score": round(self.score, 6),
            "path": self.path,
            "source": self.source,
            "text": self.text,
            "page": self.page,
            "page_end": self.page_end,
            "heading": self.heading,
            "start": self.start,
            "end": self.end,
            "line_start": self.line_start,
            "line_end": self.line_end,
            "doc_id": self.doc_id,
            "vector_rank": self.vector_rank,
            "keyword_rank": self.keyword_rank,
        }


def _as_document_patterns(
    patterns: Sequence[str], locations: Mapping[str, str] | None, cwd: str | None = None
) -> list[str]:
    """Each pattern as given, plus, for one that names a place on disk inside a folder source
    (``/srv/share/hr/complaint-0042.docx``, ``./notices/*.txt``, relative to ``cwd``, default
    the current folder), its ``SOURCE/PATH`` form."""
    out = list(patterns)
    roots = {
        name: Path(where).resolve()
        for name, where in (locations or {}).items()
        if not is_remote(where) and "://" not in where
    }
    base = Path(cwd or os.getcwd())
    for pattern in patterns:
        on_disk = base / Path(pattern).expanduser()  # an absolute pattern stays as it is
        if not (Path(pattern).is_absolute() or pattern.startswith((".", "~")) or on_disk.exists()):
            continue
        absolute = Path(os.path.abspath(on_disk))
        for name, root in roots.items():
            try:
                relative = absolute.relative_to(root)
            except ValueError:
                continue
            out.append(f"{name}/{relative.as_posix()}" if relative.parts else f"{name}/*")
    return out


def _document_matcher(patterns: Sequence[str]) -> Callable[[Mapping[str, Any]], bool]:
    """A test of a document row (``source``, ``path``, ``doc_id``) against globs matched on
    ``source/path``, ``path`` or the doc id."""

    def matches(d: Mapping[str, Any]) -> bool:
        return any(
            fnmatch.fnmatchcase(f"{d['source']}/{d['path']}", p)
            or fnmatch.fnmatchcase(d["path"], p)
            or fnmatch.fnmatchcase(d["doc_id"], p)
            for p in patterns
        )

    return matches


def _hit(r: retrieval.Ranked) -> Hit:
    row = r.row
    return Hit(
        score=r.score,
        source=row["source"],
        path=row["path"],
        text=row["text"],
        page=row["page_start"],
        page_end=row["page_end"],
        heading=row["heading"],
        start=row["t_start"],
        end=row["t_end"],
        line_start=row["line_start"],
        line_end=row["line_end"],
        doc_id=row["doc_id"],
        chunk_id=row["chunk_id"],
        ordinal=row["ordinal"],
        vector_rank=r.vector_rank,
        keyword_rank=r.keyword_rank,
    )


def _clock(seconds: float) -> str:
    whole = int(seconds)
    return f"{whole // 3600:02d}:{whole // 60 % 60:02d}:{whole % 60:02d}"


class Index:
    """One upwell index folder. Writers take the folder's lock; readers never do."""

    def __init__(
        self,
        path: str | os.PathLike[str] | None = None,
        *,
        model: str | None = None,
        chunking: ChunkSettings | None = None,
        limits: Limits | None = None,
        progress: Progress | None = None,
        batch_documents: int = defaults.BATCH_DOCUMENTS,
        max_removal_fraction: float = defaults.MAX_REMOVAL_FRACTION,
        storage_options: Mapping[str, str] | None = None,
        embedder: Embedder | None = None,
    ) -> None:
        """``embedder``: an already-built embedder to use instead of loading ``model`` (a
        process that opens several indexes can share one loaded model). It must be the
        model the index records: ``model`` names it for a new index, and a writer still
        checks the model id against an existing one."""
        # A folder is a Path; a URI on object storage (s3://bucket/prefix) stays the string it
        # was given, since Path would fold its "//". ``storage_options`` reach LanceDB for URIs.
        where = os.fspath(path or default_index_path())
        self.path: Path | str = where if is_remote(where) else Path(where)
        self.storage_options = dict(storage_options or {})
        self._model_spec = model
        self._chunking = chunking
        self.limits = limits or Limits()
        if self.limits.ocr_cache is None:
            # Content-addressed by page-image hash, so indexes on one machine may share it.
            ocr_cache = (
                machine_folder(defaults.OCR_CACHE_FOLDER)
                if isinstance(self.path, str)
                else self.path / defaults.OCR_CACHE_FOLDER
            )
            self.limits = dataclasses.replace(self.limits, ocr_cache=str(ocr_cache))
        self.progress = progress or Progress(enabled=False)
        self.batch_documents = batch_documents
        self.max_removal_fraction = max_removal_fraction
        self._store: Store | None = None
        self._embedder: Any = embedder
        self._lock_depth = 0
        self.cluster: LazyCluster | None = None  # set_cluster(): where extraction and embedding go

    # --- opening --------------------------------------------------------------------------------

    @property
    def state_root(self) -> Path:
        """Where connectors keep what they remember between runs (ETags, mirrors): in the index
        folder, or for an index on object storage a folder on this machine keyed by its URI
        (the one machine that writes the index is the one that syncs its sources)."""
        if isinstance(self.path, str):
            return machine_folder(defaults.CONNECTOR_STATE_FOLDER) / uri_key(self.path)
        return self.path / defaults.CONNECTOR_STATE_FOLDER

    @property
    def exists(self) -> bool:
        return Store.exists(self.path, self.storage_options)

    def store(self) -> Store:
        """The open store, for readers; IndexMissing if there is no index here."""
        if self._store is None:
            self._store = Store.open(self.path, self.storage_options)
        return self._store

    def embedder(self) -> Any:
        """The index's embedder. For an existing index it is loaded only when text needs
        tokens or vectors, so a sync that finds nothing changed never loads the model."""
        if self._embedder is None:
            recorded = self.store().settings() if self.exists else {}
            spec = self._model_spec or recorded.get("model") or DEFAULT_MODEL
            if recorded and spec == recorded.get("model"):
                self._embedder = _DeferredEmbedder(spec, recorded)
            else:
                self._embedder = make_embedder(spec)
        return self._embedder

    def _spec(self, store: Store) -> str:
        """The model spec workers load: the one given, else the one the index records."""
        return self._model_spec or store.settings().get("model") or DEFAULT_MODEL

    def set_cluster(self, settings: ClusterSettings | None, *, fallback: bool = False) -> None:
        """Send extraction, chunking and embedding to a Dask cluster from now on (None: in
        process). The cluster is reached on first need and kept until ``close_cluster()``."""
        self.close_cluster()
        self.cluster = LazyCluster(settings, fallback=fallback) if settings else None

    def close_cluster(self) -> None:
        if self.cluster is not None:
            self.cluster.close()

    def cluster_status(self) -> dict[str, Any] | None:
        """Workers and tasks in flight of the cluster in use; None when there is none."""
        if self.cluster is None:
            return None
        return {
            "configured": self.cluster.settings.describe(),
            "min_documents": self.cluster.settings.min_documents,
            **(self.cluster.describe() or {"connected": False}),
        }

    def _wanted_settings(self) -> dict[str, Any]:
        emb = self.embedder()
        return {
            "format_version": FORMAT_VERSION,
            "model": self._model_spec or DEFAULT_MODEL,
            "model_id": emb.model_id,
            "dimension": emb.dimension,
            "max_input_tokens": emb.max_input_tokens,
            "embedder": emb.describe(),
            "chunking": (self._chunking or ChunkSettings()).as_dict(),
            "created_at": datetime.now(UTC).isoformat(timespec="seconds"),
        }

    def _store_for_writing(self) -> Store:
        if not self.exists:
            self._store = Store.create(self.path, self._wanted_settings(), self.storage_options)
            return self._store
        store = self.store()
        if self._chunking is not None:
            store.check_settings({"chunking": self._chunking.as_dict()}, ["chunking"])
        else:
            self._chunking = ChunkSettings(**store.settings()["chunking"])
        emb = self.embedder()
        # The input budget decides chunk sizes: changing it would mix two chunkings.
        store.check_settings(
            {"model_id": emb.model_id, "max_input_tokens": emb.max_input_tokens},
            ["model_id", "max_input_tokens"],
        )
        return self._open_existing_for_writing(recover=None)

    def _open_existing_for_writing(self, recover: str | None) -> Store:
        """The store, up to date, for a writer (the caller holds the lock). A rollback or an
        erasure that a crash interrupted is finished first; then, unless ``recover`` is None (a
        sync does it itself, to report it), what a writer killed mid-batch left is cleaned up
        in a commit whose trigger is ``recover:RECOVER``."""
        store = self.store()
        recover_for_writing(store, recover)
        return store

    # --- writing --------------------------------------------------------------------------------

    @contextmanager
    def writing(self) -> Iterator[Index]:
        """Hold the index's writer lock for a block of writes (re-entrant within this object).

        A long-running writer (the service) holds it for its whole life, so no other process
        can write in between; ``sync`` and the other writers take it for their own call when
        nobody holds it yet. Raises IndexLocked (exit code 4) if another process has it.
        """
        if self._lock_depth:
            self._lock_depth += 1
            try:
                yield self
            finally:
                self._lock_depth -= 1
            return
        with writer_lock(self.path):
            self._lock_depth = 1
            try:
                yield self
            finally:
                self._lock_depth = 0

    def sync(
        self,
        sources: Sequence[str | os.PathLike[str] | Source],
        *,
        yes: bool = False,
        confirm: Callable[[str], bool] | None = None,
        trigger: str = "sync",
        should_stop: Callable[[], bool] | None = None,
        on_commit: Callable[[CommitResult], None] | None = None,
    ) -> SyncReport:
        """Bring the index in line with the sources; one commit per batch of changed documents.

        A folder path becomes a folder source named after the folder. Safe to re-run after a
        crash: the index converges to what a clean run would leave.
        """
        resolved = [self._as_source(s) for s in sources]
        names = [s.name for s in resolved]
        if len(set(names)) != len(names):
            raise UsageError(f"two sources share a name: {names}; name them apart with NAME=PATH")
        with self.writing():
            if self.cluster is not None and not self.cluster.settings.min_documents:
                # A command on a cluster connects before anything is read or created: an
                # unreachable scheduler or a mismatched worker stops it with nothing changed.
                recorded = self.store().settings() if self.exists else {}
                self.cluster.get(
                    self._model_spec or recorded.get("model") or DEFAULT_MODEL,
                    self.embedder().model_id,
                )
            store = self._store_for_writing()
            self._refuse_if_paused(store)
            locations = self._check_locations(store, resolved, yes=yes, confirm=confirm)
            engine = SyncEngine(
                store,
                self.embedder(),
                self._chunking or ChunkSettings(),
                self.limits,
                batch_documents=self.batch_documents,
                max_removal_fraction=self.max_removal_fraction,
                progress=self.progress,
                cluster=self.cluster,
                model_spec=self._spec(store),
            )
            try:
                report = engine.sync(
                    resolved,
                    yes=yes,
                    confirm=confirm,
                    trigger=trigger,
                    should_stop=should_stop,
                    on_commit=on_commit,
                )
            except SourceError as exc:
                # An unreachable source is not an empty one: nothing changed; status says why.
                self._record_source_errors(store, {exc.source or "?": str(exc)}, [])
                raise
            self._record_source_errors(store, {}, [s.name for s in resolved])
            self._record_source_problems(store, resolved)
            report.skipped = self._record_skipped(store, resolved)
            if locations is not None:
                store.update_setting("source_locations", locations)
            kinds = store.settings().get("source_kinds") or {}
            seen = {s.name: str(getattr(s, "kind", "folder")) for s in resolved}
            if any(kinds.get(name) != kind for name, kind in seen.items()):
                store.update_setting("source_kinds", {**kinds, **seen})
            if report.commits:
                upkeep.ensure_indexes(store)
                upkeep.tidy_small_tables(store)
            return report

    @staticmethod
    def _refuse_if_paused(store: Store) -> None:
        paused = store.settings().get(history.PAUSED)
        if paused:
            raise SyncPaused(
                f"syncing is paused since {paused['since']} by the rollback "
                f"{paused['commit']} to {paused['rollback_to']}; `upwell resume` lifts the "
                "pause (the next sync then re-applies what changed at the sources)"
            )

    @staticmethod
    def _record_source_problems(store: Store, sources: Sequence[Source]) -> None:
        """Keep, for status, what a listing skipped or kept as it was (a web page that answered
        500 after its retries, a sitemap entry on another site): the source is reachable, so the
        sync went on, but these items did not get their latest version."""
        recorded: dict[str, Any] = dict(store.settings().get("source_problems") or {})
        before = dict(recorded)
        for source in sources:
            problems = getattr(source, "problems", None)
            if problems is None:
                continue
            items = [{"key": key, "problem": problem} for key, problem in problems]
            if not items:
                recorded.pop(source.name, None)
            elif recorded.get(source.name, {}).get("items") != items:
                recorded[source.name] = {"items": items, "since": utc_now()}
        if recorded != before:
            store.update_setting("source_problems", recorded)

    @staticmethod
    def _record_skipped(store: Store, sources: Sequence[Source]) -> dict[str, dict[str, int]]:
        """Keep, for status, the files of a type upwell does not read, counted by suffix per
        source (most first); returns this sync's counts."""
        recorded: dict[str, Any] = dict(store.settings().get("source_skipped") or {})
        before = dict(recorded)
        now: dict[str, dict[str, int]] = {}
        for source in sources:
            skipped = getattr(source, "skipped", None)
            if skipped is None:
                continue  # a kind of source that does not count them
            counts = dict(sorted(skipped.items(), key=lambda kv: (-kv[1], kv[0])))
            if counts:
                now[source.name] = recorded[source.name] = counts
            else:
                recorded.pop(source.name, None)
        if recorded != before:
            store.update_setting("source_skipped", recorded)
        return now

    def record_source_error(self, source: str, reason: str) -> None:
        """Show in ``status`` (and the service's /healthz) that ``source`` was not synced and
        why, until a sync of it succeeds; for a refusal the sync itself did not record, such
        as a removal of most of a source that needs confirmation."""
        with self.writing():
            self._record_source_errors(self._open_existing_for_writing(None), {source: reason}, [])

    @staticmethod
    def _record_source_errors(store: Store, failed: dict[str, str], fine: Sequence[str]) -> None:
        errors: dict[str, Any] = dict(store.settings().get("source_errors") or {})
        before = dict(errors)
        for name in fine:
            errors.pop(name, None)
        for name, reason in failed.items():
            errors[name] = {
                "reason": reason,
                "since": errors.get(name, {}).get("since") or utc_now(),
            }
        if errors != before:
            store.update_setting("source_errors", errors)

    @staticmethod
    def _as_source(source: str | os.PathLike[str] | Source) -> Source:
        """A folder path is a source named after the folder; ``NAME=PATH`` names it."""
        if not isinstance(source, (str, os.PathLike)):
            return source
        text = os.fspath(source)
        name = None
        match = _NAMED_PATH.match(text)
        if match and not os.path.exists(text):
            name, text = match.group(1), match.group(2)
        folder = FolderSource.from_path(text, suffixes=formats.SUPPORTED_SUFFIXES)
        return dataclasses.replace(folder, name=name) if name else folder

    @staticmethod
    def _check_locations(
        store: Store,
        sources: Sequence[Source],
        *,
        yes: bool,
        confirm: Callable[[str], bool] | None,
    ) -> dict[str, str] | None:
        """Refuse to point a known source name at another location without confirmation.

        Two different folders that happen to share a name would otherwise replace each other's
        documents in the index.
        """
        known: dict[str, str] = store.settings().get("source_locations", {})
        changed = False
        for source in sources:
            location = getattr(source, "location", None)
            if location is None:
                continue
            before = known.get(source.name)
            if before is not None and before != location and not yes:
                message = (
                    f"source {source.name!r} was synced from {before}, not {location}. To index "
                    f"both, give this one another name: NAME={location}."
                )
                if confirm is None or not confirm(message + " Has the share moved here?"):
                    raise ConfirmationRequired(
                        message + " If the share moved, re-run with --yes. Nothing was changed."
                    )
            if before != location:
                known[source.name] = location
                changed = True
        return known if changed else None

    # --- reading --------------------------------------------------------------------------------

    def search(
        self,
        query: str,
        k: int = 10,
        *,
        source: str | Sequence[str] | None = None,
        as_of: str | None = None,
        mode: str = retrieval.DEFAULT_MODE,
        paths: Sequence[str] = (),
        types: Sequence[str] = (),
        since: str | None = None,
        per_doc: int | None = None,
    ) -> list[Hit]:
        """The ``k`` best chunks for ``query``, best first.

        ``mode``: ``hybrid`` (default; vector and keyword lists fused by reciprocal rank),
        ``vector`` (cosine similarity) or ``keyword`` (BM25). Filters, all run inside LanceDB:
        ``source`` (one name or several), ``paths`` (globs on SOURCE/PATH or PATH), ``types``
        (suffixes such as ``pdf``), ``since`` (documents changed at or after a time or REF).
        ``per_doc`` caps the hits from one document. With ``as_of`` (any REF) the index as it
        was then.
        """
        text = retrieval.check_query(query)
        if k < 1:
            raise UsageError(f"-k must be at least 1, not {k}")
        if per_doc is not None and per_doc < 1:
            raise UsageError(f"--per-doc must be at least 1, not {per_doc}")
        if mode not in retrieval.MODES:
            raise UsageError(
                f"unknown search mode {mode!r}: use one of {', '.join(retrieval.MODES)}"
            )
        store = self.store()
        table = store.table("chunks")
        if as_of is not None:
            commit = history.resolve(store, as_of)
            history.dataset_at(store, "chunks", commit.version)  # a clear error if it is gone
            table = store.db.open_table("chunks")
            table.checkout(commit.version)
        sources = (source,) if isinstance(source, str) else tuple(source or ())
        filters = retrieval.Filters(
            sources=sources,
            paths=tuple(paths),
            types=tuple(types),
            doc_ids=self._changed_since(store, since) if since else None,
        )
        where = filters.where()
        vector = None
        if mode != "keyword":
            vector = np.asarray(self.embedder().embed([text])[0], dtype=np.float32)
        effective = mode
        if mode != "vector" and not retrieval.keyword_index_names_at(table):
            if mode == "keyword":
                raise UsageError(
                    "this version of the index has no keyword index (it was built before "
                    "keyword search existed): search it with --mode vector, or `upwell rebuild` it"
                )
            effective = "vector"  # hybrid falls back to the one list this version has
        ranked = retrieval.run_search(
            mode=effective,
            k=k,
            per_doc=per_doc,
            vector_rows=lambda n: store.search(vector, n, SEARCH_COLUMNS, where=where, table=table),
            keyword_rows=lambda n: retrieval.keyword_rows(
                table, text, n, KEYWORD_SEARCH_COLUMNS, where
            ),
        )
        return [_hit(r) for r in ranked]

    def query_notes(self, query: str) -> list[str]:
        """What a search did to the query that a script should know (e.g. truncation)."""
        notes = []
        if self.exists and len(query) > 1000:
            budget = int(self.store().settings().get("max_input_tokens") or 254)
            used = self.embedder().tokens.count([query])[0]
            if used > budget:
                notes.append(
                    f"the query has {used} tokens; the model read the first {budget} of them"
                )
        if len(query.split()) > retrieval.MAX_KEYWORD_TERMS:
            notes.append(f"the keyword search used the first {retrieval.MAX_KEYWORD_TERMS} words")
        return notes

    def _changed_since(self, store: Store, since: str) -> tuple[str, ...]:
        """Ids of documents changed at or after ``since`` (an ISO time, or a REF's time)."""
        try:
            when = history.parse_time(since)
        except (ValueError, UsageError):
            when = history.resolve(store, since).when
        rows = store.all_documents(["doc_id", "updated_at", "content_hash"])
        return tuple(
            sorted(
                r["doc_id"]
                for r in rows
                if r["content_hash"]
                and r["updated_at"]
                and history.parse_time(r["updated_at"]) >= when
            )
        )

    # --- history ------------------------------------------------------------------------------

    def history(self, limit: int | None = None) -> list[Commit]:
        """Commits, newest first."""
        log = history.commits(self.store())
        log.reverse()
        return log[:limit] if limit else log

    def resolve(self, ref: str) -> Commit:
        """The commit a REF names: tag, version number, commit id (prefix) or ISO-8601 time."""
        return history.resolve(self.store(), ref)

    def diff(
        self,
        ref: str,
        ref2: str | None = None,
        *,
        paths: Sequence[str] = (),
        cwd: str | None = None,
    ) -> Diff:
        """Documents and chunks added, changed and removed between two commits.

        With one REF: that commit against its parent. With two: from REF to REF2. ``paths``
        limits it to the documents they name, as ``erase`` takes them: globs on
        ``source/path``, ``path`` or the doc id, or paths on disk inside a folder source.
        """
        store = self.store()
        log = history.commits(store)
        first = history.resolve(store, ref, log)
        base, head = (
            (history.parent(log, first), first)
            if ref2 is None
            else (first, history.resolve(store, ref2, log))
        )
        if not paths:
            return history.diff(store, base, head)
        patterns = self.document_patterns(paths, cwd=cwd)
        restricted = history.diff(store, base, head, keep=_document_matcher(patterns))
        if restricted is None:
            raise UsageError(
                f"no document matches {', '.join(paths)} in either commit "
                f"(v{base.version if base else 0} or v{head.version})"
            )
        return restricted

    def document_patterns(self, patterns: Sequence[str], *, cwd: str | None = None) -> list[str]:
        """``patterns`` as given, plus the ``SOURCE/PATH`` form of each that names a place on
        disk (absolute, or relative to ``cwd``) inside a folder source's recorded location."""
        locations = self.store().settings().get("source_locations") if self.exists else None
        return _as_document_patterns(patterns, locations, cwd)

    def tags(self) -> dict[str, Commit]:
        store = self.store()
        log = {c.id: c for c in history.commits(store)}
        return {name: log[cid] for name, cid in sorted(history.tags(store).items()) if cid in log}

    def tag(self, name: str, ref: str | None = None) -> Commit:
        """Name a commit (default: the latest). A tagged commit is never removed by retention."""
        with self.writing():
            store = self._open_existing_for_writing("tag")
            log = history.commits(store)
            if not log:
                raise UnknownVersion("the index has no commits to tag yet")
            commit = history.resolve(store, ref, log) if ref else log[-1]
            history.create_tag(store, name, commit)
            return commit

    def untag(self, name: str) -> str:
        with self.writing():
            return history.delete_tag(self._open_existing_for_writing("untag"), name)

    def history_totals(self, commits: Sequence[Commit]) -> dict[str, dict[str, int] | None]:
        """Commit id -> searchable documents and chunks just after it (None where retention
        removed that version), for the history chart."""
        store = self.store()
        return {c.id: history.totals_at(store, c) for c in commits}

    # --- one document -------------------------------------------------------------------------

    def document(self, doc_id: str) -> dict[str, Any] | None:
        """The documents-table row of ``doc_id`` (without its text), or None if the index holds
        no row for it (never seen, or removed: see ``document_events``)."""
        return self.store().document_row(doc_id)

    def document_chunks(
        self, doc_id: str, offset: int = 0, limit: int = 50
    ) -> tuple[int, list[dict[str, Any]]]:
        """(how many chunks ``doc_id`` has now, the ``limit`` of them from ``offset``), each
        with its anchors (page, heading path, lines, time range) and text."""
        store = self.store()
        rows = store.chunks_of(doc_id, CHUNK_VIEW_COLUMNS, start=offset, stop=offset + limit)
        return store.count_chunks_of(doc_id), rows

    def document_events(self, doc_id: str) -> list[dict[str, Any]]:
        """What each commit did to ``doc_id``, oldest first: added, modified, failed, moved
        (here from, or away to, another id) or removed, with the tombstone's reason."""
        store = self.store()
        tombstones = {t["commit_id"]: t for t in store.tombstones_of(doc_id)}
        events: list[dict[str, Any]] = []
        for commit in history.commits(store):
            changes = commit.changes
            found: list[dict[str, Any]] = []
            for outcome in ("added", "modified", "failed", "removed"):
                if doc_id in (changes.get(outcome) or ()):
                    found.append({"event": outcome})
            for pair in changes.get("moved") or ():
                if list(pair)[:1] == [doc_id]:
                    found.append({"event": "moved away", "to": pair[1]})
                elif list(pair)[1:2] == [doc_id]:
                    found.append({"event": "moved here", "from": pair[0]})
            for event in found:
                tomb = tombstones.get(commit.id)
                if tomb and event["event"] in ("removed", "moved away"):
                    event["reason"] = tomb["reason"]
                    if tomb.get("detail"):
                        event["detail"] = tomb["detail"]
                if changes.get("rollback_to"):
                    event["rollback_to"] = changes["rollback_to"]
                events.append({"commit": commit.as_dict(), **event})
        return events

    def document_tombstones(self, doc_id: str) -> list[dict[str, Any]]:
        """The tombstones ``doc_id`` left, oldest first."""
        return self.store().tombstones_of(doc_id)

    def plan_rollback(self, ref: str) -> RollbackPlan:
        store = self.store()
        log = history.commits(store)
        return history.plan_rollback(store, history.resolve(store, ref, log), log[-1])

    def rollback(
        self,
        ref: str,
        *,
        pause: bool = False,
        yes: bool = False,
        confirm: Callable[[str], bool] | None = None,
    ) -> Commit:
        """Make the index what it was at REF, as new versions on top (history is kept).

        Says what will change and asks first unless ``yes``. With ``pause``, syncing stops
        until ``resume()``, so the next sync does not re-apply what was rolled back. Safe to
        interrupt: the next writer completes the rollback.
        """
        with self.writing():
            store = self._open_existing_for_writing("rollback")
            log = history.commits(store)
            target = history.resolve(store, ref, log)
            plan = history.plan_rollback(store, target, log[-1])
            message = plan.describe()
            if not pause:
                message += (
                    "\nThe next sync will re-apply whatever differs at the sources; use --pause "
                    "to stop syncing until `upwell resume`."
                )
            if not yes and (confirm is None or not confirm(message + "\nRoll back?")):
                raise ConfirmationRequired(message + "\nNothing was changed; re-run with --yes.")
            commit_id = new_commit_id()
            history.start_rollback(store, plan, commit_id, utc_now(), pause)
            return history.resolve(store, commit_id)

    def remove_source(
        self,
        name: str,
        *,
        yes: bool = False,
        confirm: Callable[[str], bool] | None = None,
    ) -> SyncReport:
        """Take every document of one source out of the index, as commits with tombstones.

        For a source taken out of the configuration, or a folder no longer wanted: a sync only
        ever looks at the sources it is given, so their documents would otherwise stay
        searchable. History keeps them (``rollback`` brings them back, ``erase`` forgets them
        for good). Says what goes and asks first unless ``yes``.
        """
        with self.writing():
            store = self._open_existing_for_writing("remove-source")
            self._refuse_if_paused(store)
            docs = store.documents_of_source(name)
            chunks = store.chunk_counts().get(name, 0)
            if not docs and not chunks:
                known = sorted({d["source"] for d in store.all_documents(["source"])})
                raise UsageError(
                    f"the index has no source named {name!r}; its sources are: "
                    + (", ".join(known) or "none")
                )
            searchable = sum(1 for d in docs.values() if d["content_hash"])
            message = (
                f"This takes source {name!r} out of the index: {searchable} documents "
                f"({chunks} chunks) stop being searchable, and {len(docs) - searchable} failed "
                "ones are forgotten. Tombstones record the removals and history keeps the "
                "documents: `upwell rollback` brings them back, `upwell erase` forgets them."
            )
            if not yes and (confirm is None or not confirm(message + "\nRemove them?")):
                raise ConfirmationRequired(message + "\nNothing was changed; re-run with --yes.")
            engine = SyncEngine(
                store,
                self.embedder(),  # deferred: a removal embeds nothing, so no model is loaded
                self._chunking or ChunkSettings(),
                self.limits,
                batch_documents=self.batch_documents,
                max_removal_fraction=1.0,
                progress=self.progress,
                removal_reason="source removed",
            )
            report = engine.sync([_NoItems(name)], yes=True, trigger="remove-source")
            for key in (
                "source_locations",
                "source_kinds",
                "source_errors",
                "source_problems",
                "source_skipped",
            ):
                entries = dict(store.settings().get(key) or {})
                if entries.pop(name, None) is not None:
                    store.update_setting(key, entries)
            return report

    def resume(self) -> dict[str, Any] | None:
        """Lift a pause set by ``rollback(pause=True)``; None if syncing was not paused."""
        with self.writing():
            return history.resume(self._open_existing_for_writing("resume"))

    def rebuild(
        self,
        into: str | os.PathLike[str],
        *,
        as_of: str | None = None,
        model: str | None = None,
        chunking: dict[str, int] | None = None,
    ) -> SyncReport:
        """A new index in ``into`` built from this index's stored text; no source is read.

        Chunking settings not given are kept; the model is kept unless ``model`` names
        another. Vectors are reused wherever the model and the exact text match.
        """
        store = self.store()
        settings = store.settings()
        if as_of is not None:
            commit = history.resolve(store, as_of)
            documents = history.dataset_at(store, "documents", commit.documents_version)
        else:
            documents = store.table("documents").to_lance()
        target = Index(
            into,
            model=model or settings.get("model", DEFAULT_MODEL),
            chunking=ChunkSettings(**{**settings["chunking"], **(chunking or {})}),
            limits=self.limits,
            progress=self.progress,
            batch_documents=self.batch_documents,
            storage_options=self.storage_options,
        )
        if target.exists:
            raise UsageError(f"{target.path} already holds an index; rebuild into a new folder")
        report = SyncReport()
        with target.writing():
            new_store = target._store_for_writing()
            embedder = target.embedder()
            same_model = embedder.model_id == settings.get("model_id")
            engine = SyncEngine(
                new_store,
                embedder,
                target._chunking or ChunkSettings(),
                self.limits,
                progress=self.progress,
                vector_sources=[store] if same_model else [],
                cluster=self.cluster,
                model_spec=target._spec(new_store),
            )
            if self.cluster is not None:
                engine.cluster_for(1)  # connect first: nothing is written if it cannot
            by_source: dict[str, list[dict[str, Any]]] = {}
            for row in documents.to_table().to_pylist():
                if row["content_hash"]:  # a document that never extracted has no text to keep
                    by_source.setdefault(row["source"], []).append(row)
            for source, rows in sorted(by_source.items()):
                rows.sort(key=lambda r: r["path"])
                for i in range(0, len(rows), self.batch_documents):
                    batch = [_stored_document(r) for r in rows[i : i + self.batch_documents]]
                    engine.ingest_extracted(source, batch, report, trigger="rebuild")
            locations = settings.get("source_locations")
            if locations:
                new_store.update_setting("source_locations", locations)
        return report

    # --- upkeep ---------------------------------------------------------------------------------

    def plan_retention(self, keep_days: float = defaults.KEEP_DAYS) -> RetentionPlan:
        return history.plan_retention(self.store(), timedelta(days=keep_days))

    def maintain(
        self,
        *,
        keep_days: float = defaults.KEEP_DAYS,
        yes: bool = False,
        confirm: Callable[[str], bool] | None = None,
    ) -> dict[str, Any]:
        """Compact the tables, create scalar indexes once they pay, and remove versions older
        than ``keep_days`` (never tagged ones, never what a paused rollback replaced).

        Removing versions destroys history, so it asks first unless ``yes`` (when there is
        anything to remove).
        """
        with self.writing():
            store = self._open_existing_for_writing("maintain")
            plan = history.plan_retention(store, timedelta(days=keep_days))
            if plan.commits_lost and not yes:
                message = plan.describe()
                if confirm is None or not confirm(message + "\nRemove them?"):
                    raise ConfirmationRequired(
                        message + "\nNothing was changed; re-run with --yes."
                    )
            created = upkeep.ensure_indexes(store)
            report = upkeep.compact_and_clean(store, timedelta(days=keep_days))
            report.indexes_created = created
            return {
                "retention_days": keep_days,
                "commits_past_retention": len(plan.commits_lost),
                **report.as_dict(),
            }

    def erase(
        self,
        patterns: Sequence[str],
        *,
        yes: bool = False,
        confirm: Callable[[str], bool] | None = None,
        cwd: str | None = None,
    ) -> dict[str, Any]:
        """Forget documents completely: rows, cached vectors, and every old version holding them.

        ``patterns`` are globs matched against ``source/path``, ``path`` or the doc id, or
        paths on disk (absolute, or relative to ``cwd``, default the current folder) inside a
        folder source's recorded location, which are mapped to ``source/path``. This rewrites
        history: earlier rollback points and tags are lost. Asks first unless ``yes``.
        """
        with self.writing():
            store = self._open_existing_for_writing("erase")
            docs = store.all_documents(["doc_id", "source", "path"])
            patterns = _as_document_patterns(
                patterns, store.settings().get("source_locations"), cwd
            )
            matches = _document_matcher(patterns)
            matched = sorted(d["doc_id"] for d in docs if matches(d))
            if not matched:
                raise UsageError(f"no document matches {', '.join(patterns)}")
            shown = ", ".join(matched[:10]) + (
                f" and {len(matched) - 10} more" if len(matched) > 10 else ""
            )
            tag_names = sorted(history.tags(store))
            message = (
                f"Erasing {len(matched)} documents for good: {shown}.\n"
                "Their chunks, cached vectors and stored text are deleted, the OCR cache is "
                "emptied (it may hold their scanned text), and every earlier "
                "version of the index is removed so none still holds them: all earlier rollback "
                "points are lost"
                + (f", and the tags {', '.join(tag_names)} are dropped" if tag_names else "")
                + ". This cannot be undone. (If a file is still at its source, the next sync "
                "indexes it again: remove it there, or exclude it, first.)"
            )
            if not yes and (confirm is None or not confirm(message + "\nErase?")):
                raise ConfirmationRequired(message + "\nNothing was changed; re-run with --yes.")
            result = erasure.erase_documents(
                store, matched, commit_id=new_commit_id(), now=utc_now()
            )
            store.refresh()
            if self.limits.ocr_cache:
                shutil.rmtree(self.limits.ocr_cache, ignore_errors=True)
            return {"erased": matched, **result}

    def status(self) -> dict[str, Any]:
        """Totals, per-source counts, failed documents with reasons, model and last commit."""
        return index_status(self.store(), str(self.path))

    def source_kinds(self) -> dict[str, str]:
        """Source name -> its connector's kind (folder, git, http, s3), as last synced."""
        return dict(self.store().settings().get("source_kinds") or {})


class _DeferredEmbedder:
    """Stands in for an index's recorded embedder and loads it on first real use.

    The id, dimension and token budget come from the index's settings; once loaded, the
    model must have the id the index recorded (a changed package is a ModelMismatch).
    """

    def __init__(self, spec: str, recorded: dict[str, Any]) -> None:
        self.spec = spec
        self.model_id: str = recorded["model_id"]
        self.dimension: int = int(recorded["dimension"])
        self.max_input_tokens: int = int(recorded["max_input_tokens"])
        self._loaded: Any = None

    def _load(self) -> Any:
        if self._loaded is None:
            embedder = make_embedder(self.spec)
            if embedder.model_id != self.model_id:
                raise ModelMismatch(
                    f"the index was built with {self.model_id}, but {self.spec!r} now loads "
                    f"{embedder.model_id}; install the model the index was built with, or "
                    "`upwell rebuild --into NEW_DIR --new-model SPEC`"
                )
            self._loaded = embedder
        return self._loaded

    @property
    def tokens(self) -> Any:
        return self._load().tokens

    def embed(self, texts: Sequence[str]) -> np.ndarray:
        return np.asarray(self._load().embed(texts))

    def describe(self) -> dict[str, Any]:
        return dict(self._load().describe())


def _stored_document(row: dict[str, Any]) -> tuple[SourceItem, str, Extracted, str]:
    """A documents-table row as an already-extracted document (for rebuild)."""
    item = SourceItem(
        source=row["source"],
        key=row["path"],
        fingerprint=Fingerprint.parse(row["fingerprint"]) or Fingerprint(0),
    )
    extracted = Extracted(
        media_type=row["media_type"],
        segments=segments_from_json(row["segments"]),
        title=row["title"],
        warnings=tuple(json.loads(row["warnings"] or "[]")),
    )
    return item, row["content_hash"], extracted, row["segments"]


class _NoItems:
    """A source that lists nothing: syncing it removes everything the index holds of it."""

    def __init__(self, name: str) -> None:
        self.name = name

    def list_items(self) -> list[SourceItem]:
        return []

    def read(self, key: str, max_bytes: int) -> bytes:
        raise AssertionError("a source that lists nothing is never read")
