"""PDF extraction with pypdf: one PARAGRAPH segment per paragraph, anchored by 1-based page.

pypdf gives the text of a page as lines and no paragraph marks, so paragraphs are rebuilt from
the lines with this heuristic (the last line of a wrapped paragraph is the only one that stops
well short of the measure):

* a blank line always ends a paragraph;
* a line ends a paragraph when it is shorter than 80 % of the page's typical line (the 90th
  percentile of its line lengths) and ends a sentence (``.``, ``!``, ``?`` or ``:``, optionally
  followed by a closing quote or bracket), and the next line starts like a new sentence
  (capital letter, digit, bullet or opening quote);
* a line shorter than half the typical line ends a paragraph even without a full stop, when the
  next line starts like a new sentence and the short line does not end in a comma or hyphen
  (headings, table rows and list lines; mid-paragraph lines of wrapped prose are never that
  short).

Lines of one paragraph are joined with a space; a line that ends in a hyphen between letters is
joined to a next line that starts with a lower-case letter without the hyphen ("adjust-" +
"ment" -> "adjustment"), and kept as a compound before a capital ("Marrowby-" + "Built").
"""

from __future__ import annotations

import io
import re
from typing import Any

import pypdf
from pypdf.errors import DependencyError, FileNotDecryptedError, PyPdfError, WrongPasswordError

from pipeline.errors import CorruptDocument, EncryptedDocument, NoTextLayer
from pipeline.formats.text import normalise_text, split_lines
from pipeline.records import PARAGRAPH, Anchor, Extracted, Segment

PDF_TYPE = "application/pdf"

# Readers accept the header anywhere in the first 1024 bytes and the %%EOF marker within the last
# 1024 (Adobe's implementation notes to the PDF reference; from memory).
_HEADER_WINDOW = 1024
_EOF_WINDOW = 1024

_SENTENCE_END = re.compile(r"[.!?:][\"'\u201d\u2019)\]]*$")
_SENTENCE_START = re.compile(r"^[\"'\u201c\u2018(\[]?[A-Z0-9\u00c0-\u00de\u2022\u2023\u25aa\-*]")
_HYPHENS = "-\u2010"
_SHORT_SENTENCE_LINE = 0.8
_VERY_SHORT_LINE = 0.5


def find_pdf_header(data: bytes) -> int:
    """Offset of the ``%PDF-`` header within the first 1024 bytes, or -1 if there is none."""
    return data[:_HEADER_WINDOW].find(b"%PDF-")


def _typical_line_length(lines: list[str]) -> float:
    lengths = sorted(len(line) for line in lines if line)
    if not lengths:
        return 0.0
    return float(lengths[min(len(lengths) - 1, int(0.9 * len(lengths)))])


def _ends_paragraph(line: str, next_line: str, typical: float) -> bool:
    if not next_line:
        return True
    if not _SENTENCE_START.match(next_line):
        return False
    if len(line) < _SHORT_SENTENCE_LINE * typical and _SENTENCE_END.search(line):
        return True
    return len(line) < _VERY_SHORT_LINE * typical and not line.endswith((",", *_HYPHENS))


def _join_lines(lines: list[str]) -> str:
    joined = lines[0]
    for line in lines[1:]:
        if joined.endswith("\u00ad"):  # a soft hyphen marks a break inside a word
            joined = joined[:-1] + line
        elif joined[-1] in _HYPHENS and joined[-2:-1].isalpha() and line[:1].isalpha():
            # A word broken at the line end; before a capital the hyphen belongs to a compound.
            joined = joined[:-1] + line if line[0].islower() else joined + line
        else:
            joined = f"{joined} {line}"
    return joined


def split_page_paragraphs(page_text: str) -> list[str]:
    """The paragraphs of one page's extracted text, normalised, by the module's heuristic."""
    lines = [line.strip() for line in split_lines(page_text)]
    typical = _typical_line_length(lines)
    paragraphs: list[str] = []
    current: list[str] = []
    for index, line in enumerate(lines):
        if not line:
            if current:
                paragraphs.append(_join_lines(current))
                current = []
            continue
        current.append(line)
        next_line = lines[index + 1] if index + 1 < len(lines) else ""
        if _ends_paragraph(line, next_line, typical):
            paragraphs.append(_join_lines(current))
            current = []
    if current:
        paragraphs.append(_join_lines(current))
    return [text for text in (normalise_text(p) for p in paragraphs) if text]


