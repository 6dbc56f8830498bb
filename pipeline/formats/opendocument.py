"""OpenDocument text (.odt), spreadsheet (.ods) and presentation (.odp) extraction with lxml.

An OpenDocument file is a zip archive whose ``content.xml`` part holds the body (OASIS
OpenDocument 1.2, Part 1 and Part 3; element names from memory). The archive is opened with the
shared checks of ``pipeline.formats.container`` first: a damaged container, a missing
``content.xml`` or a zip bomb is refused, and any XML part that declares a DOCTYPE or an entity is
refused unread. The parts are then parsed with entity resolution, DTD loading, network access and
libxml2's huge-tree mode all off. A manifest that lists encryption data means ``content.xml`` is
encrypted (``EncryptedDocument``); a ``mimetype`` part naming another OpenDocument type than the
suffix says is ``UnsupportedDocument``. ``Extracted.title`` is ``dc:title`` of ``meta.xml``.

What is read, in document order:

* .odt: ``text:h`` is a HEADING (``text:outline-level``, 1 when absent, builds the heading path
  "A > B" carried by every later segment's ``Anchor.heading``); ``text:p`` a PARAGRAPH, a
  LIST_ITEM when it sits in a ``text:list-item``; each ``table:table-row`` one TABLE_ROW, cells
  joined with " | " (a covered, merged-away cell is skipped; repeated cells are not repeated).
  Sections, index bodies and row groups are entered. Footnotes and endnotes (``text:note``) are
  appended right after the paragraph that cites them, as PARAGRAPH segments "Note 1: ...", using
  the note's own citation; comments (``office:annotation``), tracked deletions and frames anchored
  in a paragraph (images, text boxes) are not read.
* .ods: one TABLE_ROW per row of each ``table:table``, "Part: HB2-114, Price: 12.4", with the
  same rules, caps and warnings as the .xlsx reader (``pipeline.formats.sheets``): the first
  non-empty row is the header, ``Anchor.heading`` is the sheet's ``table:name`` and
  ``line_start`` = ``line_end`` = the 1-based row number counting repeated rows. A cell's value is
  its ``office:value`` for float, percentage and currency cells (an integral float is shown as an
  integer), else the text of its ``text:p`` paragraphs. ``table:number-rows-repeated`` and
  ``table:number-columns-repeated`` are honoured lazily: a repeated empty row costs one step per
  row until the empty-row cap (10,000 in a row) stops the sheet, so a sheet formatted down to its
  millionth row is cut with a warning, not expanded; at most 100,000 non-empty rows are read.
* .odp: each ``draw:page`` in order, ``Anchor.page`` its 1-based number and ``Anchor.heading``
  the text of its title frame (``presentation:class="title"``) or None. The title is a HEADING,
  then every other paragraph on the page in document order (PARAGRAPH, or LIST_ITEM in a list),
  table rows as for .odt, then the speaker notes (``presentation:notes``), each paragraph
  starting "Notes: ". Page number, footer and date frames are page furniture and are not read.

Inline text: ``text:span``, ``text:a`` and the other inline wrappers are entered; ``text:s`` is
``text:c`` spaces (at least one), ``text:tab`` a tab and ``text:line-break`` a line break, all
then collapsed by ``normalise_text``.
"""

from __future__ import annotations

import zipfile
from collections.abc import Callable, Iterator

from lxml import etree

