"""The content-defined chunker: exact examples, properties, and edit locality.

Run as a script to print the edit-locality distribution instead of asserting it:
    .venv/bin/python -m tests.test_chunking 300
"""

from __future__ import annotations

import collections
import hashlib
import json
import random
import sys
import time

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.chunking import chunk_segments, split_sentences
from pipeline.records import CUE, LIST_ITEM, PARAGRAPH, TABLE_ROW, Anchor, ChunkSettings, Segment
from pipeline.tokens import DEFAULT_TOKENIZER, TokenCounter

COUNTER = TokenCounter()
# A modulus no 64-bit hash is likely to divide: no content cuts, only heading and maximum cuts.
NO_CONTENT_CUTS = 2**61 - 1
# Settings under which the maximum never forces a cut, to isolate the content-defined rule.
UNBOUNDED = ChunkSettings(max_tokens=10**7)
UNBOUNDED_INPUT = 10**7


def squash(text: str) -> str:
    """Text with all whitespace removed: what "covers the text exactly once" compares."""
    return "".join(text.split())


def sha256(text: str) -> str:
    # Reference: hashlib's SHA-256 (FIPS 180-4), independent of pipeline.hashing.
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --- sentences -------------------------------------------------------------------------------


def test_sentences_split_after_terminal_marks_before_capitals_digits_and_quotes() -> None:
    text = 'Remove the wheel. Check the rim! Is it true? "Yes," said the fitter. 4 bolts remain.'
    assert split_sentences(text) == [
        "Remove the wheel.",
        "Check the rim!",
        "Is it true?",
        '"Yes," said the fitter.',
        "4 bolts remain.",
    ]


def test_sentences_do_not_split_after_abbreviations_initials_or_decimals() -> None:
    text = (
        "Use a thin grease, e.g. Marrowby Blue, on part No. 7 at approx. 3.5 N·m. "
        "Ask R. Pellow in stores. Then seat the cup (see the jig.) Next fit the axle."
    )
    assert split_sentences(text) == [
        "Use a thin grease, e.g. Marrowby Blue, on part No. 7 at approx. 3.5 N·m.",
        "Ask R. Pellow in stores.",
        "Then seat the cup (see the jig.)",
        "Next fit the axle.",
    ]


def test_sentences_need_a_capital_after_the_stop() -> None:
    assert split_sentences("Spin the crank. then stop.") == ["Spin the crank. then stop."]


# --- exact examples --------------------------------------------------------------------------


def test_a_heading_change_forces_a_cut_and_no_context_crosses_it() -> None:
    segments = [
        Segment("Loosen the stem bolts.", Anchor(heading="Headset")),
        Segment("Lift the bar away.", Anchor(heading="Headset")),
        Segment("Drop the fork out.", Anchor(heading="Headset > Removal")),
    ]
    chunks = chunk_segments("share:headset.md", segments, COUNTER)
    assert [(c.text, c.context, c.heading) for c in chunks] == [
        ("Loosen the stem bolts.\nLift the bar away.", "", "Headset"),
        ("Drop the fork out.", "", "Headset > Removal"),
    ]
    assert [c.ordinal for c in chunks] == [0, 1]
    assert chunks[1].text_hash == sha256("Drop the fork out.")


def test_contexts_are_whole_units_from_the_end_of_the_previous_chunk() -> None:
    sentences = [f"Check spoke {name} now." for name in "ABCDEF"]
    # Precondition from the real tokenizer: each sentence is 5 tokens, so a 15-token maximum
    # holds exactly three and a 10-token overlap exactly two.
    assert COUNTER.count(sentences) == [5] * 6
    segments = [Segment(" ".join(sentences), Anchor(heading="Wheel"))]
    chunk_settings = ChunkSettings(
        min_tokens=0, max_tokens=15, overlap_tokens=10, cut_modulus=NO_CONTENT_CUTS
    )
    chunks = chunk_segments("share:wheel.md", segments, COUNTER, chunk_settings)
    assert [c.text for c in chunks] == [" ".join(sentences[:3]), " ".join(sentences[3:])]
    assert [c.context for c in chunks] == ["", "Check spoke B now. Check spoke C now."]
    second = "Check spoke B now. Check spoke C now.\n" + " ".join(sentences[3:])
    assert chunks[1].embed_text == second
    assert chunks[1].text_hash == sha256(second)
    assert chunks[1].tokens == 25


