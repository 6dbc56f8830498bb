"""Builders for the extractor tests: invented Marrowby Cycle Works documents, made on the fly."""

from __future__ import annotations

import difflib
import io
import re
import unicodedata
import zipfile

from fpdf import FPDF

# Invented text for the demo scenario; no real product or company.
SERVICE_MANUAL = [
    [
        "Marrowby Cycle Works builds the Fellrunner touring frame in its own workshop. Every "
        "frame leaves the bench with a signed inspection card and a torque record for each bolt.",
        "Before the first ride, check that the rear hub turns freely and that the quick release "
        "lever closes with firm pressure from the palm of the hand.",
    ],
    [
        "Brake pads wear faster in wet weather. Inspect the pad depth every two hundred "
        "kilometres and replace both pads on an axle together, never one on its own.",
        "The headset needs grease twice a year. Remove the stem cap, lift the fork out slowly "
        "and wipe the bearing races before packing them with fresh grease.",
    ],
    [
        "Chain wear is measured with the gauge supplied in the Marrowby tool roll. A chain that "
        "has stretched past the second mark must be replaced along with the rear sprockets.",
        "Store the bicycle indoors through the winter months, with the tyres inflated to half "
        "pressure and the chain cleaned and lightly oiled.",
    ],
]


def make_pdf(pages: list[list[str] | None], title: str | None = None) -> bytes:
    """A PDF with one page per entry: paragraphs of text, or None for an image-only page."""
    pdf = FPDF()
    pdf.set_font("Helvetica", size=11)
    if title:
        pdf.set_title(title)
    for paragraphs in pages:
        pdf.add_page()
        if paragraphs is None:
            pdf.set_fill_color(90, 90, 90)
            pdf.rect(20, 20, 120, 80, style="F")  # a drawing, not text: like a scanned page
            continue
        for paragraph in paragraphs:
            pdf.multi_cell(0, 6, paragraph, new_x="LMARGIN", new_y="NEXT")
            pdf.ln(4)
    return bytes(pdf.output())


def comparable_words(text: str) -> list[str]:
    """Words of ``text`` for comparing two readings: NFKC, case-folded, punctuation dropped."""
    return re.findall(r"\w+", unicodedata.normalize("NFKC", text).casefold())


def word_similarity(ours: str, reference: str) -> float:
    """difflib.SequenceMatcher ratio over the two word lists (1.0 = same words in same order)."""
    matcher = difflib.SequenceMatcher(None, comparable_words(ours), comparable_words(reference))
    return matcher.ratio()


def rewrite_zip(data: bytes, replace: dict[str, bytes | None]) -> bytes:
    """Copy a zip-based document (.docx, .pptx, ...), replacing (or with None, dropping) the named
    parts; the others are copied as they are."""
    source = zipfile.ZipFile(io.BytesIO(data))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as target:
        for member in source.infolist():
            if member.filename in replace:
                if replace[member.filename] is not None:
                    target.writestr(member.filename, replace[member.filename])
            else:
                target.writestr(member, source.read(member))
    return buffer.getvalue()
