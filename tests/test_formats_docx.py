"""Word extraction checked against a plain zipfile + ElementTree reading and against docx2txt."""

from __future__ import annotations

import io
import xml.etree.ElementTree as ElementTree
import zipfile

import docx
import docx2txt
import pytest
from docx.oxml import OxmlElement, parse_xml
from docx.oxml.ns import nsdecls, qn

from pipeline.errors import CorruptDocument
from pipeline.formats import extract
from pipeline.formats.text import normalise_text
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW, Limits
from tests.conftest import SAMPLE_CORPUS
from tests.support.formats import comparable_words, word_similarity

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
    skipped. Each paragraph's own text is ``_reader_text``.
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
                    " ".join(_reader_text(p)[0] for p in cell.iter(f"{W}p"))
                    for cell in row.iter(f"{W}tc")
                ]
                units.append(" | ".join(normalise_text(cell) for cell in cells))
    return units


# What a reader of the final document sees in a paragraph, per ECMA-376 Part 1 (all from memory).
# Not shown: tracked deletions w:del and the source of a move w:moveFrom (17.13.5), the settings
# of a content control w:sdtPr / w:sdtEndPr (17.5.2), the phonetic guide w:rt of w:ruby
# (17.3.3.25), paragraph properties w:pPr (17.3.1), and the VML copy in mc:Fallback (Part 3).
# Deleted text w:delText (17.3.3.7) and field codes w:instrText (17.16.23) are not w:t, so they
# are never collected. Everything else (w:ins, w:moveTo, w:hyperlink, w:fldSimple, w:smartTag,
# w:customXml, w:sdtContent) is entered and its runs read where they stand.
_NOT_SHOWN = {f"{W}{name}" for name in ("del", "moveFrom", "sdtPr", "sdtEndPr", "rt", "pPr")} | {
    f"{MC}Fallback"
}


def _symbol(element: ElementTree.Element) -> str:
    # w:char is a hex code; U+F0xx addresses a glyph of a symbol font, not a Unicode character.
    code = int(element.get(f"{W}char"), 16)
    return "" if 0xF000 <= code <= 0xF0FF else chr(code)


# Run content that shows as characters. w:softHyphen (17.3.3.29) shows only at a line end.
_RUN_CONTENT = {
    f"{W}t": lambda element: element.text or "",  # 17.3.3.31
    f"{W}tab": lambda element: "\t",  # 17.3.3.32
    f"{W}ptab": lambda element: "\t",  # 17.3.3.23
    f"{W}br": lambda element: "\n",  # 17.3.3.1
    f"{W}cr": lambda element: "\n",  # 17.3.3.4
    f"{W}noBreakHyphen": lambda element: "-",  # 17.3.3.18
    f"{W}sym": _symbol,  # 17.3.3.30
}


def _reader_text(paragraph: ElementTree.Element) -> tuple[str, list[ElementTree.Element]]:
    """A w:p's visible text, and the w:txbxContent elements it anchors, in document order."""
    pieces: list[str] = []
    text_boxes: list[ElementTree.Element] = []
    # One flag per open complex field: False in its code, True in its result (fldChar begin /
    # separate / end, 17.16.18). Text shows only when all open fields are in their results.
    open_fields: list[bool] = []

    def visit(element: ElementTree.Element) -> None:
        for child in element:
            tag = child.tag
            if tag in _NOT_SHOWN:
                continue
            if tag == f"{W}txbxContent":
                text_boxes.append(child)
            elif tag == f"{W}fldChar":
                kind = child.get(f"{W}fldCharType")
                if kind == "begin":
                    open_fields.append(False)
                elif kind == "separate" and open_fields:
                    open_fields[-1] = True
                elif kind == "end" and open_fields:
                    open_fields.pop()
            elif tag in _RUN_CONTENT:
                if all(open_fields):
                    pieces.append(_RUN_CONTENT[tag](child))
            else:
                visit(child)

    visit(paragraph)
    return "".join(pieces), text_boxes


def _paragraph_units(paragraph: ElementTree.Element) -> list[str]:
    own_text, text_boxes = _reader_text(paragraph)
    units = [normalise_text(own_text)]
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
    for row, values in zip(table.rows, [("Bolt", "Torque"), ("Stem cap", "5 Nm")], strict=True):
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


# ---------------------------------------------------------------- text inside the paragraph

_REVISION = 'w:author="Marrowby QA" w:date="2024-03-04T09:00:00Z"'


