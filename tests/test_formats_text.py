"""Plain text decoding and paragraphs, and Markdown structure with heading paths and line ranges."""

from __future__ import annotations

import codecs
import re

import pytest

from pipeline.formats import extract, media_type_for
from pipeline.records import HEADING, LIST_ITEM, PARAGRAPH, TABLE_ROW

NOTICE = (
    "Engineering change notice 14: Größe of the seat clamp.\n"
    "The café-racer bar end now uses an M6 bolt.\n"
    "\n"
    "Workshops should fit the new bolt from the spring batch onward.\n"
)
EXPECTED_NOTICE = [
    "Engineering change notice 14: Größe of the seat clamp. "
    "The café-racer bar end now uses an M6 bolt.",
    "Workshops should fit the new bolt from the spring batch onward.",
]


@pytest.mark.parametrize(
    "encoded",
    [
        codecs.BOM_UTF8 + NOTICE.encode("utf-8"),
        codecs.BOM_UTF16_LE + NOTICE.encode("utf-16-le"),
        codecs.BOM_UTF16_BE + NOTICE.encode("utf-16-be"),
        NOTICE.encode("utf-16-le"),  # no BOM: recognised by the alternating NUL bytes
        NOTICE.encode("utf-16-be"),
        NOTICE.encode("latin-1"),
        NOTICE.encode("utf-8"),
    ],
    ids=["utf8-bom", "utf16le-bom", "utf16be-bom", "utf16le", "utf16be", "latin1", "utf8"],
)
def test_text_encodings_decode_to_the_same_paragraphs(encoded):
    # The expected text is the str the bytes were encoded from (Python's codecs as reference).
    assert [s.text for s in extract("ecn-14.txt", encoded).segments] == EXPECTED_NOTICE


def test_latin1_short_phrase_decodes():
    (segment,) = extract("label.txt", "Größe café".encode("latin-1")).segments
    assert segment.text == "Größe café"


def test_nul_bytes_are_stripped():
    (segment,) = extract("ecn.txt", b"Seat\x00post clamp torque 5 Nm\n").segments
    assert segment.text == "Seatpost clamp torque 5 Nm"


def test_plain_text_paragraphs_carry_inclusive_line_ranges():
    text = "\n\nFirst line\nsecond line\n   \nThird\r\nfourth\r\nfifth\n\n"
    segments = extract("ecn.text", text.encode()).segments
    assert [(s.text, s.anchor.line_start, s.anchor.line_end, s.kind) for s in segments] == [
        ("First line second line", 3, 4, PARAGRAPH),
        ("Third fourth fifth", 6, 8, PARAGRAPH),
    ]


def test_text_is_nfkc_normalised_and_whitespace_collapsed():
    # Unicode NFKC (UAX #15): the "fi" ligature U+FB01 becomes "fi", a no-break space a space.
    (segment,) = extract("n.txt", "The \ufb01nal\u00a0check\t\t  of the frame".encode()).segments
    assert segment.text == "The final check of the frame"


WARRANTY_MD = """# Warranty

Marrowby Cycle Works covers every frame it builds.

## Frames

- Steel frames: ten years
- Paint and decals: two years
  when kept indoors

| Part | Years |
|------|------:|
| Frame | 10 |
| Fork | 5 |

Returns
-------

1. Write to the workshop first.
2. Pack the frame in its *original* box.

```
RMA-2024-0001
```

### Shipping

Send it by [insured post](https://example.invalid/post).
"""


def test_markdown_heading_paths_kinds_and_line_ranges():
    extracted = extract("warranty.md", WARRANTY_MD.encode())
    rows = [
        (s.kind, s.text, s.anchor.heading, s.anchor.line_start, s.anchor.line_end)
        for s in extracted.segments
    ]
    assert rows == [
        (HEADING, "Warranty", "Warranty", 1, 1),
        (PARAGRAPH, "Marrowby Cycle Works covers every frame it builds.", "Warranty", 3, 3),
        (HEADING, "Frames", "Warranty > Frames", 5, 5),
        (LIST_ITEM, "Steel frames: ten years", "Warranty > Frames", 7, 7),
        (LIST_ITEM, "Paint and decals: two years when kept indoors", "Warranty > Frames", 8, 9),
        (TABLE_ROW, "Part | Years", "Warranty > Frames", 11, 11),
        (TABLE_ROW, "Frame | 10", "Warranty > Frames", 13, 13),
        (TABLE_ROW, "Fork | 5", "Warranty > Frames", 14, 14),
        (HEADING, "Returns", "Warranty > Returns", 16, 17),
        (LIST_ITEM, "Write to the workshop first.", "Warranty > Returns", 19, 19),
        (LIST_ITEM, "Pack the frame in its original box.", "Warranty > Returns", 20, 20),
        (PARAGRAPH, "RMA-2024-0001", "Warranty > Returns", 22, 24),
        (HEADING, "Shipping", "Warranty > Returns > Shipping", 26, 26),
        (PARAGRAPH, "Send it by insured post.", "Warranty > Returns > Shipping", 28, 28),
    ]
    assert extracted.title == "Warranty"


def test_markdown_line_ranges_point_at_the_source_lines():
    lines = WARRANTY_MD.split("\n")
    for segment in extract("warranty.md", WARRANTY_MD.encode()).segments:
        source = " ".join(lines[segment.anchor.line_start - 1 : segment.anchor.line_end])
        # Every word of the segment appears in the lines its anchor names.
        for word in re.findall(r"\w+", segment.text):
            assert word in source


def test_fenced_code_is_one_paragraph_and_hides_headings():
    text = "Intro.\n\n~~~~\n# not a heading\n- not a list\n~~~~\n\nAfter.\n"
    segments = extract("code.markdown", text.encode()).segments
    assert [(s.kind, s.text) for s in segments] == [
        (PARAGRAPH, "Intro."),
        (PARAGRAPH, "# not a heading - not a list"),
        (PARAGRAPH, "After."),
    ]
    assert segments[1].anchor.line_start == 3 and segments[1].anchor.line_end == 6


def test_markdown_setext_h1_is_the_title_and_front_matter_is_skipped():
    text = "---\nowner: returns desk\n---\nReturns policy\n==============\n\nThirty days.\n"
    extracted = extract("returns.md", text.encode())
    assert extracted.title == "Returns policy"
    assert [s.text for s in extracted.segments] == ["Returns policy", "Thirty days."]


def test_media_type_is_chosen_by_suffix_in_any_case():
    assert media_type_for("NOTES.MD") == "text/markdown"
    assert media_type_for("ecn.Txt") == "text/plain"
    assert media_type_for("frame-jig.dwg") is None
