"""EPUB extraction checked against a raw lxml reading of the OPF spine and the XHTML chapters."""

from __future__ import annotations

import io
import zipfile

import pytest
from lxml import etree

from pipeline.errors import CorruptDocument, DocumentTooLarge, EmptyDocument
from pipeline.formats.epub import EPUB_TYPE, extract_epub
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, Limits

# Namespaces of the OCF container, the OPF package, Dublin Core and XHTML (W3C EPUB 3.3;
# from memory).
CONTAINER_NS = "urn:oasis:names:tc:opendocument:xmlns:container"
OPF = "{http://www.idpf.org/2007/opf}"
XHTML = "{http://www.w3.org/1999/xhtml}"

# The reference parser never resolves entities nor fetches anything.
_SAFE_PARSER = etree.XMLParser(resolve_entities=False, no_network=True, load_dtd=False)

CONTAINER_XML = f"""<?xml version="1.0" encoding="UTF-8"?>
<container version="1.0" xmlns="{CONTAINER_NS}">
  <rootfiles>
    <rootfile full-path="OEBPS/content.opf" media-type="application/oebps-package+xml"/>
  </rootfiles>
</container>
"""


def _chapter(title: str, body: str, doctype: str = "<!DOCTYPE html>") -> str:
    return f"""<?xml version="1.0" encoding="UTF-8"?>
{doctype}
<html xmlns="http://www.w3.org/1999/xhtml" xml:lang="en">
<head><title>{title}</title></head>
<body>
{body}
</body>
</html>
"""


CHAPTERS = {
    "text/intro.xhtml": _chapter(
        "Introduction",
        """<h1>Workshop manual</h1>
<p>This manual covers the frame bench at Marrowby Cycle Works.</p>
<p>Every frame carries a serial such as MCW-2291 stamped under the bottom bracket.</p>""",
    ),
    "text/brakes.xhtml": _chapter(
        "Brakes",
        """<h1>Brakes</h1>
<h2>Pads</h2>
<p>Replace pads when the groove is worn away, per notice ECN-0417.</p>
<ul>
<li>Loosen the pad bolt with a 5 mm hex key.</li>
<li>Seat the new pad and torque the bolt to 6 Nm.</li>
</ul>""",
    ),
    "text/wheels.xhtml": _chapter(
        "Wheels",
        """<h1>Wheels</h1>
<p>True every rebuilt wheel on the stand before it leaves the bench.</p>
<p>Record spoke tension on the job card with the frame serial.</p>""",
    ),
}
# Spine order differs from the manifest order and the zip order on purpose: the spine alone
# sets the reading order (EPUB 3.3, package document "spine" element).
SPINE = ["intro", "wheels", "brakes"]
MANIFEST = {
    "brakes": "text/brakes.xhtml",
    "intro": "text/intro.xhtml",
    "wheels": "text/wheels.xhtml",
}


def _opf(manifest: dict[str, str], spine: list[str], title: str | None = "Marrowby Bench Manual"):
    items = "\n".join(
        f'    <item id="{item_id}" href="{href}" media-type="application/xhtml+xml"/>'
        for item_id, href in manifest.items()
    )
    refs = "\n".join(f'    <itemref idref="{item_id}"/>' for item_id in spine)
    title_xml = f"<dc:title>{title}</dc:title>" if title else ""
    return f"""<?xml version="1.0" encoding="UTF-8"?>
<package xmlns="http://www.idpf.org/2007/opf" version="3.0" unique-identifier="uid">
  <metadata xmlns:dc="http://purl.org/dc/elements/1.1/">
    <dc:identifier id="uid">urn:uuid:00000000-0000-4000-8000-000000000417</dc:identifier>
    {title_xml}
    <dc:language>en</dc:language>
  </metadata>
  <manifest>
{items}
  </manifest>
  <spine>
{refs}
  </spine>
</package>
"""