def _run(text: str) -> str:
    return f'<w:r><w:t xml:space="preserve">{text}</w:t></w:r>'


def _field_char(kind: str) -> str:
    return f'<w:r><w:fldChar w:fldCharType="{kind}"/></w:r>'


def _complex_field(code: str, result: str) -> str:
    """fldChar begin / instrText / separate / result / end (ECMA-376 Part 1, 17.16.18)."""
    return (
        _field_char("begin")
        + f'<w:r><w:instrText xml:space="preserve">{code}</w:instrText></w:r>'
        + _field_char("separate")
        + result
        + _field_char("end")
    )


def _append_inline(paragraph, markup: str) -> None:
    """Append WordprocessingML paragraph content, given as markup, to a python-docx paragraph."""
    holder = parse_xml(f"<w:holder {nsdecls('w')}>{markup}</w:holder>")
    for child in list(holder):
        paragraph._p.append(child)  # lxml moves the element


def _save(document) -> bytes:
    buffer = io.BytesIO()
    document.save(buffer)
    return buffer.getvalue()


# Paragraph content built with python-docx, then edited with lxml, for the final-inspection card
# of an invented Marrowby frame; each with the text a reader of the final document sees.
# Every construct here is read the same way by docx2txt (see test below).
_COMPARABLE_PARAGRAPHS = [
    (  # tracked insertion, ECMA-376 Part 1, 17.13.5 (from memory)
        "Torque the stem cap to ",
        f'<w:ins w:id="1" {_REVISION}>{_run("5 Nm")}</w:ins>{_run(" before the test ride.")}',
        "Torque the stem cap to 5 Nm before the test ride.",
    ),
    (  # tracked deletion: w:del > w:r > w:delText, and a replacement beside it
        "Fit ",
        f'<w:del w:id="2" {_REVISION}><w:r><w:delText>four</w:delText></w:r></w:del>'
        f'<w:ins w:id="3" {_REVISION}>{_run("six")}</w:ins>{_run(" bottle cage bolts.")}',
        "Fit six bottle cage bolts.",
    ),
    (  # inline content control, 17.5.2: only w:sdtContent is shown
        "Frame number: ",
        '<w:sdt><w:sdtPr><w:alias w:val="Frame number"/><w:tag w:val="frame"/></w:sdtPr>'
        f"<w:sdtContent>{_run('MCW-2291')}</w:sdtContent></w:sdt>" + _run(", painted slate grey."),
        "Frame number: MCW-2291, painted slate grey.",
    ),
    (  # internal hyperlink, 17.16.22, holding a tracked insertion
        "See the ",
        f'<w:hyperlink w:anchor="torque_table">{_run("torque ")}'
        f'<w:ins w:id="4" {_REVISION}>{_run("table")}</w:ins></w:hyperlink>'
        + _run(" for every bolt."),
        "See the torque table for every bolt.",
    ),
    (  # simple field, 17.16.19: its runs are the result
        "This card is page ",
        f'<w:fldSimple w:instr=" PAGE ">{_run("3")}</w:fldSimple>{_run(" of the build file.")}',
        "This card is page 3 of the build file.",
    ),
    (  # complex field, 17.16.18: the code (w:instrText) is dropped, the result kept
        "Checked on ",
        _complex_field(' DATE \\@ "d MMMM yyyy" ', _run("4 March 2024"))
        + _run(" by the bench lead."),
        "Checked on 4 March 2024 by the bench lead.",
    ),
    (  # smart tag and run-level custom XML, 17.5.1: their runs are shown
        "Ship to ",
        '<w:smartTag w:uri="urn:marrowby:places" w:element="place"><w:smartTagPr>'
        '<w:attr w:name="kind" w:val="town"/></w:smartTagPr>'
        f"{_run('Upper Marrowby')}</w:smartTag>{_run(' by the ')}"
        f'<w:customXml w:element="carrier">{_run("Tuesday van")}</w:customXml>{_run(".")}',
        "Ship to Upper Marrowby by the Tuesday van.",
    ),
    (  # destination of a tracked move, 17.13.5
        "Pack the ",
        '<w:moveToRangeStart w:id="5" w:name="move1" w:author="Marrowby QA"/>'
        f'<w:moveTo w:id="6" {_REVISION}>{_run("spare spokes ")}</w:moveTo>'
        '<w:moveToRangeEnd w:id="5"/>' + _run("with the wheel."),
        "Pack the spare spokes with the wheel.",
    ),
    (  # tab, line break and soft hyphen, 17.3.3
        "Bolt",
        "<w:r><w:tab/><w:t>Torque</w:t><w:br/><w:t>Stem cap</w:t><w:cr/><w:t>Re</w:t>"
        "<w:softHyphen/><w:t>true</w:t></w:r>",
        "Bolt Torque Stem cap Retrue",
    ),
]


