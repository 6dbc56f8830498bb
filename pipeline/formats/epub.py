"""EPUB extraction: the OPF spine in order, each XHTML chapter read by the HTML extractor.

An EPUB is a zip archive (EPUB 3.3, Open Container Format). ``open_checked_zip`` checks it first
(sizes, zip-bomb ratio, a ``META-INF/container.xml`` part, no entity declaration in any XML
part; a plain ``<!DOCTYPE html>`` is allowed, as EPUB chapters carry one). Then:

1. ``META-INF/container.xml`` names the package document (the OPF) in its first ``rootfile``;
2. the OPF's manifest maps item ids to parts (``href`` relative to the OPF) and its spine lists
   the reading order as ``itemref idref`` values;
3. each spine item that is an XHTML content document goes through ``extract_html``; its
   segments keep their kind and heading path, and ``Anchor.page`` is the item's 1-based spine
   position (the chapter number). Non-XHTML spine items (SVG pages) are skipped with a warning.

XML is parsed with lxml with entities off, no DTD and no network. A missing or unreadable OPF,
or a spine entry whose manifest item or part is missing, is ``CorruptDocument`` naming the part.
A chapter that fails to extract adds a warning and is skipped; if no chapter is left,
``EmptyDocument``. ``Extracted.title`` is the OPF's ``dc:title`` when set.
"""

from __future__ import annotations

import posixpath
from dataclasses import replace
from urllib.parse import unquote, urldefrag

from lxml import etree

from pipeline.errors import CorruptDocument, EmptyDocument, ExtractionError, first_line
from pipeline.formats.container import open_checked_zip, read_part
from pipeline.formats.html import extract_html
from pipeline.formats.text import normalise_text
from pipeline.records import Extracted, Limits, Segment

EPUB_TYPE = "application/epub+zip"

CONTAINER_PART = "META-INF/container.xml"
LABEL = ".epub"
KIND = "an EPUB book"

# Namespaces of the OCF container, the OPF package and Dublin Core (EPUB 3.3; from memory).
_CONTAINER_NS = "{urn:oasis:names:tc:opendocument:xmlns:container}"
_OPF_NS = "{http://www.idpf.org/2007/opf}"
_DC_NS = "{http://purl.org/dc/elements/1.1/}"
_XHTML_TYPES = frozenset({"application/xhtml+xml", "text/html"})


def _parser() -> etree.XMLParser:
    return etree.XMLParser(resolve_entities=False, no_network=True, load_dtd=False)


def _parse_xml(data: bytes, part: str) -> etree._Element:
    try:
        return etree.fromstring(data, parser=_parser())
    except (etree.XMLSyntaxError, ValueError) as error:
        raise CorruptDocument(
            f"damaged {LABEL}: part {part} is not readable XML ({error})"
        ) from None


def _opf_path(archive) -> str:
    root = _parse_xml(read_part(archive, CONTAINER_PART, LABEL), CONTAINER_PART)
    for rootfile in root.iter(f"{_CONTAINER_NS}rootfile"):
        path = (rootfile.get("full-path") or "").strip()
        if path:
            return path
    raise CorruptDocument(f"damaged {LABEL}: {CONTAINER_PART} names no package document")


def _resolve(opf_path: str, href: str) -> str:
    """The zip name of a manifest ``href``, which is a URL relative to the OPF."""
    target = unquote(urldefrag(href).url)
    return posixpath.normpath(posixpath.join(posixpath.dirname(opf_path), target))


def extract_epub(data: bytes, limits: Limits) -> Extracted:
    """Spine chapters in reading order; page is the chapter number, heading the chapter's."""
    archive = open_checked_zip(
        data,
        limits,
        label=LABEL,
        kind=KIND,
        required=(CONTAINER_PART,),
        allow_plain_doctype=True,
    )
    with archive:
        opf_path = _opf_path(archive)
        if opf_path not in set(archive.namelist()):
            raise CorruptDocument(f"damaged {LABEL}: the package document {opf_path} is missing")
        package = _parse_xml(read_part(archive, opf_path, LABEL), opf_path)
        titles = package.findall(f"{_OPF_NS}metadata/{_DC_NS}title")
        title = normalise_text("".join(titles[0].itertext())) if titles else ""
        manifest = {
            item.get("id"): item for item in package.iterfind(f"{_OPF_NS}manifest/{_OPF_NS}item")
        }
        spine = package.findall(f"{_OPF_NS}spine/{_OPF_NS}itemref")
        segments: list[Segment] = []
        warnings: list[str] = []
        for page, itemref in enumerate(spine, start=1):
            idref = itemref.get("idref")
            item = manifest.get(idref)
            if item is None or not item.get("href"):
                raise CorruptDocument(
                    f"damaged {LABEL}: spine item {idref!r} has no manifest entry in {opf_path}"
                )
            part = _resolve(opf_path, item.get("href"))
            media_type = (item.get("media-type") or "").strip().lower()
            if media_type not in _XHTML_TYPES:
                warnings.append(f"chapter {page} ({part}) is {media_type or 'untyped'}, not read")
                continue
            chapter_bytes = read_part(archive, part, LABEL)
            try:
                chapter = extract_html(chapter_bytes)
            except ExtractionError as error:
                warnings.append(f"chapter {page} ({part}) skipped: {first_line(error)}")
                continue
            segments.extend(
                Segment(s.text, replace(s.anchor, page=page), s.kind) for s in chapter.segments
            )
    if not segments:
        raise EmptyDocument("the EPUB book has no readable text in its spine chapters")
    return Extracted(
        media_type=EPUB_TYPE,
        segments=tuple(segments),
        title=title or None,
        warnings=tuple(warnings),
    )
