"""Version history: the commit log and REFs (``log``), rollback (``rollback``), which old
versions retention removes (``retention``) and erasure, which rewrites history (``erase``).

The names most callers need are importable from here: ``history.resolve(store, "v12")``.
"""

from pipeline.history.log import (
    Commit,
    Diff,
    chunk_ids_at,
    commits,
    create_tag,
    dataset_at,
    delete_tag,
    diff,
    documents_at,
    parent,
    parse_time,
    resolve,
    tags,
    totals_at,
)
from pipeline.history.retention import RetentionPlan, plan_retention
from pipeline.history.rollback import (
    PAUSED,
    PENDING_ROLLBACK,
    RollbackPlan,
    complete_pending,
    plan_rollback,
    resume,
    start_rollback,
)

__all__ = [
    "PAUSED",
    "PENDING_ROLLBACK",
    "Commit",
    "Diff",
    "RetentionPlan",
    "RollbackPlan",
    "chunk_ids_at",
    "commits",
    "complete_pending",
    "create_tag",
    "dataset_at",
    "delete_tag",
    "diff",
    "documents_at",
    "parent",
    "parse_time",
    "plan_retention",
    "plan_rollback",
    "resolve",
    "resume",
    "start_rollback",
    "tags",
    "totals_at",
]
