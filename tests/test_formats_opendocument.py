"""OpenDocument extraction checked against an independent raw reading of content.xml.

The fixtures are written here by hand as OpenDocument zip packages (``mimetype`` first and
stored, then ``content.xml``, ``meta.xml`` and ``META-INF/manifest.xml``), with the element names
of OASIS OpenDocument 1.2, Part 1. The reference is a plain lxml reading with entities off: the
``itertext`` of each ``text:p`` / ``text:h`` (and of each table cell) in document order.
``itertext`` does not turn ``text:s``, ``text:tab`` or ``text:line-break`` into whitespace, so
text is compared with all whitespace removed; spacing is checked separately on one paragraph.
Spreadsheet values are compared exactly once the reference renders them by ``_shown`` below.
"""

from __future__ import annotations

import copy
import io
import zipfile

import pytest
from lxml import etree

from pipeline.errors import (
    CorruptDocument,
    DocumentTooLarge,
    EmptyDocument,
    EncryptedDocument,
    UnsupportedDocument,
)
from pipeline.formats.opendocument import (
    ODP_TYPE,
    ODS_TYPE,
    ODT_TYPE,
    extract_odp,
    extract_ods,
    extract_odt,
)
from pipeline.formats.text import normalise_text
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW, Limits

# Namespaces of OASIS OpenDocument 1.2, Part 1 (from memory).
NAMESPACES = {
    "office": "urn:oasis:names:tc:opendocument:xmlns:office:1.0",
    "text": "urn:oasis:names:tc:opendocument:xmlns:text:1.0",
    "table": "urn:oasis:names:tc:opendocument:xmlns:table:1.0",
    "draw": "urn:oasis:names:tc:opendocument:xmlns:drawing:1.0",
    "presentation": "urn:oasis:names:tc:opendocument:xmlns:presentation:1.0",
    "svg": "urn:oasis:names:tc:opendocument:xmlns:svg-compatible:1.0",
    "xlink": "http://www.w3.org/1999/xlink",
    "dc": "http://purl.org/dc/elements/1.1/",
    "meta": "urn:oasis:names:tc:opendocument:xmlns:meta:1.0",
    "manifest": "urn:oasis:names:tc:opendocument:xmlns:manifest:1.0",
}
TEXT = f"{{{NAMESPACES['text']}}}"
TABLE = f"{{{NAMESPACES['table']}}}"
OFFICE = f"{{{NAMESPACES['office']}}}"
PRESENTATION = f"{{{NAMESPACES['presentation']}}}"
_DECLS = " ".join(f'xmlns:{prefix}="{uri}"' for prefix, uri in NAMESPACES.items())
LIMITS = Limits()


def _content(body: str) -> bytes:
    return (
        '<?xml version="1.0" encoding="UTF-8"?>\n'
        f'<office:document-content {_DECLS} office:version="1.2">'
        f"<office:body>{body}</office:body></office:document-content>"
    ).encode()


