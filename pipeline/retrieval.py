"""Search: vector, keyword (BM25) and hybrid, with filters that run inside LanceDB.

- **vector**: cosine similarity of the query's embedding to each chunk's (``score`` is the
  cosine similarity).
- **keyword**: LanceDB's own full-text index over the chunk text and its heading path, ranked
  by BM25 (``score`` is the BM25 score). Rows a commit added since the index was last
  optimised are searched unindexed, so a commit is searchable by keyword at once.
- **hybrid** (the default): both lists fused by reciprocal rank (Cormack, Clarke and
  Buettcher, "Reciprocal Rank Fusion outperforms Condorcet and individual Rank Learning
  Methods", SIGIR 2009): ``score(d) = sum over lists of 1 / (RRF_K + rank(d))``, ranks from 1.

The query is plain text, never a query language: it goes to LanceDB as a match query object
(never parsed for operators) and never into a filter string. Filters (source, path glob,
type, documents changed since) are SQL built here from quoted values only, and run as
prefilters, so asking for k hits with a filter returns k hits when k exist.
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any

from lancedb.query import MultiMatchQuery

from pipeline import formats
from pipeline.errors import UsageError
from pipeline.store.ids import quote
from pipeline.store.keyword import keyword_index_names
from pipeline.store.schema import KEYWORD_COLUMNS

MODES = ("hybrid", "vector", "keyword")
DEFAULT_MODE = "hybrid"
#: The constant of reciprocal rank fusion; 60 is the value of Cormack et al. (2009).
RRF_K = 60
#: Each list hybrid fuses is this deep at least (and 3k when k is larger).
FUSION_DEPTH = 50
#: Words of a query past this many are dropped from the keyword search (BM25 sums one term
#: at a time; a pasted page would otherwise cost one posting list per word).
MAX_KEYWORD_TERMS = 256

_WORD = re.compile(r"\w", re.UNICODE)


@dataclass(frozen=True)
class Filters:
    """What a search is limited to; every field empty means the whole index."""

    sources: tuple[str, ...] = ()
    paths: tuple[str, ...] = ()  # globs on SOURCE/PATH or on PATH
    types: tuple[str, ...] = ()  # suffixes: pdf, docx, md, ...
    doc_ids: tuple[str, ...] | None = None  # None: any; () : none (e.g. nothing changed since)

    def where(self) -> str | None:
        """The SQL prefilter, or None for no filter."""
        parts = []
        if self.sources:
            parts.append(_any_of(f"source = {quote(s)}" for s in self.sources))
        if self.paths:
            likes = []
            for glob in self.paths:
                like = quote(glob_to_like(glob))
                likes.append(f"path LIKE {like} ESCAPE '\\'")
                likes.append(f"concat(source, '/', path) LIKE {like} ESCAPE '\\'")
            parts.append(_any_of(likes))
        if self.types:
            media = sorted({media_type_of_suffix(t) for t in self.types})
            parts.append(_any_of(f"media_type = {quote(m)}" for m in media))
        if self.doc_ids is not None:
            if not self.doc_ids:
                return "FALSE"
            parts.append(f"doc_id IN ({', '.join(quote(d) for d in self.doc_ids)})")
        return " AND ".join(parts) if parts else None


def _any_of(clauses: Iterable[str]) -> str:
    return "(" + " OR ".join(clauses) + ")"


def glob_to_like(glob: str) -> str:
    """A shell-style glob as a SQL LIKE pattern with ``\\`` as the escape character: ``*`` (and
    ``**``) match any run of characters, slashes included; ``?`` matches one character; ``%``,
    ``_`` and ``\\`` match themselves."""
    out = []
    for ch in glob:
        if ch == "*":
            if not out or out[-1] != "%":
                out.append("%")
        elif ch == "?":
            out.append("_")
        elif ch in "%_\\":
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def media_type_of_suffix(suffix: str) -> str:
    """The media type of a suffix given as ``pdf`` or ``.pdf``; UsageError naming the known ones."""
    wanted = "." + suffix.strip().lstrip(".").lower()
    media = formats.media_type_for("x" + wanted)
    if media is None:
        known = ", ".join(sorted(s.lstrip(".") for s in formats.SUPPORTED_SUFFIXES))
        raise UsageError(f"--type {suffix!r} is not a format upwell reads (known: {known})")
    return media


def check_query(query: str) -> str:
    """The query, stripped; UsageError when it has no word to search for."""
    text = unicodedata.normalize("NFC", query).strip()
    if not text:
        raise UsageError("the search query is empty")
    if not _WORD.search(text):
        raise UsageError(f"the search query {query!r} has no letters or digits to search for")
    return text


def keyword_query(query: str) -> str:
    """The words of ``query`` the keyword search uses (at most MAX_KEYWORD_TERMS)."""
    words = query.split()
    return " ".join(words[:MAX_KEYWORD_TERMS])


def rrf_scores(rankings: Sequence[Sequence[str]], k: int = RRF_K) -> dict[str, float]:
    """Reciprocal rank fusion of ranked lists of ids (best first; ranks count from 1)."""
    scores: dict[str, float] = {}
    for ranking in rankings:
        for rank, item in enumerate(ranking, start=1):
            scores[item] = scores.get(item, 0.0) + 1.0 / (k + rank)
    return scores


@dataclass(frozen=True)
class Ranked:
    """One result before it becomes a Hit: the row, its score in the mode asked for, and its
    rank in the vector and keyword lists (None where it is absent from that list)."""

    row: dict[str, Any]
    score: float
    vector_rank: int | None
    keyword_rank: int | None


def keyword_index_names_at(table: Any) -> dict[str, str]:
    """The keyword index of this table version (empty for an index made before it existed)."""
    try:
        return keyword_index_names(table)
    except (ValueError, RuntimeError, OSError):
        return {}


def keyword_rows(
    table: Any, query: str, limit: int, columns: list[str], where: str | None
) -> list[dict[str, Any]]:
    """The ``limit`` best rows by BM25 over KEYWORD_COLUMNS, with ``_score``."""
    q = table.search(MultiMatchQuery(keyword_query(query), list(KEYWORD_COLUMNS)), query_type="fts")
    if where is not None:
        q = q.where(where, prefilter=True)
    return q.select([*columns, "_score"]).limit(limit).to_arrow().to_pylist()


def run_search(
    *,
    mode: str,
    k: int,
    per_doc: int | None,
    vector_rows: Callable[[int], list[dict[str, Any]]],
    keyword_rows: Callable[[int], list[dict[str, Any]]],
) -> list[Ranked]:
    """The k best results in ``mode`` (one of MODES; the caller checked it), at most ``per_doc``
    from one document.

    ``vector_rows(n)`` and ``keyword_rows(n)`` return the n best rows of each kind (filters
    already applied). With a per-document cap the lists are fetched deeper until k results
    are found or a list runs out.
    """
    depth = max(FUSION_DEPTH, 3 * k) if mode == "hybrid" else k
    if per_doc is not None:
        depth = max(depth, 4 * k)
    while True:
        vec = vector_rows(depth) if mode in ("vector", "hybrid") else []
        kw = keyword_rows(depth) if mode in ("keyword", "hybrid") else []
        ranked = _rank(mode, vec, kw)
        chosen = _cap_per_document(ranked, per_doc, k)
        exhausted = len(vec) < depth and len(kw) < depth
        if len(chosen) >= k or exhausted or per_doc is None or depth >= 20_000:
            return chosen
        depth *= 4


def _rank(mode: str, vec: list[dict[str, Any]], kw: list[dict[str, Any]]) -> list[Ranked]:
    v_rank = {r["chunk_id"]: i for i, r in enumerate(vec, start=1)}
    k_rank = {r["chunk_id"]: i for i, r in enumerate(kw, start=1)}
    if mode == "vector":
        return [Ranked(r, float(1.0 - r["_distance"]), v_rank[r["chunk_id"]], None) for r in vec]
    if mode == "keyword":
        return [Ranked(r, float(r["_score"]), None, k_rank[r["chunk_id"]]) for r in kw]
    rows = {r["chunk_id"]: r for r in kw}
    rows.update({r["chunk_id"]: r for r in vec})
    fused = rrf_scores([list(v_rank), list(k_rank)])
    # Ties (equal fused score) go to the better vector rank, then the better keyword rank.
    order = sorted(
        fused,
        key=lambda c: (-fused[c], v_rank.get(c, 1 << 30), k_rank.get(c, 1 << 30), c),
    )
    return [Ranked(rows[c], fused[c], v_rank.get(c), k_rank.get(c)) for c in order]


def _cap_per_document(ranked: list[Ranked], per_doc: int | None, k: int) -> list[Ranked]:
    if per_doc is None:
        return ranked[:k]
    seen: dict[str, int] = {}
    out = []
    for r in ranked:
        doc = r.row["doc_id"]
        if seen.get(doc, 0) < per_doc:
            seen[doc] = seen.get(doc, 0) + 1
            out.append(r)
            if len(out) == k:
                break
    return out


# --- snippets ----------------------------------------------------------------------------------

_SENTENCE = re.compile(r"(?<=[.!?])\s+")
_TERM = re.compile(r"\w+", re.UNICODE)


def query_terms(query: str) -> set[str]:
    """The query's words, lower-cased, for highlighting (two letters or more)."""
    return {w.lower() for w in _TERM.findall(query) if len(w) > 1}


