"""What a file's bytes look like, for error messages that name a misnamed file's real type."""

from __future__ import annotations

# Leading bytes of formats people commonly save under the wrong name, for error messages.
_SIGNATURES: tuple[tuple[bytes, str], ...] = (
    (b"%PDF-", "a PDF document"),
    (b"PK\x03\x04", "a zip archive"),
    (b"PK\x05\x06", "an empty zip archive"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1", "a legacy Office file (.doc/.xls, OLE2)"),
    (b"{\\rtf", "an RTF document"),
    (b"\x89PNG\r\n\x1a\n", "a PNG image"),
    (b"\xff\xd8\xff", "a JPEG image"),
    (b"GIF8", "a GIF image"),
    (b"\x1f\x8b", "gzip-compressed data"),
    (b"WEBVTT", "a WebVTT transcript"),
)


def describe_content(data: bytes) -> str:
    """A short phrase for what the bytes look like ("a zip archive", "HTML", "text", ...)."""
    head = data[:1024].lstrip()
    for signature, description in _SIGNATURES:
        if head.startswith(signature):
            return description
    lowered = head[:256].lower()
    if lowered.startswith((b"<!doctype html", b"<html")):
        return "an HTML page"
    if lowered.startswith(b"<?xml") or lowered.startswith(b"<"):
        return "XML or HTML markup"
    sample = data[:4096]
    printable = sum(1 for byte in sample if byte >= 0x20 or byte in b"\t\r\n")
    if sample and printable / len(sample) > 0.95:
        return "plain text"
    return "unrecognised binary data"
