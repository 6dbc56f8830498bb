"""PowerPoint extraction checked against a raw lxml reading of the slide and notes XML parts."""

from __future__ import annotations

import io
import zipfile
from collections import Counter

import docx
import pptx
import pytest
from lxml import etree
from pptx.util import Emu, Inches, Pt

from pipeline.errors import CorruptDocument, DocumentTooLarge, EmptyDocument
from pipeline.formats.slides import NOTES_PREFIX, PPTX_TYPE, extract_pptx
from pipeline.formats.text import normalise_text
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW, Limits
from tests.support.formats import rewrite_zip

# DrawingML and PresentationML namespaces, relationships (ECMA-376 Part 1, 20 and 19; Part 2,
# OPC; from memory).
A = "{http://schemas.openxmlformats.org/drawingml/2006/main}"
P = "{http://schemas.openxmlformats.org/presentationml/2006/main}"
R = "{http://schemas.openxmlformats.org/officeDocument/2006/relationships}"
PKG_REL = "{http://schemas.openxmlformats.org/package/2006/relationships}"
NOTES_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships/notesSlide"

# The reference parser never resolves entities nor fetches anything.
_SAFE_PARSER = etree.XMLParser(resolve_entities=False, no_network=True, load_dtd=False)

TORQUE_ROWS = [
    ("Part", "Torque", "Tool"),
    ("Stem cap", "5 Nm", "click wrench"),
    ("Seat clamp", "6 Nm", "hex key 4 mm"),
    ("Crank bolt", "40 Nm", "torque wrench"),
]


def _save(presentation) -> bytes:
    buffer = io.BytesIO()
    presentation.save(buffer)
    return buffer.getvalue()


def _text_box(slide, left, top, paragraphs: list[str]):
    shapes = getattr(slide, "shapes", slide)  # a slide, or a group's shape collection
    box = shapes.add_textbox(left, top, Inches(4), Inches(1))
    frame = box.text_frame
    frame.text = paragraphs[0]
    for text in paragraphs[1:]:
        frame.add_paragraph().text = text
    return box


def _training_deck() -> bytes:
    """An invented Marrowby Cycle Works workshop training deck, shapes added in reading order."""
    deck = pptx.Presentation()
    deck.core_properties.title = "Marrowby Workshop Induction"

    cover = deck.slides.add_slide(deck.slide_layouts[0])  # Title Slide
    cover.shapes.title.text = "Workshop Induction"
    cover.placeholders[1].text = "Marrowby Cycle Works, frame bench training"
    cover.notes_slide.notes_text_frame.text = "Welcome the new starters and hand out tool rolls."

    rules = deck.slides.add_slide(deck.slide_layouts[1])  # Title and Content
    rules.shapes.title.text = "Before you pick up a wrench"
    body = rules.placeholders[1].text_frame
    body.text = "Read the job card from top to bottom"
    item = body.add_paragraph()
    item.text = "Check the frame serial, e.g. MCW-2291, against the card"
    item.level = 1
    body.add_paragraph().text = "Wear eye protection at the wheel truing stand"
    _text_box(rules, Inches(0.5), Inches(6.5), ["ECN-0417 replaces the old seat clamp bolts."])
    notes = rules.notes_slide.notes_text_frame
    notes.text = "Ask who has built a wheel before."
    notes.add_paragraph().text = "Point out the   first-aid kit by the door."

    torque = deck.slides.add_slide(deck.slide_layouts[5])  # Title Only
    torque.shapes.title.text = "Torque values"
    table = torque.shapes.add_table(4, 3, Inches(0.5), Inches(1.6), Inches(8), Inches(2)).table
    for row, values in zip(table.rows, TORQUE_ROWS, strict=True):
        for cell, value in zip(row.cells, values, strict=True):
            cell.text = value
    _text_box(torque, Inches(0.5), Inches(4.5), ["Always set the wrench before the bolt."])
    torque.notes_slide.notes_text_frame.text = "Demonstrate the click wrench on a spare stem."
    return _save(deck)


