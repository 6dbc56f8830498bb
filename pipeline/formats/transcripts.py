"""WebVTT and SRT transcripts: one CUE segment per cue, anchored by start and end in seconds.

The WebVTT reader follows the parsing rules of the W3C "WebVTT: The Web Video Text Tracks
Format" (Candidate Recommendation, https://www.w3.org/TR/webvtt1/), cited by section below.
SRT has no formal specification; the reader accepts the common layout (sequence number, then
``HH:MM:SS,mmm --> HH:MM:SS,mmm``, then text) with '.' as decimal separator and the hours field
left out (``MM:SS,mmm``), as players do.

Cue text is plain text: tags are removed, character references decoded, ruby annotations
(``<rt>``) dropped so the base text reads on, and a voice span ``<v Name>`` becomes "Name: ".
"""

from __future__ import annotations

import html
import re
from dataclasses import dataclass

from pipeline.errors import CorruptDocument, EmptyDocument
from pipeline.formats.text import decode_text, normalise_text, split_lines
from pipeline.records import CUE, Anchor, Extracted, Segment

WEBVTT_TYPE = "text/vtt"
SRT_TYPE = "application/x-subrip"

_ARROW = "-->"


@dataclass(frozen=True)
class _Cue:
    start: float
    end: float
    text: str


class _TimingError(ValueError):
    """A timing line that the rules reject; the cue is discarded."""


# --- WebVTT --------------------------------------------------------------------------------------


class _Scanner:
    """A position in one line, with the "collect a sequence of code points" steps of the spec."""

    def __init__(self, line: str) -> None:
        self.line = line
        self.position = 0

    def at_end(self) -> bool:
        return self.position >= len(self.line)

    def peek(self) -> str:
        return "" if self.at_end() else self.line[self.position]

    def collect_digits(self) -> str:
        start = self.position
        while not self.at_end() and self.line[self.position] in "0123456789":
            self.position += 1
        return self.line[start : self.position]

    def skip_whitespace(self) -> None:
        while not self.at_end() and self.line[self.position] in " \t\n\x0c\r":
            self.position += 1


def _collect_vtt_timestamp(scanner: _Scanner) -> float:
    """WebVTT 6.2 "collect a WebVTT timestamp": hours optional, exactly 3 fraction digits."""
    hours_given = False
    if not scanner.peek().isdigit():
        raise _TimingError("timestamp does not start with a digit")
    digits = scanner.collect_digits()
    value1 = int(digits)
    if len(digits) != 2 or value1 > 59:
        hours_given = True  # more than two digits, or over 59: the first field is hours
    if scanner.peek() != ":":
        raise _TimingError("expected ':'")
    scanner.position += 1
    digits = scanner.collect_digits()
    if len(digits) != 2:
        raise _TimingError("minutes or seconds must have two digits")
    value2 = int(digits)
    if hours_given or scanner.peek() == ":":
        if scanner.peek() != ":":
            raise _TimingError("expected ':'")
        scanner.position += 1
        digits = scanner.collect_digits()
        if len(digits) != 2:
            raise _TimingError("seconds must have two digits")
        value3 = int(digits)
    else:
        # Only two fields: they are minutes and seconds, and hours are zero.
        value1, value2, value3 = 0, value1, value2
    if scanner.peek() != ".":
        raise _TimingError("expected '.' before the milliseconds")
    scanner.position += 1
    digits = scanner.collect_digits()
    if len(digits) != 3:
        raise _TimingError("milliseconds must have three digits")
    if value2 > 59 or value3 > 59:
        raise _TimingError("minutes and seconds must be at most 59")
    return value1 * 3600 + value2 * 60 + value3 + int(digits) / 1000