def _package(
    media_type: str,
    content: bytes | None,
    *,
    title: str | None = None,
    extra: dict[str, bytes] | None = None,
    manifest_extra: str = "",
) -> bytes:
    """An OpenDocument zip: ``mimetype`` first and stored, as Part 3 requires (from memory)."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr(zipfile.ZipInfo("mimetype"), media_type, compress_type=zipfile.ZIP_STORED)
        if content is not None:
            archive.writestr("content.xml", content)
        title_xml = f"<dc:title>{title}</dc:title>" if title else ""
        archive.writestr(
            "meta.xml",
            f'<?xml version="1.0" encoding="UTF-8"?>\n<office:document-meta {_DECLS} '
            f'office:version="1.2"><office:meta>{title_xml}'
            "<meta:generator>hand-written test fixture</meta:generator>"
            "</office:meta></office:document-meta>",
        )
        archive.writestr(
            "META-INF/manifest.xml",
            f'<?xml version="1.0" encoding="UTF-8"?>\n<manifest:manifest {_DECLS} '
            'manifest:version="1.2">'
            f'<manifest:file-entry manifest:full-path="/" manifest:media-type="{media_type}"/>'
            '<manifest:file-entry manifest:full-path="content.xml" '
            f'manifest:media-type="text/xml">{manifest_extra}</manifest:file-entry>'
            '<manifest:file-entry manifest:full-path="meta.xml" manifest:media-type="text/xml"/>'
            "</manifest:manifest>",
        )
        for name, data in (extra or {}).items():
            archive.writestr(name, data)
    return buffer.getvalue()


def _cell(text: str) -> str:
    return (
        f'<table:table-cell office:value-type="string"><text:p>{text}</text:p></table:table-cell>'
    )


NOTICE_BODY = (
    "<office:text>"
    "<text:sequence-decls/>"
    '<text:h text:outline-level="1">Workshop Notice</text:h>'
    "<text:p>From Monday the <text:span>frame jig</text:span> in bay 2 is reserved for ECN-0412 "
    'rework.<text:note text:id="ftn1" text:note-class="footnote">'
    "<text:note-citation>1</text:note-citation><text:note-body>"
    "<text:p>ECN-0412 covers the revised dropout weld.</text:p></text:note-body></text:note>"
    " Book other jobs with the foreman.</text:p>"
    '<text:h text:outline-level="2">Safety</text:h>'
    "<text:p>Wear<text:s/>eye protection<text:tab/>at the<text:line-break/>grinder"
    '<text:s text:c="3"/>and the lathe.</text:p>'
    "<text:list>"
    "<text:list-item><text:p>Check the torque wrench calibration tag.</text:p></text:list-item>"
    "<text:list-item><text:p>Log each frame serial "
    '<text:a xlink:type="simple" xlink:href="#serials">MCW-2026-0187</text:a> in the book.'
    "</text:p></text:list-item>"
    "</text:list>"
    '<text:h text:outline-level="1">Parts on hold</text:h>'
    '<table:table table:name="Hold">'
    '<table:table-column table:number-columns-repeated="2"/>'
    f"<table:table-row>{_cell('Part')}{_cell('Reason')}</table:table-row>"
    f"<table:table-row>{_cell('HB2-114')}{_cell('awaiting <text:span>ECN-0415</text:span>')}"
    "</table:table-row>"
    "</table:table>"
    "<text:section text:name="
    '"Close"><text:p>Questions to the <text:span>works office</text:span>.</text:p></text:section>'
    "</office:text>"
)


def _notice_odt() -> bytes:
    """An invented Marrowby workshop notice: headings, a footnote, a list and a table."""
    return _package(ODT_TYPE, _content(NOTICE_BODY), title="Bay 2 Workshop Notice")


def _raw_root(data: bytes, part: str = "content.xml") -> etree._Element:
    parser = etree.XMLParser(resolve_entities=False, no_network=True, load_dtd=False)
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        return etree.fromstring(archive.read(part), parser=parser)


def _own_text(element: etree._Element) -> str:
    """itertext of an element with its notes removed (a note's text is not the paragraph's)."""
    element = copy.deepcopy(element)
    for note in list(element.iter(f"{TEXT}note")):
        parent = note.getparent()
        previous = note.getprevious()
        if note.tail:  # keep the text that follows the note
            if previous is not None:
                previous.tail = (previous.tail or "") + note.tail
            else:
                parent.text = (parent.text or "") + note.tail
        parent.remove(note)
    return normalise_text("".join(element.itertext()))


def _squeezed(text: str) -> str:
    return "".join(text.split())


def _has_ancestor(element: etree._Element, tag: str) -> bool:
    return any(parent.tag == tag for parent in element.iterancestors())


def _reference_odt(data: bytes) -> list[tuple[str, str, str | None]]:
    """(kind, text, heading path) of a raw reading of content.xml, in document order."""
    root = _raw_root(data)
    out: list[tuple[str, str, str | None]] = []
    path: list[tuple[int, str]] = []
    for element in root.iter(f"{TEXT}p", f"{TEXT}h", f"{TABLE}table-row"):
        heading = " > ".join(text for _, text in path) or None
        if element.tag == f"{TABLE}table-row":
            cells = element.iterfind("table:table-cell", NAMESPACES)
            out.append((TABLE_ROW, " | ".join(_own_text(c) for c in cells), heading))
        elif _has_ancestor(element, f"{TABLE}table-row"):
            continue
        elif _has_ancestor(element, f"{TEXT}note-body"):
            note = next(a for a in element.iterancestors() if a.tag == f"{TEXT}note")
            citation = note.findtext("text:note-citation", namespaces=NAMESPACES)
            out.append((PARAGRAPH, f"Note {citation}: {_own_text(element)}", heading))
        elif element.tag == f"{TEXT}h":
            level = int(element.get(f"{TEXT}outline-level"))
            path = [(lv, t) for lv, t in path if lv < level] + [(level, _own_text(element))]
            out.append((HEADING, _own_text(element), " > ".join(t for _, t in path)))
        else:
            kind = LIST_ITEM if _has_ancestor(element, f"{TEXT}list-item") else PARAGRAPH
            out.append((kind, _own_text(element), heading))
    return out


def test_odt_matches_a_raw_reading_of_content_xml() -> None:
    data = _notice_odt()
    result = extract_odt(data, LIMITS)
    reference = _reference_odt(data)
    assert result.media_type == ODT_TYPE
    # Reference: lxml itertext per text:p / text:h / table row (OASIS OpenDocument 1.2, Part 1);
    # tolerance: whitespace removed, since itertext drops text:s, text:tab and text:line-break.
    ours = [(s.kind, _squeezed(s.text), s.anchor.heading) for s in result.segments]
    assert ours == [(kind, _squeezed(text), heading) for kind, text, heading in reference]
    # Title: dc:title of meta.xml, read raw.
    assert result.title == _raw_root(data, "meta.xml").findtext(
        "office:meta/dc:title", namespaces=NAMESPACES
    )


def test_odt_inline_spaces_tabs_breaks_and_links() -> None:
    segments = extract_odt(_notice_odt(), LIMITS).segments
    texts = [s.text for s in segments]
    # text:s, text:tab and text:line-break each separate words (OASIS OpenDocument 1.2, Part 1,
    # 6.1.3-6.1.5; from memory); runs of whitespace are collapsed to one space.
    assert "Wear eye protection at the grinder and the lathe." in texts
    assert "Log each frame serial MCW-2026-0187 in the book." in texts
    # The footnote is appended after its paragraph, not inside it.
    first = next(i for i, t in enumerate(texts) if t.startswith("From Monday"))
    assert texts[first].endswith("ECN-0412 rework. Book other jobs with the foreman.")
    assert texts[first + 1] == "Note 1: ECN-0412 covers the revised dropout weld."


# --- spreadsheets ------------------------------------------------------------------------------


def _float(value: str, shown: str | None = None) -> str:
    return (
        f'<table:table-cell office:value-type="float" office:value="{value}">'
        f"<text:p>{shown or value}</text:p></table:table-cell>"
    )


PARTS_BODY = (
    "<office:spreadsheet>"
    '<table:table table:name="Parts">'
    '<table:table-column table:number-columns-repeated="4"/>'
    "<table:table-row>"
    f"{_cell('Part')}{_cell('Description')}{_cell('Price')}{_cell('Qty')}</table:table-row>"
    f"<table:table-row>{_cell('HB2-114')}{_cell('Headset bearing')}{_float('12.40')}"
    f"{_float('20', '20.00')}</table:table-row>"
    '<table:table-row table:number-rows-repeated="3"><table:table-cell '
    'table:number-columns-repeated="4"/></table:table-row>'
    f"<table:table-row>{_cell('CR-5521')}"
    '<table:table-cell table:number-columns-repeated="2"/>'
    f"{_float('4')}</table:table-row>"
    f'<table:table-row table:number-rows-repeated="2">{_cell("SP-0290")}'
    f"{_cell('Spoke <text:s/>stainless')}{_float('0.35')}</table:table-row>"
    # LibreOffice pads a sheet to its last row this way (from memory): never expanded.
    '<table:table-row table:number-rows-repeated="1048567"><table:table-cell '
    'table:number-columns-repeated="16384"/></table:table-row>'
    "</table:table>"
    '<table:table table:name="Frames">'
    "<table:table-header-rows>"
    f"<table:table-row>{_cell('Serial')}{_cell('ECN')}</table:table-row>"
    "</table:table-header-rows>"
    f"<table:table-row>{_cell('MCW-2026-0187')}{_cell('ECN-0412')}</table:table-row>"
    "</table:table>"
    "</office:spreadsheet>"
)


def _parts_ods() -> bytes:
    """An invented Marrowby parts list with repeated rows and columns, and a second sheet."""
    return _package(ODS_TYPE, _content(PARTS_BODY), title="Spares price list")


def _shown(cell: etree._Element) -> str:
    """The documented rendering, applied independently: office:value for floats (an integral
    float without ".0", others as repr), else the text of the cell's paragraphs."""
    if cell.get(f"{OFFICE}value-type") == "float":
        number = float(cell.get(f"{OFFICE}value"))
        return str(int(number)) if number.is_integer() else repr(number)
    return normalise_text(" ".join("".join(p.itertext()) for p in cell.iter(f"{TEXT}p")))


