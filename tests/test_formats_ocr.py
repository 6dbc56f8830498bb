"""OCR of images and of PDF pages without a text layer, measured against known text.

The known text is the first two sentences of the Gettysburg Address (Abraham Lincoln, 1863; in
the public domain), rendered here with the font built into Pillow at 11 pt on an A4-wide page
at 300 and 150 dpi, as a PNG and as an image-only PDF (Pillow's PDF writer). The character
error rate is CER = (S + D + I) / N: the Levenshtein edit distance between the recognised and
the known text, over the known text's length (the usual OCR measure; common practice), after
whitespace runs are folded to one space.
"""

from __future__ import annotations

import io
import struct
import textwrap
import zlib
from pathlib import Path

import pytest
from PIL import Image, ImageDraw, ImageFont

from pipeline.errors import CorruptDocument, DocumentTooLarge, NoTextLayer, UnsupportedDocument
from pipeline.formats import extract, ocr
from pipeline.records import Limits

KNOWN_TEXT = (
    "Four score and seven years ago our fathers brought forth on this continent, a new nation, "
    "conceived in Liberty, and dedicated to the proposition that all men are created equal. "
    "Now we are engaged in a great civil war, testing whether that nation, or any nation so "
    "conceived and so dedicated, can long endure."
)


def render(text: str, dpi: int) -> Image.Image:
    """``text`` at 11 pt on an A4-wide white page with one-inch margins, black on white."""
    size = round(11 / 72 * dpi)
    font = ImageFont.load_default(size=size)
    lines = textwrap.wrap(text, 70)
    step = round(size * 1.5)
    image = Image.new("L", (round(8.27 * dpi), 2 * dpi + len(lines) * step), 255)
    draw = ImageDraw.Draw(image)
    for number, line in enumerate(lines):
        draw.text((dpi, dpi + number * step), line, font=font, fill=0)
    return image


def png_bytes(image: Image.Image) -> bytes:
    out = io.BytesIO()
    image.save(out, "PNG")
    return out.getvalue()


def pdf_bytes(image: Image.Image, dpi: int) -> bytes:
    out = io.BytesIO()
    image.save(out, "PDF", resolution=dpi)
    return out.getvalue()


def character_error_rate(recognised: str, known: str) -> float:
    """Levenshtein distance (substitutions, deletions, insertions) per known character."""
    got, ref = " ".join(recognised.split()), " ".join(known.split())
    previous = list(range(len(ref) + 1))
    for i, a in enumerate(got, start=1):
        current = [i]
        for j, b in enumerate(ref, start=1):
            current.append(min(previous[j] + 1, current[j - 1] + 1, previous[j - 1] + (a != b)))
        previous = current
    return previous[-1] / len(ref)


def test_the_error_rate_formula_on_a_textbook_pair():
    # "kitten" -> "sitting" is three edits (the classic Levenshtein example; from memory).
    assert character_error_rate("kitten", "sitting") == pytest.approx(3 / 7)
    assert character_error_rate(KNOWN_TEXT, KNOWN_TEXT) == 0.0


@pytest.mark.slow
def test_printed_text_at_300_dpi_is_read_within_two_percent_as_png_and_as_image_pdf():
    image = render(KNOWN_TEXT, 300)
    from_png = extract("notice-board.png", png_bytes(image))
    assert {s.anchor.page for s in from_png.segments} == {1}
    png_cer = character_error_rate(" ".join(s.text for s in from_png.segments), KNOWN_TEXT)
    from_pdf = extract("scanned-notice.pdf", pdf_bytes(image, 300))
    pdf_cer = character_error_rate(" ".join(s.text for s in from_pdf.segments), KNOWN_TEXT)
    print(f"CER at 300 dpi: PNG {png_cer:.4f}, image-only PDF {pdf_cer:.4f}")
    assert png_cer <= 0.02
    assert pdf_cer <= 0.02
    assert "page 1 has no text layer; its text was read by OCR" in from_pdf.warnings


@pytest.mark.slow
def test_printed_text_at_150_dpi_is_still_mostly_read():
    # No target is set at 150 dpi; the figure is printed and must stay well short of garbage.
    image = render(KNOWN_TEXT, 150)
    found = extract("notice-board.png", png_bytes(image))
    cer = character_error_rate(" ".join(s.text for s in found.segments), KNOWN_TEXT)
    print(f"CER at 150 dpi: PNG {cer:.4f}")
    assert cer <= 0.15