def test_context_is_empty_when_the_last_unit_is_longer_than_the_overlap() -> None:
    segments = [Segment("Check spoke A now. Check spoke B now.", Anchor())]
    chunk_settings = ChunkSettings(
        min_tokens=0, max_tokens=5, overlap_tokens=4, cut_modulus=NO_CONTENT_CUTS
    )
    chunks = chunk_segments("share:wheel.md", segments, COUNTER, chunk_settings)
    assert [(c.text, c.context) for c in chunks] == [
        ("Check spoke A now.", ""),
        ("Check spoke B now.", ""),
    ]


def test_pages_times_and_lines_merge_into_ranges() -> None:
    one_chunk = ChunkSettings(cut_modulus=NO_CONTENT_CUTS)
    pdf = [
        Segment("Torque the crank to spec.", Anchor(page=2)),
        Segment("Front hub", Anchor(page=3), kind=TABLE_ROW),
    ]
    (chunk,) = chunk_segments("share:manual.pdf", pdf, COUNTER, one_chunk)
    assert (chunk.page_start, chunk.page_end, chunk.text) == (
        2,
        3,
        "Torque the crank to spec.\nFront hub",
    )
    cues = [
        Segment("Now the chain.", Anchor(start=12.5, end=20.0), kind=CUE),
        Segment("Count the links.", Anchor(start=20.0, end=31.0), kind=CUE),
    ]
    (chunk,) = chunk_segments("share:training.vtt", cues, COUNTER, one_chunk)
    assert (chunk.t_start, chunk.t_end, chunk.page_start) == (12.5, 31.0, None)
    lines = [
        Segment("ECN 14: new bolt.", Anchor(line_start=1, line_end=2)),
        Segment("Applies to frames.", Anchor(line_start=4, line_end=6), kind=LIST_ITEM),
    ]
    (chunk,) = chunk_segments("share:ecn.txt", lines, COUNTER, one_chunk)
    assert (chunk.line_start, chunk.line_end) == (1, 6)


def test_a_unit_longer_than_the_maximum_is_split_at_word_boundaries() -> None:
    words = [f"spoke{n}" for n in range(120)]
    segments = [Segment(" ".join(words), Anchor(), kind=LIST_ITEM)]
    chunk_settings = ChunkSettings(min_tokens=0, max_tokens=50, cut_modulus=NO_CONTENT_CUTS)
    chunks = chunk_segments("share:list.md", segments, COUNTER, chunk_settings)
    assert len(chunks) > 1
    for chunk in chunks:
        assert COUNTER.count_one(chunk.text) <= 50
        # Whole words only: every piece is a run of the original words.
        assert all(word in words for word in chunk.text.split())
    assert " ".join(c.text for c in chunks) == " ".join(words)


# --- properties ------------------------------------------------------------------------------

