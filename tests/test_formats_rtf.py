"""RTF extraction checked against the RTF specification's own rules for text.

There is no second RTF reader among the project's dependencies, so the fixtures are written
here by hand from the control words of the Rich Text Format specification 1.9.1 (from memory):
``\\par`` ends a paragraph, ``\\'hh`` is a byte in the declared ``\\ansicpgN`` code page,
``\\uN`` followed by one fallback character is a Unicode code point, ``{\\*\\dest ...}`` groups
and the font table are not document text, and ``\\{`` ``\\}`` ``\\\\`` are literal characters.
"""

from __future__ import annotations

import pytest

from pipeline.errors import CorruptDocument, EmptyDocument
from pipeline.formats import extract
from pipeline.records import PARAGRAPH

HEADER = rb"{\rtf1\ansi\ansicpg1252\deff0{\fonttbl{\f0\fswiss Arial;}}"
HEADER += rb"{\*\generator Marrowby notes 1.0;}\f0\fs22 "


def _rtf(body: bytes) -> bytes:
    return HEADER + body + b"}"


def test_paragraphs_become_segments_with_their_line_numbers():
    data = _rtf(
        rb"Wheel bench notice\par "
        rb"Spoke tension is checked with the meter on bench 6.\par "
        rb"\par "
        rb"Report a cracked rim to the stores lead.\par"
    )
    segments = extract("wheel-bench.rtf", data).segments
    # Spec: \par ends a paragraph; an empty \par is an empty line, not a segment.
    assert [s.text for s in segments] == [
        "Wheel bench notice",
        "Spoke tension is checked with the meter on bench 6.",
        "Report a cracked rim to the stores lead.",
    ]
    assert [s.anchor.line_start for s in segments] == [1, 2, 4]
    assert all(s.kind == PARAGRAPH and s.anchor.line_end == s.anchor.line_start for s in segments)


def test_escapes_in_the_declared_code_page_and_unicode_escapes_decode():
    # Spec: \'e9 is byte 0xE9 in code page 1252 (e acute); \u8212? is U+2014 with "?" as the
    # fallback that a Unicode-aware reader skips; \{ \} \\ are literal braces and backslash.
    data = _rtf(rb"Caf\'e9 corner \u8212? stock \{A3\} in bay C:\\racks\par")
    assert [s.text for s in extract("notes.rtf", data).segments] == [
        "Caf\u00e9 corner \u2014 stock {A3} in bay C:\\racks"
    ]


def test_another_declared_code_page_is_used_for_escapes():
    # Code page 1251 (Cyrillic): byte 0xC0 is U+0410 (Windows-1251 table; from memory).
    data = rb"{\rtf1\ansi\ansicpg1251 Bin \'c0-7\par}"
    assert extract("bins.rtf", data).segments[0].text == "Bin \u0410-7"


def test_destinations_and_the_font_table_are_not_text():
    data = _rtf(rb"{\*\company Marrowby Cycle Works}Frame serial MCW-0042 passed.\par")
    texts = [s.text for s in extract("serial.rtf", data).segments]
    assert texts == ["Frame serial MCW-0042 passed."]
    assert not any("Arial" in t or "generator" in t for t in texts)


def test_text_that_is_not_rtf_says_what_it_looks_like():
    with pytest.raises(CorruptDocument, match="not an RTF document.*plain text"):
        extract("notice.rtf", b"Just a plain notice about the spares desk.\n")


def test_a_cut_off_rtf_file_is_damaged():
    whole = _rtf(rb"{\b Bold start} and the rest\par")
    with pytest.raises(CorruptDocument, match="braces never close"):
        extract("cut.rtf", whole[: len(whole) // 2])


def test_rtf_without_text_is_empty():
    with pytest.raises(EmptyDocument, match="no text"):
        extract("blank.rtf", _rtf(rb"\par\par"))
