"""What ``upwell status`` shows: totals, sources, failures and warnings, the model, the last
commit, and any pause or unfinished rollback or erasure. Read-only; no lock is taken."""

from __future__ import annotations

import json
from typing import Any

from pipeline.history.erase import PENDING_ERASE
from pipeline.history.log import Commit
from pipeline.history.rollback import PAUSED, PENDING_ROLLBACK
from pipeline.store.tables import Store


def _empty_source(name: str) -> dict[str, Any]:
    return {"name": name, "documents": 0, "failed": 0, "chunks": 0, "last_update": None}


def index_status(store: Store, location: str) -> dict[str, Any]:
    """The status of the index in ``store``; ``location`` is how the index was named."""
    docs = store.all_documents()
    chunk_counts = store.chunk_counts()
    commits = store.commits()
    settings = store.settings()
    per_source: dict[str, dict[str, Any]] = {}
    failures = []
    warnings = []
    for d in docs:
        s = per_source.setdefault(d["source"], _empty_source(d["source"]))
        if d["content_hash"]:
            s["documents"] += 1
        if d["status"] == "failed":
            s["failed"] += 1
            failures.append(
                {
                    "doc_id": d["doc_id"],
                    "source": d["source"],
                    "path": d["path"],
                    "reason": d["error"],
                    "since": d["updated_at"],
                    "last_good_searchable": bool(d["content_hash"]),
                }
            )
        for w in json.loads(d["warnings"] or "[]"):
            warnings.append({"source": d["source"], "path": d["path"], "warning": w})
        if s["last_update"] is None or (d["updated_at"] or "") > s["last_update"]:
            s["last_update"] = d["updated_at"]
    for name, n in chunk_counts.items():
        per_source.setdefault(name, _empty_source(name))["chunks"] = n
    for name, err in (settings.get("source_errors") or {}).items():
        per_source.setdefault(name, _empty_source(name))["error"] = err
    for name, recorded in (settings.get("source_problems") or {}).items():
        per_source.setdefault(name, _empty_source(name))["problems"] = [
            {**item, "since": recorded["since"]} for item in recorded["items"]
        ]
    for name, counts in (settings.get("source_skipped") or {}).items():
        per_source.setdefault(name, _empty_source(name))["skipped"] = counts
    last = commits[-1] if commits else None
    return {
        "index": location,
        "totals": {
            "documents": sum(s["documents"] for s in per_source.values()),
            "chunks": sum(chunk_counts.values()),
            "failed": len(failures),
            "commits": len(commits),
        },
        "sources": sorted(per_source.values(), key=lambda s: s["name"]),
        "failures": sorted(failures, key=lambda f: (f["source"], f["path"])),
        "warnings": warnings,
        "model": {
            "name": settings.get("model"),
            "id": settings.get("model_id"),
            "dimension": settings.get("dimension"),
            "max_input_tokens": settings.get("max_input_tokens"),
        },
        "chunking": settings.get("chunking"),
        "version": int(store.table("chunks").version),
        "last_commit": Commit.from_row(last).summary() if last else None,
        "paused": settings.get(PAUSED),
        "pending_rollback": bool(settings.get(PENDING_ROLLBACK)),
        # Only a count: the intent names the documents, and status must not repeat them.
        "pending_erase": (
            {"documents": len(erasing["doc_ids"]), "since": erasing["time"]}
            if (erasing := settings.get(PENDING_ERASE))
            else None
        ),
        "tags": sorted(settings.get("tags", {})),
    }
