"""Plain text and Markdown extraction, and the text decoding and normalisation every format shares.

Decoding order (``decode_text``): a byte-order mark decides (UTF-8, UTF-16 LE/BE); else UTF-16
without a BOM is recognised by its alternating NUL bytes; else strict UTF-8; else the encoding
charset-normalizer detects. A file whose decoded text is mostly control characters, or that
cannot be decoded at all, is binary data with a text suffix and raises ``CorruptDocument``.

Markdown is parsed by a small line-based reader written for upwell. It recognises the block
structure that matters for citations (ATX and setext headings, list items, GFM pipe tables,
fenced code, block quotes, front matter) and strips inline markup (emphasis, code spans, links,
images), so every segment keeps an exact 1-based inclusive line range.
"""

from __future__ import annotations

import codecs
import html
import re
import unicodedata
from collections.abc import Iterator
from dataclasses import dataclass

import charset_normalizer

from pipeline.errors import CorruptDocument, EmptyDocument
from pipeline.records import (
    HEADING,
    LIST_ITEM,
    PARAGRAPH,
    TABLE_ROW,
    Anchor,
    Extracted,
    Segment,
)

PLAIN_TEXT_TYPE = "text/plain"
MARKDOWN_TYPE = "text/markdown"

# Invisible format characters that only steer rendering (soft hyphen, zero-width space, the
# left-to-right / right-to-left marks, word joiner, a stray BOM). They split words for search
# if kept. ZWJ and ZWNJ are left alone: they change meaning in emoji and in some scripts.
_INVISIBLE = dict.fromkeys(map(ord, "\u00ad\u200b\u200e\u200f\u2060\ufeff"))
_WHITESPACE_RUN = re.compile(r"\s+")

# Control characters allowed in text: tab, line feed, vertical tab, form feed, carriage return.
_TEXT_CONTROLS = frozenset("\t\n\x0b\x0c\r")
# Share of control characters above which decoded bytes are taken for binary data. Text files
# carry almost none; random bytes decoded as a single-byte code page carry about 1 in 8.
_BINARY_CONTROL_SHARE = 0.05
_SNIFF_BYTES = 64 * 1024


def normalise_text(text: str) -> str:
    """Return ``text`` in the form every segment carries.

    Guarantee: NFKC-normalised, invisible format characters removed, every run of whitespace
    (including line breaks and no-break spaces) collapsed to one space, and stripped.
    """
    text = unicodedata.normalize("NFKC", text).translate(_INVISIBLE)
    return _WHITESPACE_RUN.sub(" ", text).strip()


def strip_boms_and_blanks(data: bytes) -> bytes:
    """The bytes left once byte-order marks, whitespace and NULs are removed (for empty checks)."""
    for bom in (codecs.BOM_UTF8, codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE):
        if data.startswith(bom):
            data = data[len(bom) :]
            break
    return data.strip(b" \t\r\n\x0b\x0c\x00")


def _guess_bomless_utf16(sample: bytes) -> str | None:
    """'utf-16-le' or 'utf-16-be' when NULs sit on one side of most byte pairs, else None.

    ASCII-range text in UTF-16 has a NUL in every code unit's high byte: on odd offsets for
    little-endian, even offsets for big-endian.
    """
    pairs = len(sample) // 2
    if pairs < 2:
        return None
    even_nuls = sample[0 : pairs * 2 : 2].count(0)
    odd_nuls = sample[1 : pairs * 2 : 2].count(0)
    if odd_nuls >= 0.4 * pairs and even_nuls <= 0.05 * pairs:
        return "utf-16-le"
    if even_nuls >= 0.4 * pairs and odd_nuls <= 0.05 * pairs:
        return "utf-16-be"
    return None


def _looks_binary(text: str) -> bool:
    sample = text[:_SNIFF_BYTES]
    if not sample:
        return False
    controls = sum(
        1 for char in sample if char not in _TEXT_CONTROLS and unicodedata.category(char) == "Cc"
    )
    return controls / len(sample) > _BINARY_CONTROL_SHARE