def _reference_ods(data: bytes, max_rows: int = 50) -> list[tuple[str, str, int]]:
    """(text, sheet, row number) per data row, repeats expanded (a small fixture only)."""
    out = []
    for table in _raw_root(data).iter(f"{TABLE}table"):
        header = None
        number = 0
        for row in table.iter(f"{TABLE}table-row"):
            repeat = int(row.get(f"{TABLE}number-rows-repeated", "1"))
            values = []
            for cell in row.iterfind("table:table-cell", NAMESPACES):
                values += [_shown(cell)] * int(cell.get(f"{TABLE}number-columns-repeated", "1"))
            for _ in range(min(repeat, max_rows)):
                number += 1
                if not any(values):
                    continue
                if header is None:
                    header = values
                    continue
                pairs = [f"{header[i]}: {v}" for i, v in enumerate(values) if v]
                out.append((", ".join(pairs), table.get(f"{TABLE}name"), number))
    return out


def test_ods_rows_match_a_raw_reading_with_repeats() -> None:
    data = _parts_ods()
    result = extract_ods(data, LIMITS)
    assert result.media_type == ODS_TYPE
    assert {s.kind for s in result.segments} == {TABLE_ROW}
    # Reference: raw lxml read of table:table-row / table:table-cell with repeats expanded
    # (OASIS OpenDocument 1.2, Part 1, 9.1; from memory); tolerance: exact strings and numbers.
    ours = [(s.text, s.anchor.heading, s.anchor.line_start) for s in result.segments]
    assert ours == _reference_ods(data)
    assert all(s.anchor.line_start == s.anchor.line_end for s in result.segments)
    assert "Part: HB2-114, Description: Headset bearing, Price: 12.4, Qty: 20" in [
        s.text for s in result.segments
    ]
    # The padding after the last row is dropped silently: nothing follows it.
    assert result.warnings == ()
    assert result.title == "Spares price list"