def _epub(
    chapters: dict[str, str] | None = None,
    opf: str | None = None,
    container: str | None = CONTAINER_XML,
    extra: dict[str, bytes] | None = None,
) -> bytes:
    """An EPUB written with zipfile: ``mimetype`` first and stored (EPUB 3.3 OCF)."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr(zipfile.ZipInfo("mimetype"), EPUB_TYPE, compress_type=zipfile.ZIP_STORED)
        if container is not None:
            archive.writestr("META-INF/container.xml", container)
        archive.writestr("OEBPS/content.opf", opf if opf is not None else _opf(MANIFEST, SPINE))
        for name, text in (CHAPTERS if chapters is None else chapters).items():
            archive.writestr(f"OEBPS/{name}", text)
        for name, payload in (extra or {}).items():
            archive.writestr(name, payload)
    return buffer.getvalue()


def _reference_chapters(data: bytes) -> list[str]:
    """Independent reading: container.xml -> OPF -> spine idrefs -> manifest hrefs -> XHTML body
    text (lxml itertext, whitespace-normalised), in spine order (W3C EPUB 3.3)."""
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        container = etree.fromstring(archive.read("META-INF/container.xml"), _SAFE_PARSER)
        opf_path = container.find(f".//{{{CONTAINER_NS}}}rootfile").get("full-path")
        package = etree.fromstring(archive.read(opf_path), _SAFE_PARSER)
        hrefs = {i.get("id"): i.get("href") for i in package.iter(f"{OPF}item")}
        base = opf_path.rsplit("/", 1)[0]
        texts = []
        for ref in package.iter(f"{OPF}itemref"):
            page = etree.fromstring(archive.read(f"{base}/{hrefs[ref.get('idref')]}"), _SAFE_PARSER)
            body = page.find(f"{XHTML}body")
            texts.append(" ".join("".join(body.itertext()).split()))
    return texts


def test_chapters_in_spine_order_match_a_raw_xhtml_reading():
    data = _epub()
    result = extract_epub(data, Limits())
    assert result.media_type == EPUB_TYPE
    assert result.title == "Marrowby Bench Manual"  # the OPF's dc:title
    assert result.warnings == ()
    reference = _reference_chapters(data)
    assert len(reference) == 3
    for page, expected in enumerate(reference, start=1):
        got = [s.text for s in result.segments if s.anchor.page == page]
        # Reference: lxml itertext of the chapter's <body>, whitespace-normalised; the extractor's
        # segments of that chapter, joined with spaces, must give the same words in order.
        assert " ".join(got) == expected
    # Reading order is the spine's (intro, wheels, brakes), not the manifest's or the zip's.
    assert [
        s.text for s in result.segments if s.kind == HEADING and s.anchor.heading.count(">") == 0
    ] == [
        "Workshop manual",
        "Wheels",
        "Brakes",
    ]


def test_headings_and_kinds_are_kept_per_chapter():
    result = extract_epub(_epub(), Limits())
    brakes = [s for s in result.segments if s.anchor.page == 3]
    assert brakes[0].text == "Brakes" and brakes[0].kind == HEADING
    items = [s for s in brakes if s.kind == LIST_ITEM]
    assert [s.text for s in items] == [
        "Loosen the pad bolt with a 5 mm hex key.",
        "Seat the new pad and torque the bolt to 6 Nm.",
    ]
    assert {s.anchor.heading for s in items} == {"Brakes > Pads"}
    wheels = [s for s in result.segments if s.anchor.page == 2 and s.kind == PARAGRAPH]
    assert {s.anchor.heading for s in wheels} == {"Wheels"}  # no heading leaks from chapter 1


def test_no_title_in_the_opf_gives_none():
    result = extract_epub(_epub(opf=_opf(MANIFEST, SPINE, title=None)), Limits())
    assert result.title is None


def test_empty_chapter_is_skipped_with_a_warning():
    chapters = dict(CHAPTERS)
    chapters["text/wheels.xhtml"] = _chapter("Blank", "<p>   </p>")
    result = extract_epub(_epub(chapters=chapters), Limits())
    assert {s.anchor.page for s in result.segments} == {1, 3}
    assert len(result.warnings) == 1 and "chapter 2" in result.warnings[0]


def test_every_chapter_empty_is_an_empty_document():
    blank = {name: _chapter("Blank", "<div></div>") for name in CHAPTERS}
    with pytest.raises(EmptyDocument):
        extract_epub(_epub(chapters=blank), Limits())


def test_not_a_zip_is_corrupt():
    with pytest.raises(CorruptDocument, match="not an EPUB book"):
        extract_epub(b"Marrowby Cycle Works parts list, plain text", Limits())


def test_zip_bomb_part_is_refused():
    zeros = b"\0" * (50 * 1024 * 1024)  # deflates about a thousand times (common practice)
    with pytest.raises(DocumentTooLarge, match="zip bomb"):
        extract_epub(_epub(extra={"OEBPS/images/padding.bin": zeros}), Limits())


def test_entity_declaration_in_a_chapter_is_refused():
    chapters = dict(CHAPTERS)
    doctype = '<!DOCTYPE html [<!ENTITY serial "MCW-2291">]>'
    chapters["text/brakes.xhtml"] = _chapter("Brakes", "<p>Frame &serial;</p>", doctype=doctype)
    with pytest.raises(CorruptDocument, match="declares an entity"):
        extract_epub(_epub(chapters=chapters), Limits())


def test_missing_container_xml_is_corrupt():
    with pytest.raises(CorruptDocument, match="META-INF/container.xml"):
        extract_epub(_epub(container=None), Limits())


def test_spine_item_missing_from_the_zip_is_corrupt():
    chapters = {k: v for k, v in CHAPTERS.items() if k != "text/wheels.xhtml"}
    with pytest.raises(CorruptDocument, match="OEBPS/text/wheels.xhtml"):
        extract_epub(_epub(chapters=chapters), Limits())


def test_spine_idref_without_manifest_item_is_corrupt():
    opf = _opf(MANIFEST, [*SPINE, "appendix"])
    with pytest.raises(CorruptDocument, match="appendix"):
        extract_epub(_epub(opf=opf), Limits())


def test_missing_package_document_is_corrupt():
    container = CONTAINER_XML.replace("OEBPS/content.opf", "OEBPS/missing.opf")
    with pytest.raises(CorruptDocument, match="OEBPS/missing.opf"):
        extract_epub(_epub(container=container), Limits())
