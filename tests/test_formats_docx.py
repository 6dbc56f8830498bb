"""Word extraction checked against a plain zipfile + ElementTree reading and against docx2txt."""

from __future__ import annotations

import io
import xml.etree.ElementTree as ElementTree
import zipfile

import docx
import docx2txt
from docx.oxml import OxmlElement, parse_xml
from docx.oxml.ns import qn

from pipeline.formats import extract
from pipeline.formats.text import normalise_text
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW
from tests.formats_support import word_similarity

# WordprocessingML main namespace (ECMA-376 Part 1, 17; from memory).
W = "{http://schemas.openxmlformats.org/wordprocessingml/2006/main}"
# Markup compatibility namespace (ECMA-376 Part 3; from memory).
MC = "{http://schemas.openxmlformats.org/markup-compatibility/2006}"


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
    """Body paragraphs and table rows read straight from word/document.xml (no python-docx).

    Follows ECMA-376 Part 1 (from memory): a block-level content control w:sdt holds its blocks
    in w:sdtContent (17.5.2); a text box's blocks sit in w:txbxContent (17.17.1), read here right
    after the paragraph whose run anchors it; mc:Fallback repeats an mc:Choice (Part 3) and is
    skipped.
    """
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        root = ElementTree.fromstring(archive.read("word/document.xml"))
    return [unit for unit in _block_units(root.find(f"{W}body")) if unit]


def _block_units(container: ElementTree.Element) -> list[str]:
    units: list[str] = []
    for block in container:
        if block.tag == f"{W}p":
            units.extend(_paragraph_units(block))
        elif block.tag == f"{W}sdt":
            units.extend(_block_units(block.find(f"{W}sdtContent")))
        elif block.tag == f"{W}tbl":
            for row in block.iter(f"{W}tr"):
                cells = [
                    "".join(t.text or "" for t in cell.iter(f"{W}t"))
                    for cell in row.iter(f"{W}tc")
                ]
                units.append(" | ".join(normalise_text(cell) for cell in cells))
    return units


def _paragraph_units(paragraph: ElementTree.Element) -> list[str]:
    own_text: list[str] = []
    text_boxes: list[ElementTree.Element] = []

    def visit(element: ElementTree.Element) -> None:
        for child in element:
            if child.tag == f"{W}t":
                own_text.append(child.text or "")
            elif child.tag == f"{W}txbxContent":
                text_boxes.append(child)
            elif child.tag != f"{MC}Fallback":
                visit(child)

    visit(paragraph)
    units = [normalise_text("".join(own_text))]
    for text_box in text_boxes:
        units.extend(_block_units(text_box))
    return units


def _wrap_in_content_control(elements: list, alias: str) -> None:
    """Move ``elements`` (adjacent siblings) into a new w:sdt at their place (ECMA-376 17.5.2)."""
    control = OxmlElement("w:sdt")
    properties = OxmlElement("w:sdtPr")
    name = OxmlElement("w:alias")
    name.set(qn("w:val"), alias)
    properties.append(name)
    control.append(properties)
    content = OxmlElement("w:sdtContent")
    control.append(content)
    elements[0].addprevious(control)
    for element in elements:
        content.append(element)  # lxml moves the element


def _content_control_docx() -> bytes:
    """A Marrowby procedure whose middle section (heading, paragraph, table) is a content control.

    The table sits in a second content control nested in the first, and a later table has a
    content control inside one of its cells.
    """
    document = docx.Document()
    document.add_paragraph("Collect the frame from the paint shop before the evening shift.")
    heading = document.add_heading("Torque settings", level=1)
    paragraph = document.add_paragraph("Use the click wrench set to the values below.")
    table = document.add_table(rows=2, cols=2)
    for row, values in zip(
        table.rows, [("Bolt", "Torque"), ("Stem cap", "5 Nm")], strict=True
    ):
        for cell, value in zip(row.cells, values, strict=True):
            cell.text = value
    document.add_paragraph("Record each value on the inspection card.")
    checks = document.add_table(rows=2, cols=2)
    for row, values in zip(
        checks.rows, [("Check", "Result"), ("Headset play", "none found")], strict=True
    ):
        for cell, value in zip(row.cells, values, strict=True):
            cell.text = value
    _wrap_in_content_control([table._tbl], "Torque table")
    _wrap_in_content_control(
        [heading._p, paragraph._p, table._tbl.getparent().getparent()], "Torque section"
    )
    result_cell = checks.cell(1, 1)
    _wrap_in_content_control(list(result_cell._tc.iterchildren(qn("w:p"))), "Result")
    buffer = io.BytesIO()
    document.save(buffer)
    return buffer.getvalue()


_TEXT_BOX_NAMESPACES = (
    'xmlns:w="http://schemas.openxmlformats.org/wordprocessingml/2006/main" '
    'xmlns:mc="http://schemas.openxmlformats.org/markup-compatibility/2006" '
    'xmlns:wp="http://schemas.openxmlformats.org/drawingml/2006/wordprocessingDrawing" '
    'xmlns:a="http://schemas.openxmlformats.org/drawingml/2006/main" '
    'xmlns:wps="http://schemas.microsoft.com/office/word/2010/wordprocessingShape" '
    'xmlns:v="urn:schemas-microsoft-com:vml"'
)


def _text_box_content(paragraphs: list[str]) -> str:
    runs = "".join(f"<w:p><w:r><w:t>{text}</w:t></w:r></w:p>" for text in paragraphs)
    return f"<w:txbxContent>{runs}</w:txbxContent>"


