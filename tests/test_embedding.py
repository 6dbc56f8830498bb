"""The embedders: the default ONNX model against sentence-transformers, and the hashed embedder.

The reference vectors in tests/fixtures/reference_vectors.npz were made by the
sentence-transformers library running the upstream float32 all-MiniLM-L6-v2 weights (see
tests/fixtures/make_reference_vectors.py); torch is not needed here.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.distance import cosine as scipy_cosine_distance

from pipeline.embedding import make_embedder
from pipeline.embedding.base import Embedder
from pipeline.embedding.hashed import HashEmbedder
from pipeline.embedding.onnx import DEFAULT_SHA, OnnxEmbedder, default_embedder, packaged_model_path
from pipeline.errors import EmbedderError
from pipeline.tokens import DEFAULT_TOKENIZER

FIXTURE = Path(__file__).parent / "fixtures" / "reference_vectors.npz"

# Thresholds chosen from our own measurement of the int8 export against the float32 reference
# (24 fixture texts): mean cosine 0.99947, lowest 0.99894 (a 238-token passage).
# int8 weights cost a little accuracy; a wrong pooling, tokenizer or truncation costs far more
# (128-token truncation measured: mean 0.958, lowest 0.827).
MIN_COSINE_PER_TEXT = 0.998
MIN_COSINE_MEAN = 0.999


@pytest.fixture(scope="module")
def reference() -> dict[str, np.ndarray]:
    with np.load(FIXTURE) as data:
        return {name: data[name] for name in data.files}


@pytest.fixture(scope="module")
def onnx() -> OnnxEmbedder:
    return default_embedder()


def _reference_texts(reference: dict[str, np.ndarray]) -> list[str]:
    return [str(text) for text in reference["texts"]]


# --- the default model against the reference -------------------------------------------------


def test_fixture_covers_phrases_sentences_and_passages_past_the_limit(reference):
    counts = reference["token_counts"]
    provenance = json.loads(str(reference["provenance"]))
    assert provenance["max_seq_length"] == 256
    assert len(counts) >= 20
    assert (counts <= 10).sum() >= 4, "short phrases"
    assert (counts > 256).sum() >= 3, "passages that the model must truncate"
    assert ((counts > 200) & (counts <= 256)).sum() >= 2, "long passages within the limit"


def test_default_vectors_match_sentence_transformers_per_text_and_on_average(onnx, reference):
    vectors = onnx.embed(_reference_texts(reference))
    cosines = (vectors.astype(np.float64) * reference["vectors"]).sum(axis=1)
    worst = int(np.argmin(cosines))
    assert cosines.min() >= MIN_COSINE_PER_TEXT, (
        f"text {worst} ({reference['token_counts'][worst]} tokens) has cosine {cosines[worst]:.5f}"
    )
    assert cosines.mean() >= MIN_COSINE_MEAN


def test_cosine_agrees_with_scipy_so_rows_are_unit_length(onnx, reference):
    # Reference: scipy.spatial.distance.cosine divides by both norms itself, so it agrees with a
    # plain dot product only if our rows (and the fixture's) really have unit length.
    vectors = onnx.embed(_reference_texts(reference))
    for ours, theirs in zip(vectors, reference["vectors"], strict=True):
        scipy_cosine = 1.0 - scipy_cosine_distance(ours.astype(np.float64), theirs)
        assert float(np.dot(ours, theirs)) == pytest.approx(scipy_cosine, abs=1e-5)


def test_long_passages_depend_on_truncating_at_256_not_128(reference):
    # The tokenizer file ships 128-token truncation; the model was trained at 256
    # (sentence-transformers max_seq_length, recorded in the fixture). Running at 128 must
    # visibly miss the reference on long passages, or this fixture would not test truncation.
    long_texts = [
        str(text)
        for text, count in zip(reference["texts"], reference["token_counts"], strict=True)
        if count > 200
    ]
    long_refs = reference["vectors"][reference["token_counts"] > 200]
    short_model = OnnxEmbedder(max_seq_len=128)
    cosines = (short_model.embed(long_texts) * long_refs).sum(axis=1)
    assert cosines.min() < 0.95


def test_text_past_the_budget_embeds_as_its_first_254_tokens(onnx):
    sentence = "The fitter checks the spoke tension of each wheel before it leaves the bench. "
    long_text = sentence * 40
    spans = onnx.tokens.offsets(long_text)
    assert len(spans) > onnx.max_input_tokens + 50
    prefix = long_text[: spans[onnx.max_input_tokens - 1][1]]
    assert onnx.tokens.count_one(prefix) == onnx.max_input_tokens
    whole, cut = onnx.embed([long_text, prefix])
    assert np.abs(whole - cut).max() <= 1e-5
    one_token_shorter = long_text[: spans[onnx.max_input_tokens - 2][1]]
    assert np.abs(whole - onnx.embed([one_token_shorter])[0]).max() > 1e-4


# --- output contract -------------------------------------------------------------------------


@pytest.mark.parametrize("make", [default_embedder, HashEmbedder], ids=["onnx", "hash"])
def test_output_is_float32_unit_rows_of_the_declared_dimension(make):
    embedder = make()
    texts = ["chain", "Check the brake pads for wear every service.", "", "  \n "]
    vectors = embedder.embed(texts)
    assert vectors.dtype == np.float32
    assert vectors.shape == (len(texts), embedder.dimension) == (4, 384)
    assert vectors.flags["C_CONTIGUOUS"]
    assert np.all(np.isfinite(vectors))
    np.testing.assert_allclose(np.linalg.norm(vectors, axis=1), 1.0, atol=1e-5)
    assert isinstance(embedder, Embedder)


@pytest.mark.parametrize("make", [default_embedder, HashEmbedder], ids=["onnx", "hash"])
def test_empty_input_gives_zero_rows(make):
    embedder = make()
    empty = embedder.embed([])
    assert empty.shape == (0, embedder.dimension)
    assert empty.dtype == np.float32


def test_a_vector_does_not_depend_on_its_batch_or_position(onnx, reference):
    texts = _reference_texts(reference)
    # Mixed lengths, more texts than one sub-batch, and a duplicate, in a scrambled order.
    rng = np.random.default_rng(7)
    order = rng.permutation(len(texts))
    mixed = [texts[i] for i in order] + [texts[0]]
    assert len(mixed) > onnx.batch_size
    together = onnx.embed(mixed)
    alone = np.vstack([onnx.embed([text]) for text in mixed])
    assert np.abs(together - alone).max() <= 1e-5
    # Rows come back in input order: the sort by length is undone.
    np.testing.assert_allclose(together[order.argsort()[:3]], onnx.embed(texts[:3]), atol=1e-5)


def test_token_budget_and_counter_belong_to_the_model(onnx):
    assert onnx.dimension == 384
    assert onnx.max_seq_len == 256
    assert onnx.max_input_tokens == 254  # 256 minus [CLS] and [SEP]
    assert Path(onnx.tokens.path) == DEFAULT_TOKENIZER
    assert default_embedder() is onnx


def test_describe_records_model_weights_and_pooling(onnx):
    description = onnx.describe()
    expected_id = f"all-MiniLM-L6-v2/int8-onnx@{DEFAULT_SHA[:8]}"
    assert description["model_id"] == onnx.model_id == expected_id
    assert description["weights_sha256"] == DEFAULT_SHA
    assert description["dimension"] == 384
    assert description["max_seq_len"] == 256
    assert "mean" in description["pooling"]
    json.dumps(description)  # the index stores it as JSON


# --- weights verification and loading other files --------------------------------------------


def test_sha_mismatch_is_refused_naming_both_hashes():
    wrong = "0" * 64
    with pytest.raises(EmbedderError) as raised:
        OnnxEmbedder(expected_sha256=wrong)
    message = str(raised.value)
    assert wrong in message and DEFAULT_SHA in message


def test_model_by_path_is_checked_only_against_a_given_sha_and_records_its_own(tmp_path, onnx):
    copy = tmp_path / "marrowby-encoder.onnx"
    copy.write_bytes(packaged_model_path().read_bytes()[:-1] + b"\x00")  # not the pinned bytes
    with pytest.raises(EmbedderError):
        OnnxEmbedder(copy, expected_sha256=DEFAULT_SHA)
    # Same bytes as the package: loads by path, records its sha, gives the default's vectors.
    exact = tmp_path / "exact.onnx"
    exact.write_bytes(packaged_model_path().read_bytes())
    by_path = make_embedder(f"onnx:{exact},{DEFAULT_TOKENIZER}")
    assert isinstance(by_path, OnnxEmbedder)
    assert by_path.describe()["weights_sha256"] == DEFAULT_SHA
    text = ["Torque the crank arm fixing bolt to 40 newton metres."]
    assert np.abs(by_path.embed(text) - onnx.embed(text)).max() <= 1e-6


def test_unreadable_or_missing_model_files_raise_embedder_error(tmp_path):
    garbage = tmp_path / "not-a-model.onnx"
    garbage.write_bytes(b"this is a workshop note, not an ONNX graph")
    with pytest.raises(EmbedderError, match="not-a-model.onnx"):
        OnnxEmbedder(garbage)
    with pytest.raises(EmbedderError, match="not found"):
        OnnxEmbedder(tmp_path / "missing.onnx")
    bad_tokenizer = tmp_path / "tokenizer.json"
    bad_tokenizer.write_text("{}")
    with pytest.raises(EmbedderError, match="tokenizer"):
        OnnxEmbedder(packaged_model_path(), bad_tokenizer)


def test_make_embedder_specs():
    assert make_embedder(None) is default_embedder()
    assert make_embedder("default") is default_embedder()
    hashed = make_embedder("hash")
    assert isinstance(hashed, HashEmbedder) and hashed.model_id == "hash-384-v1"
    for bad in ["bert", "onnx:", "onnx:a.onnx,", "onnx:a,b,c"]:
        with pytest.raises(EmbedderError):
            make_embedder(bad)


# --- the hashed embedder ---------------------------------------------------------------------

_HASH_TEXTS = [
    "Adjust the rear derailleur cable tension.",
    "Rear derailleur cable tension needs adjusting.",
    "Returns are refunded within five working days.",
]


def test_hash_embedder_is_deterministic_across_instances_and_processes():
    here = HashEmbedder().embed(_HASH_TEXTS)
    assert np.array_equal(here, HashEmbedder().embed(_HASH_TEXTS))
    # A fresh interpreter with a different string-hash seed must give identical bits: the
    # features may not use Python's salted hash().
    script = (
        "import json, sys; from pipeline.embedding import HashEmbedder; "
        "print(json.dumps(HashEmbedder().embed(json.loads(sys.argv[1])).tolist()))"
    )
    env = {**os.environ, "PYTHONHASHSEED": "12345"}
    result = subprocess.run(
        [sys.executable, "-c", script, json.dumps(_HASH_TEXTS)],
        capture_output=True,
        text=True,
        check=True,
        env=env,
        cwd=Path(__file__).resolve().parent.parent,
    )
    there = np.array(json.loads(result.stdout), dtype=np.float32)
    assert np.array_equal(here, there)


def test_hash_embedder_dimension_and_budget_match_the_default_tokenizer():
    small = HashEmbedder(dimension=64)
    assert small.embed(_HASH_TEXTS).shape == (3, 64)
    assert small.model_id == "hash-64-v1"
    default = HashEmbedder()
    assert default.max_input_tokens == 254
    # Same counter as the default model, so chunk budgets carry over.
    assert default.tokens.count(_HASH_TEXTS) == default_embedder().tokens.count(_HASH_TEXTS)


def test_hash_embedder_texts_sharing_words_are_closer():
    a, b, c = HashEmbedder().embed(_HASH_TEXTS)
    assert float(a @ b) > float(a @ c) + 0.2
    assert float(a @ b) < 0.999  # different texts, different vectors


def test_hash_embedder_sees_only_the_token_budget():
    embedder = HashEmbedder()
    base = "spoke nipple rim hub " * 100
    assert embedder.tokens.count_one(base) > embedder.max_input_tokens
    first, changed_tail = embedder.embed([base, base + " saddle bag"])
    assert np.array_equal(first, changed_tail)
