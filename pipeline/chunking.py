"""Content-defined chunking of extracted segments ("Boundaries come from content" in DEVELOPERS.md).

Boundaries are chosen from the text around them, never from offsets, so an edit moves only the
cuts next to it and the unchanged chunks keep their hashes (and their vectors). The idea is the
one of content-defined chunking for files (LBFS, Muthitacharoen et al., SOSP 2001; FastCDC, Xia
et al., USENIX ATC 2016), applied to sentences and other whole text units instead of bytes.

The pipeline here is pure: segments and settings in, chunks out, no I/O.
"""

from __future__ import annotations

import hashlib
import re
import unicodedata
from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.hashing import text_hash
from pipeline.records import PARAGRAPH, Anchor, Chunk, ChunkSettings, Segment, join_context
from pipeline.tokens import TokenCounter

# --- sentences -------------------------------------------------------------------------------

# A sentence ends at . ! or ? (possibly repeated, possibly followed by closing quotes or
# brackets), then whitespace. Whether it really ends is decided in code from what follows and
# from the word the mark belongs to.
_SENTENCE_END = re.compile(r"[.!?]+[\"'\u201d\u2019)\]]*\s+")
_OPENING_MARKS = "\"'\u201c\u2018([" + "\u00ab"

# Words after which a full stop rarely ends a sentence (common practice; English list).
_ABBREVIATIONS = frozenset(
    """
    e.g. i.e. no. nos. approx. vs. cf. fig. figs. ref. refs. incl. excl. min. max.
    dr. mr. mrs. ms. st. mt. ca. p. pp. vol. ch. sec. art. dept. est. ed. eds. al.
    jan. feb. mar. apr. jun. jul. aug. sep. sept. oct. nov. dec. mon. tue. wed. thu. fri.
    sat. sun. co. corp. inc. ltd. tel. ext. resp. dia. qty. pcs. ea. nr. op.
    """.split()
)
# "J." (an initial) or a dotted abbreviation such as "U.K." or "e.g." written without the list.
_INITIALS = re.compile(r"(?:[A-Za-z]\.)+$")


def split_sentences(text: str) -> list[str]:
    """Split prose into sentences, deterministically; the pieces joined by spaces give ``text``
    back up to whitespace.

    A cut follows ``.``, ``!`` or ``?`` (with any closing quotes or brackets) when whitespace and
    then an uppercase letter, a digit or an opening quote follow, and the mark does not end an
    abbreviation ("e.g.", "No.", "approx."), a single initial ("J.") or a dotted acronym.
    """
    sentences: list[str] = []
    start = 0
    for match in _SENTENCE_END.finditer(text):
        after = match.end()
        if after >= len(text):
            break
        following = text[after]
        if not (following.isupper() or following.isdigit() or following in _OPENING_MARKS):
            continue
        if text[match.start()] == "." and _ends_abbreviation(text[start : match.start() + 1]):
            continue
        sentence = text[start : match.end()].strip()
        if sentence:
            sentences.append(sentence)
        start = after
    tail = text[start:].strip()
    if tail:
        sentences.append(tail)
    return sentences


def _ends_abbreviation(text_through_stop: str) -> bool:
    words = text_through_stop.split()
    if not words:
        return False
    last = words[-1].lstrip("\"'\u201c\u2018([")
    return last.lower() in _ABBREVIATIONS or bool(_INITIALS.fullmatch(last))


# --- units -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Unit:
    """The smallest piece the chunker moves: a sentence, list item, table row, cue or heading."""

    text: str
    segment: int  # index of the segment it came from: decides the " " or "\n" join
    anchor: Anchor
    tokens: int
    cut_hash: int


def _normalise_for_cut(text: str) -> str:
    # Cut decisions ignore width variants, spacing and case, so reflowing or re-casing a
    # sentence does not move boundaries (its text hash still changes, as it must).
    return " ".join(unicodedata.normalize("NFKC", text).split()).casefold()


def _cut_hash(text: str) -> int:
    digest = hashlib.blake2b(_normalise_for_cut(text).encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "big")


def _split_long(text: str, limit: int, counter: TokenCounter) -> list[str]:
    """Pieces of ``text`` with at most ``limit`` tokens each, cut at whitespace where a word
    boundary exists within the limit, otherwise between tokens (one giant "word")."""
    pieces: list[str] = []
    rest = text.strip()
    while rest:
        offsets = counter.offsets(rest)
        if len(offsets) <= limit:
            pieces.append(rest)
            break
        first_excluded = offsets[limit][0]  # where the first token that does not fit begins
        cut = _last_space(rest, first_excluded)
        if cut <= 0:
            # No whitespace inside the first `limit` tokens: cut between tokens instead.
            cut = first_excluded
        # Tokenizers can merge differently at the new edge; shrink until the piece fits.
        while cut > 1 and counter.count_one(rest[:cut]) > limit:
            space = _last_space(rest, cut - 1)
            cut = space if space > 0 else cut - 1
        cut = max(cut, 1)
        pieces.append(rest[:cut].strip())
        rest = rest[cut:].strip()
    return [piece for piece in pieces if piece]


