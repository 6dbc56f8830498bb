"""Word .docx extraction with python-docx, after checking the zip container is safe to open.

Checks before python-docx sees the file (it reads whole parts into memory with no cap):

* the bytes are a zip archive with a ``word/document.xml`` part (else ``CorruptDocument``);
* the declared uncompressed sizes sum to at most ``limits.max_inflated_bytes`` and no part
  larger than 1 MiB inflates by more than ``limits.max_inflate_ratio`` (else
  ``DocumentTooLarge``). The declared sizes are an upper bound on what is inflated: CPython's
  ``zipfile`` stops reading a member at its declared size and fails on a CRC mismatch (from
  memory of ``zipfile.ZipExtFile``);
* no XML part declares a DOCTYPE (else ``UnsupportedDocument``): OOXML forbids it
  (ECMA-376 Part 2, 8.1.4; from memory) and python-docx silently drops the text after an entity.

Body paragraphs and tables are read in document order with ``Document.iter_inner_content()``.
"""

from __future__ import annotations

import io
import re
import zipfile
from collections.abc import Iterator

import docx
from docx.document import Document as WordDocument
from docx.oxml.ns import qn
from docx.table import Table, _Cell
from docx.text.paragraph import Paragraph

from pipeline.errors import (
    CorruptDocument,
    DocumentTooLarge,
    EmptyDocument,
    UnsupportedDocument,
)
from pipeline.formats.text import normalise_text
from pipeline.records import (
    HEADING,
    LIST_ITEM,
    PARAGRAPH,
    TABLE_ROW,
    Anchor,
    Extracted,
    Limits,
    Segment,
)

DOCX_TYPE = "application/vnd.openxmlformats-officedocument.wordprocessingml.document"

MAIN_PART = "word/document.xml"
# Parts smaller than this are not ratio-checked: small XML compresses 20-50x routinely, and a
# small part cannot exhaust memory whatever its ratio.
_RATIO_CHECK_MIN_BYTES = 1024 * 1024
_SCAN_CHUNK = 64 * 1024
_DOCTYPE_MARKERS = (b"<!DOCTYPE", b"<!ENTITY")
_HEADING_STYLE = re.compile(r"^heading\s*([1-9])$", re.IGNORECASE)
_TITLE_STYLE = "title"


def _check_container(archive: zipfile.ZipFile, limits: Limits) -> None:
    members = archive.infolist()
    total = sum(member.file_size for member in members)
    if total > limits.max_inflated_bytes:
        raise DocumentTooLarge(
            f"the .docx would inflate to {total:,} bytes, over the limit of "
            f"{limits.max_inflated_bytes:,} bytes"
        )
    for member in members:
        if member.file_size < _RATIO_CHECK_MIN_BYTES:
            continue
        ratio = member.file_size / max(member.compress_size, 1)
        if ratio > limits.max_inflate_ratio:
            raise DocumentTooLarge(
                f"part {member.filename} inflates {ratio:,.0f} times ({member.file_size:,} bytes), "
                f"over the limit of {limits.max_inflate_ratio:,.0f} times; it looks like a zip bomb"
            )
    names = {member.filename for member in members}
    if MAIN_PART not in names:
        raise CorruptDocument(f"not a Word document: the .docx has no {MAIN_PART} part")


def _xml_part_has_doctype(archive: zipfile.ZipFile, member: zipfile.ZipInfo) -> bool:
    """Scan one part in pieces, so a large part is never held in memory whole."""
    with archive.open(member) as stream:
        head = stream.read(2)
        if head in (b"\xff\xfe", b"\xfe\xff"):  # UTF-16 XML: decode before searching
            text = (head + stream.read()).decode("utf-16", errors="replace").encode("utf-8")
            return any(marker in text for marker in _DOCTYPE_MARKERS)
        carry = head
        while True:
            piece = stream.read(_SCAN_CHUNK)
            window = carry + piece
            if any(marker in window for marker in _DOCTYPE_MARKERS):
                return True
            if not piece:
                return False
            carry = window[-16:]  # longer than any marker, so one split across pieces is seen


def _check_no_doctype(archive: zipfile.ZipFile) -> None:
    for member in archive.infolist():
        if member.filename.endswith((".xml", ".rels")) and _xml_part_has_doctype(archive, member):
            raise UnsupportedDocument(
                f"part {member.filename} declares a DOCTYPE, which Word documents must not "
                "contain; text after an entity would be lost, so the file is refused"
            )


