"""PowerPoint .pptx extraction with python-pptx, after checking the zip container is safe to open.

Checks before python-pptx sees the file (it reads whole parts into memory with no cap):

* the bytes are a zip archive (else ``CorruptDocument`` saying what they look like) with a
  ``ppt/presentation.xml`` part (else ``CorruptDocument``);
* the declared uncompressed sizes sum to at most ``limits.max_inflated_bytes`` and no part
  larger than 1 MiB inflates by more than ``limits.max_inflate_ratio`` (else
  ``DocumentTooLarge``), as for .docx: the declared sizes bound what ``zipfile`` inflates;
* no XML part declares a DOCTYPE or an entity (else ``CorruptDocument``): OOXML forbids it
  (ECMA-376 Part 2, 8.1.4; from memory), and an internal entity subset is how an entity
  expansion bomb ("billion laughs") is built. Parts are scanned as streams, never parsed, so no
  entity is ever expanded.

What is read, slide by slide in presentation order (``Anchor.page`` is the 1-based slide number,
``Anchor.heading`` the slide's title, or None when it has none):

1. the title placeholder's text, as one HEADING segment;
2. the text of every other shape in reading order: top to bottom, then left to right by the
   shape's position (a placeholder's inherited position counts; shapes without one come last, in
   the order the slide lists them). Group shapes are entered and their members ordered the same
   way among themselves, at the group's place. Each non-empty paragraph is one segment, a
   LIST_ITEM when it is a bullet, else a PARAGRAPH. The rule for a bullet is kept simple and
   judged on the paragraph and its shape only, not on the slide master's list styles:
   its indent level is above 0, or its properties name a bullet character or automatic
   numbering (``a:buChar`` / ``a:buAutoNum``), or it sits in a body or content placeholder
   (whose text the master bullets) without ``a:buNone``;
3. tables, one TABLE_ROW segment per row, cells joined with " | " (a cell covered by a merge
   is skipped, so a merged cell appears once);
4. the speaker notes (the notes slide's body placeholder), one PARAGRAPH segment per paragraph,
   each starting "Notes: " so a search result shows where its text came from.

Footer, date and slide-number placeholders are page furniture and are not read; nor are
pictures, charts or SmartArt. ``Extracted.title`` is the core properties' title when set.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pptx
from pptx.enum.shapes import PP_PLACEHOLDER
from pptx.oxml.ns import qn
from pptx.shapes.group import GroupShape

from pipeline.errors import CorruptDocument, EmptyDocument
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

PPTX_TYPE = "application/vnd.openxmlformats-officedocument.presentationml.presentation"

MAIN_PART = "ppt/presentation.xml"
NOTES_PREFIX = "Notes: "

_TITLE_TYPES = frozenset({PP_PLACEHOLDER.TITLE, PP_PLACEHOLDER.CENTER_TITLE})
_FURNITURE_TYPES = frozenset(
    {PP_PLACEHOLDER.FOOTER, PP_PLACEHOLDER.DATE, PP_PLACEHOLDER.SLIDE_NUMBER}
)
_BULLETED_TYPES = frozenset({PP_PLACEHOLDER.BODY, PP_PLACEHOLDER.OBJECT})
_BULLET_TAGS = (qn("a:buChar"), qn("a:buAutoNum"))
_NO_BULLET_TAG = qn("a:buNone")
# Sorts a shape with no position after every positioned one (EMU fit comfortably below this).
_UNPLACED = 1 << 62


def _open_checked(data: bytes, limits: Limits) -> Any:
    # Bytes that are not a zip at all are refused earlier, by the format table's check, which
    # says what they look like; here the container itself is checked. A macro-enabled .pptm, a
    # template or a slide show renamed to .pptx is refused as not a plain presentation.
    return open_checked_package(
        data,
        limits,
        pptx.Presentation,
        label=".pptx",
        kind="a PowerPoint presentation",
        plain="a plain PowerPoint presentation",
        required=(MAIN_PART,),
    )


def _placeholder_type(shape: Any) -> Any:
    return shape.placeholder_format.type if shape.is_placeholder else None


def _position(shape: Any) -> tuple[int, int]:
    try:
        top, left = shape.top, shape.left
    except (AttributeError, KeyError, ValueError):  # a placeholder whose layout part is gone
        top = left = None
    return (_UNPLACED if top is None else top, _UNPLACED if left is None else left)


def _reading_order(shapes: Any) -> Iterator[Any]:
    """Leaf shapes in reading order, group shapes entered (an explicit stack: depth is the
    file's choice). ``sorted`` is stable, so unplaced shapes keep the slide's order."""
    pending: list[Iterator[Any]] = [iter(sorted(shapes, key=_position))]
    while pending:
        shape = next(pending[-1], None)
        if shape is None:
            pending.pop()
        elif isinstance(shape, GroupShape):
            pending.append(iter(sorted(shape.shapes, key=_position)))
        else:
            yield shape


def _is_list_item(paragraph: Any, placeholder_type: Any) -> bool:
    if paragraph.level > 0:
        return True
    properties = paragraph._p.pPr
    if properties is not None:
        if properties.find(_NO_BULLET_TAG) is not None:
            return False
        if any(properties.find(tag) is not None for tag in _BULLET_TAGS):
            return True
    return placeholder_type in _BULLETED_TYPES


def _row_text(row: Any) -> str:
    texts = [normalise_text(cell.text) for cell in row.cells if not cell.is_spanned]
    return " | ".join(texts) if any(texts) else ""


def _slide_segments(slide: Any, page: int) -> list[Segment]:
    title_shape = next(
        (shape for shape in slide.shapes if _placeholder_type(shape) in _TITLE_TYPES), None
    )
    title = normalise_text(title_shape.text_frame.text) if title_shape is not None else ""
    anchor = Anchor(page=page, heading=title or None)
    segments: list[Segment] = []
    if title:
        segments.append(Segment(title, anchor, HEADING))
    for shape in _reading_order(slide.shapes):
        is_title = title_shape is not None and shape.shape_id == title_shape.shape_id
        if is_title or (kind := _placeholder_type(shape)) in _FURNITURE_TYPES:
            continue
        if shape.has_text_frame:
            for paragraph in shape.text_frame.paragraphs:
                text = normalise_text(paragraph.text)
                if text:
                    segment_kind = LIST_ITEM if _is_list_item(paragraph, kind) else PARAGRAPH
                    segments.append(Segment(text, anchor, segment_kind))
        elif getattr(shape, "has_table", False) and shape.has_table:
            for row in shape.table.rows:
                text = _row_text(row)
                if text:
                    segments.append(Segment(text, anchor, TABLE_ROW))
    if slide.has_notes_slide:
        notes = slide.notes_slide.notes_text_frame
        for paragraph in notes.paragraphs if notes is not None else ():
            text = normalise_text(paragraph.text)
            if text:
                segments.append(Segment(NOTES_PREFIX + text, anchor, PARAGRAPH))
    return segments


def extract_pptx(data: bytes, limits: Limits) -> Extracted:
    """Per slide: its title, the text of its shapes in reading order, its tables, its notes."""
    presentation = _open_checked(data, limits)
    segments: list[Segment] = []
    try:
        title = normalise_text(presentation.core_properties.title or "") or None
        for page, slide in enumerate(presentation.slides, start=1):
            segments.extend(_slide_segments(slide, page))
    except (
        KeyError,
        ValueError,
        AttributeError,
        IndexError,
        SyntaxError,
        NotImplementedError,
    ) as error:
        # lxml's XMLSyntaxError is a SyntaxError; python-pptx loads a slide's XML when asked.
        raise CorruptDocument(f"damaged .pptx slide ({type(error).__name__}: {error})") from error
    if not segments:
        raise EmptyDocument("the PowerPoint presentation has no text on its slides or in notes")
    return Extracted(media_type=PPTX_TYPE, segments=tuple(segments), title=title)