def best_snippet(text: str, query: str, width: int) -> str:
    """About ``width`` characters of ``text`` around its sentence sharing most words with the
    query (the chunk's start when none does)."""
    flat = " ".join(text.split())
    if len(flat) <= width:
        return flat
    terms = query_terms(query)
    sentences = _SENTENCE.split(flat)
    best, best_hits = 0, 0
    for i, sentence in enumerate(sentences):
        hits = len(terms & {w.lower() for w in _TERM.findall(sentence)})
        if hits > best_hits:
            best, best_hits = i, hits
    start = len(" ".join(sentences[:best])) + (1 if best else 0)
    if len(flat) - start < width:  # near the end: show the whole tail, from a word's start
        start = max(0, len(flat) - width)
        if start:
            start = flat.find(" ", start) + 1
    piece = flat[start : start + width]
    if start + width < len(flat):
        piece = piece.rsplit(" ", 1)[0] + " …"
    return ("… " if start else "") + piece


def highlight(text: str, query: str, on: str = "\x1b[1m", off: str = "\x1b[0m") -> str:
    """``text`` with each whole word of the query wrapped in ``on``/``off`` (bold on a terminal)."""
    terms = query_terms(query)
    if not terms:
        return text
    return _TERM.sub(
        lambda m: f"{on}{m.group(0)}{off}" if m.group(0).lower() in terms else m.group(0), text
    )


def marked(text: str, query: str) -> list[tuple[str, bool]]:
    """``text`` cut into pieces, each flagged True where it is a whole word of the query: what
    a page wraps in ``<mark>`` after escaping each piece."""
    terms = query_terms(query)
    pieces: list[tuple[str, bool]] = []
    at = 0
    for m in _TERM.finditer(text):
        if m.group(0).lower() in terms:
            if m.start() > at:
                pieces.append((text[at : m.start()], False))
            pieces.append((m.group(0), True))
            at = m.end()
    if at < len(text):
        pieces.append((text[at:], False))
    return pieces