# Western code pages, preferred when detection cannot tell candidates apart: on short input
# charset-normalizer often ties Latin-1 with Arabic or Greek code pages (measured here on
# "Größe café"), and Western European is the likeliest legacy encoding for these documents.
_WESTERN_CODE_PAGES = ("cp1252", "latin_1", "iso8859_15")


def _detect_and_decode(data: bytes) -> str:
    matches = list(charset_normalizer.from_bytes(data))
    if not matches:
        raise CorruptDocument("binary data, not text (no text encoding fits)")
    least_chaos = min(match.chaos for match in matches)
    calm = [match for match in matches if match.chaos == least_chaos]
    most_coherent = max(match.coherence for match in calm)
    tied = [match for match in calm if match.coherence == most_coherent]
    for match in tied:
        for western in _WESTERN_CODE_PAGES:
            if western in match.could_be_from_charset:
                return data.decode(western, errors="replace")
    return str(tied[0])


def decode_text(data: bytes) -> str:
    """Decode the bytes of a text file; raise ``CorruptDocument`` if they are not text.

    Guarantee: the result has no BOM and no NUL characters. UTF-8 (with or without BOM),
    UTF-16 (with or without BOM) and single-byte encodings such as Latin-1 decode correctly.
    """
    text: str | None = None
    if data.startswith(codecs.BOM_UTF8):
        text = data[len(codecs.BOM_UTF8) :].decode("utf-8", errors="replace")
    elif data.startswith(codecs.BOM_UTF16_LE):
        text = data[2:].decode("utf-16-le", errors="replace")
    elif data.startswith(codecs.BOM_UTF16_BE):
        text = data[2:].decode("utf-16-be", errors="replace")
    else:
        utf16 = _guess_bomless_utf16(data[:_SNIFF_BYTES])
        if utf16 is not None:
            text = data.decode(utf16, errors="replace")
    if text is None:
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError:
            text = _detect_and_decode(data)
    if _looks_binary(text.replace("\x00", "\x01")):
        # NULs count as control characters here (a text file has none), before they are removed.
        raise CorruptDocument("binary data, not text (mostly control characters)")
    return text.replace("\x00", "").lstrip("\ufeff")


def split_lines(text: str) -> list[str]:
    """Split on CRLF, CR or LF only, so line numbers match what an editor shows."""
    return text.replace("\r\n", "\n").replace("\r", "\n").split("\n")


# --- plain text --------------------------------------------------------------------------------


def extract_plain_text(data: bytes) -> Extracted:
    """One PARAGRAPH per run of non-blank lines, anchored by its 1-based inclusive line range."""
    lines = split_lines(decode_text(data))
    segments: list[Segment] = []
    start: int | None = None
    for number, line in enumerate([*lines, ""], start=1):
        if line.strip():
            if start is None:
                start = number
            continue
        if start is not None:
            text = normalise_text(" ".join(lines[start - 1 : number - 1]))
            if text:
                anchor = Anchor(line_start=start, line_end=number - 1)
                segments.append(Segment(text, anchor, PARAGRAPH))
            start = None
    if not segments:
        raise EmptyDocument("no text in the file")
    return Extracted(media_type=PLAIN_TEXT_TYPE, segments=tuple(segments))


# --- Markdown: block structure -------------------------------------------------------------------

# Patterns follow the CommonMark 0.31 and GFM specifications (https://spec.commonmark.org/,
# https://github.github.com/gfm/): up to three spaces of indentation before a block marker.
_ATX_HEADING = re.compile(r"^ {0,3}(#{1,6})(?:[ \t]+(.*?))?(?:[ \t]+#+)?[ \t]*$")
_SETEXT_UNDERLINE = re.compile(r"^ {0,3}(=+|-+)[ \t]*$")
_THEMATIC_BREAK = re.compile(r"^ {0,3}([-*_])(?:[ \t]*\1){2,}[ \t]*$")
_LIST_MARKER = re.compile(r"^([ \t]*)([-*+]|(\d{1,9})[.)])(?:[ \t]+(.*)|[ \t]*$)")
_FENCE_OPEN = re.compile(r"^ {0,3}(`{3,}|~{3,})(.*)$")
_BLOCKQUOTE = re.compile(r"^ {0,3}> ?")
_TABLE_DELIMITER = re.compile(r"^ {0,3}\|?[ \t]*:?-+:?[ \t]*(?:\|[ \t]*:?-+:?[ \t]*)*\|?[ \t]*$")
_LINK_DEFINITION = re.compile(r"^ {0,3}\[[^\]]+\]:\s*\S+")