def _reference_slides(data: bytes) -> list[tuple[list[str], list[str]]]:
    """(text units, notes paragraphs) of each slide in presentation order, from the raw XML.

    Reference, read with zipfile + lxml (entities off) per ECMA-376 (from memory): slide order is
    p:sldIdLst in ppt/presentation.xml, each p:sldId naming a relationship to a slide part
    (Part 1, 19.2.1.34); a slide's text is in p:txBody > a:p > a:r / a:fld > a:t, a:br a line
    break (Part 1, 21.1.2); a table a:tbl > a:tr > a:tc (21.1.3); a slide's notes are the body
    placeholder (p:ph type="body") of the notes slide its relationships name (19.3.1.26).
    Units are taken in document (z-) order: a table row is its cells' texts joined with " | ",
    anything else one unit per a:p.
    """
    with zipfile.ZipFile(io.BytesIO(data)) as archive:

        def xml(name: str):
            return etree.fromstring(archive.read(name), _SAFE_PARSER)

        def targets(part: str) -> dict[str, tuple[str, str]]:
            folder, _, base = part.rpartition("/")
            rels = xml(f"{folder}/_rels/{base}.rels")
            return {
                rel.get("Id"): (rel.get("Type"), _resolve(folder, rel.get("Target")))
                for rel in rels.iter(f"{PKG_REL}Relationship")
            }

        presentation_rels = targets("ppt/presentation.xml")
        slide_parts = [
            presentation_rels[sld_id.get(f"{R}id")][1]
            for sld_id in xml("ppt/presentation.xml").iter(f"{P}sldId")
        ]
        slides = []
        for part in slide_parts:
            units = _units(xml(part).find(f"{P}cSld"))
            notes: list[str] = []
            for rel_type, target in targets(part).values():
                if rel_type == NOTES_REL:
                    for shape in xml(target).iter(f"{P}sp"):
                        placeholder = shape.find(f"{P}nvSpPr/{P}nvPr/{P}ph")
                        if placeholder is not None and placeholder.get("type") == "body":
                            notes.extend(_units(shape))
            slides.append(([u for u in units if u], [n for n in notes if n]))
    return slides


def _resolve(folder: str, target: str) -> str:
    parts = folder.split("/")
    for piece in target.split("/"):
        if piece == "..":
            parts.pop()
        elif piece != ".":
            parts.append(piece)
    return "/".join(parts)


def _paragraph_text(paragraph) -> str:
    pieces = []
    for element in paragraph.iter(f"{A}t", f"{A}br"):
        pieces.append(" " if element.tag == f"{A}br" else element.text or "")
    return normalise_text("".join(pieces))


def _units(container) -> list[str]:
    units: list[str] = []
    for element in container.iter(f"{A}tbl", f"{A}p"):
        if element.tag == f"{A}tbl":
            for row in element.iter(f"{A}tr"):
                cells = [
                    " ".join(_paragraph_text(p) for p in cell.iter(f"{A}p"))
                    for cell in row.iter(f"{A}tc")
                ]
                units.append(" | ".join(normalise_text(cell) for cell in cells))
        elif not any(ancestor.tag == f"{A}tbl" for ancestor in element.iterancestors()):
            units.append(_paragraph_text(element))
    return units


def _by_slide(segments) -> dict[int, tuple[list[str], list[str]]]:
    slides: dict[int, tuple[list[str], list[str]]] = {}
    for segment in segments:
        texts, notes = slides.setdefault(segment.anchor.page, ([], []))
        if segment.text.startswith(NOTES_PREFIX):
            notes.append(segment.text.removeprefix(NOTES_PREFIX))
        else:
            texts.append(segment.text)
    return slides


def test_text_and_notes_match_a_raw_xml_reading_of_the_slides():
    data = _training_deck()
    ours = _by_slide(extract_pptx(data, Limits()).segments)
    reference = _reference_slides(data)
    assert sorted(ours) == list(range(1, len(reference) + 1))
    for page, (units, notes) in enumerate(reference, start=1):
        # Tolerance: the same sequence of a:p / table-row texts after whitespace normalisation
        # (normalise_text on both sides). The deck's shapes were added top to bottom, so the
        # XML order is also the reading order here.
        assert ours[page][0] == units
        assert ours[page][1] == notes


