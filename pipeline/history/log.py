"""Version history: commits, refs, diffs, tags, rollback, and keeping old versions in check.

The ``commits`` table is upwell's log: one row per commit with UTC time, counts, and the version
of the chunks, documents and tombstones tables after it. LanceDB keeps every table version; this
module maps between the two. LanceDB only looks versions up by number or tag (its own version
list has naive local timestamps), so every lookup by time goes through the commits log.

A REF, everywhere, is one of: a tag; a chunks-table version number (``12`` or ``v12``); a commit
id or an unambiguous prefix of one (4 characters or more); an ISO-8601 time, meaning the last
commit at or before it (a time without a zone is UTC).
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any, overload

from pipeline.errors import StoreError, UnknownVersion, UsageError, first_line
from pipeline.store.tables import Store

TAG_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9._-]{0,63}$")
INTERNAL_TAG_PREFIX = "upwell-"
PAUSE_TAG = "upwell-paused-before"


@dataclass(frozen=True)
class Commit:
    """One row of the commits log."""

    id: str
    time: str
    trigger: str
    version: int  # of the chunks table
    documents_version: int
    tombstones_version: int
    sources: tuple[str, ...]
    documents: dict[str, int]
    chunks: dict[str, int]
    seconds: float
    changes: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def from_row(cls, row: dict[str, Any]) -> Commit:
        return cls(
            id=row["commit_id"],
            time=row["time"],
            trigger=row["trigger"],
            version=int(row["chunks_version"]),
            documents_version=int(row["documents_version"]),
            tombstones_version=int(row["tombstones_version"]),
            sources=tuple(json.loads(row["sources"] or "[]")),
            # .get: a column added later is absent from commits written before it existed.
            documents={
                k: int(row.get(f"documents_{k}") or 0)
                for k in ("added", "modified", "removed", "moved", "unchanged", "failed")
            },
            chunks={
                k: int(row.get(f"chunks_{k}") or 0)
                for k in ("embedded", "reused", "added", "deleted")
            },
            seconds=float(row["seconds"] or 0.0),
            changes=json.loads(row["changes"] or "{}"),
        )

    def summary(self) -> dict[str, Any]:
        """The ``last_commit`` of ``upwell status --json``."""
        return {
            "id": self.id,
            "time": self.time,
            "trigger": self.trigger,
            "version": self.version,
            "documents": dict(self.documents),
            "chunks": dict(self.chunks),
        }

    @property
    def when(self) -> datetime:
        return parse_time(self.time)

    def as_dict(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "version": self.version,
            "time": self.time,
            "trigger": self.trigger,
            "sources": list(self.sources),
            "documents": dict(self.documents),
            "chunks": dict(self.chunks),
            "seconds": round(self.seconds, 3),
        }


def parse_time(text: str) -> datetime:
    """An ISO-8601 time as an aware UTC datetime; a time without a zone is taken as UTC."""
    value = text.strip()
    if value.endswith(("Z", "z")):
        value = value[:-1] + "+00:00"
    when = datetime.fromisoformat(value)
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return when.astimezone(UTC)


def commits(store: Store) -> list[Commit]:
    """Every commit, oldest first (in the order ``store.commit_order`` defines)."""
    return [Commit.from_row(r) for r in store.commits()]


# --- refs --------------------------------------------------------------------------------------


def tags(store: Store) -> dict[str, str]:
    """User tags: name -> commit id."""
    return dict(store.settings().get("tags", {}))


def resolve(store: Store, ref: str, log: list[Commit] | None = None) -> Commit:
    """The commit a REF names; UnknownVersion (one line, listing the nearest refs) if none."""
    log = commits(store) if log is None else log
    text = ref.strip()
    if not log:
        raise UnknownVersion(f"unknown ref {ref!r}: the index has no commits yet")
    by_id = {c.id: c for c in log}
    named = tags(store)
    if text in named:
        commit = by_id.get(named[text])
        if commit is None:
            raise UnknownVersion(f"tag {text!r} names commit {named[text]} which is not in the log")
        return commit
    version = re.fullmatch(r"v?(\d{1,7})", text)
    if version:
        number = int(version.group(1))
        at_or_before = [c for c in log if c.version <= number]
        if at_or_before and number <= log[-1].version:
            # The last commit whose chunks version is at or before the number asked for.
            return max(at_or_before, key=lambda c: (c.version, c.time))
    if re.fullmatch(r"[0-9a-fA-F]{4,}", text):
        matches = [c for c in log if c.id.startswith(text.lower())]
        if len(matches) == 1:
            return matches[0]
        if len(matches) > 1:
            listed = ", ".join(f"{c.id} ({c.time})" for c in matches[:5])
            raise UnknownVersion(
                f"ref {ref!r} is ambiguous: it starts {len(matches)} commit ids: {listed}"
            )
    try:
        when = parse_time(text)
    except ValueError:
        when = None
    if when is not None:
        before = [c for c in log if c.when <= when]
        if before:
            return before[-1]
        raise UnknownVersion(
            f"no commit at or before {when.isoformat()}: the first commit is {log[0].id} "
            f"at {log[0].time}"
        )
    recent = ", ".join(f"{c.id[:12]} (v{c.version}, {c.time})" for c in reversed(log[-3:]))
    tag_list = ", ".join(sorted(named)) or "none"
    raise UnknownVersion(
        f"unknown ref {ref!r}: not a tag, version, commit id or ISO-8601 time; "
        f"latest commits: {recent}; tags: {tag_list}"
    )


def parent(log: list[Commit], commit: Commit) -> Commit | None:
    position = [c.id for c in log].index(commit.id)
    return log[position - 1] if position > 0 else None


# --- reading a table as it was -----------------------------------------------------------------


def dataset_at(store: Store, table: str, version: int) -> Any:
    """The Lance dataset of ``table`` at ``version``; UnknownVersion if retention removed it."""
    try:
        return store.table(table).to_lance().checkout_version(version)
    except (ValueError, RuntimeError, OSError) as exc:
        # Lance's own message names its manifest file and source lines: the cause is enough.
        cause = "not found" if "not found" in str(exc).lower() else first_line(exc)
        raise UnknownVersion(
            f"version {version} of the {table} table is no longer stored ({cause}; removed by "
            "`upwell maintain` retention or by an erasure): `upwell history` lists the commits "
            "that can still be searched, diffed and rolled back to"
        ) from None


def documents_at(store: Store, version: int) -> dict[str, dict[str, Any]]:
    """doc_id -> {path, source, content_hash, status} of the documents table at a version."""
    ds = dataset_at(store, "documents", version)
    rows = ds.to_table(columns=["doc_id", "source", "path", "content_hash", "status"]).to_pylist()
    return {r["doc_id"]: r for r in rows if r["content_hash"]}


def totals_at(store: Store, commit: Commit) -> dict[str, int] | None:
    """Searchable documents and chunks just after ``commit``; None once retention removed
    either version. Counts only: row metadata and one narrow column are read."""
    try:
        docs = dataset_at(store, "documents", commit.documents_version)
        chunks = dataset_at(store, "chunks", commit.version)
        return {
            # a document that failed before it was ever read has an empty content hash
            "documents": int(
                docs.count_rows(filter="content_hash IS NOT NULL AND content_hash != ''")
            ),
            "chunks": int(chunks.count_rows()),
        }
    except UnknownVersion:
        return None


def chunk_ids_at(store: Store, version: int) -> dict[str, str]:
    """chunk_id -> doc_id of the chunks table at a version."""
    ds = dataset_at(store, "chunks", version)
    table = ds.to_table(columns=["chunk_id", "doc_id"])
    return dict(zip(table["chunk_id"].to_pylist(), table["doc_id"].to_pylist(), strict=True))


@dataclass(frozen=True)
class Diff:
    """Documents and chunks added, changed and removed from ``base`` to ``head``."""

    base: Commit | None
    head: Commit
    added: tuple[str, ...]
    modified: tuple[str, ...]
    removed: tuple[str, ...]
    moved: tuple[tuple[str, str], ...]
    chunks_added: int
    chunks_removed: int

    def as_dict(self) -> dict[str, Any]:
        return {
            "from": self.base.as_dict() if self.base else None,
            "to": self.head.as_dict(),
            "documents": {
                "added": list(self.added),
                "modified": list(self.modified),
                "removed": list(self.removed),
                "moved": [{"from": a, "to": b} for a, b in self.moved],
            },
            "counts": {
                "documents": {
                    "added": len(self.added),
                    "modified": len(self.modified),
                    "removed": len(self.removed),
                    "moved": len(self.moved),
                },
                "chunks": {"added": self.chunks_added, "removed": self.chunks_removed},
            },
        }


def diff_states(
    before_docs: dict[str, dict[str, Any]],
    after_docs: dict[str, dict[str, Any]],
    before_chunks: dict[str, str],
    after_chunks: dict[str, str],
    base: Commit | None,
    head: Commit,
) -> Diff:
    """Pure: compare two states. A removal and an addition of the same content is a move."""
    added = [d for d in after_docs if d not in before_docs]
    removed = [d for d in before_docs if d not in after_docs]
    modified = [
        d
        for d in after_docs
        if d in before_docs and after_docs[d]["content_hash"] != before_docs[d]["content_hash"]
    ]
    moved = []
    by_hash = {before_docs[d]["content_hash"]: d for d in removed}
    for d in list(added):
        source = by_hash.pop(after_docs[d]["content_hash"], None)
        if source is not None:
            moved.append((source, d))
            added.remove(d)
            removed.remove(source)
    return Diff(
        base=base,
        head=head,
        added=tuple(sorted(added)),
        modified=tuple(sorted(modified)),
        removed=tuple(sorted(removed)),
        moved=tuple(sorted(moved)),
        chunks_added=len(after_chunks.keys() - before_chunks.keys()),
        chunks_removed=len(before_chunks.keys() - after_chunks.keys()),
    )


@overload
def diff(store: Store, base: Commit | None, head: Commit) -> Diff: ...
@overload
def diff(
    store: Store, base: Commit | None, head: Commit, keep: Callable[[dict[str, Any]], bool]
) -> Diff | None: ...
def diff(
    store: Store,
    base: Commit | None,
    head: Commit,
    keep: Callable[[dict[str, Any]], bool] | None = None,
) -> Diff | None:
    """What changed from ``base`` to ``head``. With ``keep``, only the documents whose row (at
    either end) it accepts, and both ends of a move when either is kept; ``None`` when it
    accepts no document at either end."""
    before_docs = documents_at(store, base.documents_version) if base else {}
    after_docs = documents_at(store, head.documents_version)
    before_chunks = chunk_ids_at(store, base.version) if base else {}
    after_chunks = chunk_ids_at(store, head.version)
    whole = diff_states(before_docs, after_docs, before_chunks, after_chunks, base, head)
    if keep is None:
        return whole
    kept = {d for d, row in (*before_docs.items(), *after_docs.items()) if keep(row)}
    if not kept:
        return None
    for a, b in whole.moved:
        if a in kept or b in kept:
            kept |= {a, b}
    return diff_states(
        {d: r for d, r in before_docs.items() if d in kept},
        {d: r for d, r in after_docs.items() if d in kept},
        {c: d for c, d in before_chunks.items() if d in kept},
        {c: d for c, d in after_chunks.items() if d in kept},
        base,
        head,
    )


# --- tags --------------------------------------------------------------------------------------

TAGGED_TABLES = ("chunks", "documents")


def create_tag(store: Store, name: str, commit: Commit) -> None:
    """Name a commit. The tag also pins its table versions, so retention never removes them."""
    if not TAG_NAME.match(name) or name.startswith(INTERNAL_TAG_PREFIX):
        raise UsageError(
            f"tag name {name!r} is not allowed: use a letter, then letters, digits, '.', '_' or "
            f"'-' (at most 64), not starting with {INTERNAL_TAG_PREFIX!r}"
        )
    existing = tags(store)
    if name in existing:
        raise UsageError(f"tag {name!r} already names commit {existing[name]}; untag it first")
    _pin(store, name, commit)
    existing[name] = commit.id
    store.update_setting("tags", existing)


def delete_tag(store: Store, name: str) -> str:
    existing = tags(store)
    if name not in existing:
        raise UnknownVersion(f"no tag {name!r}; tags: {', '.join(sorted(existing)) or 'none'}")
    commit_id = existing.pop(name)
    _unpin(store, name)
    store.update_setting("tags", existing)
    return commit_id


def _pin(store: Store, name: str, commit: Commit) -> None:
    versions = {"chunks": commit.version, "documents": commit.documents_version}
    for table in TAGGED_TABLES:
        lance_tags = store.table(table).tags
        if name in lance_tags.list():
            lance_tags.delete(name)
        try:
            lance_tags.create(name, versions[table])
        except (ValueError, RuntimeError, OSError) as exc:
            raise StoreError(
                f"cannot tag {table} version {versions[table]}: {first_line(exc)}"
            ) from None


def _unpin(store: Store, name: str) -> None:
    for table in TAGGED_TABLES:
        lance_tags = store.table(table).tags
        if name in lance_tags.list():
            lance_tags.delete(name)
