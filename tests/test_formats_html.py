"""HTML pages: headings as heading paths, blocks as segments, page furniture dropped.

The reference reading is the standard library's ``html.parser`` (an event parser independent
of lxml/libxml2), driven by the rules the extractor documents: which tags are dropped, which
start a block, which are headings, list items and table rows.
"""

from __future__ import annotations

import codecs
import mimetypes
import unicodedata
from html.parser import HTMLParser

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.errors import CorruptDocument, EmptyDocument, UnsupportedDocument
from pipeline.formats import EXTRACTOR_VERSION, extract, media_type_for
from pipeline.formats.html import BLOCK_TAGS, DROPPED_TAGS, HEADING_TAGS
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW

VOID_TAGS = {"br", "hr", "img", "input", "meta", "link", "wbr", "source", "col", "area"}


class ReferenceReader(HTMLParser):
    """(kind, heading path, text) in order, read with html.parser, following the same rules.

    Written for well-formed markup (every element closed), which is what the fixtures are.
    """

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.rows: list[tuple[str, str | None, str]] = []
        self.title = ""
        self._in_title = False
        self._skip = 0  # depth inside a dropped element
        self._buffer: list[str] = []
        self._kinds: list[str] = []
        self._headings: list[tuple[int, str]] = []
        self._heading_level = 0
        self._row: list[str] | None = None
        self._cell: list[str] | None = None

    @staticmethod
    def _clean(text: str) -> str:
        return " ".join(unicodedata.normalize("NFKC", text).split())

    def _path(self) -> str | None:
        return " > ".join(name for _, name in self._headings) or None

    def _flush(self) -> None:
        text = self._clean("".join(self._buffer))
        self._buffer = []
        if text:
            self.rows.append((self._kinds[-1] if self._kinds else PARAGRAPH, self._path(), text))

    def handle_starttag(self, tag, attrs):
        if tag == "title":
            self._in_title = True
        if self._skip or tag in DROPPED_TAGS or any(name == "hidden" for name, _ in attrs):
            if tag not in VOID_TAGS:
                self._skip += 1
            return
        if tag in HEADING_TAGS:
            self._flush()
            self._heading_level = HEADING_TAGS[tag]
        elif tag == "tr":
            self._flush()
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
        elif tag == "br":
            (self._cell if self._cell is not None else self._buffer).append(" ")
        elif tag in BLOCK_TAGS and self._row is None and not self._heading_level:
            self._flush()
            self._kinds.append(LIST_ITEM if tag == "li" else PARAGRAPH)

    def handle_endtag(self, tag):
        if tag == "title":
            self._in_title = False
        if self._skip:
            if tag in DROPPED_TAGS or self._skip > 1 or tag not in VOID_TAGS:
                self._skip -= 1
            return
        if tag in HEADING_TAGS and self._heading_level:
            text = self._clean("".join(self._buffer))
            self._buffer = []
            level, self._heading_level = self._heading_level, 0
            if text:
                while self._headings and self._headings[-1][0] >= level:
                    self._headings.pop()
                self._headings.append((level, text))
                self.rows.append((HEADING, self._path(), text))
        elif tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append(self._clean("".join(self._cell)))
            self._cell = None
        elif tag == "tr" and self._row is not None:
            if any(self._row):
                self.rows.append((TABLE_ROW, self._path(), " | ".join(self._row)))
            self._row = None
        elif tag in BLOCK_TAGS and self._row is None and not self._heading_level:
            self._flush()
            if self._kinds:
                self._kinds.pop()

    def handle_data(self, data):
        if self._in_title:
            self.title += data
            return
        if self._skip:
            return
        if self._row is not None:
            if self._cell is not None:
                self._cell.append(data)
            return
        self._buffer.append(data)

    def close(self):
        super().close()
        self._flush()


def reference_reading(html: str) -> tuple[str, list[tuple[str, str | None, str]]]:
    reader = ReferenceReader()
    reader.feed(html)
    reader.close()
    return reader._clean(reader.title), reader.rows


