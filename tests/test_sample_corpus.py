"""The demo corpus (sample_corpus/) is made of valid files, as judged by outside readers.

Every check here reads the committed files with a general-purpose reference library that upwell
does not use itself (pdfminer.six, docx2txt, webvtt-py, srt) or with the standard library
against the published file format, so the demo rests on files other tools accept too.
"""

from __future__ import annotations

import codecs
import importlib.util
import re
import sys
import zipfile
from datetime import timedelta
from pathlib import Path
from types import ModuleType
from xml.etree import ElementTree

import docx2txt
import pytest
import srt
import webvtt
from pdfminer.high_level import extract_pages, extract_text
from pdfminer.layout import LTTextContainer
from pdfminer.pdfdocument import PDFDocument
from pdfminer.pdfparser import PDFParser

REPO = Path(__file__).resolve().parents[1]
CORPUS = REPO / "sample_corpus"
GENERATOR = REPO / "tests" / "fixtures" / "make_sample_corpus.py"
MANUAL = CORPUS / "manuals" / "workshop-service-manual.pdf"

# The formats the extractor reads (the README's list); anything else in the corpus would be a
# stray non-document file that the demo would index or skip by surprise.
DOCUMENT_SUFFIXES = {
    ".pdf",
    ".docx",
    ".pptx",
    ".xlsx",
    ".eml",
    ".png",
    ".md",
    ".txt",
    ".vtt",
    ".srt",
}

# WordprocessingML main namespace, ECMA-376 Part 1, section 17 (from memory).
W_NS = "{http://schemas.openxmlformats.org/wordprocessingml/2006/main}"


def corpus_files(suffix: str) -> list[Path]:
    files = sorted(CORPUS.rglob(f"*{suffix}"))
    assert files, f"no {suffix} files in {CORPUS}"
    return files


def load_generator() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_sample_corpus", GENERATOR)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    # dataclasses resolves string annotations through sys.modules, so register before running.
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


# ---------------------------------------------------------------- the collection as a whole


def test_corpus_holds_between_12_and_20_documents_and_nothing_else() -> None:
    files = [p for p in CORPUS.rglob("*") if p.is_file()]
    strays = [p for p in files if p.suffix not in DOCUMENT_SUFFIXES]
    assert strays == []
    assert 12 <= len(files) <= 20
    # Each format of the scenario is present (the scenario the README describes).
    assert {p.suffix for p in files} == DOCUMENT_SUFFIXES


def test_generator_reproduces_the_committed_files_byte_for_byte(tmp_path: Path) -> None:
    # Proves both that the committed binaries are current and that regeneration is stable.
    written = load_generator().write_corpus(tmp_path)
    assert len(written) == 10
    for path in written:
        committed = CORPUS / path.relative_to(tmp_path)
        assert committed.read_bytes() == path.read_bytes(), f"{committed} is out of date"


# ---------------------------------------------------------------- PDF, read with pdfminer.six


def test_every_manual_page_has_text_per_pdfminer() -> None:
    pages = list(extract_pages(str(MANUAL)))
    assert 8 <= len(pages) <= 12  # a manual of 8-12 pages, as the README describes it
    for number, page in enumerate(pages, start=1):
        text = "".join(el.get_text() for el in page if isinstance(el, LTTextContainer))
        assert len(text.split()) >= 40, f"page {number} has almost no text"


def test_manual_has_at_least_3500_words_per_pdfminer() -> None:
    assert len(extract_text(str(MANUAL)).split()) >= 3500


def test_manual_title_metadata_is_set() -> None:
    with MANUAL.open("rb") as handle:
        info = PDFDocument(PDFParser(handle)).info[0]
    assert info["Title"] == b"Marrowby Cycle Works - Workshop Service Manual"


def test_torque_table_is_on_one_page_with_its_headings() -> None:
    pages_with_table = []
    for index in range(len(list(extract_pages(str(MANUAL))))):
        text = extract_text(str(MANUAL), page_numbers=[index])
        if "Thread locker" in text and "Torque (Nm)" in text:
            pages_with_table.append(text)
    assert len(pages_with_table) == 1
    table_page = pages_with_table[0]
    assert "Torque specifications" in table_page
    assert "Crank arm fixing bolts" in table_page
    assert "Medium strength (blue)" in table_page


