"""E-mail extraction checked against an independent reading of the same bytes.

The reference is the standard library's legacy parser, ``email.message_from_bytes(data,
policy=email.policy.compat32)``, with ``get_payload(decode=True)`` on each part, and a raw lxml
read of ``word/document.xml`` for a .docx attachment (ECMA-376 Part 1, 17; from memory).
"""

from __future__ import annotations

import email
import email.policy
import io
import zipfile
from email.message import EmailMessage

import docx
import lxml.html
import pytest
from lxml import etree

from pipeline.errors import CorruptDocument, EmptyDocument
from pipeline.formats.mail import EML_TYPE, MAX_DEPTH, extract_eml
from pipeline.formats.text import normalise_text
from pipeline.records import HEADING, PARAGRAPH, Limits

W = "{http://schemas.openxmlformats.org/wordprocessingml/2006/main}"
DOCX_TYPE = ("application", "vnd.openxmlformats-officedocument.wordprocessingml.document")
_SAFE_PARSER = etree.XMLParser(resolve_entities=False, no_network=True, load_dtd=False)

SUBJECT = "Workshop notice: ECN-0412 brake cable routing"
BODY = (
    "From Monday the rear brake cable on frame serials MCW-2291 to MCW-2340 is routed inside "
    "the down tube.\n"
    "Fit the new guide before the bottom bracket goes in.\n"
    "\n"
    "Old stock guides go back to stores, shelf B4 — torque 2 N·m.\n"
    "\n\n"
    "Questions to the workshop office.\n"
)
TORQUE_TXT = "Stem cap 5 Nm\nSeat clamp 6 Nm\n\nCrank bolt 40 Nm\n"


def _docx_bytes() -> bytes:
    document = docx.Document()
    document.add_heading("Parts list ECN-0412", level=1)
    document.add_paragraph("Internal cable guide, part MCW-P-7781, quantity 50.")
    document.add_paragraph("Grommet 5 mm, part MCW-P-7790, quantity 100.")
    buffer = io.BytesIO()
    document.save(buffer)
    return buffer.getvalue()


def _notice(docx_data: bytes | None = None) -> bytes:
    """An invented Marrowby Cycle Works workshop notice with a text and a Word attachment."""
    message = EmailMessage()
    message["Subject"] = SUBJECT
    message["From"] = "Workshop Office <workshop@marrowby.example>"
    message["To"] = "Assembly Line <assembly@marrowby.example>"
    message["Date"] = "Thu, 03 Dec 2026 09:15:00 +0000"
    message.set_content(BODY)
    message.add_alternative(f"<html><body><p>{BODY}</p></body></html>", subtype="html")
    message.add_attachment(TORQUE_TXT.encode(), "text", "plain", filename="torque.txt")
    message.add_attachment(
        docx_data if docx_data is not None else _docx_bytes(), *DOCX_TYPE, filename="parts.docx"
    )
    message.add_attachment(b"AC1032" + bytes(64), "application", "acad", filename="guide.dwg")
    return message.as_bytes()


def _reference_parts(data: bytes):
    # Reference: the stdlib legacy parser (compat32), independent of policy.default.
    return list(email.message_from_bytes(data, policy=email.policy.compat32).walk())


def _reference_paragraphs(text: str) -> list[str]:
    blocks = text.replace("\r\n", "\n").split("\n\n")
    return [p for p in (normalise_text(b) for b in blocks) if p]


def _reference_body(data: bytes, subtype: str = "plain") -> bytes:
    for part in _reference_parts(data):
        if part.get_content_type() == f"text/{subtype}" and part.get_filename() is None:
            return part.get_payload(decode=True)
    raise AssertionError("no body part")


def _docx_paragraphs(data: bytes) -> list[str]:
    # Reference: raw read of word/document.xml, text of each w:p.
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        root = etree.fromstring(archive.read("word/document.xml"), _SAFE_PARSER)
    texts = ("".join(t.text or "" for t in p.iter(f"{W}t")) for p in root.iter(f"{W}p"))
    return [normalise_text(t) for t in texts if normalise_text(t)]