def test_ods_million_repeated_empty_rows_are_bounded_with_a_warning() -> None:
    body = (
        '<office:spreadsheet><table:table table:name="Parts">'
        f"<table:table-row>{_cell('Part')}{_cell('Price')}</table:table-row>"
        f"<table:table-row>{_cell('HB2-114')}{_float('12.4')}</table:table-row>"
        '<table:table-row table:number-rows-repeated="1000000"><table:table-cell '
        'table:number-columns-repeated="16384"/></table:table-row>'
        f"<table:table-row>{_cell('HIDDEN-1')}{_float('1')}</table:table-row>"
        "</table:table></office:spreadsheet>"
    )
    result = extract_ods(_package(ODS_TYPE, _content(body)), LIMITS)
    assert [s.text for s in result.segments] == ["Part: HB2-114, Price: 12.4"]
    # The cap of 10,000 empty rows in a row is the one the .xlsx reader uses (common practice).
    assert len(result.warnings) == 1
    assert "sheet 'Parts'" in result.warnings[0] and "10,000 empty rows" in result.warnings[0]


def test_ods_row_cap_stops_a_repeated_data_row() -> None:
    body = (
        '<office:spreadsheet><table:table table:name="Parts">'
        f"<table:table-row>{_cell('Part')}</table:table-row>"
        f'<table:table-row table:number-rows-repeated="1000000">{_cell("HB2-114")}'
        "</table:table-row></table:table></office:spreadsheet>"
    )
    result = extract_ods(_package(ODS_TYPE, _content(body)), LIMITS, max_rows=50)
    assert len(result.segments) == 49  # the header is one of the 50 rows read
    assert "limit of 50 rows" in result.warnings[0]


