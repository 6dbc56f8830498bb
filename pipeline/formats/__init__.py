"""Text extraction: turn the bytes of one file into segments in reading order, with anchors.

The sync engine calls ``extract(name, data, limits)``. The suffix chooses the extractor and the
bytes confirm it, so a ``.pdf`` that is really an HTML page fails with a reason that says so.
Every failure is an ``ExtractionError`` subclass whose message is a sentence for the status view;
success always carries at least one segment.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import PurePath

from pipeline.errors import (
    CorruptDocument,
    DocumentTooLarge,
    EmptyDocument,
    UnsupportedDocument,
)
from pipeline.formats import mail as _mail
from pipeline.formats.container import require_zip_bytes
from pipeline.formats.docx import DOCX_TYPE, extract_docx
from pipeline.formats.epub import EPUB_TYPE, extract_epub
from pipeline.formats.html import HTML_TYPE, extract_html
from pipeline.formats.mail import EML_TYPE, extract_eml
from pipeline.formats.ocr import IMAGE_TYPES, extract_image
from pipeline.formats.opendocument import (
    ODP_TYPE,
    ODS_TYPE,
    ODT_TYPE,
    extract_odp,
    extract_ods,
    extract_odt,
)
from pipeline.formats.pdf import PDF_TYPE, extract_pdf, find_pdf_header
from pipeline.formats.rtf import RTF_TYPE, extract_rtf
from pipeline.formats.sheets import (
    CSV_TYPE,
    TSV_TYPE,
    XLSX_TYPE,
    check_xlsx_bytes,
    extract_csv,
    extract_tsv,
    extract_xlsx,
)
from pipeline.formats.slides import PPTX_TYPE, extract_pptx
from pipeline.formats.sniff import _SIGNATURES, describe_content
from pipeline.formats.text import (
    MARKDOWN_TYPE,
    PLAIN_TEXT_TYPE,
    extract_markdown,
    extract_plain_text,
    strip_boms_and_blanks,
)
from pipeline.formats.transcripts import SRT_TYPE, WEBVTT_TYPE, extract_srt, extract_webvtt
from pipeline.records import Extracted, Limits

__all__ = [
    "EXTRACTOR_VERSION",
    "FORMATS",
    "SUPPORTED_SUFFIXES",
    "Format",
    "extract",
    "media_type_for",
]

# Bump whenever any extractor's output changes for the same input bytes: the engine compares it
# with the version stored beside a document's segments and re-extracts when they differ.
EXTRACTOR_VERSION = "5"  # 5: .docx footnotes and endnotes


@dataclass(frozen=True)
class Format:
    """One format upwell reads: its media type, the suffixes that name it, the check that the
    bytes are plausibly that format (a clear error instead of a parser's), and its extractor."""

    media_type: str
    suffixes: tuple[str, ...]
    extract: Callable[[bytes, Limits], Extracted]
    check: Callable[[bytes], None] | None = None


def _check_pdf(data: bytes) -> None:
    if find_pdf_header(data) < 0:
        raise CorruptDocument(
            f"not a PDF (no %PDF- header); it looks like {describe_content(data)}"
        )


def _image_extractor(media_type: str) -> Callable[[bytes, Limits], Extracted]:
    def extract_one(data: bytes, limits: Limits) -> Extracted:
        if not limits.ocr:
            raise UnsupportedDocument("an image, and OCR is off for this source (ocr = false)")
        return extract_image(data, media_type, limits.ocr_cache)

    return extract_one


def _zip_check(what: str) -> Callable[[bytes], None]:
    """The format table's check for a zip-based format: refuse other bytes, saying what they are."""

    def check(data: bytes) -> None:
        require_zip_bytes(data, what)

    return check


def _check_html(data: bytes) -> None:
    # Any text may be a page (the parser wraps bare text), but not a known binary format.
    described = describe_content(data)
    if any(described == description for _, description in _SIGNATURES):
        raise CorruptDocument(f"not an HTML page; it looks like {described}")


#: The one table of formats: adding a format is one row here and one extractor module.
FORMATS: tuple[Format, ...] = (
    Format(
        PDF_TYPE,
        (".pdf",),
        lambda data, limits: extract_pdf(data, ocr=limits.ocr, ocr_cache=limits.ocr_cache),
        _check_pdf,
    ),
    Format(DOCX_TYPE, (".docx",), extract_docx, _zip_check("a Word .docx")),
    Format(PPTX_TYPE, (".pptx",), extract_pptx, _zip_check("a PowerPoint .pptx")),
    Format(XLSX_TYPE, (".xlsx",), extract_xlsx, check_xlsx_bytes),
    Format(EPUB_TYPE, (".epub",), extract_epub, _zip_check("an EPUB book")),
    Format(ODT_TYPE, (".odt",), extract_odt, _zip_check("an OpenDocument text .odt")),
    Format(ODS_TYPE, (".ods",), extract_ods, _zip_check("an OpenDocument spreadsheet .ods")),
    Format(ODP_TYPE, (".odp",), extract_odp, _zip_check("an OpenDocument presentation .odp")),
    Format(EML_TYPE, (".eml",), extract_eml),
    Format(CSV_TYPE, (".csv",), extract_csv),
    Format(TSV_TYPE, (".tsv", ".tab"), extract_tsv),
    Format(PLAIN_TEXT_TYPE, (".txt", ".text"), lambda data, limits: extract_plain_text(data)),
    Format(MARKDOWN_TYPE, (".md", ".markdown"), lambda data, limits: extract_markdown(data)),
    Format(WEBVTT_TYPE, (".vtt",), lambda data, limits: extract_webvtt(data)),
    Format(SRT_TYPE, (".srt",), lambda data, limits: extract_srt(data)),
    *(Format(media, (suffix,), _image_extractor(media)) for suffix, media in IMAGE_TYPES.items()),
    Format(RTF_TYPE, (".rtf",), lambda data, limits: extract_rtf(data)),
    Format(HTML_TYPE, (".html", ".htm"), lambda data, limits: extract_html(data), _check_html),
)
_BY_SUFFIX: dict[str, Format] = {s: f for f in FORMATS for s in f.suffixes}
_MEDIA_TYPES: dict[str, str] = {s: f.media_type for s, f in _BY_SUFFIX.items()}

SUPPORTED_SUFFIXES: frozenset[str] = frozenset(_MEDIA_TYPES)


def media_type_for(name: str) -> str | None:
    """The media type upwell extracts ``name`` as, judged by its suffix (any case); else None."""
    # Called once per listed file: a plain string split, not a PurePath.
    base = name.rpartition("/")[2]
    dot = base.rfind(".")
    return _MEDIA_TYPES.get(base[dot:].lower()) if dot > 0 else None


def extract(name: str, data: bytes, limits: Limits | None = None) -> Extracted:
    """Extract the text of the file called ``name`` (only its suffix matters) from ``data``.

    Guarantee: returns at least one segment, in reading order, with anchors set for the format;
    otherwise raises an ``ExtractionError`` subclass whose message is the human reason
    (``EmptyDocument``, ``CorruptDocument``, ``EncryptedDocument``, ``UnsupportedDocument``,
    ``DocumentTooLarge``, ``NoTextLayer``).
    """
    limits = limits or Limits()
    media_type = media_type_for(name)
    if media_type is None:
        suffix = PurePath(name).suffix or "(none)"
        raise UnsupportedDocument(f"unsupported file type {suffix}")
    if len(data) > limits.max_file_bytes:
        raise DocumentTooLarge(
            f"file is {len(data):,} bytes, over the limit of {limits.max_file_bytes:,} bytes"
        )
    if not strip_boms_and_blanks(data):
        raise EmptyDocument("empty file" if not data else "file holds only whitespace")

    fmt = _BY_SUFFIX[_suffix(name)]
    if fmt.check is not None:
        fmt.check(data)
    return fmt.extract(data, limits)


def _suffix(name: str) -> str:
    base = name.rpartition("/")[2]
    dot = base.rfind(".")
    return base[dot:].lower() if dot > 0 else ""


_mail.use_format_table(extract, media_type_for)