def _parse_vtt_timing(line: str) -> tuple[float, float]:
    """WebVTT 6.3 "collect WebVTT cue timings and settings"; the settings are ignored."""
    scanner = _Scanner(line)
    scanner.skip_whitespace()
    start = _collect_vtt_timestamp(scanner)
    scanner.skip_whitespace()
    if scanner.line[scanner.position : scanner.position + 3] != _ARROW:
        raise _TimingError("expected '-->'")
    scanner.position += 3
    scanner.skip_whitespace()
    end = _collect_vtt_timestamp(scanner)
    return start, end


# WebVTT 6.4 cue text tokenizer: '<' opens a tag that runs to '>' (or the end of the text);
# everything else is text in which '&' starts an HTML character reference.
_CUE_TOKEN = re.compile(r"<([^>]*)(?:>|$)|([^<]+)")


def _vtt_cue_plain_text(raw: str) -> str:
    """Plain text of WebVTT cue text: tags removed, references decoded, voices as "Name: "."""
    pieces: list[str] = []
    ruby_text_depth = 0
    for token in _CUE_TOKEN.finditer(raw):
        tag, text = token.group(1), token.group(2)
        if text is not None:
            if ruby_text_depth == 0:
                pieces.append(html.unescape(text))
            continue
        tag = tag.strip()
        if tag.startswith("/"):
            name = tag[1:].strip()
            if name == "rt":
                ruby_text_depth = max(0, ruby_text_depth - 1)
            elif name == "ruby":
                ruby_text_depth = 0  # the end of a ruby closes any rt still open (6.4)
            continue
        if tag[:1].isdigit():
            continue  # an inline timestamp tag
        name_and_classes, *annotation_parts = re.split(r"[ \t\n\x0c]", tag, maxsplit=1)
        annotation = annotation_parts[0] if annotation_parts else ""
        name = name_and_classes.split(".", 1)[0]
        if name == "rt":
            ruby_text_depth += 1
        elif name == "v":
            speaker = " ".join(html.unescape(annotation).split())
            if speaker:
                pieces.append(f" {speaker}: ")
    return normalise_text("".join(pieces))


def _vtt_blocks(lines: list[str]) -> list[list[str]]:
    """Split the lines after the signature into blocks (WebVTT 6.1 "collect a WebVTT block").

    A line holding "-->" is a timing line only as a block's first or second line; anywhere later
    it ends the block and starts the next one.
    """
    blocks: list[list[str]] = []
    index = 1
    while index < len(lines) and lines[index] != "" and _ARROW not in lines[index]:
        index += 1  # the rest of the header
    while index < len(lines):
        if lines[index] == "":
            index += 1
            continue
        block: list[str] = []
        seen_arrow = False
        while index < len(lines) and lines[index] != "":
            line = lines[index]
            if _ARROW in line:
                if not seen_arrow and len(block) < 2:
                    seen_arrow = True
                elif block:
                    break
            block.append(line)
            index += 1
        blocks.append(block)
    return blocks


def extract_webvtt(data: bytes) -> Extracted:
    """Cues of a WebVTT file; NOTE, STYLE and REGION blocks are skipped.

    Raises ``CorruptDocument`` when the "WEBVTT" signature is missing or no cue timing can be
    read, ``EmptyDocument`` when the file has no cue text.
    """
    # WebVTT 6.1: decode as UTF-8 (errors replaced), drop a BOM, normalise line ends.
    text = data.decode("utf-8", errors="replace").lstrip("\ufeff").replace("\x00", "")
    lines = split_lines(text)
    first = lines[0]
    if not (first.startswith("WEBVTT") and (len(first) == 6 or first[6] in " \t")):
        raise CorruptDocument('not a WebVTT transcript: the first line does not start "WEBVTT"')
    cues: list[_Cue] = []
    bad_timings = 0
    for block in _vtt_blocks(lines):
        timing_at = next((i for i, line in enumerate(block[:2]) if _ARROW in line), None)
        if timing_at is None:
            continue  # NOTE, STYLE, REGION or a stray block: none of them carry cue text
        try:
            start, end = _parse_vtt_timing(block[timing_at])
        except _TimingError:
            bad_timings += 1
            continue
        cue_text = _vtt_cue_plain_text("\n".join(block[timing_at + 1 :]))
        if cue_text:
            cues.append(_Cue(start, end, cue_text))
    return _transcript(WEBVTT_TYPE, cues, bad_timings)