def test_kinds_anchors_and_title():
    extracted = extract_pptx(_training_deck(), Limits())
    assert extracted.media_type == PPTX_TYPE
    assert extracted.title == "Marrowby Workshop Induction"
    rows = [(s.anchor.page, s.anchor.heading, s.kind, s.text) for s in extracted.segments]
    rules = "Before you pick up a wrench"
    assert rows == [
        (1, "Workshop Induction", HEADING, "Workshop Induction"),
        (1, "Workshop Induction", PARAGRAPH, "Marrowby Cycle Works, frame bench training"),
        (
            1,
            "Workshop Induction",
            PARAGRAPH,
            "Notes: Welcome the new starters and hand out tool rolls.",
        ),
        (2, rules, HEADING, rules),
        # The content placeholder is bulleted by the slide master; the sub-point has level 1.
        (2, rules, LIST_ITEM, "Read the job card from top to bottom"),
        (2, rules, LIST_ITEM, "Check the frame serial, e.g. MCW-2291, against the card"),
        (2, rules, LIST_ITEM, "Wear eye protection at the wheel truing stand"),
        (2, rules, PARAGRAPH, "ECN-0417 replaces the old seat clamp bolts."),
        (2, rules, PARAGRAPH, "Notes: Ask who has built a wheel before."),
        (2, rules, PARAGRAPH, "Notes: Point out the first-aid kit by the door."),
        (3, "Torque values", HEADING, "Torque values"),
        *[(3, "Torque values", TABLE_ROW, " | ".join(row)) for row in TORQUE_ROWS],
        (3, "Torque values", PARAGRAPH, "Always set the wrench before the bolt."),
        (3, "Torque values", PARAGRAPH, "Notes: Demonstrate the click wrench on a spare stem."),
    ]


def _positions(data: bytes, page: int) -> dict[str, tuple[int, int]]:
    """Reference: (a:off y, a:off x) of each top-level p:sp's xfrm, keyed by its first a:p's text,
    read with lxml from the slide part (ECMA-376 Part 1, 20.1.7.4 off; from memory)."""
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        root = etree.fromstring(archive.read(f"ppt/slides/slide{page}.xml"), _SAFE_PARSER)
    positions = {}
    for shape in root.find(f"{P}cSld/{P}spTree").iterchildren(f"{P}sp"):
        offset = shape.find(f"{P}spPr/{A}xfrm/{A}off")
        text = _paragraph_text(shape.find(f".//{A}p"))
        positions[text] = (int(offset.get("y")), int(offset.get("x")))
    return positions


def test_shapes_are_read_top_to_bottom_then_left_to_right_with_groups_entered():
    deck = pptx.Presentation()
    slide = deck.slides.add_slide(deck.slide_layouts[6])  # Blank: no title
    # Added in the reverse of reading order, so the XML order is wrong on purpose.
    _text_box(slide, Inches(5), Inches(5), ["Sign the card, bottom right."])
    _text_box(slide, Inches(0.5), Inches(5), ["Date the card, bottom left."])
    group = slide.shapes.add_group_shape()
    _text_box(group.shapes, Inches(5), Inches(3), ["Grouped: right of the pair."])
    _text_box(group.shapes, Inches(0.5), Inches(3), ["Grouped: left of the pair."])
    _text_box(slide, Inches(0.5), Inches(1), ["Strip the old bar tape first.", "Keep the plugs."])
    data = _save(deck)
    segments = extract_pptx(data, Limits()).segments
    texts = [segment.text for segment in segments]
    assert texts == [
        "Strip the old bar tape first.",
        "Keep the plugs.",
        "Grouped: left of the pair.",
        "Grouped: right of the pair.",
        "Date the card, bottom left.",
        "Sign the card, bottom right.",
    ]
    assert {(s.anchor.page, s.anchor.heading, s.kind) for s in segments} == {(1, None, PARAGRAPH)}
    # Reference: the same multiset of a:p texts as the raw XML reading (order differs: z-order).
    ((units, _),) = _reference_slides(data)
    assert Counter(texts) == Counter(units)
    # Reference: the top-level shapes' a:off positions, sorted by (y, x), give our order.
    positions = _positions(data, 1)
    top_level = [t for t in texts if t in positions]
    assert top_level == sorted(top_level, key=positions.__getitem__)