# ---------------------------------------------------------------- Word, read with docx2txt


@pytest.mark.parametrize("path", corpus_files(".docx"), ids=lambda p: p.name)
def test_every_docx_opens_with_docx2txt_and_has_a_table(path: Path) -> None:
    assert len(docx2txt.process(str(path)).split()) >= 250
    with zipfile.ZipFile(path) as package:
        assert package.testzip() is None
        body = ElementTree.fromstring(package.read("word/document.xml"))
    assert body.findall(f".//{W_NS}tbl"), "no w:tbl element"


@pytest.mark.parametrize("path", corpus_files(".docx"), ids=lambda p: p.name)
def test_every_docx_uses_title_heading_and_list_styles(path: Path) -> None:
    with zipfile.ZipFile(path) as package:
        body = ElementTree.fromstring(package.read("word/document.xml"))
    styles = {el.get(f"{W_NS}val") for el in body.iter(f"{W_NS}pStyle")}
    assert {"Title", "Heading1", "Heading2", "ListNumber", "ListBullet"} <= styles


@pytest.mark.parametrize("path", corpus_files(".docx"), ids=lambda p: p.name)
def test_each_numbered_procedure_has_its_own_numbering(path: Path) -> None:
    # Separate w:numId values make each procedure restart at 1 (ECMA-376 17.9, from memory).
    with zipfile.ZipFile(path) as package:
        body = ElementTree.fromstring(package.read("word/document.xml"))
    num_ids = [el.get(f"{W_NS}val") for el in body.iter(f"{W_NS}numId")]
    assert len(set(num_ids)) >= 2


# ---------------------------------------------------------------- transcripts, webvtt-py and srt


@pytest.mark.parametrize("path", corpus_files(".vtt"), ids=lambda p: p.name)
def test_every_vtt_parses_with_webvtt_py_and_has_voiced_cues(path: Path) -> None:
    captions = webvtt.read(str(path)).captions
    assert 25 <= len(captions) <= 60
    assert 180 <= captions[-1].end_in_seconds <= 360
    assert all(caption.voice for caption in captions)
    starts = [caption.start_in_seconds for caption in captions]
    assert starts == sorted(starts)


def test_one_vtt_has_a_style_block_a_note_and_an_entity() -> None:
    files = corpus_files(".vtt")
    styled = [p for p in files if webvtt.read(str(p)).styles]
    assert len(styled) == 1
    raw = styled[0].read_text(encoding="utf-8")
    # NOTE comment block, WebVTT (W3C) section 4.1, from memory.
    assert re.search(r"^NOTE\b", raw, flags=re.MULTILINE)
    assert any("&amp;" in caption.raw_text for caption in webvtt.read(str(styled[0])).captions)


@pytest.mark.parametrize("path", corpus_files(".srt"), ids=lambda p: p.name)
def test_every_srt_parses_with_srt(path: Path) -> None:
    subtitles = list(srt.parse(path.read_text(encoding="utf-8")))
    assert 25 <= len(subtitles) <= 60
    assert [s.index for s in subtitles] == list(range(1, len(subtitles) + 1))
    assert timedelta(minutes=3) <= subtitles[-1].end <= timedelta(minutes=6)
    # srt's own serializer round-trips the file, i.e. it is in the canonical layout.
    assert list(srt.parse(srt.compose(subtitles))) == subtitles


# ---------------------------------------------------------------- notices and their encodings


def test_utf16_notice_has_a_bom_and_decodes_with_its_codec() -> None:
    raw = (CORPUS / "notices" / "ECN-0144.txt").read_bytes()
    assert raw.startswith(codecs.BOM_UTF16_LE)  # BOM bytes per the Python codecs module
    text = raw[len(codecs.BOM_UTF16_LE) :].decode("utf-16-le")
    assert "Roulements Ébrard SA" in text
    assert "±0.005 mm" in text


