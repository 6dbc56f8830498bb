"""WebVTT and SRT cues checked against webvtt-py, srt, and the W3C WebVTT parsing rules."""

from __future__ import annotations

import pytest
import srt
import webvtt

from pipeline.errors import CorruptDocument, EmptyDocument
from pipeline.formats import extract
from pipeline.records import CUE

TRAINING_VTT = """WEBVTT - Marrowby workshop training, session 4

STYLE
::cue { color: yellow }

NOTE
Recorded in the wheel room; the names are invented.

intro-1
00:00:01.000 --> 00:00:04.250 align:start position:10%
Good morning, this session covers
truing a rear wheel.

00:00:04.500 --> 00:00:09.125
Start with the spoke key on the nipple
closest to the valve hole.

00:01:10.000 --> 00:01:15.500 line:0
Quarter turns only, then spin and look again.

01:02:03.004 --> 01:02:05.000
That is the end of the session.
"""

TRAINING_SRT = """1
00:00:01,000 --> 00:00:03,500
Welcome to the Marrowby fitting room.

2
00:00:03,750 --> 00:00:07,000
Saddle height comes first,
then the reach to the bars.

3
00:01:02,500 --> 00:01:05,250 X1:10 X2:200 Y1:10 Y2:50
Measure twice before you cut the steerer.
"""


def _vtt_seconds(timestamp: str) -> float:
    # webvtt-py's start_in_seconds is a whole number; its start/end strings keep milliseconds.
    hours, minutes, seconds = timestamp.split(":")
    return int(hours) * 3600 + int(minutes) * 60 + float(seconds)


def test_webvtt_cues_match_webvtt_py(tmp_path):
    path = tmp_path / "session4.vtt"
    path.write_text(TRAINING_VTT, encoding="utf-8")
    segments = extract(path.name, path.read_bytes()).segments
    # Reference: webvtt-py, an independent WebVTT reader.
    reference = [
        (_vtt_seconds(c.start), _vtt_seconds(c.end), " ".join(c.text.split()))
        for c in webvtt.read(str(path))
    ]
    ours = [(s.anchor.start, s.anchor.end, s.text) for s in segments]
    assert len(ours) == 4
    assert ours == reference
    assert {segment.kind for segment in segments} == {CUE}


def test_srt_cues_match_the_srt_package(tmp_path):
    path = tmp_path / "fitting.srt"
    path.write_text(TRAINING_SRT, encoding="utf-8")
    segments = extract(path.name, path.read_bytes()).segments
    ours = [(s.anchor.start, s.anchor.end, s.text) for s in segments]
    # Reference: the srt package from PyPI.
    reference = [
        (sub.start.total_seconds(), sub.end.total_seconds(), " ".join(sub.content.split()))
        for sub in srt.parse(TRAINING_SRT)
    ]
    assert len(ours) == 3
    assert ours == reference


def test_note_style_and_region_blocks_are_skipped():
    text = (
        "WEBVTT\n\n"
        "REGION\nid:bottom\nwidth:40%\n\n"
        "STYLE\n::cue(b) { color: red }\n\n"
        "NOTE a comment that must not be indexed\n\n"
        "00:02.000 --> 00:03.000 region:bottom\nTighten the cone nut.\n\n"
        "NOTE\nanother comment\nover two lines\n\n"
        "00:04.000 --> 00:05.000\nThen the lock nut.\n"
    )
    segments = extract("cones.vtt", text.encode()).segments
    assert [s.text for s in segments] == ["Tighten the cone nut.", "Then the lock nut."]