def _last_space(text: str, before: int) -> int:
    """Index of the last whitespace character at or before ``before``, or -1."""
    for index in range(min(before, len(text) - 1), -1, -1):
        if text[index].isspace():
            return index
    return -1


def _units(segments: Sequence[Segment], counter: TokenCounter, unit_limit: int) -> list[_Unit]:
    texts: list[tuple[str, int]] = []
    for index, segment in enumerate(segments):
        if segment.kind == PARAGRAPH:
            texts.extend((sentence, index) for sentence in split_sentences(segment.text))
        else:
            stripped = " ".join(segment.text.split())
            if stripped:
                texts.append((stripped, index))
    counts = counter.count([text for text, _ in texts])
    units: list[_Unit] = []
    for (text, index), tokens in zip(texts, counts, strict=True):
        pieces = [text] if tokens <= unit_limit else _split_long(text, unit_limit, counter)
        piece_counts = [tokens] if len(pieces) == 1 else counter.count(pieces)
        for piece, piece_tokens in zip(pieces, piece_counts, strict=True):
            anchor = segments[index].anchor
            units.append(_Unit(piece, index, anchor, piece_tokens, _cut_hash(piece)))
    return units


def _join(units: Sequence[_Unit]) -> str:
    parts: list[str] = []
    for position, unit in enumerate(units):
        if position:
            parts.append(" " if unit.segment == units[position - 1].segment else "\n")
        parts.append(unit.text)
    return "".join(parts)


# --- cut points ------------------------------------------------------------------------------


def _group(
    units: Sequence[_Unit], settings: ChunkSettings, text_limit: int, counter: TokenCounter
) -> list[tuple[int, int]]:
    """Chunks as (first unit, end unit exclusive).

    A unit is a cut candidate when its hash is 0 modulo ``cut_modulus``. The chunk is cut after a
    candidate when at least ``min_tokens`` tokens lie between it and the previous candidate (or
    the start of the heading section). That distance is measured from the previous *candidate*,
    not from the previous cut as in byte-level CDC: a cut then depends only on the units since
    the last candidate, so an edit cannot shift cuts further along (measured: the start-based
    rule lets an inserted paragraph move the next few cuts too). Every content cut still leaves
    a chunk of at least ``min_tokens``, since the chunk holds at least the units since the
    previous candidate. A heading change is a hard cut, and a unit that would take the chunk past
    ``text_limit`` starts a new chunk (the only decision that depends on where the chunk began).

    Each cut is decided from the units up to it, plus the size of the next unit for the maximum,
    so an edit never changes a chunk that ends before the unit preceding the edit.
    """
    spans: list[tuple[int, int]] = []
    start = tokens = index = 0
    since_candidate = 0

    def close(end: int) -> int:
        nonlocal start, tokens, since_candidate
        fitted = _fit(units, start, end, text_limit, counter)
        if fitted < end:
            # Walking resumes at `fitted`: rewind the distance to what it was there.
            since_candidate = _tokens_since_candidate(units, fitted, settings.cut_modulus)
        spans.append((start, fitted))
        start, tokens = fitted, 0
        return fitted

    while index < len(units):
        unit = units[index]
        if index > start and unit.anchor.heading != units[index - 1].anchor.heading:
            # A heading change is a hard cut, so every chunk cites exactly one heading path.
            since_candidate = 0
            index = close(index)
            continue
        if index > start and tokens + unit.tokens > text_limit:
            index = close(index)
            continue
        tokens += unit.tokens
        since_candidate += unit.tokens
        index += 1
        is_candidate = unit.cut_hash % settings.cut_modulus == 0
        content_cut = is_candidate and since_candidate >= settings.min_tokens
        if is_candidate:
            since_candidate = 0
        if content_cut or index == len(units):
            index = close(index)
    return spans


def _tokens_since_candidate(units: Sequence[_Unit], end: int, cut_modulus: int) -> int:
    """Tokens of the units before ``end`` back to the last candidate or heading change."""
    total = 0
    for index in range(end - 1, -1, -1):
        if units[index].cut_hash % cut_modulus == 0:
            break
        total += units[index].tokens
        if index > 0 and units[index].anchor.heading != units[index - 1].anchor.heading:
            break
    return total