def _inspection_card_docx() -> bytes:
    """The comparable paragraphs, plus a heading, a list item and a table row with revisions."""
    document = docx.Document()
    heading = document.add_heading("Brake ", level=1)
    _append_inline(heading, f'<w:ins w:id="20" {_REVISION}>{_run("Service ")}</w:ins>')
    _append_inline(heading, _run("Checks"))
    for start, markup, _ in _COMPARABLE_PARAGRAPHS:
        _append_inline(document.add_paragraph(start), markup)
    item = document.add_paragraph("Replace ", style="List Bullet")
    _append_inline(
        item,
        f'<w:del w:id="21" {_REVISION}><w:r><w:delText>both </w:delText></w:r></w:del>'
        f'<w:ins w:id="22" {_REVISION}>{_run("the worn ")}</w:ins>{_run("pads.")}',
    )
    table = document.add_table(rows=1, cols=2)
    name, value = table.rows[0].cells
    name.text = "Pad depth"
    _append_inline(name.paragraphs[0], f'<w:ins w:id="23" {_REVISION}>{_run(" (mm)")}</w:ins>')
    _append_inline(value.paragraphs[0], _complex_field(" = 3 / 2 ", _run("1.5")))
    return _save(document)


_CARD_TEXTS = [
    "Brake Service Checks",
    *(expected for _, _, expected in _COMPARABLE_PARAGRAPHS),
    "Replace the worn pads.",
    "Pad depth (mm) | 1.5",
]


def test_revisions_fields_and_inline_controls_read_as_the_final_document_shows():
    data = _inspection_card_docx()
    texts = [segment.text for segment in extract("card.docx", data).segments]
    assert texts == _CARD_TEXTS
    # Reference: zipfile + xml.etree reading per ECMA-376 Part 1 (``_reader_text``; from memory).
    assert texts == _xml_units(data)


def test_revised_heading_list_item_and_cell_keep_their_kind_and_path():
    segments = extract("card.docx", _inspection_card_docx()).segments
    by_text = {segment.text: segment for segment in segments}
    assert by_text["Brake Service Checks"].kind == HEADING
    assert by_text["Replace the worn pads."].kind == LIST_ITEM
    assert by_text["Pad depth (mm) | 1.5"].kind == TABLE_ROW
    assert by_text["Fit six bottle cage bolts."].anchor.heading == "Brake Service Checks"


def test_revisions_fields_and_inline_controls_match_docx2txt(tmp_path):
    data = _inspection_card_docx()
    path = tmp_path / "card.docx"
    path.write_bytes(data)
    ours = " ".join(segment.text for segment in extract(path.name, data).segments)
    # Reference: docx2txt 0.9, which reads every w:t, w:tab, w:br and w:cr of document.xml in
    # order, whatever wraps it, and never w:delText or w:instrText; so for insertions, deletions,
    # content controls, hyperlinks, smart tags, custom XML, moves-to and both kinds of field it
    # sees what a reader sees. Compared word for word, not by similarity.
    assert comparable_words(ours) == comparable_words(docx2txt.process(str(path)))


def test_text_box_paragraphs_read_their_revisions_too():
    document = docx.Document()
    document.add_paragraph("Fit the chain guard.")
    anchor = document.add_paragraph("Tighten the guard bolts.")
    note = f'<w:p><w:r><w:t xml:space="preserve">Use </w:t></w:r><w:ins w:id="30" {_REVISION}>'
    note += f"{_run('blue')}</w:ins>{_run(' thread locker.')}</w:p>"
    box = _vml_text_box_run(["unused"]).replace(
        _text_box_content(["unused"]), f"<w:txbxContent>{note}</w:txbxContent>"
    )
    anchor._p.append(parse_xml(box.replace("<w:r>", f"<w:r {_TEXT_BOX_NAMESPACES}>", 1)))
    data = _save(document)
    texts = [segment.text for segment in extract("guard.docx", data).segments]
    assert texts == [
        "Fit the chain guard.",
        "Tighten the guard bolts.",
        "Use blue thread locker.",
    ]
    # Reference: zipfile + xml.etree reading (ECMA-376 Part 1, 17.17.1 and 17.13.5; from memory).
    assert texts == _xml_units(data)