def test_webvtt_tags_are_stripped_and_entities_decoded():
    text = (
        "WEBVTT\n\n"
        "00:00.000 --> 00:02.000\n"
        "<v.lead Esme Tarrant>Use <b>the</b> <i>blue</i> <u>grease</u> "
        "<c.note.small>here</c> &amp; there</v>\n\n"
        "00:02.000 --> 00:04.000\n"
        "Torque &lt;5 Nm&gt;&nbsp;max&lrm;, <00:02.500>then <ruby>stop<rt>halt</rt></ruby>.\n"
    )
    segments = extract("grease.vtt", text.encode()).segments
    # Expected per W3C WebVTT 6.4 [from memory] (cue text tokenizer): tags are not text, "&..." are
    # HTML
    # character references; the voice annotation is the speaker's name.
    assert [s.text for s in segments] == [
        "Esme Tarrant: Use the blue grease here & there",
        "Torque <5 Nm> max, then stop.",
    ]


def test_hours_less_timings_are_minutes_and_seconds_per_the_spec():
    # W3C WebVTT 6.2 [from memory]: with two fields, "mm:ss.ttt" (hours are zero). SRT players read
    # the
    # hours-less "MM:SS,mmm" form the same way.
    vtt = extract("short.vtt", b"WEBVTT\n\n00:05.000 --> 01:02.250\nPump the tyres.\n")
    assert (vtt.segments[0].anchor.start, vtt.segments[0].anchor.end) == (5.0, 62.25)
    srt_file = extract("short.srt", b"1\n00:05,000 --> 01:02.250\nPump the tyres.\n")
    assert (srt_file.segments[0].anchor.start, srt_file.segments[0].anchor.end) == (5.0, 62.25)


def test_webvtt_timestamps_the_spec_rejects_discard_their_cue():
    text = (
        "WEBVTT\n\n"
        "00:00:01.5 --> 00:00:02.000\nTwo fraction digits short.\n\n"
        "00:61.000 --> 00:62.000\nSeconds over 59.\n\n"
        "00:00:03.000 --> 00:00:04.000\nKept.\n"
    )
    extracted = extract("bad.vtt", text.encode())
    assert [s.text for s in extracted.segments] == ["Kept."]
    assert extracted.warnings == ("2 cue(s) skipped: their timing line could not be read",)


def test_webvtt_cue_identifier_and_a_missing_blank_line_between_cues():
    # W3C WebVTT 6.1 [from memory]: a line holding "-->" after the cue text starts the next cue.
    text = "WEBVTT\n\nfirst\n00:01.000 --> 00:02.000\nOne.\n00:02.000 --> 00:03.000\nTwo.\n"
    segments = extract("tight.vtt", text.encode()).segments
    assert [(s.text, s.anchor.start) for s in segments] == [("One.", 1.0), ("Two.", 2.0)]


def test_webvtt_without_signature_is_corrupt():
    with pytest.raises(CorruptDocument, match="WEBVTT"):
        extract("nosig.vtt", b"00:01.000 --> 00:02.000\nNo header here.\n")
    with pytest.raises(CorruptDocument, match="WEBVTT"):
        extract("nosig.vtt", b"WEBVTTX\n\n00:01.000 --> 00:02.000\nWrong signature.\n")


def test_srt_tags_stripped_and_odd_layouts_read():
    text = (
        '\ufeff1\r\n00:00:01,000 --> 00:00:02,000\r\n<i>Brake</i> <font color="red">first</font>'
        "\r\n{\\an8}&amp; always\r\n2\r\n00:00:02.500 --> 00:00:03.000\r\nNo blank line before.\r\n"
    )
    segments = extract("brakes.srt", text.encode("utf-8")).segments
    assert [(s.text, s.anchor.start) for s in segments] == [
        ("Brake first & always", 1.0),
        ("No blank line before.", 2.5),
    ]


def test_srt_in_latin1_decodes():
    text = "1\n00:00:01,000 --> 00:00:02,000\nDie Größe des Rahmens prüfen, café.\n"
    (segment,) = extract("rahmen.srt", text.encode("latin-1")).segments
    assert segment.text == "Die Größe des Rahmens prüfen, café."


def test_transcripts_without_cues():
    with pytest.raises(EmptyDocument):
        extract("empty.vtt", b"WEBVTT\n\nNOTE nothing recorded yet\n")
    with pytest.raises(CorruptDocument, match="timing"):
        extract("notes.srt", b"Just some notes, not subtitles.\n")