from pipeline.errors import (
    CorruptDocument,
    DocumentTooLarge,
    EmptyDocument,
    EncryptedDocument,
    UnsupportedDocument,
)
from pipeline.formats.container import open_checked_zip, read_part
from pipeline.formats.sheets import (
    MAX_CELLS,
    MAX_EMPTY_RUN,
    MAX_ROWS,
    _Budget,
    _read_sheets,
    _result,
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

__all__ = [
    "ODP_TYPE",
    "ODS_TYPE",
    "ODT_TYPE",
    "extract_odp",
    "extract_ods",
    "extract_odt",
]

ODT_TYPE = "application/vnd.oasis.opendocument.text"
ODS_TYPE = "application/vnd.oasis.opendocument.spreadsheet"
ODP_TYPE = "application/vnd.oasis.opendocument.presentation"

CONTENT_PART = "content.xml"
META_PART = "meta.xml"
MANIFEST_PART = "META-INF/manifest.xml"
MIMETYPE_PART = "mimetype"
NOTES_PREFIX = "Notes: "
#: Most columns one spreadsheet row is read to (Excel's 16,384-column width; from memory).
MAX_COLUMNS = 16_384
#: Most spaces one ``text:s`` stands for; they collapse to one anyway.
_MAX_SPACES = 64

# Namespaces of OASIS OpenDocument 1.2, Part 1 (from memory).
_OFFICE = "{urn:oasis:names:tc:opendocument:xmlns:office:1.0}"
_TEXT = "{urn:oasis:names:tc:opendocument:xmlns:text:1.0}"
_TABLE = "{urn:oasis:names:tc:opendocument:xmlns:table:1.0}"
_DRAW = "{urn:oasis:names:tc:opendocument:xmlns:drawing:1.0}"
_PRESENTATION = "{urn:oasis:names:tc:opendocument:xmlns:presentation:1.0}"
_SVG = "{urn:oasis:names:tc:opendocument:xmlns:svg-compatible:1.0}"
_DC = "{http://purl.org/dc/elements/1.1/}"

_P = f"{_TEXT}p"
_H = f"{_TEXT}h"
_LIST_ITEM = f"{_TEXT}list-item"
_LIST_HEADER = f"{_TEXT}list-header"
_SPACE = f"{_TEXT}s"
_TAB = f"{_TEXT}tab"
_LINE_BREAK = f"{_TEXT}line-break"
_NOTE = f"{_TEXT}note"
_NOTE_CITATION = f"{_TEXT}note-citation"
_NOTE_BODY = f"{_TEXT}note-body"
_TABLE_TABLE = f"{_TABLE}table"
_ROW = f"{_TABLE}table-row"
_CELL = f"{_TABLE}table-cell"
_COVERED_CELL = f"{_TABLE}covered-table-cell"
_ROW_CONTAINERS = frozenset(
    {f"{_TABLE}table-header-rows", f"{_TABLE}table-rows", f"{_TABLE}table-row-group"}
)
_PAGE = f"{_DRAW}page"
_NOTES = f"{_PRESENTATION}notes"
_CLASS = f"{_PRESENTATION}class"
_FURNITURE_CLASSES = frozenset({"page-number", "footer", "date-time", "header"})

# Inside a paragraph: elements whose content is not the paragraph's visible text.
_INLINE_SKIPPED = frozenset(
    {
        f"{_OFFICE}annotation",
        f"{_TEXT}ruby-text",
        f"{_DRAW}frame",
        f"{_DRAW}a",
        f"{_DRAW}custom-shape",
        f"{_DRAW}g",
        f"{_TEXT}tracked-changes",
    }
)
# Between blocks: elements that hold settings, declarations or text a reader does not see.
_BLOCK_SKIPPED = frozenset(
    {
        f"{_TEXT}tracked-changes",
        f"{_TEXT}sequence-decls",
        f"{_TEXT}variable-decls",
        f"{_TEXT}user-field-decls",
        f"{_TEXT}index-title-template",
        f"{_TEXT}table-of-content-source",
        f"{_TEXT}alphabetical-index-source",
        f"{_TEXT}illustration-index-source",
        f"{_TEXT}table-index-source",
        f"{_TEXT}user-index-source",
        f"{_TEXT}bibliography-source",
        f"{_TABLE}table-columns",
        f"{_TABLE}table-column",
        f"{_TABLE}table-header-columns",
        f"{_TABLE}named-expressions",
        f"{_OFFICE}forms",
        f"{_OFFICE}annotation",
        f"{_DRAW}page-thumbnail",
        f"{_SVG}title",
        f"{_SVG}desc",
        _NOTES,
    }
)
_FLOAT_TYPES = frozenset({"float", "percentage", "currency"})


def _parser() -> etree.XMLParser:
    return etree.XMLParser(resolve_entities=False, no_network=True, load_dtd=False, huge_tree=False)


def _parse(data: bytes, part: str, label: str) -> etree._Element:
    try:
        return etree.fromstring(data, parser=_parser())
    except (etree.XMLSyntaxError, ValueError) as error:
        raise CorruptDocument(
            f"damaged {label}: part {part} is not well-formed XML ({error})"
        ) from error


def _repeat(element: etree._Element, attribute: str) -> int:
    try:
        return max(1, int(element.get(f"{_TABLE}{attribute}") or 1))
    except ValueError:
        return 1


# --- inline text -------------------------------------------------------------------------------


def _inline_text(paragraph: etree._Element, notes: list[etree._Element] | None = None) -> str:
    """The visible text of a ``text:p`` or ``text:h``; the ``text:note`` elements met are added
    to ``notes`` (their text is not part of the paragraph's)."""
    parts = [paragraph.text or ""]
    # An explicit stack of (children, owner): the owner's tail follows once its children are done.
    pending: list[tuple[Iterator[etree._Element], etree._Element | None]] = [
        (paragraph.iterchildren(), None)
    ]
    while pending:
        children, owner = pending[-1]
        child = next(children, None)
        if child is None:
            pending.pop()
            if owner is not None:
                parts.append(owner.tail or "")
            continue
        tag = child.tag
        if tag == _SPACE:
            try:
                count = int(child.get(f"{_TEXT}c") or 1)
            except ValueError:
                count = 1
            parts.append(" " * min(max(count, 1), _MAX_SPACES))
        elif tag == _TAB:
            parts.append("\t")
        elif tag == _LINE_BREAK:
            parts.append("\n")
        elif tag == _NOTE:
            if notes is not None:
                notes.append(child)
        elif isinstance(tag, str) and tag not in _INLINE_SKIPPED:
            parts.append(child.text or "")
            pending.append((child.iterchildren(), child))
            continue
        parts.append(child.tail or "")
    return "".join(parts)


def _note_segments(notes: list[etree._Element], heading: str | None) -> list[Segment]:
    segments: list[Segment] = []
    for note in notes:
        citation = note.find(_NOTE_CITATION)
        label = normalise_text(citation.text or "") if citation is not None else ""
        body = note.find(_NOTE_BODY)
        if body is None:
            continue
        texts = [normalise_text(_inline_text(p)) for p in body.iter(_P, _H)]
        for n, text in enumerate(t for t in texts if t):
            if n == 0:
                text = f"Note {label}: {text}" if label else f"Note: {text}"
            segments.append(Segment(text, Anchor(heading=heading), PARAGRAPH))
    return segments


# --- blocks ------------------------------------------------------------------------------------


def _blocks(container: etree._Element) -> Iterator[tuple[etree._Element, bool]]:
    """(element, in a list) for each ``text:p``, ``text:h`` and ``table:table-row`` reachable from
    ``container`` through lists, sections, frames and other wrappers, in document order.

    Rows are yielded whole, not entered; paragraphs are not entered either (notes and frames
    inside them are handled by the caller or not read).
    """
    pending: list[tuple[Iterator[etree._Element], bool]] = [(container.iterchildren(), False)]
    while pending:
        children, in_list = pending[-1]
        element = next(children, None)
        if element is None:
            pending.pop()
            continue
        tag = element.tag
        if tag in (_P, _H, _ROW):
            yield element, in_list
        elif not isinstance(tag, str) or tag in _BLOCK_SKIPPED:
            continue
        elif element.get(_CLASS) in _FURNITURE_CLASSES:
            continue
        else:
            pending.append((element.iterchildren(), in_list or tag in (_LIST_ITEM, _LIST_HEADER)))


def _cell_text(cell: etree._Element) -> str:
    parts = []
    for element, _ in _blocks(cell):
        parts.append(_row_text(element) if element.tag == _ROW else _inline_text(element))
    return normalise_text(" ".join(parts))


def _row_text(row: etree._Element) -> str:
    texts = [_cell_text(cell) for cell in row.iterchildren(_CELL)]
    return " | ".join(texts) if any(texts) else ""


def _block_segments(
    container: etree._Element,
    anchor_for: Callable[[], Anchor],
    heading_stack: list[tuple[int, str]] | None,
    title_element: etree._Element | None = None,
) -> list[Segment]:
    """Segments of the blocks under ``container``. ``anchor_for()`` gives the current anchor;
    ``heading_stack`` (None: headings are plain paragraphs) is updated by each ``text:h``."""
    segments: list[Segment] = []
    for element, in_list in _blocks(container):
        if title_element is not None and _is_inside(element, title_element):
            continue
        if element.tag == _ROW:
            text = _row_text(element)
            if text:
                segments.append(Segment(text, anchor_for(), TABLE_ROW))
            continue
        notes: list[etree._Element] = []
        text = normalise_text(_inline_text(element, notes))
        if text and element.tag == _H and heading_stack is not None and not in_list:
            try:
                level = max(1, int(element.get(f"{_TEXT}outline-level") or 1))
            except ValueError:
                level = 1
            while heading_stack and heading_stack[-1][0] >= level:
                heading_stack.pop()
            heading_stack.append((level, text))
            segments.append(Segment(text, anchor_for(), HEADING))
        elif text:
            segments.append(Segment(text, anchor_for(), LIST_ITEM if in_list else PARAGRAPH))
        if notes:
            segments.extend(_note_segments(notes, anchor_for().heading))
    return segments


def _is_inside(element: etree._Element, ancestor: etree._Element) -> bool:
    return any(parent is ancestor for parent in element.iterancestors())


# --- the package -------------------------------------------------------------------------------


class _Package:
    """The parsed ``content.xml`` body and the title of one OpenDocument file."""

    def __init__(self, data: bytes, limits: Limits, label: str, kind: str, media_type: str) -> None:
        if len(data) > limits.max_file_bytes:
            raise DocumentTooLarge(
                f"file is {len(data):,} bytes, over the limit of {limits.max_file_bytes:,} bytes"
            )
        archive = open_checked_zip(data, limits, label=label, kind=kind, required=(CONTENT_PART,))
        try:
            names = set(archive.namelist())
            self._check_type(archive, names, label, kind, media_type)
            content = read_part(archive, CONTENT_PART, label)
            meta = read_part(archive, META_PART, label) if META_PART in names else None
        finally:
            archive.close()
        self.root = _parse(content, CONTENT_PART, label)
        self.title: str | None = None
        if meta is not None:
            title = _parse(meta, META_PART, label).find(f"{_OFFICE}meta/{_DC}title")
            if title is not None:
                self.title = normalise_text("".join(title.itertext())) or None

    @staticmethod
    def _check_type(
        archive: zipfile.ZipFile, names: set[str], label: str, kind: str, media_type: str
    ) -> None:
        if MANIFEST_PART in names and b"encryption-data" in read_part(
            archive, MANIFEST_PART, label
        ):
            raise EncryptedDocument(f"the {label} is encrypted; upwell does not guess passwords")
        if MIMETYPE_PART in names:
            declared = read_part(archive, MIMETYPE_PART, label)[:200].decode("ascii", "replace")
            declared = declared.strip()
            if declared not in (media_type, f"{media_type}-template"):
                raise UnsupportedDocument(
                    f"not {kind}: the {label}'s mimetype part says it is {declared!r}"
                )

    def body(self, name: str, label: str) -> etree._Element:
        body = self.root.find(f"{_OFFICE}body/{_OFFICE}{name}")
        if body is None:
            raise CorruptDocument(f"damaged {label}: content.xml has no office:{name} body")
        return body


def extract_odt(data: bytes, limits: Limits) -> Extracted:
    """Headings, paragraphs, list items, table rows and footnotes of the text, in document order."""
    package = _Package(data, limits, ".odt", "an OpenDocument text", ODT_TYPE)
    heading_stack: list[tuple[int, str]] = []

    def anchor() -> Anchor:
        return Anchor(heading=" > ".join(text for _, text in heading_stack) or None)

    segments = _block_segments(package.body("text", ".odt"), anchor, heading_stack)
    if not segments:
        raise EmptyDocument("the OpenDocument text has no text in its body")
    return Extracted(media_type=ODT_TYPE, segments=tuple(segments), title=package.title)


def _cell_value(cell: etree._Element) -> object:
    if cell.get(f"{_OFFICE}value-type") in _FLOAT_TYPES:
        try:
            return float(cell.get(f"{_OFFICE}value") or "")
        except ValueError:
            pass  # a damaged value: fall back to the text the cell shows
    return "\n".join(_inline_text(p) for p in cell.iterchildren(_P, _H))


def _row_values(row: etree._Element) -> list[object]:
    values: list[object] = []
    gap = 0  # empty cells not yet added: trailing ones never are
    for cell in row.iterchildren(_CELL, _COVERED_CELL):
        count = _repeat(cell, "number-columns-repeated")
        value = _cell_value(cell) if cell.tag == _CELL else None
        if value is None or value == "":
            gap += count
            continue
        room = MAX_COLUMNS - len(values)
        values.extend([None] * min(gap, room))
        gap = 0
        values.extend([value] * min(count, MAX_COLUMNS - len(values)))
        if len(values) >= MAX_COLUMNS:
            break
    return values


def _sheet_rows(table: etree._Element) -> Iterator[tuple[int, int, list[object]]]:
    """(row number, row number, values) per row, repeats counted. Empty rows are held back as a
    count until a row with values follows, so the padding a sheet ends with is never walked; a
    run that is followed is yielded lazily, one row at a time, and the reader's empty-row cap
    ends it."""
    number = 0
    empty_rows = 0
    pending: list[Iterator[etree._Element]] = [table.iterchildren()]
    while pending:
        element = next(pending[-1], None)
        if element is None:
            pending.pop()
        elif element.tag in _ROW_CONTAINERS:
            pending.append(element.iterchildren())
        elif element.tag == _ROW:
            values = _row_values(element)
            repeat = _repeat(element, "number-rows-repeated")
            if not values:
                empty_rows += repeat
                continue
            for _ in range(empty_rows):
                number += 1
                yield number, number, []
            empty_rows = 0
            for _ in range(repeat):
                number += 1
                yield number, number, values


def extract_ods(
    data: bytes,
    limits: Limits,
    *,
    max_rows: int = MAX_ROWS,
    max_cells: int = MAX_CELLS,
    max_empty_run: int = MAX_EMPTY_RUN,
) -> Extracted:
    """One TABLE_ROW per data row of every sheet, in sheet order, as for .xlsx."""
    package = _Package(data, limits, ".ods", "an OpenDocument spreadsheet", ODS_TYPE)
    budget = _Budget(max_rows, max_cells, max_rows, max_cells, max_empty_run)
    tables = package.body("spreadsheet", ".ods").iterchildren(_TABLE_TABLE)
    sheets = []
    for position, table in enumerate(tables):
        name = table.get(f"{_TABLE}name")
        sheets.append((name or f"Sheet{position + 1}", name or "?", _sheet_rows(table)))
    _read_sheets(sheets, budget)
    return _result(budget, ODS_TYPE, "OpenDocument spreadsheet", package.title)


def _paragraphs_text(element: etree._Element) -> str:
    return normalise_text(" ".join(_inline_text(p) for p, _ in _blocks(element) if p.tag != _ROW))


def extract_odp(data: bytes, limits: Limits) -> Extracted:
    """Per page: its title, the text of its other frames in document order, its notes."""
    package = _Package(data, limits, ".odp", "an OpenDocument presentation", ODP_TYPE)
    segments: list[Segment] = []
    pages = package.body("presentation", ".odp").iterchildren(_PAGE)
    for number, page in enumerate(pages, start=1):
        title_frame = next(
            (e for e in page.iter(f"{_DRAW}*") if e.get(_CLASS) == "title"),
            None,
        )
        title = _paragraphs_text(title_frame) if title_frame is not None else ""
        page_anchor = Anchor(page=number, heading=title or None)
        if title:
            segments.append(Segment(title, page_anchor, HEADING))
        segments.extend(_block_segments(page, lambda a=page_anchor: a, None, title_frame))
        for notes in page.iterchildren(_NOTES):
            for element, _ in _blocks(notes):
                text = (
                    _row_text(element)
                    if element.tag == _ROW
                    else normalise_text(_inline_text(element))
                )
                if text:
                    segments.append(Segment(NOTES_PREFIX + text, page_anchor, PARAGRAPH))
    if not segments:
        raise EmptyDocument("the OpenDocument presentation has no text on its pages or in notes")
    return Extracted(media_type=ODP_TYPE, segments=tuple(segments), title=package.title)
