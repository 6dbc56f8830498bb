"""Word extraction checked against a plain zipfile + ElementTree reading and against docx2txt."""

from __future__ import annotations

import io
import xml.etree.ElementTree as ElementTree
import zipfile

import docx
import docx2txt
from docx.oxml import OxmlElement
from docx.oxml.ns import qn

from pipeline.formats import extract
from pipeline.formats.text import normalise_text
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW
from tests.formats_support import word_similarity

# WordprocessingML main namespace (ECMA-376 Part 1, 17; from memory).
W = "{http://schemas.openxmlformats.org/wordprocessingml/2006/main}"


def _procedure_docx() -> bytes:
    """An invented Marrowby assembly procedure: title, headings, lists, a table between text."""
    document = docx.Document()
    document.add_heading("Wheel Build Procedure", level=0)  # the "Title" style
    document.add_heading("Procedure", level=1)
    document.add_paragraph("Lay out the hub, rim and spokes on the clean bench before lacing.")
    table = document.add_table(rows=3, cols=3)
    for row, values in zip(
        table.rows,
        [("Part", "Count", "Note"), ("Spoke", "32", "stainless"), ("Nipple", "32", "brass")],
        strict=True,
    ):
        for cell, value in zip(row.cells, values, strict=True):
            cell.text = value
    document.add_paragraph("Check the spoke count against the table before you start.")
    document.add_heading("Loading order", level=2)
    document.add_paragraph("Insert the drive-side spokes first.", style="List Number")
    document.add_paragraph("Then the non-drive side, heads outward.", style="List Number")
    document.add_heading("Checks", level=1)
    document.add_paragraph("Spin the wheel and watch the brake track.", style="List Bullet")
    document.add_paragraph("Sign the inspection card.")
    buffer = io.BytesIO()
    document.save(buffer)
    return buffer.getvalue()


def _xml_units(data: bytes) -> list[str]:
    """Body paragraphs and table rows read straight from word/document.xml (no python-docx)."""
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        root = ElementTree.fromstring(archive.read("word/document.xml"))
    units: list[str] = []
    for block in root.find(f"{W}body"):
        if block.tag == f"{W}p":
            units.append(normalise_text("".join(t.text or "" for t in block.iter(f"{W}t"))))
        elif block.tag == f"{W}tbl":
            for row in block.iter(f"{W}tr"):
                cells = [
                    "".join(t.text or "" for t in cell.iter(f"{W}t"))
                    for cell in row.iter(f"{W}tc")
                ]
                units.append(" | ".join(normalise_text(cell) for cell in cells))
    return [unit for unit in units if unit]


def test_text_matches_a_plain_xml_reading_of_the_runs():
    data = _procedure_docx()
    # Reference: the w:t runs of each body w:p / w:tr, read with zipfile + xml.etree.
    assert [segment.text for segment in extract("wheel.docx", data).segments] == _xml_units(data)


def test_text_matches_docx2txt(tmp_path):
    data = _procedure_docx()
    path = tmp_path / "wheel.docx"
    path.write_bytes(data)
    ours = " ".join(segment.text for segment in extract(path.name, data).segments)
    # Reference: docx2txt, an independent .docx text reader; SequenceMatcher over word lists.
    assert word_similarity(ours, docx2txt.process(str(path))) >= 0.95


def test_tables_appear_in_document_order():
    segments = extract("wheel.docx", _procedure_docx()).segments
    texts = [segment.text for segment in segments]
    lay_out = texts.index("Lay out the hub, rim and spokes on the clean bench before lacing.")
    check = texts.index("Check the spoke count against the table before you start.")
    assert texts[lay_out + 1 : check] == [
        "Part | Count | Note",
        "Spoke | 32 | stainless",
        "Nipple | 32 | brass",
    ]
    assert all(segment.kind == TABLE_ROW for segment in segments[lay_out + 1 : check])


def test_headings_build_a_heading_path():
    segments = extract("wheel.docx", _procedure_docx()).segments
    headings = {segment.text: segment.anchor.heading for segment in segments}
    assert headings["Loading order"] == "Procedure > Loading order"
    assert headings["Insert the drive-side spokes first."] == "Procedure > Loading order"
    assert headings["Spin the wheel and watch the brake track."] == "Checks"
    assert headings["Spoke | 32 | stainless"] == "Procedure"
    headings_in_order = [s.text for s in segments if s.kind == HEADING]
    assert headings_in_order == ["Procedure", "Loading order", "Checks"]


def test_list_paragraphs_are_list_items():
    segments = extract("wheel.docx", _procedure_docx()).segments
    assert [s.text for s in segments if s.kind == LIST_ITEM] == [
        "Insert the drive-side spokes first.",
        "Then the non-drive side, heads outward.",
        "Spin the wheel and watch the brake track.",
    ]
    assert {s.kind for s in segments if s.text == "Sign the inspection card."} == {PARAGRAPH}


def test_direct_numbering_makes_a_list_item_whatever_the_style():
    document = docx.Document()
    paragraph = document.add_paragraph("Torque the axle nuts to the card value.")
    numbering = OxmlElement("w:numPr")
    for tag, value in (("w:ilvl", "0"), ("w:numId", "1")):
        element = OxmlElement(tag)
        element.set(qn("w:val"), value)
        numbering.append(element)
    paragraph._p.get_or_add_pPr().append(numbering)
    buffer = io.BytesIO()
    document.save(buffer)
    (segment,) = extract("axle.docx", buffer.getvalue()).segments
    assert segment.kind == LIST_ITEM


def test_title_from_title_style_and_from_core_properties():
    assert extract("wheel.docx", _procedure_docx()).title == "Wheel Build Procedure"
    document = docx.Document()
    document.core_properties.title = "Frame Alignment Notes"
    document.add_paragraph("Measure the rear triangle with the alignment gauge.")
    buffer = io.BytesIO()
    document.save(buffer)
    assert extract("frame.docx", buffer.getvalue()).title == "Frame Alignment Notes"


def test_merged_cells_appear_once_in_their_row():
    document = docx.Document()
    table = document.add_table(rows=2, cols=3)
    merged = table.cell(0, 0).merge(table.cell(0, 1))
    merged.text = "Frame and fork"
    table.cell(0, 2).text = "ten years"
    for cell, value in zip(table.rows[1].cells, ("Paint", "Decals", "two years"), strict=True):
        cell.text = value
    buffer = io.BytesIO()
    document.save(buffer)
    rows = [segment.text for segment in extract("warranty.docx", buffer.getvalue()).segments]
    # python-docx repeats a merged cell for each grid column it spans; the XML holds it once.
    assert rows == _xml_units(buffer.getvalue())
    assert rows == ["Frame and fork | ten years", "Paint | Decals | two years"]