def _open(data: bytes) -> pypdf.PdfReader:
    if b"%%EOF" not in data[-_EOF_WINDOW:]:
        raise CorruptDocument("truncated or damaged PDF: the %%EOF end marker is missing")
    try:
        reader = pypdf.PdfReader(io.BytesIO(data), strict=False)
    except (PyPdfError, ValueError, KeyError, TypeError, IndexError, AttributeError) as error:
        raise CorruptDocument(f"damaged PDF: {error}") from error
    if reader.is_encrypted:
        # An empty user password is what every reader tries silently; anything else is refused.
        try:
            opened = reader.decrypt("")
        except (DependencyError, NotImplementedError) as error:
            raise EncryptedDocument(f"encrypted PDF that cannot be opened here: {error}") from error
        except (PyPdfError, ValueError, KeyError) as error:
            raise CorruptDocument(f"damaged PDF encryption data: {error}") from error
        if opened == pypdf.PasswordType.NOT_DECRYPTED:
            raise EncryptedDocument(
                "encrypted PDF that needs a password; upwell does not guess passwords, "
                "so save a copy without one"
            )
    return reader


def _metadata_title(reader: pypdf.PdfReader) -> str | None:
    try:
        metadata = reader.metadata
        title = metadata.title if metadata is not None else None
    except (PyPdfError, ValueError, KeyError, TypeError, AttributeError):
        return None
    if not isinstance(title, str):
        return None
    return normalise_text(title) or None


def _ocr_page(page: Any, number: int, cache_dir: str | None) -> tuple[list[Segment], list[str]]:
    """OCR of the images drawn on a page that has no text layer (a scan is one image a page)."""
    import pipeline.formats.ocr as ocr  # loaded only for scanned pages

    segments: list[Segment] = []
    warnings: list[str] = []
    try:
        images = list(page.images)
    except Exception as error:  # noqa: BLE001 - a damaged image stream is this page's warning
        return [], [f"page {number}: its images could not be read for OCR ({error})"]
    for image_file in images:
        try:
            image = ocr.open_image(image_file.data, f"image on page {number}")
            image = image_file.image if image.format is None else image
            lines = ocr.recognise(image, key=image_file.data, cache_dir=cache_dir)
        except Exception as error:  # noqa: BLE001 - one bad image must not lose the page
            warnings.append(f"page {number}: an image could not be read for OCR ({error})")
            continue
        found, warning = ocr.page_segments(lines, number)
        segments.extend(found)
        if warning:
            warnings.append(warning)
    return segments, warnings


def extract_pdf(data: bytes, *, ocr: bool = True, ocr_cache: str | None = None) -> Extracted:
    """Paragraphs of every page with ``anchor.page``; pages without text become warnings.

    A page without a text layer is read by OCR from the images drawn on it when ``ocr`` is on
    (a page with a text layer never is). Raises ``CorruptDocument`` (truncated, damaged),
    ``EncryptedDocument`` (needs a password) or ``NoTextLayer`` (no page has text, even by OCR).
    """
    reader = _open(data)
    try:
        pages = list(reader.pages)
    except (FileNotDecryptedError, WrongPasswordError) as error:  # before their base class
        raise EncryptedDocument(f"encrypted PDF: {error}") from error
    except (PyPdfError, ValueError, KeyError, TypeError, IndexError, AttributeError) as error:
        raise CorruptDocument(f"damaged PDF page tree: {error}") from error
    segments: list[Segment] = []
    warnings: list[str] = []
    unreadable = 0
    for number, page in enumerate(pages, start=1):
        try:
            page_text = page.extract_text() or ""
        except Exception as error:  # noqa: BLE001 - any pypdf failure on one page is a warning
            unreadable += 1
            warnings.append(f"page {number} could not be read ({type(error).__name__}: {error})")
            continue
        paragraphs = split_page_paragraphs(page_text)
        if not paragraphs and ocr:
            found, page_warnings = _ocr_page(page, number, ocr_cache)
            warnings.extend(page_warnings)
            if found:
                warnings.append(f"page {number} has no text layer; its text was read by OCR")
                segments.extend(found)
                continue
        if not paragraphs:
            warnings.append(f"page {number} has no text layer")
        segments.extend(Segment(text, Anchor(page=number), PARAGRAPH) for text in paragraphs)
    if not segments:
        if unreadable:
            raise CorruptDocument(
                f"damaged PDF: {unreadable} of {len(pages)} pages could not be read"
            )
        raise NoTextLayer(
            f"no text layer on any of its {len(pages)} pages (scanned images?), "
            + ("and OCR found no text in it" if ocr else "OCR is off for this source")
        )
    return Extracted(
        media_type=PDF_TYPE,
        segments=tuple(segments),
        title=_metadata_title(reader),
        warnings=tuple(warnings),
    )