def _vml_text_box_run(paragraphs: list[str]) -> str:
    """A legacy VML text box, as older Word versions write it."""
    return (
        "<w:r><w:pict><v:shape><v:textbox>"
        f"{_text_box_content(paragraphs)}"
        "</v:textbox></v:shape></w:pict></w:r>"
    )


def _drawing_text_box_run(paragraphs: list[str]) -> str:
    """A DrawingML text box with the VML fallback copy current Word versions write beside it."""
    return (
        '<w:r><mc:AlternateContent><mc:Choice Requires="wps"><w:drawing><wp:inline>'
        '<wp:docPr id="1" name="Note"/><a:graphic><a:graphicData '
        'uri="http://schemas.microsoft.com/office/word/2010/wordprocessingShape">'
        f"<wps:wsp><wps:txbx>{_text_box_content(paragraphs)}</wps:txbx></wps:wsp>"
        "</a:graphicData></a:graphic></wp:inline></w:drawing></mc:Choice><mc:Fallback>"
        f"{_vml_text_box_run(paragraphs)[5:-6]}"  # the w:pict, without its w:r wrapper
        "</mc:Fallback></mc:AlternateContent></w:r>"
    )


def _text_box_docx(make_run) -> bytes:
    """A paragraph anchoring a two-paragraph text box, between ordinary paragraphs."""
    document = docx.Document()
    document.add_heading("Spoke tension", level=1)
    document.add_paragraph("True the wheel on the stand.")
    anchor = document.add_paragraph("Pluck each spoke and compare the note.")
    note = ["Workshop tip: work in quarter turns.", "Never exceed the rim maker's limit."]
    anchor._p.append(parse_xml(make_run(note).replace("<w:r>", f"<w:r {_TEXT_BOX_NAMESPACES}>", 1)))
    document.add_paragraph("Stress-relieve the spokes by squeezing pairs.")
    buffer = io.BytesIO()
    document.save(buffer)
    return buffer.getvalue()


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


def test_content_control_blocks_are_read_in_document_order():
    data = _content_control_docx()
    texts = [segment.text for segment in extract("torque.docx", data).segments]
    # Reference: the w:t runs read with zipfile + xml.etree, looking into w:sdt > w:sdtContent
    # (ECMA-376 Part 1, 17.5.2; from memory).
    assert texts == _xml_units(data)
    collect = texts.index("Collect the frame from the paint shop before the evening shift.")
    record = texts.index("Record each value on the inspection card.")
    assert texts[collect + 1 : record] == [
        "Torque settings",
        "Use the click wrench set to the values below.",
        "Bolt | Torque",
        "Stem cap | 5 Nm",
    ]


def test_content_control_blocks_keep_heading_paragraph_and_table_handling():
    segments = extract("torque.docx", _content_control_docx()).segments
    by_text = {segment.text: segment for segment in segments}
    assert by_text["Torque settings"].kind == HEADING
    assert by_text["Use the click wrench set to the values below."].kind == PARAGRAPH
    assert by_text["Stem cap | 5 Nm"].kind == TABLE_ROW
    # The heading inside the control governs the text after the control ends.
    assert by_text["Record each value on the inspection card."].anchor.heading == "Torque settings"


def test_content_control_inside_a_table_cell_is_read():
    data = _content_control_docx()
    texts = [segment.text for segment in extract("torque.docx", data).segments]
    assert texts[-1] == "Headset play | none found"
    # Reference: the w:t runs of the w:tc, read with zipfile + xml.etree.
    assert texts[-1] == _xml_units(data)[-1]


def test_content_control_text_matches_docx2txt(tmp_path):
    data = _content_control_docx()
    path = tmp_path / "torque.docx"
    path.write_bytes(data)
    ours = " ".join(segment.text for segment in extract(path.name, data).segments)
    # Reference: docx2txt, which reads every w:t of document.xml whatever wraps it.
    assert word_similarity(ours, docx2txt.process(str(path))) >= 0.95


def test_text_box_paragraphs_follow_their_anchor_paragraph_once():
    data = _text_box_docx(_drawing_text_box_run)
    segments = extract("spokes.docx", data).segments
    texts = [segment.text for segment in segments]
    # Reference: zipfile + xml.etree reading of w:txbxContent after its anchor, with the
    # mc:Fallback copy skipped (ECMA-376 Part 1, 17.17.1 and Part 3; from memory).
    assert texts == _xml_units(data)
    anchor = texts.index("Pluck each spoke and compare the note.")
    assert texts[anchor + 1 : anchor + 3] == [
        "Workshop tip: work in quarter turns.",
        "Never exceed the rim maker's limit.",
    ]
    assert texts.count("Workshop tip: work in quarter turns.") == 1
    note = segments[anchor + 1]
    assert (note.kind, note.anchor.heading) == (PARAGRAPH, "Spoke tension")


def test_legacy_text_box_matches_docx2txt(tmp_path):
    data = _text_box_docx(_vml_text_box_run)
    path = tmp_path / "spokes.docx"
    path.write_bytes(data)
    texts = [segment.text for segment in extract(path.name, data).segments]
    # Reference: zipfile + xml.etree reading (ECMA-376 Part 1, 17.17.1; from memory).
    assert texts == _xml_units(data)
    # Reference: docx2txt reads the VML text box's w:t runs where they sit in the paragraph.
    assert word_similarity(" ".join(texts), docx2txt.process(str(path))) >= 0.95