def extracted_reading(data: bytes, name: str = "page.html"):
    result = extract(name, data)
    return result, [(s.kind, s.anchor.heading, s.text) for s in result.segments]


# An invented Marrowby Cycle Works page with the furniture a real site carries.
SERVICE_PAGE = """<!DOCTYPE html>
<html lang="en">
<head>
  <meta charset="utf-8">
  <title>Brake service &ndash; Marrowby Cycle Works</title>
  <style>p { color: #333 } /* <p>not text</p> */</style>
  <script>var note = "<p>not text either</p>";</script>
</head>
<body>
  <header><a href="/">Marrowby Cycle Works</a><h1>Site banner</h1></header>
  <nav><ul><li><a href="/manual/">Manual</a></li>
    <li><a href="/warranty/">Warranty</a></li></ul></nav>
  <main>
    <article>
      <h1>Brake service</h1>
      <p>Hydraulic brakes on the <em>Fellrunner</em> need a bleed once a year,
         or sooner if the lever feels <strong>soft</strong>.</p>
      <!-- editor's note: check the lever wording -->
      <h2>Pads</h2>
      <p>Replace both pads on an axle together&nbsp;&mdash; never one on its own.</p>
      <ol>
        <li>Remove the wheel.</li>
        <li>Push the pistons back with a plastic tyre lever.</li>
        <li>Fit the new pads and the retaining pin.</li>
      </ol>
      <h3>Torque values</h3>
      <table>
        <thead><tr><th>Bolt</th><th>Torque (Nm)</th></tr></thead>
        <tbody>
          <tr><td>Caliper mount</td><td>6</td></tr>
          <tr><td>Rotor bolt</td><td>4</td></tr>
        </tbody>
      </table>
      <h2>Hoses</h2>
      <div>Check each hose for kinks near the head tube.</div>
      <p hidden>Draft: a paragraph the page does not show.</p>
      <noscript><p>Enable scripts to see the video.</p></noscript>
      <template><p>Template row</p></template>
      <aside><p>Related: our wheel truing guide.</p></aside>
      <blockquote>A soft lever is air in the system, not worn pads.</blockquote>
    </article>
  </main>
  <footer><p>&copy; Marrowby Cycle Works</p></footer>
</body>
</html>
"""

EXPECTED_SERVICE_PAGE = [
    (HEADING, "Brake service", "Brake service"),
    (
        PARAGRAPH,
        "Brake service",
        "Hydraulic brakes on the Fellrunner need a bleed once a year, or sooner if the lever "
        "feels soft.",
    ),
    (HEADING, "Brake service > Pads", "Pads"),
    (PARAGRAPH, "Brake service > Pads",
     "Replace both pads on an axle together — never one on its own."),
    (LIST_ITEM, "Brake service > Pads", "Remove the wheel."),
    (LIST_ITEM, "Brake service > Pads", "Push the pistons back with a plastic tyre lever."),
    (LIST_ITEM, "Brake service > Pads", "Fit the new pads and the retaining pin."),
    (HEADING, "Brake service > Pads > Torque values", "Torque values"),
    (TABLE_ROW, "Brake service > Pads > Torque values", "Bolt | Torque (Nm)"),
    (TABLE_ROW, "Brake service > Pads > Torque values", "Caliper mount | 6"),
    (TABLE_ROW, "Brake service > Pads > Torque values", "Rotor bolt | 4"),
    (HEADING, "Brake service > Hoses", "Hoses"),
    (PARAGRAPH, "Brake service > Hoses", "Check each hose for kinks near the head tube."),
    (PARAGRAPH, "Brake service > Hoses", "A soft lever is air in the system, not worn pads."),
]  # fmt: skip


