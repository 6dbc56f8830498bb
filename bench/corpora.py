"""Deterministic generated corpora for the benchmarks: Marrowby Cycle Works documents.

Every document is a pure function of its number (and of how many edits it has had), so two runs
with the same sizes write byte-identical text for the text formats and the same text content for
.docx and .pdf. Formats rotate through every one upwell extracts: Markdown, plain text, WebVTT,
SRT, Word (.docx, written with python-docx) and PDF (written with fpdf2).

Each paragraph carries the document's serial number, so no two documents share a chunk text and
the embedding cache cannot make a build look cheaper than it is.
"""

from __future__ import annotations

import io
import os
import random
from collections.abc import Iterator
from pathlib import Path

FORMATS: tuple[str, ...] = ("md", "txt", "vtt", "srt", "docx", "pdf")
DOCUMENTS_PER_FOLDER = 100
FOLDERS = ("manuals", "procedures", "policies", "notices", "training")

_PARTS = (
    "wheel", "spoke", "rim", "hub", "axle", "crank", "chainring", "cassette", "derailleur",
    "brake caliper", "brake hose", "rotor", "headset", "stem", "handlebar", "seatpost", "saddle",
    "bottom bracket", "pedal", "fork", "frame", "chain", "gear cable", "bearing", "dropout",
)  # fmt: skip
_ACTIONS = (
    "inspect", "clean", "grease", "tighten", "loosen", "align", "true", "replace", "measure",
    "adjust", "torque", "check", "lubricate", "seat", "bleed", "label", "pack", "photograph",
)  # fmt: skip
_CIRCUMSTANCES = (
    "before the test ride", "with the bike in the stand", "after every service",
    "using the workshop gauge", "until the play is gone", "and record the value on the job card",
    "as the supervisor showed in training", "without forcing the thread",
    "at the start of each shift", "when the customer reports a creak",
    "before the frame leaves the paint shop", "once the wheel has settled overnight",
)  # fmt: skip
_MODELS = ("Fellrunner", "Towpath", "Gritstone", "Heron", "Larkspur", "Millrace", "Coppice")


def _sentence(rng: random.Random, serial: int) -> str:
    return (
        f"{rng.choice(_ACTIONS).capitalize()} the {rng.choice(_PARTS)} of the "
        f"{rng.choice(_MODELS)} {rng.choice(_CIRCUMSTANCES)}, then note reading "
        f"{rng.randint(2, 99)} against serial MCW-{serial:06d}."
    )


def _paragraph(rng: random.Random, serial: int, sentences: int | None = None) -> str:
    return " ".join(_sentence(rng, serial) for _ in range(sentences or rng.randint(2, 4)))


def document_paragraphs(number: int, edits: int = 0) -> list[str]:
    """Paragraphs of document ``number`` after ``edits`` rewrites of one paragraph each."""
    rng = random.Random(number)
    paragraphs = [_paragraph(rng, number) for _ in range(rng.randint(2, 5))]
    for edit in range(1, edits + 1):
        edit_rng = random.Random(f"{number}/edit/{edit}")
        position = edit_rng.randrange(len(paragraphs))
        paragraphs[position] = _paragraph(edit_rng, number)
    return paragraphs


def document_title(number: int) -> str:
    return f"Marrowby workshop sheet {number:06d}"


def relative_path(number: int) -> str:
    """Where document ``number`` lives inside a corpus folder (100 documents per folder)."""
    folder = FOLDERS[number % len(FOLDERS)]
    return (
        f"{folder}/batch-{number // DOCUMENTS_PER_FOLDER:04d}/sheet-{number:06d}.{_format(number)}"
    )


def _format(number: int) -> str:
    return FORMATS[number % len(FORMATS)]


def _clock(seconds: int, separator: str) -> str:
    return f"{seconds // 3600:02d}:{seconds // 60 % 60:02d}:{seconds % 60:02d}{separator}000"


def render(fmt: str, title: str, paragraphs: list[str]) -> bytes:
    """The bytes of one document in format ``fmt`` (a suffix from FORMATS)."""
    if fmt == "md":
        body = "\n\n".join(paragraphs)
        return f"# {title}\n\n## Procedure\n\n{body}\n".encode()
    if fmt == "txt":
        return (title + "\n\n" + "\n\n".join(paragraphs) + "\n").encode()
    if fmt in ("vtt", "srt"):
        cues = [sentence for p in paragraphs for sentence in p.split(". ") if sentence]
        separator = "." if fmt == "vtt" else ","
        lines = ["WEBVTT", ""] if fmt == "vtt" else []
        for n, cue in enumerate(cues):
            if fmt == "srt":
                lines.append(str(n + 1))
            start, end = _clock(n * 6, separator), _clock(n * 6 + 6, separator)
            lines += [f"{start} --> {end}", cue.rstrip(".") + ".", ""]
        return "\n".join(lines).encode()
    if fmt == "docx":
        return _render_docx(title, paragraphs)
    if fmt == "pdf":
        return _render_pdf(title, paragraphs)
    raise ValueError(f"unknown benchmark format {fmt!r}")