# --- SRT -----------------------------------------------------------------------------------------

_SRT_TIME = r"(?:(\d+):)?(\d{1,2}):(\d{1,2})[,.](\d{1,3})"
_SRT_TIMING = re.compile(rf"^\s*{_SRT_TIME}\s*-->\s*{_SRT_TIME}(?:\s.*)?$")
_SRT_TIMING_LIKE = re.compile(r"^\s*\S+\s*-->\s*\S+")
_SRT_TAG = re.compile(r"</?(?:i|b|u|s|font)(?:\s[^>]*)?>", re.IGNORECASE)
_SRT_OVERRIDE = re.compile(r"\{\\[^}]*\}")  # ASS-style overrides some players honour: {\an8}


def _srt_seconds(hours: str | None, minutes: str, seconds: str, fraction: str) -> float:
    # The fraction is read as decimal digits: ",5" is half a second, ",500" too.
    return (
        int(hours or 0) * 3600
        + int(minutes) * 60
        + int(seconds)
        + int(fraction) / 10 ** len(fraction)
    )


def _srt_cue_plain_text(raw: str) -> str:
    return normalise_text(html.unescape(_SRT_OVERRIDE.sub("", _SRT_TAG.sub("", raw))))


def extract_srt(data: bytes) -> Extracted:
    """Cues of an SRT file; a block without a readable timing line is skipped with a warning.

    Text runs from a timing line to the next cue's sequence number or timing line, so blank lines
    inside a cue and a missing blank line between cues are both read correctly.
    """
    lines = split_lines(decode_text(data))
    cues: list[_Cue] = []
    bad_timings = 0
    start = end = 0.0
    text_lines: list[str] | None = None

    def close_cue() -> None:
        if text_lines is not None:
            cue_text = _srt_cue_plain_text("\n".join(text_lines))
            if cue_text:
                cues.append(_Cue(start, end, cue_text))

    index = 0
    while index < len(lines):
        line = lines[index]
        following = lines[index + 1] if index + 1 < len(lines) else ""
        if line.strip().isdigit() and _SRT_TIMING_LIKE.match(following):
            index += 1  # the sequence number of the next cue
            continue
        timing = _SRT_TIMING.match(line)
        if timing:
            close_cue()
            groups = timing.groups()
            start, end = _srt_seconds(*groups[:4]), _srt_seconds(*groups[4:])
            text_lines = []
        elif _SRT_TIMING_LIKE.match(line):
            close_cue()
            bad_timings += 1
            text_lines = None  # the text of a cue with unreadable timing is dropped with it
        elif text_lines is not None:
            text_lines.append(line)
        index += 1
    close_cue()
    if not cues and not bad_timings:
        raise CorruptDocument(
            "not an SRT transcript: no 'HH:MM:SS,mmm --> HH:MM:SS,mmm' timing line found"
        )
    return _transcript(SRT_TYPE, cues, bad_timings)


def _transcript(media_type: str, cues: list[_Cue], bad_timings: int) -> Extracted:
    warnings: tuple[str, ...] = ()
    if bad_timings:
        warnings = (f"{bad_timings} cue(s) skipped: their timing line could not be read",)
    if not cues:
        if bad_timings:
            raise CorruptDocument(f"no cue could be read: {warnings[0]}")
        raise EmptyDocument("the transcript has no cue text")
    segments = tuple(Segment(cue.text, Anchor(start=cue.start, end=cue.end), CUE) for cue in cues)
    return Extracted(media_type=media_type, segments=segments, warnings=warnings)
