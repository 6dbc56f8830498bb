"""Shared test helpers: small corpora written into tmp_path, and the embedders."""

from __future__ import annotations

import os
import random
from pathlib import Path

import pytest

from pipeline.embedding.hashed import HashEmbedder
from pipeline.embedding.onnx import default_embedder

REPO = Path(__file__).resolve().parents[1]
SAMPLE_CORPUS = REPO / "sample_corpus"

_PARTS = [
    "wheel",
    "spoke",
    "rim",
    "hub",
    "axle",
    "crank",
    "chainring",
    "cassette",
    "derailleur",
    "brake caliper",
    "brake hose",
    "rotor",
    "headset",
    "stem",
    "handlebar",
    "seatpost",
    "saddle",
    "bottom bracket",
    "pedal",
    "fork",
    "frame",
    "chain",
    "cable",
    "bearing",
    "quick release",
]
_VERBS = [
    "inspect",
    "clean",
    "grease",
    "tighten",
    "loosen",
    "align",
    "true",
    "replace",
    "measure",
    "adjust",
    "torque",
    "check",
    "lubricate",
    "seat",
    "bleed",
]
_TAILS = [
    "before the test ride",
    "with the bike in the stand",
    "after every service",
    "using the workshop gauge",
    "until the play is gone",
    "and record the value on the job card",
    "as the supervisor showed in training",
    "without forcing the thread",
    "at the start of each shift",
    "when the customer reports noise",
]


def sentence(rng: random.Random) -> str:
    return (
        f"{rng.choice(_VERBS).capitalize()} the {rng.choice(_PARTS)} and the "
        f"{rng.choice(_PARTS)} {rng.choice(_TAILS)}, then note {rng.randint(2, 99)} on the card."
    )


def paragraph(rng: random.Random, sentences: int | None = None) -> str:
    return " ".join(sentence(rng) for _ in range(sentences or rng.randint(3, 6)))


def long_markdown(n_paragraphs: int = 70, seed: int = 7) -> str:
    """A long Marrowby workshop guide with a few sections, deterministic for a seed."""
    rng = random.Random(seed)
    out = ["# Marrowby workshop guide", ""]
    for i in range(n_paragraphs):
        if i % 15 == 0:
            out += [f"## Part {i // 15 + 1}", ""]
        out += [paragraph(rng), ""]
    return "\n".join(out)


def write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="session")
def real_embedder():
    """The default model (bundled ONNX weights), loaded once per test session."""
    return default_embedder()


@pytest.fixture(scope="session")
def hash_embedder():
    return HashEmbedder()


@pytest.fixture
def small_corpus(tmp_path: Path) -> Path:
    """A share with a policy, a notice and a transcript."""
    root = tmp_path / "share"
    write(
        root / "policies" / "returns.md",
        "# Returns policy\n\n## Damaged frames\n\nA frame damaged in transit may be returned "
        "within 30 days. Photograph the damage and keep the packaging.\n\n## Refunds\n\nRefunds "
        "are paid to the original card within ten working days.\n",
    )
    write(
        root / "notices" / "ECN-0007.txt",
        "ENGINEERING CHANGE NOTICE ECN-0007\n\nThe rear brake hose is now routed inside the "
        "down tube, entering at the head tube port.\n\nEffective from frame serial 4100.\n",
    )
    write(
        root / "training" / "truing.vtt",
        "WEBVTT\n\n00:00:01.000 --> 00:00:06.500\nToday we true a front wheel in the stand.\n\n"
        "00:00:06.500 --> 00:00:12.000\nBring spoke tension up evenly, a quarter turn at a "
        "time.\n",
    )
    return root


# The real `upwell watch` subprocess, for every module that runs one; the console's index.
from tests.support.console import console, console_history  # noqa: E402,F401
from tests.support.service import watches  # noqa: E402,F401


def pytest_report_header(config: pytest.Config) -> str:
    """Say up front whether the console's browser tests can run here."""
    from tests.support.console import chromium_path

    found = chromium_path()
    if found:
        return f"console browser tests: Chromium at {found}"
    required = (
        " (UPWELL_REQUIRE_BROWSER is set: they will FAIL)"
        if os.environ.get("UPWELL_REQUIRE_BROWSER")
        else ""
    )
    return (
        "console browser tests: NO Chromium found, so they are SKIPPED"
        f"{required}; `apt-get install chromium` runs them"
    )
