"""PDF extraction checked against pdfminer.six on PDFs generated with fpdf2."""

from __future__ import annotations

import re

import pytest
from pdfminer.high_level import extract_text as pdfminer_extract_text

from pipeline.errors import NoTextLayer
from pipeline.formats import extract
from pipeline.formats.pdf import split_page_paragraphs
from pipeline.records import PARAGRAPH
from tests.support.formats import SERVICE_MANUAL, comparable_words, make_pdf, word_similarity


def _write(tmp_path, name: str, data: bytes):
    path = tmp_path / name
    path.write_bytes(data)
    return path


def test_pdf_text_matches_pdfminer_reading(tmp_path):
    path = _write(tmp_path, "manual.pdf", make_pdf(SERVICE_MANUAL))
    ours = " ".join(segment.text for segment in extract(path.name, path.read_bytes()).segments)
    # Reference: pdfminer.six, an independent PDF text extractor. Measure: difflib
    # SequenceMatcher ratio over word lists after NFKC + casefold; 0.95 is our bar (common
    # practice for text-layer agreement).
    reference = pdfminer_extract_text(str(path))
    assert len(comparable_words(ours)) > 100
    assert word_similarity(ours, reference) >= 0.95


def test_each_segment_carries_its_one_based_page(tmp_path):
    extracted = extract("manual.pdf", make_pdf(SERVICE_MANUAL))
    by_page: dict[int, str] = {}
    for segment in extracted.segments:
        assert segment.kind == PARAGRAPH
        by_page[segment.anchor.page] = by_page.get(segment.anchor.page, "") + " " + segment.text
    assert sorted(by_page) == [1, 2, 3]
    for number, paragraphs in enumerate(SERVICE_MANUAL, start=1):
        for paragraph in paragraphs:
            assert paragraph in by_page[number]


def test_paragraphs_of_a_page_are_separate_segments(tmp_path):
    extracted = extract("manual.pdf", make_pdf(SERVICE_MANUAL))
    # Every source paragraph is wrapped over several lines and must come back whole, as one
    # segment: lines joined with spaces, the short last line ending the paragraph.
    assert [segment.text for segment in extracted.segments] == [
        paragraph for page in SERVICE_MANUAL for paragraph in page
    ]


def test_line_end_hyphenation_is_joined_only_between_letters():
    page = (
        "The bottom bracket shell needs careful adjust-\n"
        "ment after the first hundred kilometres on the road with a full load of luggage.\n"
        "A Marrowby-\n"
        "Built wheel and a 2019-\n"
        "2024 frame number stay as they are on this line of the workshop notes here."
    )
    (text,) = split_page_paragraphs(page)
    assert "adjustment after" in text
    assert "Marrowby-Built" in text
    assert "2019- 2024" in text


def test_hyphenated_word_in_a_generated_pdf_is_joined(tmp_path):
    data = make_pdf([["Spoke tension needs a final adjust-\nment once the wheel is trued."]])
    (segment,) = extract("spokes.pdf", data).segments
    assert "adjustment" in segment.text
    # pdfminer.six keeps the hyphen and the line break: the raw layer really is hyphenated.
    path = _write(tmp_path, "spokes.pdf", data)
    assert re.search(r"adjust-\s+ment", pdfminer_extract_text(str(path)))


def test_a_short_line_ending_a_sentence_ends_the_paragraph():
    page = (
        "Loosen the two stem bolts a quarter turn each, alternating between them so that\n"
        "the clamp opens evenly.\n"
        "Turn the handlebar until the brake levers sit level with the top tube again.\n"
    )
    assert split_page_paragraphs(page) == [
        "Loosen the two stem bolts a quarter turn each, alternating between them so that "
        "the clamp opens evenly.",
        "Turn the handlebar until the brake levers sit level with the top tube again.",
    ]


def test_image_only_page_gives_a_warning_and_the_rest_is_extracted():
    extracted = extract("manual.pdf", make_pdf([SERVICE_MANUAL[0], None, SERVICE_MANUAL[2]]))
    assert extracted.warnings == ("page 2 has no text layer",)
    assert sorted({segment.anchor.page for segment in extracted.segments}) == [1, 3]


def test_all_image_pdf_raises_no_text_layer():
    with pytest.raises(NoTextLayer, match="no text layer"):
        extract("scan.pdf", make_pdf([None, None]))


def test_title_comes_from_metadata():
    data = make_pdf(SERVICE_MANUAL[:1], title="Fellrunner Service Manual")
    assert extract("manual.pdf", data).title == "Fellrunner Service Manual"
    assert extract("manual.pdf", make_pdf(SERVICE_MANUAL[:1])).title is None


def test_pdf_with_empty_user_password_opens_like_any_reader(tmp_path):
    import io

    import pypdf

    writer = pypdf.PdfWriter(clone_from=io.BytesIO(make_pdf(SERVICE_MANUAL[:1])))
    writer.encrypt(user_password="", owner_password="workshop-owner", algorithm="AES-128")
    buffer = io.BytesIO()
    writer.write(buffer)
    extracted = extract("locked-for-editing.pdf", buffer.getvalue())
    assert extracted.segments[0].text == SERVICE_MANUAL[0][0]
