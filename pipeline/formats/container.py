"""The checks every zip-based format passes before its parser sees the bytes.

.docx, .pptx, .xlsx, OpenDocument and EPUB files are zip archives of XML parts. Their parsers
read whole parts into memory with no cap and some expand entities, so each extractor opens the
archive here first. ``open_checked_zip`` refuses, with a sentence naming the format:

* bytes whose zip container is damaged (``CorruptDocument``);
* an archive whose declared uncompressed sizes sum past ``limits.max_inflated_bytes``, or with a
  part over 1 MiB that inflates more than ``limits.max_inflate_ratio`` times (a zip bomb;
  ``DocumentTooLarge``). The declared sizes bound what ``zipfile`` inflates: it stops with an
  error when a part's data runs past its declared size;
* an archive without the part that makes it this format (``CorruptDocument``);
* an XML part that declares a DOCTYPE or an entity. Office Open XML forbids a DOCTYPE (ECMA-376
  Part 2, 8.1.4; from memory) and an internal entity subset is how an entity-expansion bomb
  ("billion laughs") is built. Parts are scanned as byte streams, never parsed, so nothing is
  expanded. EPUB 3 chapters start with a plain ``<!DOCTYPE html>``, so a format may allow a
  DOCTYPE and refuse only entity declarations (``allow_plain_doctype``).
"""

from __future__ import annotations

import io
import zipfile
from collections.abc import Callable, Iterable
from typing import IO, TypeVar

from pipeline.errors import CorruptDocument, DocumentTooLarge, ExtractionError, UnsupportedDocument
from pipeline.formats.sniff import describe_content
from pipeline.records import Limits

__all__ = [
    "INFLATE_ERRORS",
    "open_checked_package",
    "open_checked_zip",
    "read_part",
    "require_zip_bytes",
]

_Package = TypeVar("_Package")

# Parts smaller than this are not ratio-checked: small XML compresses very well legitimately.
RATIO_CHECK_MIN_BYTES = 1024 * 1024
_SCAN_CHUNK = 64 * 1024
_DOCTYPE_MARKERS = (b"<!DOCTYPE", b"<!ENTITY")
_ENTITY_MARKERS = (b"<!ENTITY",)
_XML_SUFFIXES = (".xml", ".rels", ".vml", ".xhtml", ".htm", ".html", ".opf", ".ncx")

#: What ``zipfile`` raises while inflating a damaged part.
INFLATE_ERRORS = (zipfile.BadZipFile, EOFError, OSError, ValueError, NotImplementedError)


def require_zip_bytes(data: bytes, what: str) -> None:
    """Refuse bytes that do not even start like a zip archive, saying what they look like; the
    format table's first check for a zip-based format (``what``: "a Word .docx")."""
    if not data.startswith(b"PK"):
        raise CorruptDocument(
            f"not {what} (which is a zip archive); it looks like {describe_content(data)}"
        )


def _part_has_marker(
    archive: zipfile.ZipFile, member: zipfile.ZipInfo, markers: tuple[bytes, ...]
) -> bool:
    """Scan one part in pieces, so a large part is never held in memory whole."""
    with archive.open(member) as stream:
        head = stream.read(2)
        if head in (b"\xff\xfe", b"\xfe\xff"):  # UTF-16 XML: decode before searching
            text = (head + stream.read()).decode("utf-16", errors="replace").encode("utf-8")
            return any(marker in text for marker in markers)
        carry = head
        while True:
            piece = stream.read(_SCAN_CHUNK)
            window = carry + piece
            if any(marker in window for marker in markers):
                return True
            if not piece:
                return False
            carry = window[-16:]  # longer than any marker, so one split across pieces is seen


