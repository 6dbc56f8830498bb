"""Self-check of the retrieval question set.

Run ``python -m bench.retrieval.check`` from the repo root.

It writes the corpus twice into temporary folders and checks that:

* both writes are byte-identical, and the corpus meets the per-format minimums (document counts,
  PDF page counts, DOCX styles and tables, transcript lengths, rough word counts);
* every question is well formed, names a file that exists, and carries exactly the anchor its
  format calls for (``page`` for PDF, ``heading`` for DOCX/Markdown/HTML, ``time`` for VTT/SRT,
  none for plain text);
* every identifier question contains at least one identifier-like token (a code such as
  ``MCW-HB2-CAL-07``, ``ECN-0141`` or ``E-17``, an ISO date, or a capitalised name such as
  ``Tern 700`` or ``Bram Tilluck``) and every such token occurs in the answering file's text;
* every ``page`` is inside the PDF and that page has text; every ``heading`` is a heading of the
  document, and only one; every ``time`` span starts at a floored cue start and ends at a ceiled
  cue end of that transcript;
* no paraphrase question repeats six or more consecutive words of its document;
* question counts meet the minimums (total, identifier questions, questions per format).

Exits with status 1 and lists the problems if anything fails.
"""

from __future__ import annotations

import io
import math
import re
import sys
import tempfile
import tomllib
from collections import Counter
from pathlib import Path

from bench.retrieval.corpus import write_corpus

HERE = Path(__file__).resolve().parent
QUESTIONS = HERE / "questions.toml"

FORMATS = ("pdf", "docx", "md", "txt", "vtt", "srt", "html")
MIN_DOCS = {"pdf": 5, "docx": 6, "md": 7, "txt": 6, "vtt": 6, "srt": 6, "html": 6}
MIN_DOCS_TOTAL = 44
MIN_QUESTIONS = 64
MIN_IDENTIFIER = 18
MIN_PER_FORMAT = 6
ANCHOR_FOR = {
    "pdf": "page",
    "docx": "heading",
    "md": "heading",
    "html": "heading",
    "vtt": "time",
    "srt": "time",
    "txt": None,
}
WORDS_LOW, WORDS_HIGH = 250, 1800  # "roughly 300 to 1500 words"
PDF_PAGES = (3, 6)
TRANSCRIPT_SECONDS = (120, 300)
COPY_RUN = 6  # consecutive words a paraphrase may not share

_CODE = re.compile(r"\b[A-Z][A-Z0-9]*(?:[-.][A-Z0-9]+)+\b")
_DATE = re.compile(r"\b\d{4}-\d{2}-\d{2}\b")
_NAME = re.compile(r"\b[A-Z][a-z]+(?:\s+(?:&\s+)?(?:[A-Z][a-z]+|[A-Z]\b|\d+\b))+")
_QUESTION_WORDS = {
    "What",
    "Which",
    "Who",
    "Whom",
    "When",
    "Where",
    "Why",
    "How",
    "Is",
    "Are",
    "Does",
    "Do",
    "Did",
    "Can",
    "Could",
    "Should",
    "Will",
    "Would",
    "My",
    "The",
    "I",
}
_TIMING = re.compile(
    r"^(\d{2,}):(\d{2}):(\d{2})([.,])(\d{3}) --> "
    r"(\d{2,}):(\d{2}):(\d{2})([.,])(\d{3})"
)
_SPAN = re.compile(r"^(\d{2}):(\d{2}):(\d{2})-(\d{2}):(\d{2}):(\d{2})$")


def norm(text: str) -> str:
    return " ".join(text.split()).casefold()


def words(text: str) -> list[str]:
    return re.findall(r"[a-z0-9]+", text.casefold())


def identifier_tokens(text: str) -> list[str]:
    found = [m for m in _CODE.findall(text) if re.search(r"\d", m)]
    found += _DATE.findall(text)
    for match in _NAME.findall(text):
        parts = match.split()
        while parts and parts[0] in _QUESTION_WORDS:
            parts.pop(0)
        if len(parts) >= 2:
            found.append(" ".join(parts))
    return found


# ---------------------------------------------------------------------------- document readers