@dataclass
class _Block:
    kind: str
    lines: list[str]
    first: int  # 1-based line numbers, inclusive
    last: int
    level: int = 0  # heading level
    code: bool = False  # fenced code: kept literally, no inline markup stripped


def _table_cells(line: str) -> list[str]:
    body = line.strip()
    if body.startswith("|"):
        body = body[1:]
    if body.endswith("|") and not body.endswith("\\|"):
        body = body[:-1]
    cells = re.split(r"(?<!\\)\|", body)
    return [cell.strip().replace("\\|", "|") for cell in cells]


def _closes_fence(line: str, fence: str) -> bool:
    stripped = line.strip()
    return (
        len(line) - len(line.lstrip(" ")) <= 3
        and stripped.startswith(fence[0] * len(fence))
        and set(stripped) == {fence[0]}
    )


def _markdown_blocks(lines: list[str]) -> Iterator[_Block]:
    """Yield the blocks of a Markdown document in order, each with its line range."""
    index = 0
    if lines and lines[0].strip() == "---":
        # YAML front matter: metadata, not text. Only when it is closed; otherwise "---" on
        # line 1 is an ordinary thematic break.
        for end in range(1, len(lines)):
            if lines[end].strip() in ("---", "..."):
                index = end + 1
                break
    paragraph: _Block | None = None
    item: _Block | None = None

    def flush() -> Iterator[_Block]:
        nonlocal paragraph, item
        if paragraph is not None:
            yield paragraph
        if item is not None:
            yield item
        paragraph = item = None

    while index < len(lines):
        number = index + 1
        line = lines[index]
        while _BLOCKQUOTE.match(line):
            line = _BLOCKQUOTE.sub("", line, count=1)
        index += 1

        if not line.strip():
            yield from flush()
            continue

        fence = _FENCE_OPEN.match(line)
        if fence and not (fence.group(1)[0] == "`" and "`" in fence.group(2)):
            yield from flush()
            body: list[str] = []
            last = number
            while index < len(lines):
                last = index + 1
                if _closes_fence(lines[index], fence.group(1)):
                    index += 1
                    break
                body.append(lines[index])
                index += 1
            yield _Block(PARAGRAPH, body, number, last, code=True)
            continue

        heading = _ATX_HEADING.match(line)
        if heading:
            yield from flush()
            level = len(heading.group(1))
            yield _Block(HEADING, [heading.group(2) or ""], number, number, level)
            continue

        underline = _SETEXT_UNDERLINE.match(line)
        if underline and paragraph is not None:
            level = 1 if underline.group(1)[0] == "=" else 2
            yield _Block(HEADING, paragraph.lines, paragraph.first, number, level)
            paragraph = None
            continue

        if _THEMATIC_BREAK.match(line):
            yield from flush()
            continue

        if (
            paragraph is None
            and "|" in line
            and index < len(lines)
            and _TABLE_DELIMITER.match(lines[index])
            and len(_table_cells(lines[index])) == len(_table_cells(line))
        ):
            yield from flush()
            yield _Block(TABLE_ROW, [line], number, number)
            index += 1  # the delimiter row carries no text
            while index < len(lines) and lines[index].strip() and "|" in lines[index]:
                yield _Block(TABLE_ROW, [lines[index]], index + 1, index + 1)
                index += 1
            continue

        marker = _LIST_MARKER.match(line)
        # An ordered item interrupts a paragraph only when it starts at 1 (CommonMark 5.2), so a
        # wrapped line that happens to begin "2019." stays in its paragraph.
        if marker and not (paragraph is not None and marker.group(3) not in (None, "1")):
            if marker.group(4) is not None or paragraph is None:
                yield from flush()
                item = _Block(LIST_ITEM, [marker.group(4) or ""], number, number)
                continue

        if paragraph is None and item is None and _LINK_DEFINITION.match(line):
            continue  # a link reference definition: a URL, not prose

        if item is not None and paragraph is None:
            item.lines.append(line)  # continuation (indented or lazy) of the list item
            item.last = number
        elif paragraph is not None:
            paragraph.lines.append(line)
            paragraph.last = number
        else:
            paragraph = _Block(PARAGRAPH, [line], number, number)
    yield from flush()