# --- presentations -----------------------------------------------------------------------------


def _frame(cls: str, paragraphs: str) -> str:
    return (
        f'<draw:frame presentation:class="{cls}" svg:x="1cm" svg:y="1cm">'
        f"<draw:text-box>{paragraphs}</draw:text-box></draw:frame>"
    )


def _notes(text: str) -> str:
    return (
        "<presentation:notes><draw:page-thumbnail/>"
        f"{_frame('notes', f'<text:p>{text}</text:p>')}</presentation:notes>"
    )


DECK_BODY = (
    "<office:presentation>"
    '<draw:page draw:name="page1">'
    f"{_frame('title', '<text:p>Welcome to Marrowby Cycle Works</text:p>')}"
    f"{_frame('subtitle', '<text:p>New starter induction</text:p>')}"
    f"{_frame('page-number', '<text:p>1</text:p>')}"
    f"{_notes('Hand out the site map and the <text:span>locker key</text:span>.')}"
    "</draw:page>"
    '<draw:page draw:name="page2">'
    f"{_frame('title', '<text:p>Workshop rules</text:p>')}"
    + _frame(
        "outline",
        "<text:list><text:list-item><text:p>Eye protection at every grinder.</text:p>"
        "</text:list-item><text:list-item><text:p>Frame serials logged on the"
        "<text:s/>shift sheet.</text:p></text:list-item></text:list>",
    )
    + '<draw:custom-shape svg:x="2cm" svg:y="9cm"><text:p>Fire exit: bay 4</text:p>'
    "</draw:custom-shape>"
    f"{_notes('Walk the fire route with each starter.')}"
    "</draw:page>"
    '<draw:page draw:name="page3">'
    + _frame("", "<text:p>Questions go to the works office.</text:p>")
    + "</draw:page>"
    "</office:presentation>"
)


def _deck_odp() -> bytes:
    """An invented Marrowby induction deck: titles, a list, a shape, notes, a page number."""
    return _package(ODP_TYPE, _content(DECK_BODY), title="Induction")


def _reference_odp(data: bytes) -> list[tuple[str, str, int, str | None]]:
    out = []
    for number, page in enumerate(_raw_root(data).iter(f"{{{NAMESPACES['draw']}}}page"), 1):
        title = None
        texts: list[tuple[str, str]] = []
        notes: list[str] = []
        for p in page.iter(f"{TEXT}p"):
            classes = {a.get(f"{PRESENTATION}class") for a in p.iterancestors()}
            text = _own_text(p)
            if _has_ancestor(p, f"{PRESENTATION}notes"):
                notes.append("Notes: " + text)
            elif "title" in classes:
                title = text
            elif not classes & {"page-number", "footer", "date-time"}:
                kind = LIST_ITEM if _has_ancestor(p, f"{TEXT}list-item") else PARAGRAPH
                texts.append((kind, text))
        if title:
            out.append((HEADING, title, number, title))
        out += [(kind, text, number, title) for kind, text in texts]
        out += [(PARAGRAPH, text, number, title) for text in notes]
    return out