def test_explicit_bullets_and_no_bullet_in_a_text_box():
    deck = pptx.Presentation()
    slide = deck.slides.add_slide(deck.slide_layouts[5])
    slide.shapes.title.text = "Chain checks"
    box = _text_box(slide, Inches(0.5), Inches(2), ["Measure wear with the gauge."])
    bulleted = box.text_frame.add_paragraph()
    bulleted.text = "Replace past the second mark."
    properties = bulleted._p.get_or_add_pPr()
    properties.append(properties.makeelement(f"{A}buChar", {"char": "-"}))
    content = deck.slides.add_slide(deck.slide_layouts[1])
    content.shapes.title.text = "Sprockets"
    frame = content.placeholders[1].text_frame
    frame.text = "Replace the sprockets with the chain."
    plain = frame.paragraphs[0]._p.get_or_add_pPr()
    plain.append(plain.makeelement(f"{A}buNone", {}))
    kinds = [(s.text, s.kind) for s in extract_pptx(_save(deck), Limits()).segments]
    assert kinds == [
        ("Chain checks", HEADING),
        ("Measure wear with the gauge.", PARAGRAPH),
        ("Replace past the second mark.", LIST_ITEM),
        ("Sprockets", HEADING),
        ("Replace the sprockets with the chain.", PARAGRAPH),
    ]


def test_line_breaks_and_merged_cells():
    deck = pptx.Presentation()
    slide = deck.slides.add_slide(deck.slide_layouts[5])
    slide.shapes.title.text = "Warranty"
    table = slide.shapes.add_table(2, 3, Inches(0.5), Inches(2), Inches(8), Inches(1)).table
    merged = table.cell(0, 0)
    merged.merge(table.cell(0, 1))
    merged.text = "Frame and fork"
    table.cell(0, 2).text = "ten years"
    for cell, value in zip(table.rows[1].cells, ("Paint", "Decals", "two years"), strict=True):
        cell.text = value
    box = _text_box(slide, Inches(0.5), Inches(4), ["x"])
    box.text_frame.paragraphs[0].text = "Keep the receipt\vwith the frame serial."
    box.text_frame.paragraphs[0].runs[0].font.size = Pt(12)
    data = _save(deck)
    texts = [s.text for s in extract_pptx(data, Limits()).segments]
    assert texts == [
        "Warranty",
        "Frame and fork | ten years",
        "Paint | Decals | two years",
        "Keep the receipt with the frame serial.",
    ]
    # Reference: raw XML; python-pptx keeps the covered cell as an empty a:tc (hMerge), which
    # the raw reading shows as an empty cell and we leave out.
    ((units, _),) = _reference_slides(data)
    assert units[1] == "Frame and fork |  | ten years"
    assert [units[0], *units[2:]] == [texts[0], *texts[2:]]


# ---------------------------------------------------------------- bad input


def _small_deck() -> bytes:
    deck = pptx.Presentation()
    slide = deck.slides.add_slide(deck.slide_layouts[5])
    slide.shapes.title.text = "Grease the seat post before fitting it."
    return _save(deck)


@pytest.mark.parametrize(
    ("data", "looks_like"),
    [
        (b"Slide 1: lace the wheel.\nSlide 2: true it.\n", "plain text"),
        (b"%PDF-1.7\n%\xe2\xe3\xcf\xd3\n1 0 obj\n", "a PDF document"),
    ],
)
def test_not_a_zip_is_corrupt_and_says_what_it_looks_like(data, looks_like):
    # Reference for the description: pipeline.formats.describe_content's signature table. The
    # public entry point runs the format table's check before the extractor.
    from pipeline import formats

    with pytest.raises(CorruptDocument, match=f"not a PowerPoint .pptx.*{looks_like}"):
        formats.extract("training/wheel-building.pptx", data, Limits())