WORDS = st.one_of(
    st.sampled_from("hub spoke rim torque crank bolt the a of Marrowby".split()),
    st.from_regex(r"[A-Z][a-z]{1,8}[.!?]", fullmatch=True),
    st.integers(0, 10**30).map(str),
    st.text(
        alphabet=st.characters(codec="utf-8", exclude_categories=("Cs", "Cc")),
        min_size=1,
        max_size=12,
    ),
    st.text(alphabet="xyzqjk", min_size=30, max_size=400),  # a giant "word"
)
SEGMENTS = st.lists(
    st.builds(
        lambda words, kind, page, heading: Segment(
            " ".join(words), Anchor(page=page, heading=heading), kind
        ),
        st.lists(WORDS, min_size=1, max_size=80),
        st.sampled_from([PARAGRAPH, PARAGRAPH, LIST_ITEM, TABLE_ROW, CUE]),
        st.integers(1, 4),
        st.sampled_from(["Intro", "Intro > Tools", "Wheels"]),
    ),
    min_size=1,
    max_size=12,
)
SETTINGS = st.builds(
    ChunkSettings,
    min_tokens=st.integers(0, 60),
    max_tokens=st.integers(8, 220),
    overlap_tokens=st.integers(0, 60),
    cut_modulus=st.integers(1, 6),
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(segments=SEGMENTS, chunk_settings=SETTINGS, max_input=st.integers(16, 254))
def test_chunks_are_deterministic_cover_the_text_once_and_fit_the_model(
    segments: list[Segment], chunk_settings: ChunkSettings, max_input: int
) -> None:
    first = chunk_segments("share:x", segments, COUNTER, chunk_settings, max_input)
    again = chunk_segments("share:x", list(segments), COUNTER, chunk_settings, max_input)
    assert first == again
    assert squash("".join(c.text for c in first)) == squash("".join(s.text for s in segments))
    assert [c.ordinal for c in first] == list(range(len(first)))
    for chunk in first:
        # The real tokenizer on the final string, not a sum of parts.
        assert chunk.tokens == COUNTER.count_one(chunk.embed_text) <= max_input
        assert chunk.text_hash == sha256(chunk.embed_text)
        assert not chunk.context or chunk.embed_text.startswith(chunk.context + "\n")


class _Recounting(TokenCounter):
    """The bundled tokenizer with the shortcut off: every joined text is counted again."""

    def __init__(self) -> None:
        super().__init__()
        self.additive = False


RECOUNTING = _Recounting()


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(segments=SEGMENTS, chunk_settings=SETTINGS, max_input=st.integers(16, 254))
def test_summed_counts_give_the_chunks_that_counting_every_joined_text_gives(
    segments: list[Segment], chunk_settings: ChunkSettings, max_input: int
) -> None:
    # The bundled WordPiece tokenizer splits at whitespace first, so the chunker adds up unit
    # counts instead of tokenizing each joined text again; the tokenizer itself is the reference.
    assert COUNTER.additive
    assert chunk_segments("share:x", segments, COUNTER, chunk_settings, max_input) == (
        chunk_segments("share:x", segments, RECOUNTING, chunk_settings, max_input)
    )


def test_a_tokenizer_that_does_not_split_at_whitespace_is_counted_on_the_joined_text(
    tmp_path,
) -> None:
    # With no pre-tokenizer, WordPiece sees the whole text as one word: a text past its word
    # length limit (100 characters in the bundled file) becomes one unknown token, so the count
    # of a joined text is not the sum of its parts' counts and must not be taken as one.
    config = json.loads(DEFAULT_TOKENIZER.read_text(encoding="utf-8"))
    config["pre_tokenizer"] = None
    path = tmp_path / "tokenizer.json"
    path.write_text(json.dumps(config), encoding="utf-8")
    counter = TokenCounter(path)
    assert not counter.additive
    parts = ["Spoke tension is checked weekly.", "The hub bearing is greased in spring."] * 2
    assert counter.count_one(" ".join(parts)) != sum(counter.count(parts))
    segments = [Segment(" ".join(parts * 20), Anchor())]
    chunks = chunk_segments("share:x", segments, counter, ChunkSettings(max_tokens=30), 30)
    assert all(c.tokens == counter.count_one(c.embed_text) <= 30 for c in chunks)
    assert squash("".join(c.text for c in chunks)) == squash(segments[0].text)


def test_a_giant_single_sentence_fits_the_model() -> None:
    sentence = " ".join(f"bearing{n} 3.{n} ü" for n in range(900)) + "."
    chunks = chunk_segments("share:giant", [Segment(sentence, Anchor())], COUNTER)
    assert len(chunks) > 5
    assert all(COUNTER.count_one(c.embed_text) <= 254 for c in chunks)
    assert squash("".join(c.text for c in chunks)) == squash(sentence)


# --- edit locality ---------------------------------------------------------------------------

NOUNS = (
    "hub spoke rim chainring cassette derailleur crank axle bearing headset fork frame "
    "saddle seatpost brake caliper rotor cable housing tyre valve chain sprocket pedal stem "
    "bar grip bolt washer spacer wrench stand jig lathe fixture gauge grease solvent"
).split()
VERBS = (
    "check tighten loosen inspect clean replace adjust align true measure grease fit remove "
    "torque seat tension record mark"
).split()
ADJECTIVES = (
    "rear front left right worn new polished stiff loose dry clean damaged alloy steel "
    "carbon sealed threaded"
).split()
EDIT_KINDS = ("sentence", "paragraph", "insert", "insert_top", "delete", "append")


def workshop_sentence(rng: random.Random) -> str:
    words = [
        rng.choice(rng.choice((NOUNS, VERBS, ADJECTIVES, NOUNS))) for _ in range(rng.randint(5, 16))
    ]
    if rng.random() < 0.3:
        words.insert(rng.randrange(len(words)), f"{rng.randint(2, 60)} N·m")
    text = " ".join(words)
    return text[0].upper() + text[1:] + rng.choice(".!?.")


def workshop_paragraph(rng: random.Random) -> str:
    return " ".join(workshop_sentence(rng) for _ in range(rng.randint(2, 6)))


def workshop_manual(rng: random.Random, headings: bool) -> list[tuple[str, str]]:
    """A Marrowby Cycle Works service manual: (paragraph, heading path) pairs."""
    heading, manual = "Marrowby service manual", []
    for number in range(rng.randint(60, 120)):
        if headings and rng.random() < 0.08:
            heading = f"Marrowby service manual > Section {number}"
        manual.append((workshop_paragraph(rng), heading))
    return manual


def as_segments(manual: list[tuple[str, str]]) -> list[Segment]:
    return [Segment(text, Anchor(heading=heading)) for text, heading in manual]


def apply_edit(
    rng: random.Random, manual: list[tuple[str, str]], kind: str
) -> tuple[list[tuple[str, str]], str, str]:
    """The edited manual, the text before the edit point, and the new text inserted there."""
    edited = list(manual)
    at = 0 if kind == "insert_top" else rng.randrange(len(manual))
    if kind == "append":
        at = len(manual) - 1
    before = " ".join(text for text, _ in manual[:at])
    heading = manual[at][1]
    if kind == "sentence":
        sentences = split_sentences(manual[at][0])
        which = rng.randrange(len(sentences))
        new_text = workshop_sentence(rng)
        before += " " + " ".join(sentences[:which])
        sentences[which] = new_text
        edited[at] = (" ".join(sentences), heading)
    elif kind == "paragraph":
        new_text = workshop_paragraph(rng)
        edited[at] = (new_text, heading)
    elif kind in ("insert", "insert_top"):
        new_text = workshop_paragraph(rng)
        edited.insert(at, (new_text, heading))
    elif kind == "delete":
        new_text = ""
        del edited[at]
    else:
        new_text = workshop_sentence(rng)
        before += " " + manual[at][0]
        edited[at] = (manual[at][0] + " " + new_text, heading)
    return edited, before, new_text


def run_edit(
    seed: int, kind: str, headings: bool, chunk_settings: ChunkSettings, max_input: int
) -> tuple[int, int, list[str], list[str], int]:
    """(new chunk count, tokens inserted, old hashes, new hashes, old chunks before the edit)."""
    rng = random.Random(seed)
    manual = workshop_manual(rng, headings)
    edited, before, new_text = apply_edit(rng, manual, kind)
    old = chunk_segments("share:manual", as_segments(manual), COUNTER, chunk_settings, max_input)
    new = chunk_segments("share:manual", as_segments(edited), COUNTER, chunk_settings, max_input)
    old_hashes = {c.text_hash for c in old}
    fresh = sum(c.text_hash not in old_hashes for c in new)
    # Old chunks whose text lies wholly before the edit point (measured without whitespace).
    limit, covered, wholly_before = len(squash(before)), 0, 0
    for chunk in old:
        covered += len(squash(chunk.text))
        if covered > limit:
            break
        wholly_before += 1
    # The document's last chunk ends at the end of the text, not at a content cut.
    wholly_before = min(wholly_before, len(old) - 1)
    return (
        fresh,
        COUNTER.count_one(new_text) if new_text else 0,
        [c.text_hash for c in old],
        [c.text_hash for c in new],
        wholly_before,
    )


@settings(max_examples=120, deadline=None, derandomize=True)
@given(seed=st.integers(0, 2**32), kind=st.sampled_from(EDIT_KINDS), headings=st.booleans())
def test_without_forced_cuts_an_edit_changes_at_most_two_chunks_plus_one_per_min_tokens(
    seed: int, kind: str, headings: bool
) -> None:
    # With the maximum out of play every cut is content-defined, and a cut depends only on the
    # units since the previous candidate. So the cuts that can change are those inside the new
    # text and at the first candidate after it; new cuts inside it are min_tokens apart. Hence:
    # new chunks <= 2 (the edited span, and the next chunk's context) + cuts in the new text.
    fresh, inserted, old, new, wholly_before = run_edit(
        seed, kind, headings, UNBOUNDED, UNBOUNDED_INPUT
    )
    cuts_inside = 0 if inserted == 0 else 1 + inserted // UNBOUNDED.min_tokens
    assert fresh <= 2 + cuts_inside
    if inserted < UNBOUNDED.min_tokens:  # one sentence: the bound DEVELOPERS.md states
        assert fresh <= 3
    # Structural: every chunk wholly before the edit keeps its hash and its place.
    assert new[:wholly_before] == old[:wholly_before]


# With the default settings the maximum is the one rule that depends on where a chunk began:
# a forced cut next to the edit can shift the forced cuts after it until the next content-defined
# cut. Measured (6 x 300 edits with the __main__ block, and hypothesis's own search): at most two
# more than the unbounded bound above, and at most 4 for an edit shorter than min_tokens. The
# examples are derandomized, so they are the same on every run: a bound that was measured, not
# proved, must not flake in CI.
FORCED_CUT_SHIFT = 2


@settings(max_examples=120, deadline=None, derandomize=True)
@given(seed=st.integers(0, 2**32), kind=st.sampled_from(EDIT_KINDS), headings=st.booleans())
def test_with_default_settings_an_edit_changes_few_chunks_and_none_before_it(
    seed: int, kind: str, headings: bool
) -> None:
    defaults = ChunkSettings()
    fresh, inserted, old, new, wholly_before = run_edit(seed, kind, headings, defaults, 254)
    cuts_inside = 0 if inserted == 0 else 1 + inserted // defaults.min_tokens
    assert fresh <= 2 + cuts_inside + FORCED_CUT_SHIFT
    if inserted < defaults.min_tokens:
        assert fresh <= 4
    # The maximum looks one unit ahead, so the last chunk before the edit may end differently
    # (the edited unit decides whether it still fits); every chunk before that one is unchanged.
    keep = max(0, wholly_before - 1)
    assert new[:keep] == old[:keep]


def measure(manuals: int) -> None:
    """Print the edit-locality distribution and chunk sizes for the default settings."""
    for label, chunk_settings, max_input in (
        ("default", ChunkSettings(), 254),
        ("no maximum", UNBOUNDED, UNBOUNDED_INPUT),
    ):
        print(f"settings: {label}")
        for kind in EDIT_KINDS:
            counts = [
                run_edit(seed, kind, seed % 2 == 0, chunk_settings, max_input)[0]
                for seed in range(manuals)
            ]
            histogram = sorted(collections.Counter(counts).items())
            print(
                f"  {kind:11s} mean {sum(counts) / len(counts):.2f} max {max(counts)} "
                f"histogram {histogram}"
            )
    rng = random.Random(7)
    documents = [as_segments(workshop_manual(rng, True)) for _ in range(50)]
    began = time.perf_counter()
    chunks = [c for doc in documents for c in chunk_segments("share:m", doc, COUNTER)]
    seconds = time.perf_counter() - began
    tokens = sum(COUNTER.count([s.text for doc in documents for s in doc]))
    mean_tokens = sum(c.tokens for c in chunks) / len(chunks)
    print(
        f"default settings: {len(chunks)} chunks, mean {mean_tokens:.1f} tokens (context "
        f"included), {tokens / seconds:,.0f} source tokens/s"
    )


if __name__ == "__main__":
    measure(int(sys.argv[1]) if len(sys.argv) > 1 else 200)