class Doc:
    """Text, headings, sections, pages and cues of one corpus file."""

    def __init__(self, path: Path, fmt: str):
        self.path, self.fmt = path, fmt
        self.text = ""
        self.pages: list[str] = []
        self.headings: list[str] = []
        self.sections: dict[str, str] = {}
        self.cues: list[tuple[float, float, str]] = []
        self.problems: list[str] = []
        getattr(self, "_read_" + fmt)()

    def _sections_from(self, items: list[tuple[bool, str]]) -> None:
        current = None
        for is_heading, text in items:
            if is_heading:
                current = text.strip()
                self.headings.append(current)
                self.sections.setdefault(current, current)
            elif current is not None:
                self.sections[current] += " " + text
        self.text = " ".join(t for _, t in items)

    def _read_pdf(self) -> None:
        from pypdf import PdfReader

        reader = PdfReader(io.BytesIO(self.path.read_bytes()))
        self.pages = [page.extract_text() or "" for page in reader.pages]
        self.text = "\n".join(self.pages)

    def _read_docx(self) -> None:
        import docx
        from docx.table import Table
        from docx.text.paragraph import Paragraph

        document = docx.Document(str(self.path))
        items, styles = [], Counter()
        for child in document.element.body.iterchildren():  # body order keeps tables in place
            tag = child.tag.rsplit("}", 1)[-1]
            if tag == "p":
                para = Paragraph(child, document)
                name = para.style.name if para.style is not None else ""
                styles[name] += 1
                items.append((name.startswith("Heading"), para.text))
            elif tag == "tbl":
                rows = Table(child, document).rows
                items.append((False, " ".join(" ".join(c.text for c in r.cells) for r in rows)))
        self._sections_from(items)
        if not styles["Heading 1"] or not styles["Heading 2"]:
            self.problems.append("DOCX lacks Heading 1 or Heading 2 paragraphs")
        if not styles["List Number"]:
            self.problems.append("DOCX has no numbered steps (List Number)")
        if not document.tables:
            self.problems.append("DOCX has no table")

    def _read_md(self) -> None:
        raw = self.path.read_text(encoding="utf-8")
        items = []
        for line in raw.splitlines():
            m = re.match(r"^(#{1,6})\s+(.*\S)\s*$", line)
            items.append((True, m.group(2)) if m else (False, line))
        self._sections_from(items)
        self.text = raw
        if not any(line.startswith("# ") for line in raw.splitlines()):
            self.problems.append("Markdown has no '# ' heading")

    def _read_txt(self) -> None:
        self.text = self.path.read_text(encoding="utf-8")

    def _read_html(self) -> None:
        import lxml.html

        root = lxml.html.fromstring(self.path.read_bytes())
        items = []
        for el in root.iter():
            if not isinstance(el.tag, str):
                continue
            if el.tag in ("h1", "h2", "h3", "h4", "h5", "h6"):
                items.append((True, " ".join(el.text_content().split())))
            elif el.tag in ("p", "li", "tr"):
                items.append((False, " ".join(el.text_content().split())))
        self._sections_from(items)
        body = root.find("body")
        self.text = (body if body is not None else root).text_content()
        tags = {el.tag for el in root.iter() if isinstance(el.tag, str)}
        if not {"h1", "h2", "p"} <= tags:
            self.problems.append("HTML lacks <h1>, <h2> or <p>")

    def _read_cues(self, sep: str) -> None:
        raw = self.path.read_text(encoding="utf-8")
        self.text = raw
        blocks = [b for b in re.split(r"\n\s*\n", raw.strip()) if b.strip()]
        if sep == ".":
            if not blocks or not re.match(r"^WEBVTT(?:[ \t].*)?$", blocks[0].splitlines()[0]):
                self.problems.append("WebVTT file does not start with a WEBVTT line")
            blocks = blocks[1:]
        for n, block in enumerate(blocks, start=1):
            lines = block.splitlines()
            if sep == "." and lines[0].startswith("NOTE"):
                continue
            timing_at = next((i for i, ln in enumerate(lines) if "-->" in ln), None)
            if timing_at is None:
                self.problems.append(f"cue block without timing: {lines[0][:40]!r}")
                continue
            if sep == "," and (timing_at != 1 or lines[0].strip() != str(len(self.cues) + 1)):
                self.problems.append(f"SRT cue {n} is not numbered in sequence")
            m = _TIMING.match(lines[timing_at])
            if not m or m.group(4) != sep or m.group(9) != sep:
                self.problems.append(f"bad cue timing line {lines[timing_at]!r}")
                continue
            g = [int(x) if x not in ".," else x for x in m.groups()]
            start = g[0] * 3600 + g[1] * 60 + g[2] + g[4] / 1000
            end = g[5] * 3600 + g[6] * 60 + g[7] + g[9] / 1000
            if end <= start or (self.cues and start < self.cues[-1][1]):
                self.problems.append(f"cue timing out of order at {lines[timing_at]!r}")
            text = re.sub(r"<[^>]+>", "", " ".join(lines[timing_at + 1 :]))
            self.cues.append((start, end, text))
        if not self.cues:
            self.problems.append("transcript has no cues")

    def _read_vtt(self) -> None:
        self._read_cues(".")

    def _read_srt(self) -> None:
        self._read_cues(",")

    def spoken_text(self) -> str:
        return " ".join(c[2] for c in self.cues) if self.cues else self.text


