"""What each console page shows, as plain data: the JSON twin of the page is exactly this.

Every function reads through ``Index`` (the same calls the CLI makes) and does a bounded amount
of work: lists are paginated, a search takes at most ``MAX_K`` hits, the chart covers the newest
``CHART_COMMITS`` commits. Nothing here writes; a rollback preview only plans.
"""

from __future__ import annotations

import math
import shlex
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from pipeline import defaults, retrieval
from pipeline.errors import UpwellError, UsageError
from pipeline.index import Index

MAX_K = 100
HISTORY_PER_PAGE = 25
FAILURES_PER_PAGE = 50
CHUNKS_PER_PAGE = 20
CHART_COMMITS = 200  # the chart's points: the newest commits, oldest first
REF_CHOICES = 100  # commits offered in the "as of" and diff lists
SNIPPET_CHARS = 320

#: Source states, worst first: the word the page shows and the icon beside it.
STATES = {
    "unreachable": "⊘",
    "failing": "✖",
    "paused": "‖",
    "syncing": "⟳",
    "current": "✔",
}


class NotFound(UpwellError):
    """No such document, page or asset: a 404."""


@dataclass(frozen=True)
class Live:
    """What a running service knows beyond what the index records. ``upwell serve`` has no
    service: ``watching`` is false and the states come from the index alone."""

    watching: bool = False
    paused: bool = False
    writing: bool = False
    syncing: str | None = None
    queue_depth: int = 0
    failing: Mapping[str, tuple[str, str]] = field(default_factory=dict)  # name -> (class, why)
    kinds: Mapping[str, str] = field(default_factory=dict)  # configured sources -> kind
    problems: Sequence[str] = ()
    started_at: float | None = None
    cluster: Mapping[str, Any] | None = None  # workers and tasks in flight, if one is in use
    compaction: Mapping[str, Any] | None = None  # the service's automatic compaction

    def as_dict(self) -> dict[str, Any]:
        return {
            "cluster": dict(self.cluster) if self.cluster is not None else None,
            "compaction": dict(self.compaction) if self.compaction is not None else None,
            "watching": self.watching,
            "paused": self.paused,
            "writing": self.writing,
            "syncing": self.syncing,
            "queue_depth": self.queue_depth,
            "problems": list(self.problems),
            "started_at": self.started_at,
        }


# --- parameters ----------------------------------------------------------------------------------


def one(query: Mapping[str, Sequence[str]], name: str, default: str | None = None) -> str | None:
    values = query.get(name) or ()
    return values[0] if values else default


def whole(query: Mapping[str, Sequence[str]], name: str, default: int, low: int, high: int) -> int:
    """A whole-number parameter within [low, high]; a UsageError naming it otherwise."""
    text = one(query, name)
    if text is None or text == "":
        return default
    try:
        value = int(text)
    except ValueError:
        raise UsageError(f"{name} must be a whole number, not {text!r}") from None
    if not low <= value <= high:
        raise UsageError(f"{name} must be between {low} and {high}, not {value}")
    return value


def paging(total: int, page: int, per_page: int) -> dict[str, Any]:
    pages = max(1, math.ceil(total / per_page))
    return {"page": page, "pages": pages, "per_page": per_page, "total": total}


def _page_number(query: Mapping[str, Sequence[str]]) -> int:
    return whole(query, "page", 1, 1, 10**6)


# --- overview ------------------------------------------------------------------------------------


def overview(index: Index, live: Live) -> dict[str, Any]:
    """``upwell status`` plus, per source, its kind and state (current, syncing, paused,
    failing, unreachable) with the reason, and what the service is doing."""
    status = index.status()
    kinds = {**index.source_kinds(), **live.kinds}
    sources = {s["name"]: s for s in status["sources"]}
    for name in live.kinds:
        sources.setdefault(
            name, {"name": name, "documents": 0, "failed": 0, "chunks": 0, "last_update": None}
        )
    paused = bool(status["paused"]) or live.paused
    for s in sources.values():
        s["kind"] = kinds.get(s["name"], "unknown")
        s["state"], s["state_reason"] = _state(s, live, paused)
        s["state_icon"] = STATES[s["state"]]
    status["sources"] = sorted(sources.values(), key=lambda s: s["name"])
    status["service"] = live.as_dict()
    return status


def _state(source: dict[str, Any], live: Live, paused: bool) -> tuple[str, str | None]:
    name = source["name"]
    if name in live.failing:
        reason_class, why = live.failing[name]
        return ("unreachable" if reason_class == "source_unreachable" else "failing"), why
    if source.get("error"):
        # Recorded by the writer: "not synced: ..." when a sync was refused or the disk was
        # full, the connector's own error when the source could not be listed at all.
        error = str(source["error"])
        return ("failing" if error.startswith("not synced") else "unreachable"), error
    if paused:
        return "paused", "syncing is paused"
    if live.syncing == name:
        return "syncing", None
    return "current", None


