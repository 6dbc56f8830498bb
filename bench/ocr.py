"""OCR speed and accuracy on this machine: pages per second and character error rate.

    python -m bench.ocr            # 3 pages at 300 dpi and 3 at 150 dpi

Each page is an A4 page of known text (the Gettysburg Address, public domain, repeated to fill
the page) drawn in Pillow's built-in font at 11 pt, saved as an image-only PDF and extracted
through upwell's PDF reader, so the figure includes finding the page image and decoding it.
The error rate is the Levenshtein distance per known character (see tests/test_formats_ocr.py).
A second pass over the same pages shows the cache: the same page image is recognised once.
"""

from __future__ import annotations

import sys
import time

from pipeline.formats import extract
from tests.test_formats_ocr import KNOWN_TEXT, character_error_rate, pdf_bytes, render

PAGE_TEXT = " ".join([KNOWN_TEXT] * 4)


def measure(dpi: int, pages: int) -> dict[str, float]:
    documents = [pdf_bytes(render(f"Page {n}. {PAGE_TEXT}", dpi), dpi) for n in range(pages)]
    started = time.perf_counter()
    rates = []
    for number, data in enumerate(documents):
        found = extract("scan.pdf", data)
        recognised = " ".join(s.text for s in found.segments)
        rates.append(character_error_rate(recognised, f"Page {number}. {PAGE_TEXT}"))
    first = time.perf_counter() - started
    started = time.perf_counter()
    for data in documents:
        extract("scan.pdf", data)
    cached = time.perf_counter() - started
    return {
        "dpi": dpi,
        "pages_per_second": pages / first,
        "cer": sum(rates) / len(rates),
        "cached_speedup": first / max(cached, 1e-9),
    }


def main(argv: list[str]) -> int:
    pages = int(argv[1]) if len(argv) > 1 else 3
    extract("warm.png", _warm_png())  # load the models once, outside the timing
    for dpi in (300, 150):
        row = measure(dpi, pages)
        print(
            f"{row['dpi']} dpi: {row['pages_per_second']:.2f} pages/s, "
            f"CER {row['cer']:.4f}, second pass {row['cached_speedup']:.0f}x faster (cache)"
        )
    return 0


def _warm_png() -> bytes:
    from tests.test_formats_ocr import png_bytes

    return png_bytes(render("warm up", 100))


if __name__ == "__main__":
    raise SystemExit(main(sys.argv))