# ---------------------------------------------------------------------------- checks


def check_corpus(root: Path, paths: list[Path], problems: list[str]) -> dict[str, Doc]:
    docs: dict[str, Doc] = {}
    for path in paths:
        rel = path.relative_to(root).as_posix()
        fmt = path.suffix.lstrip(".")
        if fmt not in FORMATS:
            problems.append(f"{rel}: unexpected format")
            continue
        doc = Doc(path, fmt)
        docs[rel] = doc
        problems.extend(f"{rel}: {p}" for p in doc.problems)
        n_words = len(words(doc.spoken_text()))
        if not WORDS_LOW <= n_words <= WORDS_HIGH:
            problems.append(f"{rel}: {n_words} words, outside {WORDS_LOW}-{WORDS_HIGH}")
        if fmt == "pdf" and not PDF_PAGES[0] <= len(doc.pages) <= PDF_PAGES[1]:
            problems.append(f"{rel}: {len(doc.pages)} pages")
        if fmt in ("vtt", "srt") and doc.cues:
            length = doc.cues[-1][1] - doc.cues[0][0]
            if not TRANSCRIPT_SECONDS[0] <= length <= TRANSCRIPT_SECONDS[1]:
                problems.append(f"{rel}: transcript lasts {length:.0f} s")
    per_format = Counter(d.fmt for d in docs.values())
    for fmt, minimum in MIN_DOCS.items():
        if per_format[fmt] < minimum:
            problems.append(f"only {per_format[fmt]} {fmt} documents (need {minimum})")
    if len(docs) < MIN_DOCS_TOTAL:
        problems.append(f"only {len(docs)} documents (need {MIN_DOCS_TOTAL})")
    return docs


