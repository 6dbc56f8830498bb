"""E-mail .eml extraction with the standard library's ``email`` package (``policy.default``).

What is read, in order (every body segment's ``Anchor.heading`` is the mail's subject, or
``"subject > heading"`` when an HTML body carries its own headings):

1. the Subject, as one HEADING segment;
2. one PARAGRAPH ``"From: ... To: ... Date: ..."`` with the fields the mail has;
3. the body: the text/plain part split into paragraphs on blank lines; when the mail has only an
   HTML body, that part's text as the HTML extractor reads it;
4. attachments whose filename has a suffix upwell reads, through ``pipeline.formats.extract``;
   their segments keep their own page/line anchors and get the attachment's filename as heading
   (``"name.docx > Heading"`` when the attachment has its own heading path). Attachments of a
   type upwell does not read are skipped without a warning; one that fails to extract adds a
   warning naming it and the reason, and the mail is still indexed;
5. attached messages (``message/rfc822`` parts, or ``.eml`` attachments: forwarded mails) are
   read the same way, recursively, at most ``MAX_DEPTH`` levels deep; a deeper one is skipped
   with a warning that names its depth.

A charset Python does not know is decoded as UTF-8 with replacement characters, never an error.
Bytes without any mail header line raise ``CorruptDocument``, as does a mail whose MIME parts nest
deeper than the stdlib parser can recurse (about a thousand levels); a mail with no subject, body or
attachment text raises ``EmptyDocument``. ``Extracted.title`` is the subject.
"""

from __future__ import annotations

import codecs
import email.policy
from dataclasses import replace
from email.errors import HeaderParseError
from email.message import EmailMessage, Message
from email.parser import BytesParser
from typing import Any

from pipeline.errors import CorruptDocument, EmptyDocument, ExtractionError
from pipeline.formats.html import extract_html
from pipeline.formats.text import normalise_text, split_lines
from pipeline.records import HEADING, PARAGRAPH, Anchor, Extracted, Limits, Segment

EML_TYPE = "message/rfc822"
MAX_DEPTH = 10  # forwarded-mail nesting read; deeper attached messages are skipped

# Headers of which at least one must be present for the bytes to count as a mail (RFC 5322
# 3.6 and RFC 2045 3; from memory).
_MAIL_HEADERS = (
    "from",
    "to",
    "cc",
    "subject",
    "date",
    "message-id",
    "mime-version",
    "received",
    "content-type",
    "sender",
    "reply-to",
)
_ADDRESS_LINE = (("From", "from"), ("To", "to"), ("Date", "date"))
_FALLBACK_CHARSET = "utf-8"
# The stdlib parser and get_body() recurse once per nested MIME part; past Python's recursion
# limit (about 1,000 levels, measured here as failing at 2,000) they cannot read the mail.
_TOO_DEEP = "the mail nests MIME parts deeper than the e-mail parser can read"


def _parse(data: bytes) -> EmailMessage:
    message = BytesParser(policy=email.policy.default).parsebytes(data)
    assert isinstance(message, EmailMessage)
    return message


def _header(message: Message, name: str) -> str:
    """The header's decoded value, normalised; "" when absent or unreadable."""
    try:
        value = message.get(name)
        return normalise_text(str(value)) if value is not None else ""
    except (HeaderParseError, ValueError, LookupError, TypeError, IndexError, AttributeError):
        return ""


def _charset(part: Message) -> str:
    label = part.get_content_charset() or "us-ascii"
    try:
        name = codecs.lookup(label).name
    except (LookupError, ValueError):
        return _FALLBACK_CHARSET
    # A mail labelled ASCII often carries UTF-8 or Latin-1 bytes; UTF-8 with replacement keeps
    # the ASCII text identical and shows the rest as best it can.
    return _FALLBACK_CHARSET if name == "ascii" else name


def _payload(part: Message) -> bytes:
    """The part's content with its transfer encoding undone (lenient on bad base64)."""
    payload = part.get_payload(decode=True)
    return payload if isinstance(payload, bytes) else b""


def _plain_segments(part: Message, heading: str | None) -> list[Segment]:
    text = _payload(part).decode(_charset(part), errors="replace")
    segments: list[Segment] = []
    block: list[str] = []
    for line in [*split_lines(text), ""]:
        if line.strip():
            block.append(line)
            continue
        paragraph = normalise_text(" ".join(block))
        block = []
        if paragraph:
            segments.append(Segment(paragraph, Anchor(heading=heading), PARAGRAPH))
    return segments


def _join(outer: str | None, inner: str | None) -> str | None:
    if outer and inner:
        return f"{outer} > {inner}"
    return outer or inner


def _html_segments(part: Message, heading: str | None, warnings: list[str]) -> list[Segment]:
    data = _payload(part)
    if part.get_param("charset") is not None:
        # Transcode by the MIME charset; the UTF-8 BOM takes precedence over a <meta charset>.
        data = codecs.BOM_UTF8 + data.decode(_charset(part), errors="replace").encode("utf-8")
    try:
        extracted = extract_html(data)
    except EmptyDocument:
        return []
    except ExtractionError as error:
        warnings.append(f"the HTML body of {heading or 'a mail'!r} was not read: {error}")
        return []
    return [
        replace(s, anchor=replace(s.anchor, heading=_join(heading, s.anchor.heading)))
        for s in extracted.segments
    ]


