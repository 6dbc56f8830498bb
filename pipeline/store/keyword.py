"""The keyword index: LanceDB's native full-text (BM25) index on the chunk text and heading."""

from __future__ import annotations

import warnings
from typing import Any

from pipeline.store.schema import KEYWORD_COLUMNS


def keyword_index_names(table: Any) -> dict[str, str]:
    """column -> name of its full-text index, for the columns the keyword search covers."""
    return {
        ix.columns[0]: ix.name
        for ix in table.list_indices()
        if str(ix.index_type).upper() in ("FTS", "INVERTED") and len(ix.columns) == 1
    }


def create_keyword_index(table: Any, *, replace: bool = False) -> list[str]:
    """LanceDB's native full-text (BM25) index on each keyword column that lacks one (all of
    them with ``replace``). English stemming and stop words; no positions (no phrase search)."""
    have = {} if replace else keyword_index_names(table)
    created = []
    for column in KEYWORD_COLUMNS:
        if column in have:
            continue
        with warnings.catch_warnings():
            # lancedb 0.40 prefers create_index(config=FTS()); this call still works.
            warnings.simplefilter("ignore", DeprecationWarning)
            table.create_fts_index(column, use_tantivy=False, with_position=False, replace=True)
        created.append(f"chunks.{column} (FTS)")
    return created
