"""Plain values that flow between the stages of upwell.

Every arrow in the pipeline carries one of these frozen dataclasses, never an open file or a
database handle, so each stage can be called and tested on its own.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import NamedTuple


@dataclass(frozen=True)
class Anchor:
    """Where a piece of text sits in its document; the citation a search result carries.

    Only the fields that apply to the format are set: ``page`` for PDF, ``heading`` for Word and
    Markdown (a path such as ``"Procedure > Loading order"``), ``start``/``end`` in seconds for
    WebVTT and SRT cues, ``line_start``/``line_end`` (1-based, inclusive) for plain text.
    """

    page: int | None = None
    heading: str | None = None
    start: float | None = None
    end: float | None = None
    line_start: int | None = None
    line_end: int | None = None


# Segment kinds. The chunker treats them differently: prose is split into sentences, the others
# are kept whole unless longer than the chunk maximum.
PARAGRAPH = "paragraph"
LIST_ITEM = "list_item"
TABLE_ROW = "table_row"
CUE = "cue"
HEADING = "heading"


@dataclass(frozen=True)
class Segment:
    """One block of text in reading order (a paragraph, list item, table row or cue)."""

    text: str
    anchor: Anchor
    kind: str = PARAGRAPH


@dataclass(frozen=True)
class Extracted:
    """What an extractor returns for one file: its text in reading order, with anchors.

    ``warnings`` carries things the user should know that did not stop extraction, such as a PDF
    page without a text layer.
    """

    media_type: str
    segments: tuple[Segment, ...]
    title: str | None = None
    warnings: tuple[str, ...] = ()


# Fingerprint and SourceItem are named tuples, not frozen dataclasses: a rescan makes one of
# each per file, and a frozen dataclass's __init__ took a third of the listing's Python time.


class Fingerprint(NamedTuple):
    """Cheap change detector of a source item: stat data for files, an ETag or blob id elsewhere."""

    size: int
    mtime_ns: int = 0
    inode: int = 0
    tag: str = ""

    def key(self) -> str:
        """The string the documents table stores and a listing is compared with."""
        return fingerprint_string(self.size, self.mtime_ns, self.inode, self.tag)

    @classmethod
    def parse(cls, text: str | None) -> Fingerprint | None:
        """The Fingerprint whose ``key()`` is ``text`` (the tag may itself hold colons), or
        None for an empty or foreign string."""
        parts = (text or "").split(":", 3)
        if len(parts) != 4:
            return None
        try:
            return cls(int(parts[0]), int(parts[1]), int(parts[2]), parts[3])
        except ValueError:
            return None


def fingerprint_string(size: int, mtime_ns: int = 0, inode: int = 0, tag: str = "") -> str:
    """The one layout of a stored fingerprint, ``size:mtime_ns:inode:tag`` (``Fingerprint.key``;
    a folder walk compares the parsed form, ``StatFingerprints``)."""
    return f"{size}:{mtime_ns}:{inode}:{tag}"


class StatFingerprints(dict[str, "tuple[int, int, int] | None"]):
    """Item key -> (size, mtime_ns, inode) of a stored stat fingerprint with no tag, for a
    folder walk to compare with a stat result without formatting a string per file; None
    where the stored fingerprint is missing or is not a bare stat one (never equal)."""

    @classmethod
    def parse(cls, unchanged_if: Mapping[str, str | None]) -> StatFingerprints:
        out = cls()
        for key, text in unchanged_if.items():
            fp = Fingerprint.parse(text)
            out[key] = (fp.size, fp.mtime_ns, fp.inode) if fp is not None and not fp.tag else None
        return out


class SourceItem(NamedTuple):
    """An item a connector has listed: which source, its key there, and its fingerprint."""

    source: str
    key: str
    fingerprint: Fingerprint

    @property
    def doc_id(self) -> str:
        return f"{self.source}:{self.key}"


@dataclass(frozen=True)
class Chunk:
    """A piece of a document as it is embedded and stored.

    ``context`` is the overlap taken from the end of the previous chunk; the model sees
    ``embed_text`` (context and text), and ``text_hash`` is the SHA-256 of exactly that string.
    """

    doc_id: str
    ordinal: int
    text: str
    context: str
    text_hash: str
    tokens: int
    page_start: int | None = None
    page_end: int | None = None
    heading: str | None = None
    t_start: float | None = None
    t_end: float | None = None
    line_start: int | None = None
    line_end: int | None = None

    @property
    def embed_text(self) -> str:
        return join_context(self.context, self.text)


def join_context(context: str, text: str) -> str:
    """The exact string the model embeds for a chunk."""
    return f"{context}\n{text}" if context else text


@dataclass(frozen=True)
class ChunkSettings:
    """Chunking parameters; recorded in the index at creation."""

    min_tokens: int = 48
    max_tokens: int = 200
    overlap_tokens: int = 40
    # A unit whose hash is 0 modulo this number is a cut candidate (once min_tokens is reached).
    cut_modulus: int = 4

    def as_dict(self) -> dict[str, int]:
        return {
            "min_tokens": self.min_tokens,
            "max_tokens": self.max_tokens,
            "overlap_tokens": self.overlap_tokens,
            "cut_modulus": self.cut_modulus,
        }


@dataclass(frozen=True)
class Limits:
    """Input limits that protect memory; settings, with safe defaults."""

    max_file_bytes: int = 200 * 1024 * 1024
    # Total uncompressed size of a .docx's parts, and the largest compression ratio of one part.
    max_inflated_bytes: int = 256 * 1024 * 1024
    max_inflate_ratio: float = 200.0
    # Images and PDF pages without a text layer are read by OCR; a source can switch it off.
    ocr: bool = True
    # Folder where OCR results are kept by page-image hash across runs; None: this process only.
    ocr_cache: str | None = None


def segments_to_json(segments: tuple[Segment, ...] | list[Segment]) -> str:
    """Stored form of extracted segments: compact JSON, anchors without empty fields."""
    out = []
    for s in segments:
        anchor = {k: v for k, v in vars(s.anchor).items() if v is not None}
        out.append([s.text, s.kind, anchor])
    return json.dumps(out, ensure_ascii=False, separators=(",", ":"))


def segments_from_json(data: str) -> tuple[Segment, ...]:
    return tuple(Segment(text=t, kind=k, anchor=Anchor(**a)) for t, k, a in json.loads(data))


@dataclass(frozen=True)
class ClusterSettings:
    """``[cluster]`` of the configuration, or ``--workers`` / ``--cluster`` of a command.

    ``workers``: start a LocalCluster of that many processes on 127.0.0.1. ``address``: use
    the running scheduler there instead. ``min_documents``: a batch with fewer changed documents
    is done in process (``upwell watch``: a one-file save never waits on the cluster).
    ``ship_bytes``: the writer reads every document and sends its bytes, for workers that
    cannot reach the sources' paths.
    """

    workers: int | None = None
    address: str | None = None
    min_documents: int = 0
    ship_bytes: bool = False

    @property
    def wanted(self) -> bool:
        return bool(self.workers) or bool(self.address)

    def describe(self) -> str:
        if self.address:
            return f"the Dask scheduler at {self.address}"
        return f"a local Dask cluster of {self.workers} worker process(es)"
