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

import logging
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import timedelta
from typing import Any

from pipeline.errors import StoreError, first_line
from pipeline.store.keyword import create_keyword_index, keyword_index_names
from pipeline.store.schema import MAINTAINED_VERSIONS, TABLES
from pipeline.store.tables import Store

log = logging.getLogger("upwell.store")

# Scalar indexes worth having once a table is this large (smaller tables scan faster).
SCALAR_INDEX_MIN_ROWS = 5_000
SCALAR_INDEXES = {"chunks": ("doc_id", "text_hash", "source"), "vectors": ("text_hash",)}
# Past this many chunks an exact scan costs tens of milliseconds a query: build an ANN index.
# Measured with lancedb 0.40 at 100,000 rows on 2 cores: exact scan 150-190 ms; IVF_SQ builds
# in 8-11 s and answers in about 6 ms with recall@10 1.00 at nprobes 20, refine_factor 5.
# At 1,000,000 rows (bench search_1m, three runs on the shared machine): 1,000 partitions
# build in 45-108 s; p50 12-26 ms (10 ms without the figure's numpy scans between queries);
# recall@10 0.97-0.98 at nprobes 20, 0.99 at 40 (what Store.search probes).
VECTOR_INDEX_MIN_ROWS = 20_000
# The index's partitions are trained once, at sqrt(rows) of the table as it was; rows added
# later are folded into those partitions, so a table that grows from 20,000 to 1,000,000 rows
# would probe partitions fifty times fuller than planned. Once the table holds this many times
# the rows the index was trained on, it is trained again at sqrt(rows) (geometric steps: the
# retraining costs a bounded multiple of the last build, common practice for amortised growth).
VECTOR_INDEX_GROWTH = 4
#: The setting that records how many rows the vector index was last trained on.
VECTOR_INDEX_ROWS_SETTING = "vector_index_rows"


@dataclass
class MaintenanceReport:
    tables: dict[str, dict[str, Any]] = field(default_factory=dict)
    indexes_created: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {"tables": self.tables, "indexes_created": self.indexes_created}


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
            raise StoreError(f"maintenance of the {name} table failed: {first_line(exc)}") from None
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
# both whole: measured at 20,000 documents built in batches of 200 (100 fragments), the narrow
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
            log.warning("could not compact the %s table: %s", name, first_line(exc))
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
    created += ensure_keyword_index(store)
    chunks = store.table("chunks")
    rows = chunks.count_rows()
    if not _has_vector_index(chunks):
        if rows >= vector_min_rows:
            _train_vector_index(chunks, rows)
            store.update_setting(VECTOR_INDEX_ROWS_SETTING, rows)
            created.append("chunks.vector (IVF_SQ)")
    else:
        trained_on = store.settings().get(VECTOR_INDEX_ROWS_SETTING)
        if trained_on is None:
            # An index from before this setting: count from now on.
            store.update_setting(VECTOR_INDEX_ROWS_SETTING, rows)
        elif rows >= VECTOR_INDEX_GROWTH * int(trained_on):
            log.info("retraining the vector index: %d rows, trained on %d", rows, int(trained_on))
            _train_vector_index(chunks, rows)
            store.update_setting(VECTOR_INDEX_ROWS_SETTING, rows)
            created.append(f"chunks.vector retrained ({int(trained_on)} -> {rows} rows)")
    if created:
        chunks.checkout_latest()
        store.update_setting(MAINTAINED_VERSIONS["chunks"], int(chunks.version))
    return created


#: The full-text index is optimised (unindexed rows folded in) once a sync leaves this many
#: rows unindexed; until then they are searched unindexed, which costs a little per query.
KEYWORD_FOLD_ROWS = 2_000


def ensure_keyword_index(store: Store, fold_rows: int = KEYWORD_FOLD_ROWS) -> list[str]:
    """Build the keyword index if the index has none (one made before keyword search), and fold
    unindexed rows into it once there are ``fold_rows`` of them. Records the chunks version it
    leaves, like every maintenance step, so it is not taken for an interrupted batch."""
    chunks = store.table("chunks")
    done = create_keyword_index(chunks)
    if not done:
        names = keyword_index_names(chunks)
        unindexed = max(
            (chunks.index_stats(n).num_unindexed_rows for n in names.values()), default=0
        )
        if unindexed >= fold_rows:
            chunks.to_lance().optimize.optimize_indices(index_names=list(names.values()))
            done.append("chunks keyword index optimised")
    if done:
        chunks.checkout_latest()
        store.update_setting(MAINTAINED_VERSIONS["chunks"], int(chunks.version))
    return done


def _train_vector_index(chunks: Any, rows: int) -> None:
    """(Re)build the IVF_SQ index with sqrt(rows) partitions; a new one replaces the old in
    the same version, so readers see one or the other, never neither."""
    with warnings.catch_warnings():
        # lancedb 0.40 prefers a config object; these keyword arguments still work.
        warnings.simplefilter("ignore", DeprecationWarning)
        chunks.create_index(
            metric="cosine",
            vector_column_name="vector",
            index_type="IVF_SQ",
            num_partitions=max(1, int(math.sqrt(rows))),
            replace=True,
        )


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
