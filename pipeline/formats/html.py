"""HTML extraction with lxml.html: headings as heading-path anchors, blocks as segments.

The page is parsed by libxml2's HTML parser (through lxml.html), which repairs markup the way
browsers tolerate it (implied end tags, stray closing tags). The tree is then walked without
recursion, so a deeply nested page cannot exhaust Python's stack:

- ``h1``-``h6`` become HEADING segments and set the heading path (``"Brakes > Pads"``) of every
  segment after them, as in the Markdown extractor;
- ``p``, ``li``, ``pre``, ``blockquote``, ``dd``/``dt`` and other block elements become PARAGRAPH
  (LIST_ITEM inside ``li``) segments; text directly inside a ``div`` or ``section`` is kept too;
- a table row becomes one TABLE_ROW segment, its cells joined with ``" | "``;
- ``script``, ``style``, ``nav``, ``header``, ``footer``, ``aside``, ``noscript``, ``template``,
  ``svg``, the ``head`` (except its ``title``), comments and elements with the ``hidden``
  attribute are dropped: page furniture and code, not content.

The title is the ``<title>``; without one, the first ``h1``. Text is decoded by the page's own
declaration (BOM, then ``<meta charset>``), else as UTF-8, else by detection.
"""

from __future__ import annotations

import codecs
import re

import lxml.html
from lxml import etree

from pipeline.errors import CorruptDocument, EmptyDocument, UnsupportedDocument
from pipeline.formats.text import decode_text, normalise_text
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW, Anchor, Extracted, Segment

HTML_TYPE = "text/html"
_MAX_DEPTH = 2048  # libxml2's nesting limit with huge_tree (its message says so)

DROPPED_TAGS = frozenset(
    {"script", "style", "nav", "header", "footer", "aside", "noscript", "template", "svg", "head"}
)
HEADING_TAGS = {f"h{level}": level for level in range(1, 7)}
# Elements that start and end a block of text (HTML Living Standard, "flow content" that
# browsers render as blocks; list from memory). Inline elements (a, b, span, em ...) do not.
BLOCK_TAGS = frozenset(
    {
        "address", "article", "blockquote", "body", "caption", "center", "dd", "details",
        "dialog", "div", "dl", "dt", "fieldset", "figcaption", "figure", "form", "hgroup", "hr",
        "html", "legend", "li", "main", "menu", "ol", "p", "pre", "search", "section", "summary",
        "table", "tbody", "td", "tfoot", "th", "thead", "ul",
    }
)  # fmt: skip
CELL_TAGS = frozenset({"td", "th"})

# The encoding prescan looks at the first 1024 bytes (HTML Living Standard 13.2.3.2 [from memory]).
_PRESCAN_BYTES = 1024
_META_CHARSET = re.compile(
    rb"""<meta\s[^>]*?charset\s*=\s*["']?\s*([A-Za-z0-9._:-]+)""", re.IGNORECASE
)
_XML_DECLARATION = re.compile(r"^\s*<\?xml[^>]*\?>")
# Labels the Encoding Standard maps to windows-1252, and UTF-16 declared inside the bytes, which
# it treats as UTF-8 (a declaration readable as ASCII cannot be UTF-16). From memory.
_WINDOWS_1252_LABELS = frozenset({"iso-8859-1", "iso8859-1", "latin1", "l1", "us-ascii", "ascii"})


def _declared_encoding(data: bytes) -> str | None:
    """The codec the page declares with a BOM or a ``<meta charset>``, if Python knows it."""
    if data.startswith(codecs.BOM_UTF8):
        return "utf-8-sig"
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        return "utf-16"
    match = _META_CHARSET.search(data[:_PRESCAN_BYTES])
    if match is None:
        return None
    label = match.group(1).decode("ascii").lower()
    if label in _WINDOWS_1252_LABELS:
        return "cp1252"
    if label.startswith("utf-16"):
        return "utf-8"
    try:
        return codecs.lookup(label).name
    except LookupError:
        return None


def decode_html(data: bytes) -> str:
    """The page's text: by its declared encoding, else UTF-8, else as ``decode_text`` guesses."""
    encoding = _declared_encoding(data)
    if encoding is not None:
        text = data.decode(encoding, errors="replace")
    else:
        text = decode_text(data)
    # lxml refuses a str that still carries an XML encoding declaration (XHTML pages).
    return _XML_DECLARATION.sub("", text.lstrip("\ufeff"), count=1).replace("\x00", "")


def _is_hidden(element: etree._Element) -> bool:
    return element.get("hidden") is not None


