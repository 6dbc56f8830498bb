"""Every id upwell derives, defined once: commit ids, chunk and tombstone ids, the
token an erased document leaves in the logs, and the quoting of ids in LanceDB filters.

Only ids and hashes ever go into filter strings, never document text: LanceDB stores filters
verbatim in its transaction files."""

from __future__ import annotations

import secrets
from collections.abc import Iterable, Sequence
from datetime import UTC, datetime

from pipeline.hashing import sha256_hex
from pipeline.records import Chunk

IN_BATCH = 400  # ids per "IN (...)" filter; keeps filter strings short


def quote(value: str) -> str:
    """A SQL string literal for a LanceDB filter. Only ids and hashes ever go in filters."""
    return "'" + value.replace("'", "''") + "'"


def in_filter(column: str, values: Iterable[str]) -> str:
    return f"{column} IN ({', '.join(quote(v) for v in values)})"


def batched(values: Sequence[str], size: int = IN_BATCH) -> Iterable[Sequence[str]]:
    for i in range(0, len(values), size):
        yield values[i : i + size]


def new_commit_id() -> str:
    """20 random hex digits, so a short prefix names one commit (a time-first id made commits
    a few milliseconds apart share their first ten digits). Order comes from the log itself."""
    return secrets.token_hex(10)


def utc_now() -> str:
    return datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def chunk_ids(chunks: Sequence[Chunk]) -> list[str]:
    """Row keys: the document, the text hash, and which repeat of that text in the document."""
    seen: dict[str, int] = {}
    ids = []
    for c in chunks:
        n = seen.get(c.text_hash, 0)
        seen[c.text_hash] = n + 1
        ids.append(sha256_hex(f"{c.doc_id}\x00{c.text_hash}\x00{n}")[:32])
    return ids


def event_tombstone_id(doc_id: str, event: str, commit_id: str) -> str:
    """The tombstone of a document that a rollback or an erasure (``event``) took out: one per
    document and commit, so repeating the step writes nothing new."""
    return sha256_hex(f"{doc_id}\x00{event}\x00{commit_id}")[:32]


def tombstone_id(doc_id: str, content_hash: str, last_commit: str) -> str:
    # Stable across re-runs of the same removal: the document row it removes does not change
    # until the batch completes.
    return sha256_hex(f"{doc_id}\x00{content_hash}\x00{last_commit}")[:32]


def erased_token(doc_id: str) -> str:
    """What the logs keep of an erased document: a hash of its id, never its name or text.

    Whoever knows the document's id can check that it was erased; the logs alone cannot say
    what it was.
    """
    return "erased:" + sha256_hex(doc_id)[:16]