def _open_checked(data: bytes, limits: Limits) -> WordDocument:
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
    except zipfile.BadZipFile as error:
        raise CorruptDocument(
            f"not a Word .docx: the zip container is damaged ({error})"
        ) from error
    with archive:
        _check_container(archive, limits)
        try:
            _check_no_doctype(archive)
        except (zipfile.BadZipFile, EOFError, OSError, ValueError, NotImplementedError) as error:
            raise CorruptDocument(f"damaged .docx: a part cannot be inflated ({error})") from error
    try:
        return docx.Document(io.BytesIO(data))
    except ValueError as error:
        # python-docx raises ValueError for a package whose main part is not a Word document
        # (a macro-enabled .docm or a template renamed to .docx).
        raise UnsupportedDocument(f"not a plain Word document: {error}") from error
    except Exception as error:  # noqa: BLE001 - lxml, zipfile and KeyError failures alike
        raise CorruptDocument(f"damaged .docx ({type(error).__name__}: {error})") from error


def _style_chain(paragraph: Paragraph) -> Iterator[object]:
    style = paragraph.style
    seen = 0
    while style is not None and seen < 10:  # a cyclic basedOn chain must not hang us
        yield style
        style = style.base_style
        seen += 1


def _heading_level(paragraph: Paragraph) -> int | None:
    for style in _style_chain(paragraph):
        match = _HEADING_STYLE.match(getattr(style, "name", "") or "")
        if match:
            return int(match.group(1))
    return None


def _is_title(paragraph: Paragraph) -> bool:
    style = paragraph.style
    return style is not None and (style.name or "").lower() == _TITLE_STYLE


def _is_list_item(paragraph: Paragraph) -> bool:
    properties = paragraph._p.pPr
    if properties is not None and properties.find(qn("w:numPr")) is not None:
        return True
    for style in _style_chain(paragraph):
        if (getattr(style, "name", "") or "").lower().startswith("list"):
            return True
        style_properties = style.element.find(qn("w:pPr"))  # type: ignore[attr-defined]
        if style_properties is not None and style_properties.find(qn("w:numPr")) is not None:
            return True
    return False


def _cell_text(cell: _Cell) -> str:
    """Text of a cell, including any table nested inside it."""
    parts: list[str] = []
    for block in cell.iter_inner_content():
        if isinstance(block, Paragraph):
            parts.append(block.text)
        else:
            parts.extend(_row_text(row.cells) for row in block.rows)
    return normalise_text(" ".join(parts))


def _row_text(cells: list[_Cell]) -> str:
    # A horizontally merged cell appears once per grid column it spans; keep it once.
    unique: list[_Cell] = []
    for cell in cells:
        if not unique or cell._tc is not unique[-1]._tc:
            unique.append(cell)
    texts = [_cell_text(cell) for cell in unique]
    return " | ".join(texts) if any(texts) else ""


def extract_docx(data: bytes, limits: Limits) -> Extracted:
    """Headings, paragraphs, list items and table rows of the body, in document order."""
    document = _open_checked(data, limits)
    segments: list[Segment] = []
    heading_stack: list[tuple[int, str]] = []
    title = normalise_text(document.core_properties.title or "") or None

    def current_path() -> str | None:
        return " > ".join(text for _, text in heading_stack) or None

    try:
        for block in document.iter_inner_content():
            if isinstance(block, Table):
                for row in block.rows:
                    text = _row_text(row.cells)
                    if text:
                        segments.append(Segment(text, Anchor(heading=current_path()), TABLE_ROW))
                continue
            text = normalise_text(block.text)
            if not text:
                continue
            level = _heading_level(block)
            if level is not None:
                while heading_stack and heading_stack[-1][0] >= level:
                    heading_stack.pop()
                heading_stack.append((level, text))
                segments.append(Segment(text, Anchor(heading=current_path()), HEADING))
                continue
            if _is_title(block) and title is None:
                title = text
            kind = LIST_ITEM if _is_list_item(block) else PARAGRAPH
            segments.append(Segment(text, Anchor(heading=current_path()), kind))
    except (KeyError, ValueError, AttributeError, IndexError) as error:
        raise CorruptDocument(f"damaged .docx body ({type(error).__name__}: {error})") from error
    if not segments:
        raise EmptyDocument("the Word document has no text in its body")
    return Extracted(media_type=DOCX_TYPE, segments=tuple(segments), title=title)