def test_html_suffixes_are_registered_as_text_html():
    # Reference: Python's mimetypes table maps .html and .htm to text/html (IANA registration).
    assert mimetypes.types_map[".html"] == mimetypes.types_map[".htm"] == "text/html"
    assert media_type_for("site/manual/Brakes.HTML") == "text/html"
    assert media_type_for("index.htm") == "text/html"
    assert int(EXTRACTOR_VERSION) >= 4  # bumped to 4 when .html was added


def test_service_page_matches_the_reference_reading_and_the_expected_segments():
    result, rows = extracted_reading(SERVICE_PAGE.encode("utf-8"))
    title, reference = reference_reading(SERVICE_PAGE)
    assert rows == reference  # reference: html.parser, standard library
    assert rows == EXPECTED_SERVICE_PAGE  # what a reader of the page sees, written out by hand
    assert result.title == title == "Brake service – Marrowby Cycle Works"
    assert result.media_type == "text/html"
    all_text = " ".join(text for _, _, text in rows)
    for furniture in ("not text", "Site banner", "Warranty", "Draft", "Enable scripts",
                      "Template row", "Related", "©", "editor's note"):  # fmt: skip
        assert furniture not in all_text


def test_markup_browsers_repair_gives_the_same_blocks():
    # Implied end tags (HTML Living Standard 13.1.2.4 [from memory]: p, li, td, tr may omit them).
    sloppy = (
        "<title>Returns</title><h2>Returns policy<p>Return a frame within 30 days."
        "<p>Keep the box.<ul><li>Frames<li>Wheels</ul><table><tr><td>Item<td>Days"
        "<tr><td>Saddle<td>14</table>"
    )
    _, rows = extracted_reading(sloppy.encode())
    assert rows == [
        (HEADING, "Returns policy", "Returns policy"),
        (PARAGRAPH, "Returns policy", "Return a frame within 30 days."),
        (PARAGRAPH, "Returns policy", "Keep the box."),
        (LIST_ITEM, "Returns policy", "Frames"),
        (LIST_ITEM, "Returns policy", "Wheels"),
        (TABLE_ROW, "Returns policy", "Item | Days"),
        (TABLE_ROW, "Returns policy", "Saddle | 14"),
    ]


def test_nested_lists_and_text_around_blocks_are_kept_in_order():
    page = (
        "<body><div>Before the list<ul><li>Wheels<ul><li>Front</li><li>Rear</li></ul>"
        "then true them</li></ul>after the list</div><p>a<br>b<span>c</span>d</p></body>"
    )
    _, rows = extracted_reading(page.encode())
    assert rows == reference_reading(page)[1]
    assert [(kind, text) for kind, _, text in rows] == [
        (PARAGRAPH, "Before the list"),
        (LIST_ITEM, "Wheels"),
        (LIST_ITEM, "Front"),
        (LIST_ITEM, "Rear"),
        (LIST_ITEM, "then true them"),
        (PARAGRAPH, "after the list"),
        (PARAGRAPH, "a bcd"),
    ]


def test_title_falls_back_to_the_first_h1():
    result, _ = extracted_reading(b"<h2>Intro</h2><h1>Saddle fitting</h1><p>Level it.</p>")
    assert result.title == "Saddle fitting"


@pytest.mark.parametrize(
    "encoded",
    [
        "<meta charset='iso-8859-1'><p>Größe: café</p>".encode("latin-1"),
        '<meta http-equiv="Content-Type" content="text/html; charset=windows-1252">'
        "<p>Größe: café</p>".encode("cp1252"),
        "<p>Größe: café</p>".encode(),
        codecs.BOM_UTF8 + "<p>Größe: café</p>".encode(),
        codecs.BOM_UTF16_LE + "<p>Größe: café</p>".encode("utf-16-le"),
        '<?xml version="1.0" encoding="utf-8"?>'
        "<html><body><p>Größe: café</p></body></html>".encode(),
    ],
    ids=["meta-latin1", "http-equiv-cp1252", "utf8", "utf8-bom", "utf16-bom", "xhtml-declaration"],
)
def test_declared_and_undeclared_encodings_decode_to_the_same_text(encoded):
    # Reference: the str the bytes were encoded from, with Python's codecs.
    _, rows = extracted_reading(encoded)
    assert rows == [(PARAGRAPH, None, "Größe: café")]


