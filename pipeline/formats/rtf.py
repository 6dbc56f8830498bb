"""RTF extraction with striprtf: the document's text with its paragraphs, control words dropped.

RTF is 7-bit text: control words, groups in braces, ``\\'hh`` escapes for bytes of the code page
named by ``\\ansicpgN`` and ``\\uN`` for Unicode characters. striprtf turns ``\\par`` into a line
break and drops destinations such as the font table, the stylesheet and ``{\\*...}`` groups.

Each non-empty line of the converted text is one PARAGRAPH segment with ``line_start`` =
``line_end`` = its 1-based line in that text (RTF carries no pages or headings that survive
conversion). The code page for ``\\'hh`` escapes is the one the file declares (``\\ansicpgN``),
else Windows-1252, the RTF default (RTF 1.9.1 specification, "Character set"; from memory).

Refused with a reason: bytes that do not start with ``{\\rtf`` (``CorruptDocument`` saying what
they look like), a file whose braces never close at the top level (``CorruptDocument``, the
sign of a cut-off copy), and a file with no text (``EmptyDocument``).
"""

from __future__ import annotations

import codecs
import re

from striprtf.striprtf import rtf_to_text

from pipeline.errors import CorruptDocument, EmptyDocument
from pipeline.formats.text import normalise_text
from pipeline.records import PARAGRAPH, Anchor, Extracted, Segment

__all__ = ["RTF_TYPE", "extract_rtf"]

RTF_TYPE = "application/rtf"

_CODE_PAGE = re.compile(rb"\\ansicpg(\d{3,5})")
_DEFAULT_CODE_PAGE = "cp1252"


def _code_page(data: bytes) -> str:
    match = _CODE_PAGE.search(data[:4096])
    if match:
        name = f"cp{int(match.group(1))}"
        try:
            codecs.lookup(name)
        except LookupError:
            return _DEFAULT_CODE_PAGE
        return name
    return _DEFAULT_CODE_PAGE


def _braces_balance(data: bytes) -> bool:
    """True when the top-level group closes: braces counted outside ``\\{`` and ``\\}``."""
    unescaped = data.replace(b"\\\\", b"").replace(b"\\{", b"").replace(b"\\}", b"")
    return unescaped.count(b"{") <= unescaped.count(b"}")


def extract_rtf(data: bytes) -> Extracted:
    """One PARAGRAPH per non-empty line of the text striprtf makes of ``data``."""
    start = data.lstrip(b"\xef\xbb\xbf \t\r\n")
    if not start.startswith(b"{\\rtf"):
        from pipeline.formats.sniff import describe_content

        raise CorruptDocument(
            f"not an RTF document (no {{\\rtf header); it looks like {describe_content(data)}"
        )
    if not _braces_balance(start):
        raise CorruptDocument("damaged RTF: the document's braces never close (a cut-off copy?)")
    encoding = _code_page(start)
    # RTF is 7-bit by definition; stray 8-bit bytes are read in the declared code page.
    text = rtf_to_text(
        start.decode(encoding, errors="replace"), encoding=encoding, errors="replace"
    )
    segments = []
    for number, line in enumerate(text.splitlines(), start=1):
        cleaned = normalise_text(line)
        if cleaned:
            segments.append(
                Segment(
                    text=cleaned, anchor=Anchor(line_start=number, line_end=number), kind=PARAGRAPH
                )
            )
    if not segments:
        raise EmptyDocument("the RTF document holds no text")
    return Extracted(media_type=RTF_TYPE, segments=tuple(segments))