class _Walker:
    """Collects segments from a start/end walk of the tree."""

    def __init__(self) -> None:
        self.segments: list[Segment] = []
        self.headings: list[tuple[int, str]] = []
        self.first_h1: str | None = None
        self.pieces: list[str] = []  # text of the block being gathered
        self.kinds: list[str] = []  # innermost block kind last: LIST_ITEM inside li
        # A heading or a table row gathers its whole text into one segment.
        self.capture: etree._Element | None = None
        self.cells: list[str] = []
        self.in_cell = False

    def heading_path(self) -> str | None:
        return " > ".join(name for _, name in self.headings) or None

    def flush(self) -> None:
        text = normalise_text("".join(self.pieces))
        self.pieces = []
        if text:
            kind = self.kinds[-1] if self.kinds else PARAGRAPH
            self.segments.append(Segment(text, Anchor(heading=self.heading_path()), kind))

    def start(self, element: etree._Element) -> None:
        tag = element.tag
        if self.capture is not None:
            if tag in CELL_TAGS and self.capture.tag == "tr":
                self._start_cell()
            elif tag in BLOCK_TAGS or tag == "br":
                self.pieces.append(" ")
        elif tag in HEADING_TAGS or tag == "tr":
            self.flush()
            self.capture = element
            self.cells = []
            self.in_cell = False
        elif tag in BLOCK_TAGS:
            self.flush()
            self.kinds.append(LIST_ITEM if tag == "li" else PARAGRAPH)
        elif tag == "br":
            self.pieces.append(" ")
        if element.text:
            self.pieces.append(element.text)

    def end(self, element: etree._Element) -> None:
        tag = element.tag
        if self.capture is element:
            self.capture = None
            if tag == "tr":
                self._start_cell()  # closes the last cell
                self.pieces = []
                if any(self.cells):
                    anchor = Anchor(heading=self.heading_path())
                    self.segments.append(Segment(" | ".join(self.cells), anchor, TABLE_ROW))
            else:
                self._end_heading(HEADING_TAGS[tag])
        elif self.capture is not None:
            if tag in BLOCK_TAGS:
                self.pieces.append(" ")
        elif tag in BLOCK_TAGS:
            self.flush()
            self.kinds.pop()
        self.tail(element)

    def tail(self, node: etree._Element) -> None:
        if node.tail:
            self.pieces.append(node.tail)

    def _start_cell(self) -> None:
        """Close the cell being gathered, if any; text between cells joins the one before it
        (whitespace, mostly), and text before the first cell is dropped (none is rendered)."""
        if self.in_cell:
            self.cells.append(normalise_text("".join(self.pieces)))
        self.pieces = []
        self.in_cell = True

    def _end_heading(self, level: int) -> None:
        text = normalise_text("".join(self.pieces))
        self.pieces = []
        if not text:
            return
        while self.headings and self.headings[-1][0] >= level:
            self.headings.pop()
        self.headings.append((level, text))
        if level == 1 and self.first_h1 is None:
            self.first_h1 = text
        self.segments.append(Segment(text, Anchor(heading=self.heading_path()), HEADING))


def extract_html(data: bytes) -> Extracted:
    """Segments of an HTML page with heading paths; title from ``<title>``, else the first h1.

    Guarantee: at least one segment, in document order, none from dropped elements; otherwise
    ``EmptyDocument`` (no text) or ``CorruptDocument`` (the parser found no document).
    """
    text = decode_html(data)
    # huge_tree lifts libxml2's nesting limit from 256 to 2,048 levels; past it the parser
    # stops reading (measured here), so such a page fails rather than losing text silently.
    parser = lxml.html.HTMLParser(huge_tree=True)
    try:
        root = lxml.html.document_fromstring(text, parser=parser)
    except (etree.ParserError, ValueError) as exc:
        raise CorruptDocument(f"not a readable HTML page ({exc})") from None
    if any(error.type_name == "ERR_RESOURCE_LIMIT" for error in parser.error_log):
        raise UnsupportedDocument(
            f"the page nests elements deeper than {_MAX_DEPTH:,} levels, past what the HTML "
            "parser reads; text below that depth would be lost"
        )
    titles = root.xpath("/html/head/title")
    title = normalise_text(titles[0].text_content()) if titles else ""

    walker = _Walker()
    walk = etree.iterwalk(root, events=("start", "end", "comment", "pi"))
    dropped: etree._Element | None = None
    for event, node in walk:
        if event in ("comment", "pi"):
            walker.tail(node)  # the comment itself is not text; what follows it is
        elif not isinstance(node.tag, str):
            continue  # entities lxml could not resolve
        elif event == "start":
            if node.tag in DROPPED_TAGS or _is_hidden(node):
                walk.skip_subtree()  # the next event is this element's "end"
                dropped = node
            else:
                walker.start(node)
        elif node is dropped:
            dropped = None
            walker.tail(node)  # the text after a dropped element is still content
        else:
            walker.end(node)
    walker.flush()
    if not walker.segments:
        raise EmptyDocument("no text in the page")
    return Extracted(
        media_type=HTML_TYPE,
        segments=tuple(walker.segments),
        title=title or walker.first_h1,
    )
