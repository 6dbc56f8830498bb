"""OCR on the CPU for images and for PDF pages without a text layer.

The engine is RapidOCR's ONNX build (``rapidocr-onnxruntime``, Apache-2.0): PP-OCRv4 detection
and recognition models and a direction classifier ship inside its wheel and run on onnxruntime,
so nothing is downloaded at run time and no GPU is used. It is loaded once per process, on the
first image, and guarded by a lock (onnxruntime sessions are not shared across calls here).

What a page gives: one segment per recognised line, top to bottom, with ``Anchor.page`` set and
the line's confidence kept beside it. Lines under ``LOW_CONFIDENCE`` are kept (a wrong word is
still better found than lost) and counted; a page where most recognised characters are below it
adds a warning, which the status view shows as a problem of that document.

Results are cached by the SHA-256 of the page image's bytes, in memory and in a file per page
under the index's OCR cache folder, so a page seen twice (the same scan in two PDFs, a PDF whose
other pages changed, in this run or a later one) is recognised once. ``erase`` empties that
folder, since it may hold the text of the erased scans.
A file that did not change, or was only renamed, is never re-extracted at all: the sync engine
skips it by its content hash before any extractor runs.

Images are refused before decoding when they claim more than ``MAX_PIXELS`` pixels (a
decompression bomb: a small PNG can claim 20,000 x 20,000), and a truncated image is
``CorruptDocument``. Large images are scaled so their longer side is at most ``MAX_SIDE`` pixels
before recognition, which bounds memory and time per page.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import threading
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import CorruptDocument, DocumentTooLarge, EmptyDocument
from pipeline.formats.text import normalise_text
from pipeline.records import PARAGRAPH, Anchor, Extracted, Segment

__all__ = [
    "IMAGE_TYPES",
    "LOW_CONFIDENCE",
    "MAX_PIXELS",
    "OcrLine",
    "extract_image",
    "recognise",
]

IMAGE_TYPES = {
    ".png": "image/png",
    ".jpg": "image/jpeg",
    ".jpeg": "image/jpeg",
    ".tif": "image/tiff",
    ".tiff": "image/tiff",
}

#: A line whose recognition confidence is below this is counted as low confidence.
LOW_CONFIDENCE = 0.6
#: Pixels an image may claim before it is decoded: an A3 page at 600 dpi is about 70 million.
MAX_PIXELS = 100_000_000
#: Longer side, in pixels, an image is scaled down to before recognition (A4 at 300 dpi: 3,508).
MAX_SIDE = 4000
_MAX_FRAMES = 500
_CACHE_PAGES = 256


@dataclass(frozen=True)
class OcrLine:
    text: str
    confidence: float
    top: float
    left: float


_engine: Any = None
_engine_lock = threading.Lock()
_cache: OrderedDict[str, tuple[OcrLine, ...]] = OrderedDict()


def _get_engine() -> Any:
    global _engine
    if _engine is None:
        from rapidocr_onnxruntime import RapidOCR

        _engine = RapidOCR()
    return _engine


def _to_rgb_array(image: Any) -> Any:
    import numpy

    if max(image.size) > MAX_SIDE:
        image = image.copy()
        image.thumbnail((MAX_SIDE, MAX_SIDE))
    return numpy.asarray(image.convert("RGB"))


def _disk_path(cache_dir: str | None, digest: str | None) -> Path | None:
    if cache_dir is None or digest is None:
        return None
    return Path(cache_dir) / digest[:2] / f"{digest}.json"


def _read_disk(path: Path | None) -> tuple[OcrLine, ...] | None:
    if path is None:
        return None
    try:
        rows = json.loads(path.read_text(encoding="utf-8"))
        return tuple(OcrLine(str(t), float(c), float(y), float(x)) for t, c, y, x in rows)
    except (OSError, ValueError, TypeError):
        return None  # absent or damaged: recognise again


def _write_disk(path: Path | None, lines: tuple[OcrLine, ...]) -> None:
    if path is None:
        return
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        temporary = path.with_suffix(f".{os.getpid()}.tmp")
        rows = [[line.text, line.confidence, line.top, line.left] for line in lines]
        temporary.write_text(json.dumps(rows), encoding="utf-8")
        os.replace(temporary, path)
    except OSError:
        pass  # a cache that cannot be written costs time, never a document


def recognise(
    image: Any, key: bytes | None = None, cache_dir: str | None = None
) -> tuple[OcrLine, ...]:
    """The text lines of one PIL image, top to bottom; cached by SHA-256 of ``key`` if given,
    in memory and, with ``cache_dir``, in a file per page image that later runs reuse."""
    digest = hashlib.sha256(key).hexdigest() if key is not None else None
    disk = _disk_path(cache_dir, digest)
    with _engine_lock:
        if digest is not None and digest in _cache:
            _cache.move_to_end(digest)
            return _cache[digest]
        stored = _read_disk(disk)
        if stored is not None and digest is not None:
            _cache[digest] = stored
            return stored
        result, _elapsed = _get_engine()(_to_rgb_array(image), use_cls=False)
        lines = []
        for box, text, confidence in result or ():
            cleaned = normalise_text(str(text))
            if cleaned:
                top = min(point[1] for point in box)
                left = min(point[0] for point in box)
                lines.append(OcrLine(cleaned, float(confidence), float(top), float(left)))
        ordered = tuple(sorted(lines, key=lambda line: (round(line.top / 8), line.left)))
        if digest is not None:
            _cache[digest] = ordered
            while len(_cache) > _CACHE_PAGES:
                _cache.popitem(last=False)
            _write_disk(disk, ordered)
        return ordered


def page_segments(lines: tuple[OcrLine, ...], page: int) -> tuple[list[Segment], str | None]:
    """Segments of one recognised page, and a warning when most of its text is low confidence."""
    segments = [Segment(line.text, Anchor(page=page), PARAGRAPH) for line in lines]
    total = sum(len(line.text) for line in lines)
    low = sum(len(line.text) for line in lines if line.confidence < LOW_CONFIDENCE)
    warning = None
    if total and low / total > 0.5:
        warning = (
            f"page {page}: {low / total:.0%} of the text read by OCR is below confidence "
            f"{LOW_CONFIDENCE}; check the scan"
        )
    return segments, warning


def open_image(data: bytes, what: str = "image") -> Any:
    """A PIL image of ``data`` after the pixel-count check; ``CorruptDocument`` if unreadable."""
    from PIL import Image, UnidentifiedImageError

    try:
        image = Image.open(io.BytesIO(data))
    except Image.DecompressionBombError as error:
        raise DocumentTooLarge(f"the {what} claims too many pixels ({error})") from error
    except (UnidentifiedImageError, OSError, ValueError) as error:
        raise CorruptDocument(f"not a readable {what} ({error})") from error
    width, height = image.size
    if width * height > MAX_PIXELS:
        raise DocumentTooLarge(
            f"the {what} is {width:,} x {height:,} pixels, over the limit of {MAX_PIXELS:,} "
            "pixels (a decompression bomb?)"
        )
    return image


def _frames(image: Any) -> list[Any]:
    from PIL import ImageSequence

    frames = []
    for frame in ImageSequence.Iterator(image):
        frames.append(frame.copy())
        if len(frames) >= _MAX_FRAMES:
            break
    return frames


def extract_image(data: bytes, media_type: str, cache_dir: str | None = None) -> Extracted:
    """OCR of a PNG, JPEG or TIFF (each TIFF frame is a page); lines as segments."""
    image = open_image(data)
    try:
        frames = _frames(image)
    except (OSError, ValueError, SyntaxError) as error:
        raise CorruptDocument(f"damaged image: it cannot be decoded ({error})") from error
    segments: list[Segment] = []
    warnings: list[str] = []
    for page, frame in enumerate(frames, start=1):
        key = data if len(frames) == 1 else frame.tobytes()
        page_found, warning = page_segments(recognise(frame, key, cache_dir), page)
        segments.extend(page_found)
        if warning:
            warnings.append(warning)
    if not segments:
        raise EmptyDocument("OCR found no text in the image")
    return Extracted(media_type=media_type, segments=tuple(segments), warnings=tuple(warnings))