def test_odp_matches_a_raw_reading_of_pages_and_notes() -> None:
    data = _deck_odp()
    result = extract_odp(data, LIMITS)
    assert result.media_type == ODP_TYPE
    # Reference: lxml itertext per text:p of each draw:page, title frame first, notes last
    # (OASIS OpenDocument 1.2, Part 1, 10.2 and 16.x; from memory); tolerance: whitespace removed.
    ours = [(s.kind, _squeezed(s.text), s.anchor.page, s.anchor.heading) for s in result.segments]
    reference = [(k, _squeezed(t), page, h) for k, t, page, h in _reference_odp(data)]
    assert ours == reference
    assert "Frame serials logged on the shift sheet." in [s.text for s in result.segments]
    assert result.segments[-1].anchor.heading is None  # page 3 has no title frame
    assert result.title == "Induction"


# --- bad input ---------------------------------------------------------------------------------


def test_not_a_zip_is_corrupt() -> None:
    with pytest.raises(CorruptDocument, match="not an OpenDocument text"):
        extract_odt(b"Marrowby Cycle Works workshop notice, saved as plain text\n", LIMITS)


def test_zip_bomb_part_is_refused() -> None:
    zeros = b"\0" * (50 * 1024 * 1024)
    data = _package(ODT_TYPE, _content(NOTICE_BODY), extra={"Pictures/pad.bin": zeros})
    del zeros
    with pytest.raises(DocumentTooLarge, match="zip bomb"):
        extract_odt(data, LIMITS)


def test_doctype_with_entity_in_content_is_refused_unread() -> None:
    content = (
        b'<?xml version="1.0"?>\n<!DOCTYPE office:document-content [<!ENTITY lol "lol">]>\n'
        + _content("<office:text><text:p>&lol;</text:p></office:text>").split(b"\n", 1)[1]
    )
    with pytest.raises(CorruptDocument, match="DOCTYPE or entity"):
        extract_odt(_package(ODT_TYPE, content), LIMITS)


def test_missing_content_part_is_corrupt() -> None:
    with pytest.raises(CorruptDocument, match="content.xml"):
        extract_ods(_package(ODS_TYPE, None), LIMITS)


def test_malformed_content_is_corrupt() -> None:
    content = _content("<office:text><text:p>unclosed</office:text>")
    with pytest.raises(CorruptDocument, match="not well-formed"):
        extract_odt(_package(ODT_TYPE, content), LIMITS)


def test_wrong_body_or_mimetype() -> None:
    with pytest.raises(UnsupportedDocument, match="mimetype"):
        extract_odt(_package(ODS_TYPE, _content(PARTS_BODY)), LIMITS)
    # The right mimetype but a spreadsheet body: no office:text.
    with pytest.raises(CorruptDocument, match="office:text"):
        extract_odt(_package(ODT_TYPE, _content(PARTS_BODY)), LIMITS)


def test_encrypted_package_is_refused() -> None:
    data = _package(
        ODT_TYPE,
        b"\x93\x11 not xml: encrypted bytes",
        manifest_extra='<manifest:encryption-data manifest:checksum-type="SHA1/1K"/>',
    )
    with pytest.raises(EncryptedDocument):
        extract_odt(data, LIMITS)


@pytest.mark.parametrize(
    ("extract", "media_type", "body"),
    [
        (extract_odt, ODT_TYPE, "<office:text><text:p> <text:s/></text:p></office:text>"),
        (
            extract_ods,
            ODS_TYPE,
            '<office:spreadsheet><table:table table:name="A"/></office:spreadsheet>',
        ),
        (extract_odp, ODP_TYPE, "<office:presentation><draw:page/></office:presentation>"),
    ],
)
def test_no_text_is_empty(extract, media_type, body) -> None:  # noqa: ANN001
    with pytest.raises(EmptyDocument):
        extract(_package(media_type, _content(body)), LIMITS)