def test_latin1_notice_decodes_as_latin1_and_is_not_utf8() -> None:
    raw = (CORPUS / "notices" / "ECN-0149.txt").read_bytes()
    with pytest.raises(UnicodeDecodeError):
        raw.decode("utf-8")
    text = raw.decode("latin-1")
    assert "Kühn & Größe Präzisionsteile" in text
    assert "café" in text


def test_other_text_documents_are_strict_utf8() -> None:
    special = {"ECN-0144.txt", "ECN-0149.txt"}
    for suffix in (".txt", ".md", ".vtt", ".srt"):
        for path in corpus_files(suffix):
            if path.name not in special:
                path.read_bytes().decode("utf-8")


# ---------------------------------------------------------------- slides, spreadsheet, e-mail


def test_spreadsheet_rows_match_pandas() -> None:
    # Reference: pandas.read_excel (openpyxl engine), a sheet per family with its header row.
    import pandas

    from pipeline.formats import extract

    path = CORPUS / "parts" / "spares-price-list.xlsx"
    sheets = pandas.read_excel(path, sheet_name=None, dtype=str)
    expected = [
        (name, ", ".join(f"{column}: {value}" for column, value in row.items()))
        for name, frame in sheets.items()
        for _, row in frame.iterrows()
    ]
    got = [(s.anchor.heading, s.text) for s in extract(path.name, path.read_bytes()).segments]
    assert got == expected
    assert len(expected) >= 10


def test_deck_text_matches_a_raw_reading_of_the_slide_parts() -> None:
    # Reference: the a:t text runs of each ppt/slides/slideN.xml, read with ElementTree
    # (DrawingML main namespace, ECMA-376 Part 1, 20.1; from memory).
    from pipeline.formats import extract

    path = CORPUS / "training" / "workshop-induction.pptx"
    ns = "{http://schemas.openxmlformats.org/drawingml/2006/main}t"
    extracted = extract(path.name, path.read_bytes()).segments
    with zipfile.ZipFile(path) as archive:
        slides = sorted(
            (n for n in archive.namelist() if re.fullmatch(r"ppt/slides/slide\d+\.xml", n)),
            key=lambda n: int(re.findall(r"\d+", n)[0]),
        )
        assert len(slides) >= 4
        for number, part in enumerate(slides, start=1):
            runs = [e.text for e in ElementTree.fromstring(archive.read(part)).iter(ns) if e.text]
            ours = " ".join(
                s.text.replace(" | ", " ")
                for s in extracted
                if s.anchor.page == number and not s.text.startswith("Notes: ")
            )
            assert ours.split() == " ".join(runs).split(), part


def test_mail_body_and_pdf_attachment_match_the_email_package_and_pdfminer() -> None:
    # References: the email package's compat32 parser for the body, pdfminer.six for the
    # attached PDF's text.
    import email
    import email.policy
    import io

    from pipeline.formats import extract

    path = CORPUS / "notices" / "ECN-0156-torque-card.eml"
    message = email.message_from_bytes(path.read_bytes(), policy=email.policy.compat32)
    body, attachment = message.get_payload()
    segments = extract(path.name, path.read_bytes()).segments
    body_text = body.get_payload(decode=True).decode("utf-8")
    ours_body = " ".join(s.text for s in segments if s.anchor.page is None)
    assert " ".join(body_text.split()) in ours_body
    pdf_text = extract_text(io.BytesIO(attachment.get_payload(decode=True)))
    ours_pdf = " ".join(s.text for s in segments if s.anchor.page == 1)
    assert ours_pdf.split() == pdf_text.split()
    assert {s.anchor.heading.split(" > ")[0] for s in segments if s.anchor.page == 1} == {
        "ECN-0156-torque-card.pdf"
    }


def test_scanned_notice_is_read_by_ocr_close_to_the_text_it_was_drawn_from() -> None:
    # Reference: the lines the generator drew; CER as in tests/test_formats_ocr.py.
    from pipeline.formats import extract
    from tests.test_formats_ocr import character_error_rate

    path = CORPUS / "notices" / "paint-shop-noticeboard.png"
    generator = load_generator()
    found = extract(path.name, path.read_bytes())
    recognised = " ".join(s.text for s in found.segments)
    assert character_error_rate(recognised, " ".join(generator.PAINT_SHOP_NOTICE)) <= 0.02