# --- search --------------------------------------------------------------------------------------

SEARCH_PARAMETERS = {"q", "k", "mode", "source", "path", "type", "since", "per_doc", "as_of"}


def search_options(query: Mapping[str, Sequence[str]], default_k: int = 10) -> dict[str, Any]:
    """The search parameters of a request, checked: the ones ``upwell search`` takes."""
    mode = one(query, "mode") or retrieval.DEFAULT_MODE
    if mode not in retrieval.MODES:
        raise UsageError(f"unknown search mode {mode!r}: use one of {', '.join(retrieval.MODES)}")
    per_doc = one(query, "per_doc")
    return {
        "k": whole(query, "k", default_k, 1, MAX_K),
        "mode": mode,
        "source": [s for s in query.get("source") or () if s] or None,
        "paths": [p for p in query.get("path") or () if p],
        "types": [t for t in query.get("type") or () if t],
        "since": one(query, "since") or None,
        "per_doc": whole(query, "per_doc", 0, 1, MAX_K) if per_doc else None,
        "as_of": one(query, "as_of") or None,
    }


def search(index: Index, query: Mapping[str, Sequence[str]], default_k: int = 10) -> dict[str, Any]:
    """The hits of ``q`` with the filters given, each with its citation and snippet; with an
    empty ``q``, only what the search form offers (sources, modes, refs)."""
    q = (one(query, "q") or "").strip()
    options = search_options(query, default_k)
    data: dict[str, Any] = {
        "query": q,
        "mode": options["mode"],
        "k": options["k"],
        "filters": {
            "source": options["source"] or [],
            "path": options["paths"],
            "type": options["types"],
            "since": options["since"],
            "per_doc": options["per_doc"],
        },
        "as_of": options["as_of"],
        "results": [],
    }
    if q:
        hits = index.search(
            q,
            options["k"],
            mode=options["mode"],
            source=options["source"],
            paths=options["paths"],
            types=options["types"],
            since=options["since"],
            per_doc=options["per_doc"],
            as_of=options["as_of"],
        )
        for h in hits:
            hit = h.as_json()
            hit["citation"] = h.citation()
            hit["snippet"] = retrieval.best_snippet(h.text, q, SNIPPET_CHARS)
            data["results"].append(hit)
        data["notes"] = index.query_notes(q)
    return data


def search_choices(index: Index) -> dict[str, Any]:
    """What the search form lists: the sources, the modes, and the commits and tags to search
    as of (the newest ``REF_CHOICES``)."""
    return {
        "sources": sorted(s["name"] for s in index.status()["sources"]),
        "modes": list(retrieval.MODES),
        **ref_choices(index),
    }


def ref_choices(index: Index) -> dict[str, Any]:
    return {
        "commits": [c.as_dict() for c in index.history(REF_CHOICES)],
        "tags": {name: c.id for name, c in index.tags().items()},
    }


def marked(text: str, query: str) -> list[tuple[str, bool]]:
    return retrieval.marked(text, query)


# --- history -------------------------------------------------------------------------------------


def history_page(
    index: Index, query: Mapping[str, Sequence[str]], totals_cache: dict[str, Any] | None = None
) -> dict[str, Any]:
    """A page of commits, newest first, with the totals after each; the tags; the chart's
    series; and, given ``from`` and ``to``, the diff between those two commits (``to``
    alone: that commit against its parent)."""
    page = _page_number(query)
    log = index.history()
    shown = log[(page - 1) * HISTORY_PER_PAGE : page * HISTORY_PER_PAGE]
    chart = list(reversed(log[:CHART_COMMITS]))
    totals = _totals(index, [*shown, *chart], totals_cache)
    tags: dict[str, list[str]] = {}
    for name, commit in index.tags().items():
        tags.setdefault(commit.id, []).append(name)
    data: dict[str, Any] = {
        "paging": paging(len(log), page, HISTORY_PER_PAGE),
        "commits": [
            {**c.as_dict(), "after": totals.get(c.id), "tags": tags.get(c.id, [])} for c in shown
        ],
        "tags": {name: c.id for name, c in index.tags().items()},
        "chart": [
            {
                "id": c.id,
                "version": c.version,
                "time": c.time,
                "trigger": c.trigger,
                "after": totals.get(c.id),
                "embedded": c.chunks["embedded"],
                "reused": c.chunks["reused"],
                "added": c.chunks["added"],
                "deleted": c.chunks["deleted"],
            }
            for c in chart
        ],
        "diff": None,
    }
    base, head = one(query, "from"), one(query, "to")
    if base and not head:
        raise UsageError("a diff from a commit needs to=REF too (to alone: against its parent)")
    if head:
        data["diff"] = (index.diff(base, head) if base else index.diff(head)).as_dict()
    return data


