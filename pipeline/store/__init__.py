"""The index on disk: one LanceDB database holding six tables, and every read and write of them.

``schema`` defines each table's rows once, ``ids`` every id derived from content, ``tables`` the
``Store`` that reads and writes them, and ``upkeep`` compaction and indexes. This package knows
tables and rows only: it does not decide what changed (the engine does) and it never embeds.
"""

from pipeline.store.schema import FORMAT_VERSION, TABLES, chunks_schema, commit_row
from pipeline.store.tables import Store

__all__ = ["FORMAT_VERSION", "TABLES", "Store", "chunks_schema", "commit_row"]