def _fit(
    units: Sequence[_Unit], start: int, end: int, text_limit: int, counter: TokenCounter
) -> int:
    """Largest end <= ``end`` whose joined text really fits: token counts of a joined string can
    differ from the sum of its parts' counts with some tokenizers."""
    while end - start > 1 and _joined_tokens(units[start:end], counter) > text_limit:
        end -= 1
    return end


def _joined_tokens(units: Sequence[_Unit], counter: TokenCounter) -> int:
    """Tokens of ``_join(units)``: the sum of the units' counts where the tokenizer splits at
    whitespace (``counter.additive``), else counted on the joined text."""
    if counter.additive:
        return sum(unit.tokens for unit in units)
    return counter.count_one(_join(units))


# --- chunks ----------------------------------------------------------------------------------


def chunk_segments(
    doc_id: str,
    segments: Sequence[Segment],
    counter: TokenCounter,
    settings: ChunkSettings = ChunkSettings(),  # noqa: B008 - frozen, so a shared default is safe
    max_input_tokens: int = 254,
) -> list[Chunk]:
    """Chunk a document's segments at content-defined boundaries.

    Guarantees: the same input gives the same chunks; the chunk texts in order cover the
    segments' text exactly once; every chunk's ``embed_text`` (context and text) has at most
    ``max_input_tokens`` tokens by ``counter``; a chunk never spans a heading change; ordinals run
    0..n-1. ``max_input_tokens`` excludes the model's special tokens.
    """
    if settings.min_tokens < 0 or settings.cut_modulus < 1 or settings.max_tokens < 1:
        raise ValueError(f"invalid chunk settings: {settings.as_dict()}")
    if max_input_tokens < 1:
        raise ValueError(f"max_input_tokens must be positive, got {max_input_tokens}")
    text_limit = min(settings.max_tokens, max_input_tokens)
    units = _units(segments, counter, text_limit)
    spans = _group(units, settings, text_limit, counter)
    chunks: list[Chunk] = []
    previous: tuple[int, int] | None = None
    for ordinal, (start, end) in enumerate(spans):
        members = units[start:end]
        text = _join(members)
        # No context across a heading change: it would quote another section.
        section_start = start == 0 or units[start].anchor.heading != units[start - 1].anchor.heading
        context_units = (
            []
            if section_start or previous is None
            else _context(units[previous[0] : previous[1]], settings.overlap_tokens, counter)
        )
        context = _join(context_units)
        embed_text = join_context(context, text)
        tokens = _embed_tokens(members, context_units, embed_text, counter)
        while tokens > max_input_tokens and context_units:
            context_units = context_units[1:]
            context = _join(context_units)
            embed_text = join_context(context, text)
            tokens = _embed_tokens(members, context_units, embed_text, counter)
        chunks.append(_make_chunk(doc_id, ordinal, members, text, context, embed_text, tokens))
        previous = (start, end)
    return chunks


def _embed_tokens(
    members: Sequence[_Unit], context: Sequence[_Unit], embed_text: str, counter: TokenCounter
) -> int:
    # join_context puts a newline between context and text: whitespace, so no token of its own.
    if counter.additive:
        return _joined_tokens(context, counter) + _joined_tokens(members, counter)
    return counter.count_one(embed_text)


def _context(previous: Sequence[_Unit], overlap_tokens: int, counter: TokenCounter) -> list[_Unit]:
    """Whole units from the end of the previous chunk, as many as fit in ``overlap_tokens``."""
    taken: list[_Unit] = []
    total = 0
    for unit in reversed(previous):
        if total + unit.tokens > overlap_tokens:
            break
        taken.insert(0, unit)
        total += unit.tokens
    while taken and _joined_tokens(taken, counter) > overlap_tokens:
        taken = taken[1:]
    return taken


def _make_chunk(
    doc_id: str,
    ordinal: int,
    members: Sequence[_Unit],
    text: str,
    context: str,
    embed_text: str,
    tokens: int,
) -> Chunk:
    anchors = [unit.anchor for unit in members]
    pages = [a.page for a in anchors if a.page is not None]
    starts = [a.start for a in anchors if a.start is not None]
    ends = [a.end for a in anchors if a.end is not None]
    first_lines = [a.line_start for a in anchors if a.line_start is not None]
    last_lines = [a.line_end for a in anchors if a.line_end is not None]
    return Chunk(
        doc_id=doc_id,
        ordinal=ordinal,
        text=text,
        context=context,
        text_hash=text_hash(embed_text),
        tokens=tokens,
        page_start=min(pages) if pages else None,
        page_end=max(pages) if pages else None,
        heading=anchors[0].heading,
        t_start=min(starts) if starts else None,
        t_end=max(ends) if ends else None,
        line_start=min(first_lines) if first_lines else None,
        line_end=max(last_lines) if last_lines else None,
    )