def test_empty_and_binary_pages_fail_with_a_reason():
    with pytest.raises(EmptyDocument):
        extract("a.html", b"<html><head><title>Only a title</title></head><body> </body></html>")
    with pytest.raises(EmptyDocument):
        extract("a.html", b"<nav><p>only navigation</p></nav><script>x()</script>")
    with pytest.raises(CorruptDocument, match="PNG image"):
        extract("logo.html", b"\x89PNG\r\n\x1a\n" + bytes(64))
    with pytest.raises(CorruptDocument, match="PDF"):
        extract("manual.htm", b"%PDF-1.7\n...")


def test_deeply_nested_page_is_read_or_refused_but_never_cut_short():
    depth = 1500  # past Python's default recursion limit of 1000
    page = "<div>" * depth + "<p>Deep note</p>" + "</div>" * depth + "<p>After</p>"
    _, rows = extracted_reading(page.encode())
    assert rows == [(PARAGRAPH, None, "Deep note"), (PARAGRAPH, None, "After")]
    # Deeper than libxml2 reads (2,048 levels, its own error message): refused, not truncated.
    deeper = "<div>" * 5000 + "<p>Deep note</p>" + "</div>" * 5000 + "<p>After</p>"
    with pytest.raises(UnsupportedDocument, match="deeper than 2,048"):
        extract("deep.html", deeper.encode())


# --- generated pages: the extractor reads back exactly the structure that was written ------

_WORDS = st.sampled_from(
    ["spoke", "rim", "hub", "brake", "chain", "saddle", "torque", "bleed", "true", "&", "<", "5"]
)
_TEXT = st.lists(_WORDS, min_size=1, max_size=6).map(" ".join)
_BLOCK = st.one_of(
    st.tuples(st.just("h"), st.integers(1, 4), _TEXT),
    st.tuples(st.just("p"), st.just(0), _TEXT),
    st.tuples(st.just("li"), st.just(0), _TEXT),
    st.tuples(st.just("tr"), st.integers(1, 3), _TEXT),
)


def _escape(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;")


def _render(blocks) -> str:
    out = []
    for kind, level, text in blocks:
        if kind == "h":
            out.append(f"<h{level}>{_escape(text)}</h{level}>")
        elif kind == "p":
            out.append(f"<p>{_escape(text)}</p>")
        elif kind == "li":
            out.append(f"<ul><li>{_escape(text)}</li></ul>")
        else:
            cells = "".join(f"<td>{_escape(text)}</td>" for _ in range(level))
            out.append(f"<table><tr>{cells}</tr></table>")
    return "<html><body><nav><p>menu</p></nav>" + "\n".join(out) + "</body></html>"


def _expected(blocks):
    headings: list[tuple[int, str]] = []
    rows = []
    for kind, level, text in blocks:
        if kind == "h":
            while headings and headings[-1][0] >= level:
                headings.pop()
            headings.append((level, text))
        path = " > ".join(t for _, t in headings) or None
        if kind == "tr":
            rows.append((TABLE_ROW, path, " | ".join([text] * level)))
        else:
            rows.append(({"h": HEADING, "p": PARAGRAPH, "li": LIST_ITEM}[kind], path, text))
    return rows


@settings(max_examples=60, deadline=None)
@given(st.lists(_BLOCK, min_size=1, max_size=12))
def test_generated_pages_read_back_as_written(blocks):
    page = _render(blocks)
    _, rows = extracted_reading(page.encode())
    assert rows == _expected(blocks)
    assert rows == reference_reading(page)[1]  # reference: html.parser, standard library