def test_notice_subject_sender_body_and_attachments():
    data = _notice()
    result = extract_eml(data, Limits())
    assert result.media_type == EML_TYPE
    assert result.title == SUBJECT
    assert result.warnings == ()  # the .dwg is of a type upwell does not read: silent skip

    segments = list(result.segments)
    assert segments[0].kind == HEADING and segments[0].text == SUBJECT
    reference = email.message_from_bytes(data, policy=email.policy.compat32)
    # Reference: compat32 headers (plain ASCII here, so no decoding differs).
    assert segments[1].text == (
        f"From: {reference['From']} To: {reference['To']} Date: {reference['Date']}"
    )

    body = [s for s in segments if s.anchor.heading == SUBJECT][2:]
    # Reference: compat32 get_payload(decode=True) of the text/plain part, split on blank lines.
    expected = _reference_paragraphs(_reference_body(data).decode("utf-8"))
    assert len(expected) == 3
    assert [s.text for s in body] == expected
    assert all(s.kind == PARAGRAPH for s in body)

    torque = [s for s in segments if s.anchor.heading == "torque.txt"]
    # Reference: the attachment's own bytes from compat32, paragraphs on blank lines.
    attached = next(p for p in _reference_parts(data) if p.get_filename() == "torque.txt")
    assert [s.text for s in torque] == _reference_paragraphs(
        attached.get_payload(decode=True).decode()
    )
    assert [(s.anchor.line_start, s.anchor.line_end) for s in torque] == [(1, 2), (4, 4)]

    parts_docx = next(p for p in _reference_parts(data) if p.get_filename() == "parts.docx")
    word = [s for s in segments if (s.anchor.heading or "").startswith("parts.docx")]
    assert [s.text for s in word] == _docx_paragraphs(parts_docx.get_payload(decode=True))
    assert word[1].anchor.heading == "parts.docx > Parts list ECN-0412"


def test_html_only_body():
    message = EmailMessage()
    message["Subject"] = "Paint shop closed Friday"
    message["From"] = "paint@marrowby.example"
    html = (
        "<html><head><style>p {color: red}</style></head><body>"
        "<p>The paint shop is closed on Friday for booth cleaning.</p>"
        "<p>Frames MCW-2301 to MCW-2310 are painted <b>Thursday</b> instead.</p>"
        "</body></html>"
    )
    message.set_content(html, subtype="html")
    data = message.as_bytes()
    result = extract_eml(data, Limits())
    # Reference: compat32 payload parsed by lxml.html, text of each <p>.
    tree = lxml.html.fromstring(_reference_body(data, "html"))
    expected = [normalise_text(p.text_content()) for p in tree.iter("p")]
    body = [s for s in result.segments if s.kind == PARAGRAPH][1:]
    assert [s.text for s in body] == expected
    assert all(s.anchor.heading == "Paint shop closed Friday" for s in body)
    assert not any("color" in s.text for s in result.segments)


def test_unknown_charset_is_decoded_with_replacement():
    data = (
        b"Subject: Frame serial check\r\n"
        b"From: qc@marrowby.example\r\n"
        b'Content-Type: text/plain; charset="x-no-such-charset"\r\n'
        b"\r\n"
        b"Serial MCW-2291 passed \xe9\xff alignment.\r\n"
    )
    result = extract_eml(data, Limits())
    # Reference: compat32 payload bytes, decoded as UTF-8 with replacement.
    expected = _reference_paragraphs(_reference_body(data).decode("utf-8", errors="replace"))
    assert [s.text for s in result.segments[2:]] == expected
    assert "\ufffd" in result.segments[2].text