def check_questions(
    questions: list[dict], docs: dict[str, Doc], problems: list[str], notes: list[str]
) -> None:
    seen = set()
    for q in questions:
        qid = q.get("id", "?")
        where = f"question {qid}"
        for key in ("id", "text", "kind", "file"):
            if not isinstance(q.get(key), str) or not q.get(key).strip():
                problems.append(f"{where}: missing or empty {key!r}")
        if not re.fullmatch(r"q\d{2,}", qid):
            problems.append(f"{where}: id is not of the form q01")
        if qid in seen:
            problems.append(f"{where}: duplicate id")
        seen.add(qid)
        extra = set(q) - {"id", "text", "kind", "file", "page", "heading", "time"}
        if extra:
            problems.append(f"{where}: unknown keys {sorted(extra)}")
        if q.get("kind") not in ("paraphrase", "identifier"):
            problems.append(f"{where}: kind {q.get('kind')!r}")
        doc = docs.get(q.get("file", ""))
        if doc is None:
            problems.append(f"{where}: file {q.get('file')!r} is not in the corpus")
            continue
        anchors = [k for k in ("page", "heading", "time") if k in q]
        wanted = ANCHOR_FOR[doc.fmt]
        if (wanted is None and anchors) or (wanted is not None and anchors != [wanted]):
            problems.append(
                f"{where}: anchors {anchors} but a .{doc.fmt} file needs {wanted or 'none'}"
            )
            continue
        section = doc.text
        if wanted == "page":
            page = q["page"]
            if not isinstance(page, int) or not 1 <= page <= len(doc.pages):
                problems.append(f"{where}: page {page!r} outside 1..{len(doc.pages)}")
                continue
            section = doc.pages[page - 1]
            if not section.strip():
                problems.append(f"{where}: page {page} has no text")
        elif wanted == "heading":
            count = doc.headings.count(q["heading"])
            if count != 1:
                problems.append(
                    f"{where}: heading {q['heading']!r} occurs {count} times as a "
                    f"heading in {q['file']}"
                )
                continue
            section = doc.sections[q["heading"]]
            if not section.strip():
                problems.append(f"{where}: nothing under heading {q['heading']!r}")
        elif wanted == "time":
            m = _SPAN.match(q["time"])
            if not m:
                problems.append(f"{where}: time {q['time']!r} is not HH:MM:SS-HH:MM:SS")
                continue
            g = [int(x) for x in m.groups()]
            start, end = g[0] * 3600 + g[1] * 60 + g[2], g[3] * 3600 + g[4] * 60 + g[5]
            starts = [math.floor(c[0]) for c in doc.cues]
            ends = [math.ceil(c[1]) for c in doc.cues]
            if (
                start >= end
                or start not in starts
                or end not in ends
                or ends.index(end) < starts.index(start)
            ):
                problems.append(
                    f"{where}: time {q['time']} does not run from a cue start to a "
                    f"cue end in {q['file']}"
                )
                continue
            section = " ".join(c[2] for c in doc.cues[starts.index(start) : ends.index(end) + 1])
        file_text = norm(doc.text if doc.fmt not in ("vtt", "srt") else doc.spoken_text())
        if q["kind"] == "identifier":
            tokens = identifier_tokens(q["text"])
            if not tokens:
                problems.append(f"{where}: identifier question without an identifier-like token")
            for token in tokens:
                if norm(token) not in file_text:
                    problems.append(f"{where}: identifier {token!r} not found in {q['file']}")
            if tokens and not any(norm(t) in norm(section) for t in tokens):
                notes.append(
                    f"{qid}: identifier {tokens} is in the file but not in the anchored "
                    f"part (fine when the answer does not repeat it)"
                )
        if q["kind"] == "paraphrase":
            qw, dw = words(q["text"]), words(file_text)
            shingles = {tuple(dw[i : i + COPY_RUN]) for i in range(len(dw) - COPY_RUN + 1)}
            for i in range(len(qw) - COPY_RUN + 1):
                if tuple(qw[i : i + COPY_RUN]) in shingles:
                    problems.append(
                        f"{where}: paraphrase copies {' '.join(qw[i : i + COPY_RUN])!r}"
                    )
                    break
    kinds = Counter(q.get("kind") for q in questions)
    if len(questions) < MIN_QUESTIONS:
        problems.append(f"only {len(questions)} questions (need {MIN_QUESTIONS})")
    if kinds["identifier"] < MIN_IDENTIFIER:
        problems.append(f"only {kinds['identifier']} identifier questions (need {MIN_IDENTIFIER})")
    per_format = Counter(docs[q["file"]].fmt for q in questions if q.get("file") in docs)
    for fmt in FORMATS:
        if per_format[fmt] < MIN_PER_FORMAT:
            problems.append(f"only {per_format[fmt]} questions on {fmt} (need {MIN_PER_FORMAT})")
    unasked = sorted(set(docs) - {q.get("file") for q in questions})
    if unasked:
        notes.append(f"documents with no question (distractors only): {', '.join(unasked)}")


def main() -> int:
    problems: list[str] = []
    notes: list[str] = []
    questions = tomllib.loads(QUESTIONS.read_text(encoding="utf-8")).get("question", [])
    with tempfile.TemporaryDirectory() as one, tempfile.TemporaryDirectory() as two:
        root_a, root_b = Path(one), Path(two)
        paths_a, paths_b = write_corpus(root_a), write_corpus(root_b)
        rel_a = [p.relative_to(root_a) for p in paths_a]
        rel_b = [p.relative_to(root_b) for p in paths_b]
        if rel_a != rel_b:
            problems.append("two writes produced different file lists")
        for rel in rel_a:
            if rel in rel_b and (root_a / rel).read_bytes() != (root_b / rel).read_bytes():
                problems.append(f"{rel.as_posix()}: bytes differ between two writes")
        docs = check_corpus(root_a, paths_a, problems)
        check_questions(questions, docs, problems, notes)

    doc_formats = Counter(d.fmt for d in docs.values())
    q_formats = Counter(docs[q["file"]].fmt for q in questions if q.get("file") in docs)
    kinds = Counter(q.get("kind") for q in questions)
    print(f"documents: {len(docs)}  " + "  ".join(f"{f}={doc_formats[f]}" for f in FORMATS))
    print(f"questions: {len(questions)}  " + "  ".join(f"{f}={q_formats[f]}" for f in FORMATS))
    print(f"kinds: paraphrase={kinds['paraphrase']}  identifier={kinds['identifier']}")
    for note in notes:
        print("note:", note)
    if problems:
        print(f"FAILED: {len(problems)} problem(s)")
        for problem in problems:
            print("  -", problem)
        return 1
    print("OK: corpus written twice byte-identically; all questions and anchors check out")
    return 0


if __name__ == "__main__":
    sys.exit(main())
