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

Body paragraphs and tables are read in document order by walking ``w:body`` ourselves rather than
with ``Document.iter_inner_content()``, which yields only direct ``w:p`` / ``w:tbl`` children and so
drops everything inside a block-level content control (``w:sdt`` / ``w:sdtContent``, ECMA-376
Part 1, 17.5.2; from memory) or a block-level ``w:customXml``. The walk looks through both, at any
depth, in the body and in table cells, and wraps what it finds in python-docx's ``Paragraph`` and
``Table`` so headings, lists and tables are handled exactly as for ordinary content.

Text boxes (``w:txbxContent``, ECMA-376 Part 1, 17.17.1; from memory) anchored in a body paragraph
follow that paragraph as PARAGRAPH segments (table rows inside them as TABLE_ROW). Word stores a
modern text box twice, as DrawingML in ``mc:Choice`` and as VML in ``mc:Fallback`` (ECMA-376
Part 3, markup compatibility); the fallback copy is skipped when a choice holds the text box.

Footnotes and endnotes (``word/footnotes.xml``, ``word/endnotes.xml``; ECMA-376 Part 1, 17.11;
from memory) follow the paragraph or table that first references them (``w:footnoteReference`` /
``w:endnoteReference``; for a reference in a text box, the paragraph anchoring it, before the
box's own text), as PARAGRAPH segments under the same heading
path, each paragraph starting "Footnote N:" or "Endnote N:", N counting references in document
order as Word numbers them. Separator notes (``w:type`` set) carry no text and are skipped; a
note nothing references is not shown by Word and is not read. Headers and footers are not read:
they repeat on every page and are mostly page furniture.

Paragraph text is read from the paragraph's XML by ``paragraph_text`` rather than with
python-docx's ``Paragraph.text``, which joins only runs and hyperlinks that are direct children of
the paragraph and so loses tracked insertions, inline content controls, smart tags, simple fields
and run-level custom XML. What ``paragraph_text`` returns is what a reader of the final document
sees: insertions in, deletions and moved-from text out, field results in, field codes out.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import docx
from docx.document import Document as WordDocument
from docx.opc.constants import RELATIONSHIP_TYPE as RT
from docx.oxml import parse_xml
from docx.oxml.ns import qn
from docx.oxml.xmlchemy import BaseOxmlElement
from docx.table import Table, _Cell
from docx.text.paragraph import Paragraph

from pipeline.errors import (
    CorruptDocument,
    EmptyDocument,
    UnsupportedDocument,
)
from pipeline.formats.container import open_checked_package
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
_HEADING_STYLE = re.compile(r"^heading\s*([1-9])$", re.IGNORECASE)
_TITLE_STYLE = "title"

_PARAGRAPH_TAG = qn("w:p")
_TABLE_TAG = qn("w:tbl")
_CONTENT_CONTROL_TAG = qn("w:sdt")
_CONTENT_CONTROL_CONTENT_TAG = qn("w:sdtContent")
_CUSTOM_XML_TAG = qn("w:customXml")
_TEXT_BOX_TAG = qn("w:txbxContent")
_ID_ATTRIBUTE = qn("w:id")
_TYPE_ATTRIBUTE = qn("w:type")
_VAL_ATTRIBUTE = qn("w:val")
_STYLE_TAG = qn("w:style")
_STYLE_ID_ATTRIBUTE = qn("w:styleId")
_DEFAULT_ATTRIBUTE = qn("w:default")
_NAME_TAG = qn("w:name")
_BASED_ON_TAG = qn("w:basedOn")
_PARAGRAPH_PROPERTIES_TAG = qn("w:pPr")
_PARAGRAPH_STYLE_TAG = qn("w:pStyle")
_NUMBERING_TAG = qn("w:numPr")
# ST_OnOff's true values (ECMA-376 Part 1, 22.9.2.7; from memory), as python-docx reads them.
_ON_VALUES = frozenset({"1", "true", "on"})
# (relationship type, note element, reference element, label) of the two kinds of notes.
_NOTE_KINDS = (
    (RT.FOOTNOTES, qn("w:footnote"), qn("w:footnoteReference"), "Footnote"),
    (RT.ENDNOTES, qn("w:endnote"), qn("w:endnoteReference"), "Endnote"),
)
# Elements of paragraph content, ECMA-376 Part 1 (from memory): run content 17.3.3, revisions
# 17.13.5, fields and hyperlinks 17.16, smart tags and custom XML 17.5.1, content controls 17.5.2.
_TEXT_TAG = qn("w:t")
_TAB_TAG = qn("w:tab")
_POSITIONAL_TAB_TAG = qn("w:ptab")
_BREAK_TAGS = frozenset({qn("w:br"), qn("w:cr")})
_NO_BREAK_HYPHEN_TAG = qn("w:noBreakHyphen")
_SYMBOL_TAG = qn("w:sym")
_SYMBOL_CHAR_ATTRIBUTE = qn("w:char")
_FIELD_CHAR_TAG = qn("w:fldChar")
_FIELD_CHAR_TYPE_ATTRIBUTE = qn("w:fldCharType")
# Containers whose content is shown as it stands. w:dir / w:bdo (bidirectional embedding) and
# w:rubyBase (the base text of a phonetic guide) hold runs the same way.
_TRANSPARENT_TAGS = frozenset(
    qn(tag)
    for tag in (
        "w:r",
        "w:ins",
        "w:moveTo",
        "w:hyperlink",
        "w:smartTag",
        "w:customXml",
        "w:fldSimple",
        "w:sdtContent",
        "w:dir",
        "w:bdo",
        "w:rubyBase",
    )
)
# w:sdt holds settings (w:sdtPr, w:sdtEndPr) beside its content; w:ruby holds the guide text
# (w:rt) beside the base text: only the named child is shown.
_SHOWN_CHILD_OF = {
    _CONTENT_CONTROL_TAG: qn("w:sdtContent"),
    qn("w:ruby"): qn("w:rubyBase"),
}
# Symbol fonts (Symbol, Wingdings, ...) address their glyphs as U+F000 + byte (ECMA-376 Part 1,
# 17.3.3.30 sym; from memory): a private-use code that means nothing without the font, so dropped.
_SYMBOL_FONT_CODES = range(0xF000, 0xF100)
_MARKUP_COMPATIBILITY = "{http://schemas.openxmlformats.org/markup-compatibility/2006}"
_FALLBACK_TAG = f"{_MARKUP_COMPATIBILITY}Fallback"
_CHOICE_TAG = f"{_MARKUP_COMPATIBILITY}Choice"


def _open_checked(data: bytes, limits: Limits) -> WordDocument:
    # A macro-enabled .docm or a template renamed to .docx is refused as not a plain document.
    return open_checked_package(
        data,
        limits,
        docx.Document,
        label=".docx",
        kind="a Word document",
        plain="a plain Word document",
        required=(MAIN_PART,),
        doctype_error=UnsupportedDocument,
    )


@dataclass(frozen=True)
class _Style:
    name: str  # lower-cased; "" for a style with no name
    numbered: bool  # the style's own paragraph properties hold a numbering reference


class _Styles:
    """The paragraph styles of one document, read once, and each paragraph's style chain: its
    style and the styles that one is based on, nearest first, as python-docx's
    ``Paragraph.style`` and ``BaseStyle.base_style`` give them. A paragraph with no style of its
    own, or one naming a missing or non-paragraph style, has the document's default paragraph
    style (the last one marked default, as python-docx takes it).

    python-docx finds a paragraph's style with an XPath over every style, and the default style
    with a scan that converts every style's type, once per paragraph; reading the styles once
    took the benchmark's 333 Word documents from 4.8 to 3.1 s of extraction."""

    def __init__(self, root: BaseOxmlElement) -> None:
        self._elements: dict[str, BaseOxmlElement] = {}
        defaults: list[BaseOxmlElement] = []
        for element in root.iterchildren(_STYLE_TAG):
            style_id = element.get(_STYLE_ID_ATTRIBUTE)
            if style_id is not None:
                self._elements.setdefault(style_id, element)  # the first of a repeated id wins
            if (
                element.get(_TYPE_ATTRIBUTE) == "paragraph"
                and element.get(_DEFAULT_ATTRIBUTE) in _ON_VALUES
            ):
                defaults.append(element)
        self._default = defaults[-1] if defaults else None
        self._chains: dict[str | None, tuple[_Style, ...]] = {}

    def chain(self, paragraph: Paragraph) -> tuple[_Style, ...]:
        properties = paragraph._p.find(_PARAGRAPH_PROPERTIES_TAG)
        reference = None if properties is None else properties.find(_PARAGRAPH_STYLE_TAG)
        style_id = None if reference is None else reference.get(_VAL_ATTRIBUTE)
        chain = self._chains.get(style_id)
        if chain is None:
            chain = self._chains[style_id] = self._resolve(style_id)
        return chain

    def _resolve(self, style_id: str | None) -> tuple[_Style, ...]:
        element = self._elements.get(style_id) if style_id else None
        if element is None or element.get(_TYPE_ATTRIBUTE) != "paragraph":
            element = self._default
        chain: list[_Style] = []
        while element is not None and len(chain) < 10:  # a cyclic basedOn chain must not hang us
            name = element.find(_NAME_TAG)
            properties = element.find(_PARAGRAPH_PROPERTIES_TAG)
            chain.append(
                _Style(
                    name=((name.get(_VAL_ATTRIBUTE) if name is not None else None) or "").lower(),
                    numbered=properties is not None and properties.find(_NUMBERING_TAG) is not None,
                )
            )
            based_on = element.find(_BASED_ON_TAG)
            element = None if based_on is None else self._elements.get(based_on.get(_VAL_ATTRIBUTE))
        return tuple(chain)


def _heading_level(chain: tuple[_Style, ...]) -> int | None:
    for style in chain:
        match = _HEADING_STYLE.match(style.name)
        if match:
            return int(match.group(1))
    return None


def _is_title(chain: tuple[_Style, ...]) -> bool:
    return bool(chain) and chain[0].name == _TITLE_STYLE


def _is_list_item(paragraph: Paragraph, chain: tuple[_Style, ...]) -> bool:
    properties = paragraph._p.find(_PARAGRAPH_PROPERTIES_TAG)
    if properties is not None and properties.find(_NUMBERING_TAG) is not None:
        return True
    return any(style.name.startswith("list") or style.numbered for style in chain)


def _symbol_text(symbol: BaseOxmlElement) -> str:
    try:
        code = int(symbol.get(_SYMBOL_CHAR_ATTRIBUTE) or "", 16)
    except ValueError:
        return ""
    if code in _SYMBOL_FONT_CODES or not 0x20 <= code <= 0x10FFFF or 0xD800 <= code <= 0xDFFF:
        return ""
    return chr(code)


class _FieldState:
    """Which complex fields are open, to tell their codes from their results.

    A complex field is ``fldChar begin``, its code, ``fldChar separate``, its result, ``fldChar
    end`` (ECMA-376 Part 1, 17.16.18; from memory), and fields nest. Text is shown only when every
    open field has reached its result: a field nested in another field's code is part of that code.
    """

    def __init__(self) -> None:
        self._in_result: list[bool] = []

    def showing(self) -> bool:
        return all(self._in_result)

    def mark(self, field_char: BaseOxmlElement) -> None:
        kind = field_char.get(_FIELD_CHAR_TYPE_ATTRIBUTE)
        if kind == "begin":
            self._in_result.append(False)
        elif kind == "separate" and self._in_result:
            self._in_result[-1] = True
        elif kind == "end" and self._in_result:
            self._in_result.pop()
        # An end or separate with no begin belongs to a field opened in an earlier paragraph
        # (a table of contents spans many); its result is shown, so there is nothing to undo.


def _run_content_text(element: BaseOxmlElement) -> str | None:
    """The characters one piece of run content shows, or None if ``element`` is not run content."""
    tag = element.tag
    if tag == _TEXT_TAG:
        return element.text or ""
    if tag in (_TAB_TAG, _POSITIONAL_TAB_TAG):
        return "\t"
    if tag in _BREAK_TAGS:
        return "\n"  # any break, page and column breaks too, separates words
    if tag == _NO_BREAK_HYPHEN_TAG:
        return "-"
    if tag == _SYMBOL_TAG:
        return _symbol_text(element)
    return None


def paragraph_text(paragraph: BaseOxmlElement) -> str:
    """The text a reader sees in the ``w:p`` element ``paragraph``, in document order.

    Guarantee: includes the runs inside tracked insertions and moves-to, hyperlinks, inline
    content controls, smart tags, custom XML and simple fields, at any depth, and the results of
    complex fields; excludes tracked deletions and moves-from, field codes, content-control
    settings and soft hyphens. Tabs come out as a tab character, breaks as a newline,
    non-breaking hyphens as ``-``. Text boxes and nested paragraphs are not included.
    """
    fields = _FieldState()
    parts: list[str] = []
    # An explicit stack rather than recursion: nesting depth is the document's choice.
    pending: list[Iterator[BaseOxmlElement]] = [paragraph.iterchildren()]
    while pending:
        element = next(pending[-1], None)
        if element is None:
            pending.pop()
        elif element.tag == _FIELD_CHAR_TAG:
            fields.mark(element)
        elif (text := _run_content_text(element)) is not None:
            if fields.showing():
                parts.append(text)
        elif element.tag in _TRANSPARENT_TAGS:
            pending.append(element.iterchildren())
        elif element.tag in _SHOWN_CHILD_OF:
            pending.append(element.iterchildren(_SHOWN_CHILD_OF[element.tag]))
        # Else not shown: w:pPr and w:rPr, w:del and w:moveFrom, w:delText and w:delInstrText
        # (deleted text), w:instrText (field codes), w:softHyphen (shown only at a line end),
        # drawings (text boxes are read as blocks of their own), bookmarks, references to notes.
    return "".join(parts)


def _iter_blocks(container: BaseOxmlElement, parent: Any) -> Iterator[Paragraph | Table]:
    """Paragraphs and tables of a block container (body, cell, text box) in document order.

    Guarantee: every ``w:p`` and ``w:tbl`` reachable from ``container`` through block-level
    content controls (``w:sdt`` > ``w:sdtContent``) and ``w:customXml``, however deeply nested, is
    yielded once, in document order, wrapped against ``parent`` (the python-docx object that owns
    the container, so style lookups reach the right part). Tables are yielded whole, not entered.
    """
    # An explicit stack rather than recursion: nesting depth is the document's choice.
    pending: list[Iterator[BaseOxmlElement]] = [container.iterchildren()]
    while pending:
        element = next(pending[-1], None)
        if element is None:
            pending.pop()
        elif element.tag == _PARAGRAPH_TAG:
            yield Paragraph(element, parent)
        elif element.tag == _TABLE_TAG:
            yield Table(element, parent)
        elif element.tag == _CONTENT_CONTROL_TAG:
            # w:sdtPr and w:sdtEndPr hold settings and placeholder references, not text.
            content = element.find(_CONTENT_CONTROL_CONTENT_TAG)
            if content is not None:
                pending.append(content.iterchildren())
        elif element.tag == _CUSTOM_XML_TAG:
            pending.append(element.iterchildren())


def _is_superseded_fallback(text_box: BaseOxmlElement, paragraph: BaseOxmlElement) -> bool:
    """Whether ``text_box`` is the VML fallback copy of a text box a sibling choice also holds."""
    element = text_box.getparent()
    while element is not None and element is not paragraph:
        if element.tag == _FALLBACK_TAG:
            alternatives = element.getparent()
            return alternatives is not None and any(
                choice.find(f".//{_TEXT_BOX_TAG}") is not None
                for choice in alternatives.iterchildren(_CHOICE_TAG)
            )
        element = element.getparent()
    return False


def _iter_text_boxes(paragraph: Paragraph) -> Iterator[BaseOxmlElement]:
    """The ``w:txbxContent`` elements anchored in ``paragraph``, in document order, each once.

    Nested text boxes are yielded too (after the one holding them): ``paragraph_text`` never
    includes a drawing's text, so each text box's own paragraphs are read exactly once.
    """
    element = paragraph._p
    for text_box in element.iter(_TEXT_BOX_TAG):
        if not _is_superseded_fallback(text_box, element):
            yield text_box


class _Notes:
    """The footnotes and endnotes of a document, handed out once each, in reference order."""

    def __init__(self, document: WordDocument) -> None:
        self._by_reference: dict[str, tuple[str, dict[str, BaseOxmlElement]]] = {}
        self._numbers = {label: 0 for *_, label in _NOTE_KINDS}
        self._seen: set[tuple[str, str]] = set()
        for rel in document.part.rels.values():
            for reltype, note_tag, reference_tag, label in _NOTE_KINDS:
                if rel.reltype != reltype or rel.is_external:
                    continue
                root = parse_xml(rel.target_part.blob)
                notes = {
                    note.get(_ID_ATTRIBUTE): note
                    for note in root.iterchildren(note_tag)
                    if note.get(_TYPE_ATTRIBUTE) in (None, "normal")
                }
                self._by_reference[reference_tag] = (label, notes)

    def referenced_in(self, element: BaseOxmlElement) -> Iterator[tuple[str, list[str]]]:
        """(label with number, paragraph texts) of each note first referenced in ``element``."""
        if not self._by_reference:
            return
        for reference in element.iter(*self._by_reference):
            label, notes = self._by_reference[reference.tag]
            note_id = reference.get(_ID_ATTRIBUTE)
            note = notes.get(note_id)
            if note is None or (label, note_id) in self._seen:
                continue
            self._seen.add((label, note_id))
            self._numbers[label] += 1
            texts = [normalise_text(paragraph_text(p)) for p in note.iter(_PARAGRAPH_TAG)]
            texts = [t for t in texts if t]
            if texts:
                yield f"{label} {self._numbers[label]}", texts


def _cell_text(cell: _Cell) -> str:
    """Text of a cell, including content controls and any table nested inside it."""
    parts: list[str] = []
    for block in _iter_blocks(cell._tc, cell):
        if isinstance(block, Paragraph):
            parts.append(paragraph_text(block._p))
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
    """Headings, paragraphs, list items and table rows of the body, in document order.

    Content inside block-level content controls counts as body content; text boxes follow the
    paragraph that anchors them, as paragraphs under the same heading path.
    """
    document = _open_checked(data, limits)
    try:
        notes = _Notes(document)
    except (KeyError, ValueError, AttributeError, SyntaxError) as error:  # lxml: SyntaxError
        kind = type(error).__name__
        raise CorruptDocument(f"damaged .docx notes part ({kind}: {error})") from error
    styles = _Styles(document.styles.element)
    segments: list[Segment] = []
    heading_stack: list[tuple[int, str]] = []
    title = normalise_text(document.core_properties.title or "") or None

    def current_path() -> str | None:
        return " > ".join(text for _, text in heading_stack) or None

    def add_notes(element: BaseOxmlElement) -> None:
        for label, texts in notes.referenced_in(element):
            for n, text in enumerate(texts):
                text = f"{label}: {text}" if n == 0 else text
                segments.append(Segment(text, Anchor(heading=current_path()), PARAGRAPH))

    def add_table(table: Table) -> None:
        for row in table.rows:
            text = _row_text(row.cells)
            if text:
                segments.append(Segment(text, Anchor(heading=current_path()), TABLE_ROW))
        add_notes(table._tbl)

    def add_text_boxes(anchor: Paragraph) -> None:
        # A text box is a side note: its paragraphs never open a heading or a list.
        for text_box in _iter_text_boxes(anchor):
            for block in _iter_blocks(text_box, document):
                if isinstance(block, Table):
                    add_table(block)
                    continue
                text = normalise_text(paragraph_text(block._p))
                if text:
                    segments.append(Segment(text, Anchor(heading=current_path()), PARAGRAPH))

    try:
        for block in _iter_blocks(document.element.body, document):
            if isinstance(block, Table):
                add_table(block)
                continue
            text = normalise_text(paragraph_text(block._p))
            chain = styles.chain(block) if text else ()
            level = _heading_level(chain)
            if level is not None:
                while heading_stack and heading_stack[-1][0] >= level:
                    heading_stack.pop()
                heading_stack.append((level, text))
                segments.append(Segment(text, Anchor(heading=current_path()), HEADING))
            elif text:
                if _is_title(chain) and title is None:
                    title = text
                kind = LIST_ITEM if _is_list_item(block, chain) else PARAGRAPH
                segments.append(Segment(text, Anchor(heading=current_path()), kind))
            # The paragraph's notes (a text box's too: the element holds it) before its boxes.
            add_notes(block._p)
            # Also after an empty paragraph: one that holds only a drawing still anchors it.
            add_text_boxes(block)
    except (KeyError, ValueError, AttributeError, IndexError) as error:
        raise CorruptDocument(f"damaged .docx body ({type(error).__name__}: {error})") from error
    if not segments:
        raise EmptyDocument("the Word document has no text in its body")
    return Extracted(media_type=DOCX_TYPE, segments=tuple(segments), title=title)