# Constructs where docx2txt does not read what a reader sees, so only the ECMA-376 reading is
# the reference: docx2txt keeps the source of a move (Word writes w:moveFrom runs with w:t, from
# memory), drops w:noBreakHyphen and w:sym, shows results of fields nested in a field code and
# shows a ruby's phonetic guide (w:rt) beside its base text (seen with docx2txt 0.9).
_READER_ONLY_PARAGRAPHS = [
    (  # a tracked move: moveFrom is not shown, moveTo is (17.13.5)
        "Label the box ",
        f'<w:moveFrom w:id="40" {_REVISION}>{_run("and tape it shut ")}</w:moveFrom>'
        + _run("with the frame number")
        + f'<w:moveTo w:id="41" {_REVISION}>{_run(" and tape it shut")}</w:moveTo>'
        + _run("."),
        "Label the box with the frame number and tape it shut.",
    ),
    (  # non-breaking hyphen, 17.3.3.18
        "Fit the Fell",
        "<w:r><w:noBreakHyphen/><w:t>runner decals.</w:t></w:r>",
        "Fit the Fell-runner decals.",
    ),
    (  # symbols, 17.3.3.30: a Unicode code is shown, a symbol-font glyph (U+F0xx) is not
        "Set the seat angle to 73",
        '<w:r><w:sym w:font="Arial" w:char="00B0"/><w:t xml:space="preserve"> and tick</w:t>'
        '<w:sym w:font="Wingdings" w:char="F0FC"/><w:t xml:space="preserve"> the box.</w:t></w:r>',
        "Set the seat angle to 73° and tick the box.",
    ),
    (  # a field nested in another's code is part of that code; only the outer result shows
        "Finish: ",
        _field_char("begin")
        + '<w:r><w:instrText xml:space="preserve"> IF </w:instrText></w:r>'
        + _complex_field(" MERGEFIELD Finish ", _run("Gloss"))
        + '<w:r><w:instrText xml:space="preserve"> = "Gloss" "Lacquer" "Wax" </w:instrText></w:r>'
        + _field_char("separate")
        + _run("Lacquer")
        + _field_char("end")
        + _run(" coat."),
        "Finish: Lacquer coat.",
    ),
    (  # a field with no result (an index entry) and a deleted field show nothing
        "Spokes are stainless",
        _field_char("begin")
        + '<w:r><w:instrText xml:space="preserve"> XE "Spokes" </w:instrText></w:r>'
        + _field_char("end")
        + f'<w:del w:id="42" {_REVISION}>'
        + _complex_field(" PAGE ", "<w:r><w:delText>9</w:delText></w:r>")
        + "</w:del>"
        + _run("."),
        "Spokes are stainless.",
    ),
    (  # ruby (17.3.3.25): the base text is shown, the phonetic guide w:rt is not
        "Stamp the ",
        f"<w:r><w:ruby><w:rubyPr/><w:rt>{_run('guide')}</w:rt>"
        f"<w:rubyBase>{_run('head badge')}</w:rubyBase></w:ruby></w:r>" + _run("."),
        "Stamp the head badge.",
    ),
]


def _reader_only_docx() -> bytes:
    document = docx.Document()
    for start, markup, _ in _READER_ONLY_PARAGRAPHS:
        _append_inline(document.add_paragraph(start), markup)
    return _save(document)


def test_moves_hyphens_symbols_and_nested_fields_read_as_the_final_document_shows():
    data = _reader_only_docx()
    texts = [segment.text for segment in extract("notes.docx", data).segments]
    assert texts == [expected for _, _, expected in _READER_ONLY_PARAGRAPHS]
    # Reference: zipfile + xml.etree reading per ECMA-376 Part 1 (``_reader_text``; from memory).
    assert texts == _xml_units(data)


# --- footnotes and endnotes (ECMA-376 Part 1, 17.11; from memory) ------------------------------

_NOTES_TYPES = {
    "footnotes": "application/vnd.openxmlformats-officedocument.wordprocessingml.footnotes+xml",
    "endnotes": "application/vnd.openxmlformats-officedocument.wordprocessingml.endnotes+xml",
}


