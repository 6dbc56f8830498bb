"""Each bad input fails with its own error class and a reason a person understands."""

from __future__ import annotations

import codecs
import io
import random
import zipfile

import docx
import pypdf
import pytest

from pipeline.errors import (
    CorruptDocument,
    DocumentTooLarge,
    EmptyDocument,
    EncryptedDocument,
    NoTextLayer,
    UnsupportedDocument,
)
from pipeline.formats import SUPPORTED_SUFFIXES, extract
from pipeline.records import Limits
from tests.support.formats import SERVICE_MANUAL, make_pdf, rewrite_zip


def _small_docx() -> bytes:
    document = docx.Document()
    document.add_paragraph("Grease the seat post before fitting it to the frame.")
    buffer = io.BytesIO()
    document.save(buffer)
    return buffer.getvalue()


@pytest.mark.parametrize("suffix", sorted(SUPPORTED_SUFFIXES))
@pytest.mark.parametrize("content", [b"", b"  \r\n\t\n", codecs.BOM_UTF8 + b"\n "])
def test_empty_or_blank_file_is_empty_for_every_format(suffix, content):
    with pytest.raises(EmptyDocument, match="empty|whitespace"):
        extract(f"notes{suffix}", content)


def test_truncated_pdf_is_corrupt():
    data = make_pdf(SERVICE_MANUAL)
    with pytest.raises(CorruptDocument, match="truncated|damaged"):
        extract("manual.pdf", data[: len(data) // 2])


def test_damaged_pdf_body_is_corrupt():
    data = make_pdf(SERVICE_MANUAL)
    # Keep the header and the end marker, destroy everything between: no object can be read.
    damaged = data[:16] + bytes(len(data) - 32) + data[-16:]
    with pytest.raises(CorruptDocument):
        extract("manual.pdf", damaged)


def test_pdf_with_a_user_password_is_encrypted():
    writer = pypdf.PdfWriter(clone_from=io.BytesIO(make_pdf(SERVICE_MANUAL)))
    writer.encrypt(user_password="spoke-key", owner_password="workshop", algorithm="AES-256")
    buffer = io.BytesIO()
    writer.write(buffer)
    with pytest.raises(EncryptedDocument, match="password"):
        extract("private.pdf", buffer.getvalue())


def test_image_only_pdf_has_no_text_layer():
    with pytest.raises(NoTextLayer, match="OCR"):
        extract("scan.pdf", make_pdf([None]))


def test_pdf_that_is_really_text_says_what_it_looks_like():
    with pytest.raises(CorruptDocument, match="not a PDF.*plain text"):
        extract("manual.pdf", b"Marrowby service manual, draft notes only.\n" * 20)


def test_pdf_header_after_leading_garbage_is_accepted():
    data = b"\r\n  junk from a mail gateway\r\n" + make_pdf(SERVICE_MANUAL[:1])
    assert extract("manual.pdf", data).segments[0].text == SERVICE_MANUAL[0][0]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_binary_bytes_with_a_text_suffix_are_not_text(seed):
    blob = random.Random(seed).randbytes(8192)
    with pytest.raises(CorruptDocument, match="binary data, not text"):
        extract("notice.txt", blob)


def test_png_named_markdown_is_not_text():
    png_like = b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 16
    with pytest.raises(CorruptDocument, match="binary data, not text"):
        extract("policy.md", png_like)


def test_docx_that_is_not_a_zip_is_corrupt():
    with pytest.raises(CorruptDocument, match="not a Word .docx.*plain text"):
        extract("procedure.docx", b"Step 1: lace the wheel.\nStep 2: true it.\n")


def test_docx_with_damaged_zip_is_corrupt():
    data = _small_docx()
    with pytest.raises(CorruptDocument, match="zip"):
        extract("procedure.docx", data[: len(data) // 2])


def test_docx_without_main_part_is_corrupt():
    data = rewrite_zip(_small_docx(), {"word/document.xml": None})
    with pytest.raises(CorruptDocument, match="word/document.xml"):
        extract("procedure.docx", data)


def test_docx_part_inflating_past_the_ratio_limit_is_too_large():
    zeros = bytes(4 * 1024 * 1024)  # deflates about 1000:1
    data = rewrite_zip(_small_docx(), {"word/media/padding.bin": None})
    buffer = io.BytesIO(data)
    with zipfile.ZipFile(buffer, "a", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("word/media/padding.bin", zeros)
    limits = Limits(max_inflated_bytes=64 * 1024 * 1024, max_inflate_ratio=200.0)
    with pytest.raises(DocumentTooLarge, match="padding.bin inflates .* zip bomb"):
        extract("procedure.docx", buffer.getvalue(), limits)


def test_docx_inflating_past_the_total_limit_is_too_large():
    data = _small_docx()
    with pytest.raises(DocumentTooLarge, match="would inflate to"):
        extract("procedure.docx", data, Limits(max_inflated_bytes=1024))


def test_docx_with_a_doctype_is_unsupported():
    data = _small_docx()
    document_xml = zipfile.ZipFile(io.BytesIO(data)).read("word/document.xml")
    declaration_end = document_xml.index(b"?>") + 2
    with_doctype = (
        document_xml[:declaration_end]
        + b'<!DOCTYPE w:document [<!ENTITY shop "Marrowby">]>'
        + document_xml[declaration_end:]
    )
    data = rewrite_zip(data, {"word/document.xml": with_doctype})
    with pytest.raises(UnsupportedDocument, match="DOCTYPE"):
        extract("procedure.docx", data)


def test_file_over_the_size_limit_is_too_large():
    with pytest.raises(DocumentTooLarge, match="over the limit"):
        extract("ecn.txt", b"x" * 2048, Limits(max_file_bytes=1024))


def test_unsupported_suffix_is_unsupported():
    with pytest.raises(UnsupportedDocument, match=r"\.dwg"):
        extract("frame-jig.dwg", b"AC1032")


@pytest.mark.parametrize(
    ("name", "kind"),
    [
        ("parts.xlsx", "Excel .xlsx"),
        ("saddle-fitting.pptx", "PowerPoint .pptx"),
        ("workshop-manual.epub", "EPUB book"),
        ("ecn-1142.docx", "Word .docx"),
        ("ecn-1142.odt", "OpenDocument text .odt"),
        ("parts.ods", "OpenDocument spreadsheet .ods"),
        ("induction.odp", "OpenDocument presentation .odp"),
    ],
)
def test_zip_based_formats_saved_as_text_say_what_the_bytes_are(name, kind):
    # Every zip-based format is refused by the format table before its parser runs, with the
    # same sentence shape: what it should be and what the bytes look like.
    with pytest.raises(CorruptDocument, match=f"not an? {kind} .*zip archive.*plain text"):
        extract(name, b"Frame serial MCW-0042 passed inspection.\n")