def _render_docx(title: str, paragraphs: list[str]) -> bytes:
    import docx

    document = docx.Document()
    document.add_heading(title, level=1)
    for paragraph in paragraphs:
        document.add_paragraph(paragraph)
    out = io.BytesIO()
    document.save(out)
    return out.getvalue()


def _render_pdf(title: str, paragraphs: list[str]) -> bytes:
    from fpdf import FPDF

    pdf = FPDF()
    pdf.set_compression(False)  # faster to write; extraction cost is the same
    pdf.add_page()
    pdf.set_font("Helvetica", size=14)
    pdf.multi_cell(0, 8, title, new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", size=11)
    for paragraph in paragraphs:
        pdf.multi_cell(0, 6, paragraph, new_x="LMARGIN", new_y="NEXT")
        pdf.ln(3)
    return bytes(pdf.output())


def write_document(root: Path, number: int, edits: int = 0) -> Path:
    """Write document ``number`` (after ``edits`` rewrites) under ``root``; returns its path."""
    path = root / relative_path(number)
    path.parent.mkdir(parents=True, exist_ok=True)
    data = render(_format(number), document_title(number), document_paragraphs(number, edits))
    path.write_bytes(data)
    return path


def write_corpus(root: Path, count: int) -> Path:
    """A share of ``count`` documents, every format in turn; deterministic for ``count``."""
    root.mkdir(parents=True, exist_ok=True)
    for number in range(count):
        write_document(root, number)
    return root


def modify_corpus(root: Path, count: int, fraction: float, seed: int = 3) -> list[int]:
    """Rewrite one paragraph in ``fraction`` of the ``count`` documents; the numbers changed."""
    chosen = sorted(random.Random(seed).sample(range(count), max(1, round(count * fraction))))
    for number in chosen:
        write_document(root, number, edits=1)
    return chosen


def write_small_file_tree(root: Path, count: int, per_folder: int = 100) -> Path:
    """``count`` small plain-text stock notes, ``per_folder`` to a folder, for the scan figure."""
    for number in range(count):
        folder = root / f"shelf-{number // per_folder:05d}"
        if number % per_folder == 0:
            folder.mkdir(parents=True, exist_ok=True)
        (folder / f"note-{number:06d}.txt").write_bytes(
            f"Stock note {number}: bin {number % 97} holds {number % 13} spare spokes.\n".encode()
        )
    return root


def bare_walk(root: Path) -> int:
    """The floor for a listing: os.scandir plus one stat per file, nothing else; file count."""
    files = 0
    stack = [os.fspath(root)]
    while stack:
        with os.scandir(stack.pop()) as entries:
            for entry in entries:
                if entry.is_dir(follow_symlinks=False):
                    stack.append(entry.path)
                else:
                    entry.stat(follow_symlinks=False)
                    files += 1
    return files


# --- long documents for the edit-locality figure ---------------------------------------------

EDIT_KINDS: tuple[str, ...] = ("rewrite", "insert", "delete", "append")


def long_document(seed: int, paragraphs: int = 80) -> list[str]:
    """A long workshop guide as paragraphs (every 16th a '## ' section heading)."""
    rng = random.Random(f"long/{seed}")
    out: list[str] = []
    for n in range(paragraphs):
        if n % 16 == 0:
            out.append(f"## Part {n // 16 + 1}")
        out.append(_paragraph(rng, 900_000 + seed, rng.randint(3, 6)))
    return out


def edited(paragraphs: list[str], kind: str, rng: random.Random) -> list[str]:
    """A copy of ``paragraphs`` with one edit of ``kind`` at a random body paragraph."""
    body = [n for n, p in enumerate(paragraphs) if not p.startswith("#")]
    position = rng.choice(body)
    fresh = _paragraph(rng, rng.randint(0, 999_999), rng.randint(3, 6))
    out = list(paragraphs)
    if kind == "rewrite":
        out[position] = fresh
    elif kind == "insert":
        out.insert(position, fresh)
    elif kind == "delete":
        del out[position]
    elif kind == "append":
        out.append(fresh)
    else:
        raise ValueError(f"unknown edit kind {kind!r}")
    return out


def as_markdown(paragraphs: list[str]) -> str:
    return "# Marrowby workshop guide\n\n" + "\n\n".join(paragraphs) + "\n"


def iter_edits(documents: int, edits_per_kind: int) -> Iterator[tuple[int, str, random.Random]]:
    """(document seed, edit kind, random source) for every edit, deterministically."""
    for kind in EDIT_KINDS:
        for n in range(edits_per_kind):
            yield n % documents, kind, random.Random(f"edit/{kind}/{n}")