def _notes_part(kind: str, notes: dict[str, list[str]]) -> bytes:
    tag = kind[:-1]  # w:footnote / w:endnote
    body = "".join(  # the separator and continuation separator Word always writes
        f'<w:{tag} w:type="{t}" w:id="{i}"><w:p><w:r><w:separator/></w:r></w:p></w:{tag}>'
        for i, t in (("-1", "separator"), ("0", "continuationSeparator"))
    )
    for note_id, paragraphs in notes.items():
        body += (
            f'<w:{tag} w:id="{note_id}">'
            + "".join(
                f'<w:p><w:r><w:t xml:space="preserve">{text}</w:t></w:r></w:p>'
                for text in paragraphs
            )
            + f"</w:{tag}>"
        )
    return (
        f'<?xml version="1.0" encoding="UTF-8"?><w:{kind} {nsdecls("w")}>{body}</w:{kind}>'.encode()
    )


def _reference(kind: str, note_id: str):
    return parse_xml(f'<w:r {nsdecls("w")}><w:{kind}Reference w:id="{note_id}"/></w:r>')


def _with_notes(data: bytes, parts: dict[str, dict[str, list[str]]]) -> bytes:
    """``data`` with footnotes/endnotes parts added, as Word lays them out: the part, its content
    type override and a relationship from the main document (ECMA-376 Part 2, OPC)."""
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as src, zipfile.ZipFile(out, "w") as dst:
        for item in src.infolist():
            content = src.read(item.filename)
            if item.filename == "[Content_Types].xml":
                overrides = "".join(
                    f'<Override PartName="/word/{k}.xml" ContentType="{_NOTES_TYPES[k]}"/>'
                    for k in parts
                )
                content = content.replace(b"</Types>", overrides.encode() + b"</Types>")
            elif item.filename == "word/_rels/document.xml.rels":
                rels = "".join(
                    f'<Relationship Id="rIdNotes{k}" Target="{k}.xml" Type="http://schemas.'
                    f'openxmlformats.org/officeDocument/2006/relationships/{k}"/>'
                    for k in parts
                )
                content = content.replace(b"</Relationships>", rels.encode() + b"</Relationships>")
            dst.writestr(item, content)
        for kind, notes in parts.items():
            dst.writestr(f"word/{kind}.xml", _notes_part(kind, notes))
    return out.getvalue()


def _brake_notes_docx() -> bytes:
    document = docx.Document()
    document.add_heading("Brake bleeding", level=1)
    first = document.add_paragraph("Bleed the rear hose with the lever at full reach.")
    first._p.append(_reference("footnote", "7"))
    table = document.add_table(rows=1, cols=2)
    table.rows[0].cells[0].text = "Fluid"
    table.rows[0].cells[1].text = "mineral oil"
    table.rows[0].cells[1].paragraphs[0]._p.append(_reference("footnote", "3"))
    document.add_heading("Disposal", level=1)
    last = document.add_paragraph("Collect the old fluid in the marked drum.")
    last._p.append(_reference("endnote", "1"))
    last._p.append(_reference("footnote", "7"))  # a second reference to the first note
    buffer = io.BytesIO()
    document.save(buffer)
    return _with_notes(
        buffer.getvalue(),
        {
            "footnotes": {
                "3": ["Never mix mineral oil with DOT fluid."],
                "7": ["Reach is set with the 2 mm grub screw.", "Check it after every bleed."],
                "9": ["A note nothing references."],
            },
            "endnotes": {"1": ["The drum is emptied by the depot on Fridays."]},
        },
    )


def _xml_notes(data: bytes, kind: str) -> dict[str, list[str]]:
    """Reference: the w:t runs of each normal note's paragraphs, read with xml.etree."""
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        root = ElementTree.fromstring(archive.read(f"word/{kind}.xml"))
    return {
        note.get(f"{W}id"): [
            "".join(t.text or "" for t in p.iter(f"{W}t")) for p in note.iter(f"{W}p")
        ]
        for note in root
        if note.get(f"{W}type") is None
    }