def test_a_page_with_a_text_layer_is_never_read_by_ocr():
    from fpdf import FPDF

    pdf = FPDF()
    pdf.add_page()
    pdf.set_font("Helvetica", size=12)
    pdf.cell(0, 10, "Frame serial MCW-0042 passed final inspection.")
    found = extract("inspection.pdf", bytes(pdf.output()))
    assert [s.text for s in found.segments] == ["Frame serial MCW-0042 passed final inspection."]
    assert not any("OCR" in w for w in found.warnings)


def test_the_same_page_image_is_recognised_once(monkeypatch):
    calls = []
    engine = ocr._get_engine()

    def counting(*args, **kwargs):
        calls.append(1)
        return engine(*args, **kwargs)

    monkeypatch.setattr(ocr, "_engine", counting)
    data = png_bytes(render("Bench 7 has the only through-axle fixture.", 200))
    first = extract("bench-7.png", data)
    again = extract("bench-7-copy.png", data)
    assert [s.text for s in first.segments] == [s.text for s in again.segments]
    assert len(calls) == 1


def test_ocr_off_refuses_images_and_leaves_scans_without_text():
    image = render("Bench 7 has the only through-axle fixture.", 150)
    with pytest.raises(UnsupportedDocument, match="OCR is off"):
        extract("bench.png", png_bytes(image), Limits(ocr=False))
    with pytest.raises(NoTextLayer, match="OCR is off"):
        extract("scan.pdf", pdf_bytes(image, 150), Limits(ocr=False))


def _png_claiming(width: int, height: int) -> bytes:
    """A PNG whose header claims ``width`` x ``height`` (PNG spec, W3C REC 2003: signature,
    IHDR with its CRC-32, one tiny IDAT, IEND); the pixel data is far too short."""

    def chunk(kind: bytes, body: bytes) -> bytes:
        return (
            struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))
        )

    header = struct.pack(">IIBBBBB", width, height, 1, 0, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + chunk(b"IHDR", header)
        + chunk(b"IDAT", zlib.compress(b"\x00\x00"))
        + chunk(b"IEND", b"")
    )


def test_an_image_claiming_20000_by_20000_pixels_is_refused_before_decoding():
    with pytest.raises(DocumentTooLarge, match="pixels"):
        extract("poster.png", _png_claiming(20_000, 20_000))


@pytest.mark.parametrize("kind", ["PNG", "JPEG"])
def test_a_truncated_image_is_damaged(kind):
    out = io.BytesIO()
    render("Workshop closed on Friday afternoon.", 150).save(out, kind)
    data = out.getvalue()
    with pytest.raises(CorruptDocument):
        extract(f"notice.{kind.lower()}", data[: len(data) // 2])


def test_bytes_that_are_no_image_are_damaged():
    with pytest.raises(CorruptDocument, match="not a readable image"):
        extract("photo.jpg", b"Frame serial MCW-0042 passed final inspection.\n")


def test_a_later_run_reads_the_page_from_the_ocr_cache_folder_and_erase_empties_it(
    tmp_path, monkeypatch
):
    from pipeline.index import Index

    share = tmp_path / "share"
    share.mkdir()
    image = render("Frames are sprayed only when the green lamp is lit.", 200)
    (share / "booth-2.pdf").write_bytes(pdf_bytes(image, 200))
    index = Index(tmp_path / "idx")
    index.sync([share], yes=True)
    cache = Path(index.limits.ocr_cache)
    assert len(list(cache.rglob("*.json"))) == 1
    # A new process has an empty memory cache: stand for it by clearing this one, then count
    # the engine's calls while a renamed copy with one more page is synced.
    ocr._cache.clear()
    calls = []
    engine = ocr._get_engine()

    def counting(*args, **kwargs):
        calls.append(1)
        return engine(*args, **kwargs)

    monkeypatch.setattr(ocr, "_engine", counting)
    second = render("Booth 1 is closed for filter changes.", 200)
    both = io.BytesIO()
    image.save(both, "PDF", resolution=200, save_all=True, append_images=[second])
    (share / "booth-2.pdf").write_bytes(both.getvalue())
    index.sync([share], yes=True)
    assert len(calls) == 1  # only the new page was recognised
    assert len(list(cache.rglob("*.json"))) == 2
    index.erase(["share/booth-2.pdf"], yes=True)
    assert not cache.exists()