def test_damaged_zip_is_corrupt():
    data = _small_deck()
    with pytest.raises(CorruptDocument, match="zip"):
        extract_pptx(data[: len(data) // 2], Limits())


def test_missing_presentation_part_is_corrupt():
    data = rewrite_zip(_small_deck(), {"ppt/presentation.xml": None})
    with pytest.raises(CorruptDocument, match="no ppt/presentation.xml part"):
        extract_pptx(data, Limits())


def test_a_word_document_renamed_pptx_is_corrupt():
    document = docx.Document()
    document.add_paragraph("Lace the wheel.")
    buffer = io.BytesIO()
    document.save(buffer)
    with pytest.raises(CorruptDocument, match="not a PowerPoint presentation"):
        extract_pptx(buffer.getvalue(), Limits())


def test_part_inflating_past_the_ratio_limit_is_a_zip_bomb():
    zeros = bytes(4 * 1024 * 1024)  # deflates about 1000:1 (zlib's ceiling; from memory)
    buffer = io.BytesIO(_small_deck())
    with zipfile.ZipFile(buffer, "a", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("ppt/media/padding.bin", zeros)
    limits = Limits(max_inflated_bytes=64 * 1024 * 1024, max_inflate_ratio=200.0)
    with pytest.raises(DocumentTooLarge, match="padding.bin inflates .* zip bomb"):
        extract_pptx(buffer.getvalue(), limits)


def test_inflating_past_the_total_limit_is_too_large():
    with pytest.raises(DocumentTooLarge, match="would inflate to .* over the limit"):
        extract_pptx(_small_deck(), Limits(max_inflated_bytes=1024))


def test_a_part_larger_than_its_header_says_is_corrupt_not_read_past():
    # The central directory claims 100 bytes for a slide part that inflates to 2 MiB: zipfile
    # stops at the declared size and fails the CRC (from memory of zipfile.ZipExtFile), so the
    # declared sizes checked against the limits bound what is ever inflated.
    data = rewrite_zip(_small_deck(), {"ppt/slides/slide1.xml": b"<a/>" + b" " * (2 * 1024 * 1024)})
    buffer = io.BytesIO(data)
    with zipfile.ZipFile(buffer) as archive:
        info = archive.getinfo("ppt/slides/slide1.xml")
    # Patch the 4-byte uncompressed size in the central directory entry and the local header.
    raw = bytearray(data)
    size = info.file_size.to_bytes(4, "little")
    assert raw.count(size) >= 2
    for at in _all_offsets(raw, size):
        raw[at : at + 4] = (100).to_bytes(4, "little")
    with pytest.raises(CorruptDocument, match="damaged|cannot be inflated"):
        extract_pptx(bytes(raw), Limits())


def _all_offsets(raw: bytearray, needle: bytes) -> list[int]:
    offsets, at = [], raw.find(needle)
    while at >= 0:
        offsets.append(at)
        at = raw.find(needle, at + 1)
    return offsets


_BILLION_LAUGHS = (
    b'<?xml version="1.0"?>\n<!DOCTYPE p:sld [\n<!ENTITY lol "lol">\n'
    + b"".join(
        f'<!ENTITY lol{n} "{("&lol" + (str(n - 1) if n > 1 else "") + ";") * 10}">\n'.encode()
        for n in range(1, 10)
    )
    + b"]>\n"
)


def test_doctype_with_internal_entities_in_a_slide_is_refused_unexpanded():
    data = _small_deck()
    slide = zipfile.ZipFile(io.BytesIO(data)).read("ppt/slides/slide1.xml")
    body = slide.split(b"?>", 1)[1].replace(b"Grease the seat", b"&lol9; Grease the seat")
    assert b"&lol9;" in body
    data = rewrite_zip(data, {"ppt/slides/slide1.xml": _BILLION_LAUGHS + body})
    with pytest.raises(CorruptDocument, match="slide1.xml declares a DOCTYPE"):
        extract_pptx(data, Limits())


def test_doctype_in_a_notes_part_is_refused():
    deck = pptx.Presentation()
    slide = deck.slides.add_slide(deck.slide_layouts[5])
    slide.shapes.title.text = "Brake bleeding"
    slide.notes_slide.notes_text_frame.text = "Bleed the rear hose first."
    data = _save(deck)
    notes = zipfile.ZipFile(io.BytesIO(data)).read("ppt/notesSlides/notesSlide1.xml")
    with_doctype = b'<?xml version="1.0"?><!DOCTYPE p:notes [<!ENTITY shop "Marrowby">]>'
    data = rewrite_zip(
        data, {"ppt/notesSlides/notesSlide1.xml": with_doctype + notes.split(b"?>")[1]}
    )
    with pytest.raises(CorruptDocument, match="notesSlide1.xml declares a DOCTYPE"):
        extract_pptx(data, Limits())


def test_deck_without_text_is_empty():
    deck = pptx.Presentation()
    slide = deck.slides.add_slide(deck.slide_layouts[1])  # empty title and content placeholders
    slide.shapes.add_textbox(Inches(1), Inches(1), Emu(100), Emu(100)).text_frame.text = "  "
    with pytest.raises(EmptyDocument, match="no text"):
        extract_pptx(_save(deck), Limits())
    with pytest.raises(EmptyDocument, match="no text"):
        extract_pptx(_save(pptx.Presentation()), Limits())  # no slides at all