def test_nested_forwards_are_capped_with_a_warning():
    inner = EmailMessage()
    inner["Subject"] = "Level 50"
    inner.set_content("Original notice at level 50.")
    for level in range(49, -1, -1):
        outer = EmailMessage()
        outer["Subject"] = f"Level {level}"
        outer.set_content(f"Forwarded at level {level}.")
        outer.add_attachment(inner)  # attached as message/rfc822
        inner = outer
    data = inner.as_bytes()
    # Reference: compat32 sees all 51 messages nested in the bytes.
    assert sum(1 for p in _reference_parts(data) if p.get_content_type() == "message/rfc822") == 50

    result = extract_eml(data, Limits())
    headings = [s.text for s in result.segments if s.kind == HEADING]
    assert headings == [f"Level {n}" for n in range(MAX_DEPTH + 1)]
    assert len(result.warnings) == 1
    assert f"depth {MAX_DEPTH + 1}" in result.warnings[0]


def test_mail_forwarded_as_eml_file_and_as_whole_body():
    inner = EmailMessage()
    inner["Subject"] = "Stores count ECN-0412"
    inner.set_content("Forty guides left on shelf B4.")
    outer = EmailMessage()
    outer["Subject"] = "Fwd: stores count"
    outer.set_content("See the count below.")
    outer.add_attachment(inner.as_bytes(), "application", "octet-stream", filename="count.eml")
    result = extract_eml(outer.as_bytes(), Limits())
    # Reference: compat32 payload of the inner mail's own text/plain part.
    expected = _reference_paragraphs(_reference_body(inner.as_bytes()).decode("utf-8"))
    assert [s.text for s in result.segments if s.anchor.heading == inner["Subject"]] == [
        inner["Subject"],
        *expected,
    ]

    whole = b"Subject: Fwd bare\r\nContent-Type: message/rfc822\r\n\r\n" + inner.as_bytes()
    headings = [s.text for s in extract_eml(whole, Limits()).segments if s.kind == HEADING]
    assert headings == ["Fwd bare", inner["Subject"]]


def test_parts_nested_past_the_parser_are_corrupt_not_a_crash():
    body = b"Content-Type: text/plain\r\n\r\ndeep text\r\n"
    for level in range(2000):
        boundary = b"b%d" % level
        body = (
            b'Content-Type: multipart/mixed; boundary="' + boundary + b'"\r\n\r\n--'
            + boundary + b"\r\n" + body + b"\r\n--" + boundary + b"--\r\n"
        )  # fmt: skip
    with pytest.raises(CorruptDocument, match="nests MIME parts"):
        extract_eml(b"Subject: deep\r\n" + body, Limits())


def test_unknown_charset_in_an_encoded_word_header():
    data = (
        b"Subject: =?x-no-such-charset?q?Frame_check?=\r\nFrom: qc@marrowby.example\r\n\r\nok\r\n"
    )
    result = extract_eml(data, Limits())
    assert "Frame" in result.title and "check" in result.title


def test_corrupt_docx_attachment_warns_and_mail_is_still_indexed():
    data = _notice(docx_data=b"PK\x03\x04 this is not a real zip archive")
    result = extract_eml(data, Limits())
    assert len(result.warnings) == 1
    assert "parts.docx" in result.warnings[0]
    assert result.segments[0].text == SUBJECT
    expected = _reference_paragraphs(_reference_body(data).decode("utf-8"))
    assert [s.text for s in result.segments[2:5]] == expected
    assert not any((s.anchor.heading or "").startswith("parts.docx") for s in result.segments)


@pytest.mark.parametrize(
    "data",
    [
        b"%PDF-1.7\n%\xe2\xe3\xcf\xd3\n1 0 obj\n<< /Type /Catalog >>\nendobj\n",
        b"Frame MCW-2291 passed alignment\nand went to paint.\n",
        bytes(range(256)) * 4,
    ],
)
def test_bytes_that_are_not_a_mail(data):
    with pytest.raises(CorruptDocument, match="not an e-mail"):
        extract_eml(data, Limits())


def test_mail_without_text_is_empty():
    with pytest.raises(EmptyDocument):
        extract_eml(b"From: stores@marrowby.example\r\n\r\n\r\n", Limits())
    with pytest.raises(EmptyDocument):
        extract_eml(b"", Limits())