class _Reader:
    def __init__(self, limits: Limits) -> None:
        self.limits = limits
        self.segments: list[Segment] = []
        self.warnings: list[str] = []
        self.address_lines = 0

    def read_message(self, message: Message, depth: int) -> str:
        """Append the message's segments; returns its subject."""
        subject = _header(message, "subject")
        heading = subject or None
        if subject:
            self.segments.append(Segment(subject, Anchor(heading=heading), HEADING))
        fields = [(label, _header(message, name)) for label, name in _ADDRESS_LINE]
        line = " ".join(f"{label}: {value}" for label, value in fields if value)
        if line:
            self.segments.append(Segment(line, Anchor(heading=heading), PARAGRAPH))
            self.address_lines += 1
        self._read_body(message, heading)
        self._read_attachments(message, depth)
        return subject

    def _read_body(self, message: Message, heading: str | None) -> None:
        if not isinstance(message, EmailMessage):
            return
        body = message.get_body(preferencelist=("plain",))
        if body is not None:
            self.segments.extend(_plain_segments(body, heading))
            return
        body = message.get_body(preferencelist=("html",))
        if body is not None:
            self.segments.extend(_html_segments(body, heading, self.warnings))

    def _read_attachments(self, message: Message, depth: int) -> None:
        if message.get_content_type() == "message/rfc822":
            # The whole body is one attached message (a mail forwarded as the message itself).
            self._read_inner(message, depth)
            return
        if not isinstance(message, EmailMessage) or not message.is_multipart():
            return
        for part in message.iter_attachments():
            filename = part.get_filename() or ""
            if part.get_content_type() == "message/rfc822":
                self._read_inner(part, depth)
            elif filename.lower().endswith(".eml"):
                # Parsed here rather than through the format table, so the depth cap holds.
                self._read_attached_mail(_parse(_payload(part)), depth + 1)
            elif filename:
                self._read_file(filename, _payload(part))

    def _read_inner(self, part: Message, depth: int) -> None:
        inner = part.get_payload()
        if isinstance(inner, list) and inner and isinstance(inner[0], Message):
            self._read_attached_mail(inner[0], depth + 1)

    def _read_attached_mail(self, message: Message, depth: int) -> None:
        if depth > MAX_DEPTH:
            self.warnings.append(
                f"an attached message at nesting depth {depth} was skipped: forwarded mails are "
                f"read at most {MAX_DEPTH} levels deep"
            )
            return
        self.read_message(message, depth)

    def _read_file(self, filename: str, data: bytes) -> None:
        """Extract a file attachment through the format table, or skip it silently."""
        if _format_table is None:
            return
        extract, media_type_for = _format_table
        if media_type_for(filename) is None:
            return  # a type upwell does not read: skipped, as a folder sync skips it
        try:
            extracted = extract(filename, data, self.limits)
        except ExtractionError as error:
            self.warnings.append(f"attachment {filename!r} was not read: {error}")
            return
        self.segments.extend(
            replace(s, anchor=replace(s.anchor, heading=_join(filename, s.anchor.heading)))
            for s in extracted.segments
        )
        self.warnings.extend(f"attachment {filename!r}: {w}" for w in extracted.warnings)


# (extract, media_type_for) of the format table, handed over by the package when it is imported,
# so attachments are read by the same table without this module importing its package.
_format_table: tuple[Any, Any] | None = None


def use_format_table(extract: Any, media_type_for: Any) -> None:
    global _format_table
    _format_table = (extract, media_type_for)


def extract_eml(data: bytes, limits: Limits) -> Extracted:
    """Subject, sender line, body and readable attachments of one mail, forwarded mails too.

    Guarantee: at least one segment; otherwise ``CorruptDocument`` (no mail headers) or
    ``EmptyDocument`` (no subject, body or attachment text).
    """
    if not data.strip():
        raise EmptyDocument("empty file")
    try:
        message = _parse(data)
    except RecursionError:
        raise CorruptDocument(_TOO_DEEP) from None
    if not any(name in message for name in _MAIL_HEADERS):
        raise CorruptDocument(
            "not an e-mail message: it has no header lines such as From, To, Subject or Date"
        )
    reader = _Reader(limits)
    try:
        subject = reader.read_message(message, depth=0)
    except RecursionError:
        raise CorruptDocument(_TOO_DEEP) from None
    # The From/To/Date line alone is not text worth indexing.
    if len(reader.segments) == reader.address_lines:
        raise EmptyDocument("the mail has no subject, body text or readable attachment")
    return Extracted(
        media_type=EML_TYPE,
        segments=tuple(reader.segments),
        title=subject or None,
        warnings=tuple(reader.warnings),
    )