def test_footnotes_and_endnotes_follow_their_first_reference_under_its_heading():
    data = _brake_notes_docx()
    segments = extract("bleeding.docx", data).segments
    footnotes, endnotes = _xml_notes(data, "footnotes"), _xml_notes(data, "endnotes")
    assert [(s.text, s.anchor.heading) for s in segments] == [
        ("Brake bleeding", "Brake bleeding"),
        ("Bleed the rear hose with the lever at full reach.", "Brake bleeding"),
        ("Footnote 1: " + footnotes["7"][0], "Brake bleeding"),
        (footnotes["7"][1], "Brake bleeding"),
        ("Fluid | mineral oil", "Brake bleeding"),
        ("Footnote 2: " + footnotes["3"][0], "Brake bleeding"),
        ("Disposal", "Disposal"),
        ("Collect the old fluid in the marked drum.", "Disposal"),
        ("Endnote 1: " + endnotes["1"][0], "Disposal"),
    ]
    notes = [s for s in segments if s.text.startswith(("Footnote ", "Endnote "))]
    assert len(notes) == 3 and all(s.kind == PARAGRAPH for s in notes)
    assert not any("nothing references" in s.text for s in segments)


def test_a_damaged_notes_part_is_a_clear_failure():
    data = _brake_notes_docx()
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as src, zipfile.ZipFile(out, "w") as dst:
        for item in src.infolist():
            content = src.read(item.filename)
            dst.writestr(item, content[:40] if item.filename == "word/footnotes.xml" else content)
    with pytest.raises(CorruptDocument, match="notes part"):
        extract("bleeding.docx", out.getvalue())


# --- paragraph styles ---------------------------------------------------------------------------


def _python_docx_chain(paragraph) -> list[str]:
    """The style chain as python-docx itself walks it: Paragraph.style, then base_style."""
    names, style = [], paragraph.style
    while style is not None and len(names) < 10:
        names.append((style.name or "").lower())
        style = style.base_style
    return names


def _style_maze_docx() -> bytes:
    """Paragraphs whose styles python-docx resolves in every way it can: own style, none (the
    default), a missing id, a character style's id, a based-on chain, a based-on cycle."""
    document = docx.Document()
    styles = document.styles
    from docx.enum.style import WD_STYLE_TYPE

    base = styles.add_style("Marrowby Base", WD_STYLE_TYPE.PARAGRAPH)
    base.base_style = styles["Heading 2"]
    derived = styles.add_style("Marrowby Step", WD_STYLE_TYPE.PARAGRAPH)
    derived.base_style = base
    loop_a = styles.add_style("Loop A", WD_STYLE_TYPE.PARAGRAPH)
    loop_b = styles.add_style("Loop B", WD_STYLE_TYPE.PARAGRAPH)
    loop_a.base_style, loop_b.base_style = loop_b, loop_a
    styles.add_style("Marrowby Emphasis", WD_STYLE_TYPE.CHARACTER)
    document.add_paragraph("Fit the bottom bracket shell guard.")
    document.add_paragraph("Torque the crank bolts.", style="Marrowby Step")
    document.add_paragraph("Round and round the workshop.", style="Loop A")
    document.add_paragraph("Record the chain length.", style="List Bullet")
    missing = document.add_paragraph("A style id nothing defines.")
    missing.style = "Marrowby Base"
    missing._p.pPr.find(qn("w:pStyle")).set(qn("w:val"), "NoSuchStyle")
    character = document.add_paragraph("A character style's id on a paragraph.")
    character.style = "Marrowby Base"
    character._p.pPr.find(qn("w:pStyle")).set(qn("w:val"), "MarrowbyEmphasis")
    return _save(document)


def test_style_chains_are_the_ones_python_docx_walks():
    from pipeline.formats.docx import _Styles

    # Reference: python-docx's own Paragraph.style / BaseStyle.base_style, on the sample
    # procedures and on a document built to reach each of its look-up rules.
    sources = [_style_maze_docx(), _procedure_docx()]
    sources += [path.read_bytes() for path in sorted(SAMPLE_CORPUS.rglob("*.docx"))]
    checked = 0
    for data in sources:
        document = docx.Document(io.BytesIO(data))
        styles = _Styles(document.styles.element)
        for paragraph in document.paragraphs:
            assert [s.name for s in styles.chain(paragraph)] == _python_docx_chain(paragraph)
            checked += 1
    assert checked > 40


def test_a_heading_reached_through_a_based_on_chain_is_a_heading():
    segments = extract("procedures/maze.docx", _style_maze_docx(), Limits()).segments
    kinds = {segment.text: segment.kind for segment in segments}
    # "Marrowby Step" is based on "Marrowby Base", which is based on "Heading 2".
    assert kinds["Torque the crank bolts."] == HEADING
    assert kinds["Record the chain length."] == LIST_ITEM
    assert kinds["Fit the bottom bracket shell guard."] == PARAGRAPH
    assert kinds["Round and round the workshop."] == PARAGRAPH