def _totals(
    index: Index, commits: Sequence[Any], cache: dict[str, Any] | None
) -> dict[str, dict[str, int] | None]:
    """Totals after each commit. A commit's totals never change, so a server keeps them."""
    cache = {} if cache is None else cache
    missing = {c.id: c for c in commits if c.id not in cache}
    if missing:
        cache.update(index.history_totals(list(missing.values())))
    return {c.id: cache.get(c.id) for c in commits}


def rollback_preview(index: Index, query: Mapping[str, Sequence[str]]) -> dict[str, Any]:
    """What ``upwell rollback REF`` would bring back, remove and change, and the command to
    run it. Planned only: nothing is changed."""
    ref = one(query, "to")
    if not ref:
        raise UsageError("say which commit to preview a rollback to: to=REF")
    plan = index.plan_rollback(ref)
    where = [] if str(index.path) == defaults.INDEX_FOLDER else ["--index", str(index.path)]
    command = ["upwell", *where, "rollback", plan.target.id]
    return {**plan.as_dict(), "command": " ".join(shlex.quote(a) for a in command)}


# --- documents -----------------------------------------------------------------------------------


def document(index: Index, query: Mapping[str, Sequence[str]]) -> dict[str, Any]:
    """One document by its id: its row now (or none, once removed), what each commit did to
    it, its tombstones, its failure if it failed, and a page of its chunks with anchors."""
    doc_id = one(query, "id")
    if not doc_id:
        raise UsageError("say which document: id=DOC_ID (search hits and the history link them)")
    page = _page_number(query)
    row = index.document(doc_id)
    events = index.document_events(doc_id)
    tombstones = index.document_tombstones(doc_id)
    if row is None and not events and not tombstones:
        raise NotFound(f"the index has no document {doc_id!r}")
    total, chunks = 0, list[dict[str, Any]]()
    if row is not None:
        total, chunks = index.document_chunks(doc_id, (page - 1) * CHUNKS_PER_PAGE, CHUNKS_PER_PAGE)
    failure = None
    if row is not None and row.get("status") == "failed":
        failure = {
            "reason": row.get("error"),
            "since": row.get("updated_at"),
            "last_good_searchable": bool(row.get("content_hash")),
        }
    return {
        "doc_id": doc_id,
        "document": _document_row(row),
        "failure": failure,
        "events": list(reversed(events)),  # newest first, as the history page lists commits
        "tombstones": [_tombstone(t) for t in tombstones],
        "chunks": [_chunk(c) for c in chunks],
        "paging": paging(total, page, CHUNKS_PER_PAGE),
    }


def _document_row(row: dict[str, Any] | None) -> dict[str, Any] | None:
    if row is None:
        return None
    keep = (
        "source",
        "path",
        "title",
        "media_type",
        "size",
        "status",
        "content_hash",
        "chunk_count",
        "last_commit",
        "updated_at",
    )
    out = {k: row.get(k) for k in keep}
    out["searchable"] = bool(row.get("content_hash"))
    return out


def _tombstone(row: dict[str, Any]) -> dict[str, Any]:
    keep = ("removed_at", "reason", "detail", "commit_id", "chunk_count", "chunks_version", "path")
    return {k: row.get(k) for k in keep}


def _chunk(row: dict[str, Any]) -> dict[str, Any]:
    return {
        "ordinal": row["ordinal"],
        "chunk_id": row["chunk_id"],
        "tokens": row.get("tokens"),
        "page": row.get("page_start"),
        "page_end": row.get("page_end"),
        "heading": row.get("heading"),
        "line_start": row.get("line_start"),
        "line_end": row.get("line_end"),
        "start": row.get("t_start"),
        "end": row.get("t_end"),
        "text": row.get("text") or "",
    }


# --- failures ------------------------------------------------------------------------------------


def failures(index: Index, query: Mapping[str, Sequence[str]]) -> dict[str, Any]:
    """Every failed document with its reason, since when, and whether its last good version
    is still searchable; and every source whose last sync failed."""
    page = _page_number(query)
    status = index.status()
    rows = status["failures"]
    shown = rows[(page - 1) * FAILURES_PER_PAGE : page * FAILURES_PER_PAGE]
    return {
        "failures": shown,
        "sources": [
            {"name": s["name"], "error": s["error"]} for s in status["sources"] if s.get("error")
        ],
        "paging": paging(len(rows), page, FAILURES_PER_PAGE),
    }