# --- Markdown: inline markup ---------------------------------------------------------------------

_CODE_SPAN = re.compile(r"(`+)(.+?)\1", re.DOTALL)
_IMAGE = re.compile(r"!\[([^\]]*)\]\([^)]*\)")
_INLINE_LINK = re.compile(r"\[([^\]]*)\]\([^)]*\)")
_REFERENCE_LINK = re.compile(r"\[([^\]]+)\]\[[^\]]*\]")
_AUTOLINK = re.compile(r"<((?:https?|mailto|ftp):[^>\s]+)>")
_HTML_TAG = re.compile(r"</?[A-Za-z][A-Za-z0-9-]*(?:\s[^<>]*)?/?>|<!--.*?-->", re.DOTALL)
_STRONG = re.compile(r"(\*\*|__)(?=\S)(.+?)(?<=\S)\1")
_EMPHASIS_STAR = re.compile(r"\*(?=\S)(.+?)(?<=\S)\*")
# Underscore emphasis only at word edges, so snake_case names survive (CommonMark 6.2).
_EMPHASIS_UNDERSCORE = re.compile(r"(?<![\w_])_(?=\S)(.+?)(?<=\S)_(?![\w_])")
_STRIKETHROUGH = re.compile(r"~~(?=\S)(.+?)(?<=\S)~~")
_BACKSLASH_ESCAPE = re.compile(r"\\([!-/:-@\[-`{-~])")


def _strip_inline_markup(text: str) -> str:
    """Plain text of a Markdown inline run; code spans are kept literally."""
    pieces: list[str] = []
    position = 0
    for code in _CODE_SPAN.finditer(text):
        pieces.append(_strip_prose_markup(text[position : code.start()]))
        pieces.append(code.group(2).strip())
        position = code.end()
    pieces.append(_strip_prose_markup(text[position:]))
    return "".join(pieces)


def _strip_prose_markup(text: str) -> str:
    text = _IMAGE.sub(r"\1", text)
    text = _INLINE_LINK.sub(r"\1", text)
    text = _REFERENCE_LINK.sub(r"\1", text)
    text = _AUTOLINK.sub(r"\1", text)
    text = _HTML_TAG.sub("", text)
    text = _STRONG.sub(r"\2", text)
    text = _EMPHASIS_STAR.sub(r"\1", text)
    text = _EMPHASIS_UNDERSCORE.sub(r"\1", text)
    text = _STRIKETHROUGH.sub(r"\1", text)
    text = _BACKSLASH_ESCAPE.sub(r"\1", text)
    return html.unescape(text)


def extract_markdown(data: bytes) -> Extracted:
    """Segments of a Markdown file with heading paths and line ranges; title = first H1."""
    lines = split_lines(decode_text(data))
    segments: list[Segment] = []
    heading_stack: list[tuple[int, str]] = []
    title: str | None = None
    for block in _markdown_blocks(lines):
        if block.code:
            text = normalise_text("\n".join(block.lines))
        elif block.kind == TABLE_ROW:
            cells = [
                normalise_text(_strip_inline_markup(cell)) for cell in _table_cells(block.lines[0])
            ]
            text = " | ".join(cells) if any(cells) else ""
        else:
            text = normalise_text(_strip_inline_markup("\n".join(block.lines)))
        if not text:
            continue
        if block.kind == HEADING:
            while heading_stack and heading_stack[-1][0] >= block.level:
                heading_stack.pop()
            heading_stack.append((block.level, text))
            if block.level == 1 and title is None:
                title = text
        path = " > ".join(name for _, name in heading_stack) or None
        anchor = Anchor(heading=path, line_start=block.first, line_end=block.last)
        segments.append(Segment(text, anchor, block.kind))
    if not segments:
        raise EmptyDocument("no text in the file")
    return Extracted(media_type=MARKDOWN_TYPE, segments=tuple(segments), title=title)