def _check_sizes(archive: zipfile.ZipFile, limits: Limits, label: str) -> None:
    members = archive.infolist()
    total = sum(member.file_size for member in members)
    if total > limits.max_inflated_bytes:
        raise DocumentTooLarge(
            f"the {label} would inflate to {total:,} bytes, over the limit of "
            f"{limits.max_inflated_bytes:,} bytes"
        )
    for member in members:
        if member.file_size < RATIO_CHECK_MIN_BYTES:
            continue
        ratio = member.file_size / max(member.compress_size, 1)
        if ratio > limits.max_inflate_ratio:
            raise DocumentTooLarge(
                f"part {member.filename} inflates {ratio:,.0f} times ({member.file_size:,} bytes), "
                f"over the limit of {limits.max_inflate_ratio:,.0f} times; it looks like a zip bomb"
            )


def open_checked_zip(
    data: bytes,
    limits: Limits,
    *,
    label: str,
    kind: str,
    required: Iterable[str] = (),
    allow_plain_doctype: bool = False,
    doctype_error: type[ExtractionError] = CorruptDocument,
) -> zipfile.ZipFile:
    """Open ``data`` as a zip archive after the checks above; the caller closes it.

    ``label`` names the file type in messages (".xlsx"), ``kind`` what it should be ("an Excel
    workbook"), ``required`` the parts without which it is not that format.
    """
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
    except zipfile.BadZipFile as error:
        raise CorruptDocument(
            f"not {kind}: the {label} zip container is damaged ({error})"
        ) from error
    try:
        _check_sizes(archive, limits, label)
        names = set(archive.namelist())
        for part in required:
            if part not in names:
                raise CorruptDocument(f"not {kind}: the {label} has no {part} part")
        markers = _ENTITY_MARKERS if allow_plain_doctype else _DOCTYPE_MARKERS
        what = "an entity" if allow_plain_doctype else "a DOCTYPE or entity"
        try:
            for member in archive.infolist():
                if member.filename.lower().endswith(_XML_SUFFIXES) and _part_has_marker(
                    archive, member, markers
                ):
                    raise doctype_error(
                        f"part {member.filename} declares {what}, which {kind} must not "
                        "contain; it is refused unread, so no entity is expanded"
                    )
        except INFLATE_ERRORS as error:
            raise CorruptDocument(
                f"damaged {label}: a part cannot be inflated ({error})"
            ) from error
    except BaseException:
        archive.close()
        raise
    return archive


def open_checked_package(
    data: bytes,
    limits: Limits,
    opener: Callable[[IO[bytes]], _Package],
    *,
    label: str,
    kind: str,
    plain: str,
    required: Iterable[str],
    doctype_error: type[ExtractionError] = CorruptDocument,
) -> _Package:
    """Check ``data`` with ``open_checked_zip``, then open it with ``opener`` (``docx.Document``,
    ``pptx.Presentation``), turning the library's failures into the project's errors.

    ``plain`` names the only kind of package the library reads ("a plain Word document").
    """
    open_checked_zip(
        data, limits, label=label, kind=kind, required=required, doctype_error=doctype_error
    ).close()
    try:
        return opener(io.BytesIO(data))
    except ValueError as error:
        # python-docx and python-pptx raise ValueError for a package whose main part is not the
        # plain kind (a macro-enabled file, a template or a slide show renamed to the suffix).
        raise UnsupportedDocument(f"not {plain}: {error}") from error
    except Exception as error:  # noqa: BLE001 - lxml, zipfile and KeyError failures alike
        raise CorruptDocument(f"damaged {label} ({type(error).__name__}: {error})") from error


def read_part(archive: zipfile.ZipFile, name: str, label: str) -> bytes:
    """The bytes of one part (its size already bounded by ``open_checked_zip``)."""
    try:
        return archive.read(name)
    except KeyError as error:
        raise CorruptDocument(f"damaged {label}: part {name} is missing") from error
    except INFLATE_ERRORS as error:
        raise CorruptDocument(
            f"damaged {label}: part {name} cannot be inflated ({error})"
        ) from error
