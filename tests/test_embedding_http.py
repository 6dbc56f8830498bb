"""The HTTP embedder against a real local OpenAI-compatible server (tests/support/).

The server runs the default model in-process and returns its vectors over HTTP on 127.0.0.1.
Comparing what comes back with the same model is a transport test (batching, order, retries,
errors lose or swap nothing); it proves nothing about the model. The claim that the vectors
are the model's is checked against an outside reference, the sentence-transformers vectors in
tests/fixtures/reference_vectors.npz (test_vectors_match_the_sentence_transformers_reference).
"""

from __future__ import annotations

import random
import socket
import threading
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.distance import cosine as scipy_cosine_distance

from pipeline.embedding import make_embedder
from pipeline.embedding.base import Embedder
from pipeline.embedding.remote import HttpEmbedder, RetryNotice, parse_retry_after
from pipeline.errors import EmbedderError, ModelMismatch
from pipeline.index import Index
from tests.conftest import sentence
from tests.support.embedding_server import EmbeddingServer, Fault
from tests.test_sync import chunk_rows, make_index

FIXTURE = Path(__file__).parent / "fixtures" / "reference_vectors.npz"
MODEL = "marrowby-minilm"
# The server returns the default model's own float32 vectors as JSON floats; only float32 ->
# decimal -> float64 -> renormalise rounding stands between them and ours.
MIN_COSINE_SAME_MODEL = 0.9999


@pytest.fixture
def server():
    with EmbeddingServer(model=MODEL) as running:
        yield running


def fast_embedder(server: EmbeddingServer, **options) -> HttpEmbedder:
    """An embedder with short waits, so retry tests take well under a second each."""
    options.setdefault("backoff_base", 0.02)
    options.setdefault("backoff_cap", 0.2)
    options.setdefault("timeout", 10.0)
    return HttpEmbedder(server.url, MODEL, **options)


def marrowby_texts(count: int, seed: int = 11) -> list[str]:
    rng = random.Random(seed)
    texts = [f"Job card {n}: {sentence(rng)}" for n in range(count)]
    assert len(set(texts)) == count
    return texts


def cosines(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a = a.astype(np.float64)
    b = b.astype(np.float64)
    return (a * b).sum(axis=1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))


# --- vectors --------------------------------------------------------------------------------


def test_vectors_are_the_default_models_and_unit_length(server, real_embedder):
    texts = marrowby_texts(10)
    embedder = fast_embedder(server)
    got = embedder.embed(texts)
    assert got.dtype == np.float32 and got.shape == (10, 384) and got.flags.c_contiguous
    np.testing.assert_allclose(np.linalg.norm(got, axis=1), 1.0, atol=1e-5)
    expected = real_embedder.embed(texts)
    for row, text in enumerate(texts):
        # scipy's cosine distance is the outside reference for the similarity.
        similarity = 1.0 - scipy_cosine_distance(got[row], expected[row])
        assert similarity > MIN_COSINE_SAME_MODEL, text
    assert embedder.dimension == 384
    assert isinstance(embedder, Embedder)


def test_vectors_match_the_sentence_transformers_reference(server):
    # Reference: sentence-transformers running the float32 all-MiniLM-L6-v2 weights (see
    # tests/fixtures/make_reference_vectors.py). Threshold as in tests/test_embedding.py, from
    # our measurement of the int8 export: lowest cosine 0.99894 over the fixture.
    with np.load(FIXTURE) as data:
        texts = [str(text) for text in data["texts"]]
        reference = data["vectors"]
    got = fast_embedder(server, batch_size=7).embed(texts)
    assert cosines(got, reference).min() >= 0.998


def test_rows_are_placed_by_their_index_field(server, real_embedder):
    server.reverse_rows = True  # the answer lists rows last-first; "index" stays right
    texts = marrowby_texts(6)
    got = fast_embedder(server).embed(texts)
    assert cosines(got, real_embedder.embed(texts)).min() > MIN_COSINE_SAME_MODEL


# --- batching and concurrency -----------------------------------------------------------------


def test_batches_stay_within_the_count_and_token_bounds(server, real_embedder):
    texts = marrowby_texts(23) + ["A long Marrowby note. " * 60]
    embedder = fast_embedder(server, batch_size=5, max_batch_tokens=120, concurrency=1)
    got = embedder.embed(texts)
    assert cosines(got, real_embedder.embed(texts)).min() > MIN_COSINE_SAME_MODEL
    sent = [request.texts for request in server.requests]
    # Counted with the bundled tokenizer, the estimate the bound is defined on.
    for batch in sent:
        assert 1 <= len(batch) <= 5
        if len(batch) > 1:
            assert sum(embedder.tokens.count(list(batch))) <= 120
    assert [text for batch in sent for text in batch] == texts  # in order, each once
    assert sent[-1] == (texts[-1],)  # a text over the token budget goes alone


def test_a_text_repeated_in_one_call_is_sent_once(server):
    texts = [
        "Grease the headset bearings.",
        "Check the chain wear.",
        "Grease the headset bearings.",
    ]
    got = fast_embedder(server).embed(texts)
    assert server.embedded == {"Grease the headset bearings.": 1, "Check the chain wear.": 1}
    np.testing.assert_array_equal(got[0], got[2])


def _embed_workers() -> list[str]:
    # Only the embedder's own workers are counted: the test server's handler thread for the last
    # request may still be closing its socket after the client has read the reply.
    return [t.name for t in threading.enumerate() if t.name.startswith("upwell-embed")]


def test_order_is_kept_when_concurrent_batches_finish_out_of_order(server, real_embedder):
    texts = marrowby_texts(16)
    first = texts[0]
    # The first batch answers last: it is held while the other worker finishes the rest.
    server.inject(Fault(delay=0.8), matches=lambda batch: first in batch)
    embedder = fast_embedder(server, batch_size=4, concurrency=2)
    got = embedder.embed(texts)
    assert cosines(got, real_embedder.embed(texts)).min() > MIN_COSINE_SAME_MODEL
    assert server.max_in_flight == 2  # the limit was used, and not passed
    assert _embed_workers() == []  # the pool is gone after the call
    assert set(server.embedded.values()) == {1} and len(server.embedded) == 16


# --- transient failures -------------------------------------------------------------------------


def test_429_500_and_timeouts_lose_no_text_and_embed_each_once(server, real_embedder):
    texts = marrowby_texts(20, seed=5)
    server.inject(Fault(status=429, retry_after="1", message="slow down"), times=2)
    server.inject(Fault(status=500, message="worker crashed"), times=2)
    server.inject(Fault(status=503, message="warming up"), times=1)
    # A hang longer than the client's timeout; the server then closes without answering.
    server.inject(Fault(delay=1.5, drop=True), times=1)
    notices: list[RetryNotice] = []
    lock = threading.Lock()

    def record(notice: RetryNotice) -> None:
        with lock:
            notices.append(notice)

    embedder = fast_embedder(
        server, batch_size=4, concurrency=2, timeout=0.5, max_attempts=8, on_retry=record
    )
    got = embedder.embed(texts)

    assert cosines(got, real_embedder.embed(texts)).min() > MIN_COSINE_SAME_MODEL
    assert server.embedded == {text: 1 for text in texts}
    outcomes = sorted(request.outcome for request in server.requests)
    assert outcomes.count("200") == 5  # 20 texts in batches of 4
    assert {"429", "500", "503", "dropped"} <= set(outcomes)
    reasons = sorted(notice.reason for notice in notices)
    assert reasons == sorted(["429", "429", "500", "500", "503", "timeout"])
    for notice in notices:
        if notice.reason == "429":
            assert notice.retry_after == 1.0 and notice.delay >= 1.0  # Retry-After honoured
        else:
            assert notice.retry_after is None and 0.0 <= notice.delay <= 0.2  # capped backoff


def test_gives_up_after_the_last_attempt_naming_the_status(server):
    server.inject(Fault(status=503, message="the pool is draining"), times=10)
    with pytest.raises(EmbedderError, match=r"after 3 attempts: HTTP 503 .*the pool is draining"):
        fast_embedder(server, max_attempts=3).embed(["True the front wheel."])
    assert [request.outcome for request in server.requests] == ["503"] * 3


def test_an_unreachable_server_is_retried_then_reported():
    with socket.socket() as probe:  # a port that was free a moment ago, now closed
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    embedder = HttpEmbedder(
        f"http://127.0.0.1:{port}", MODEL, max_attempts=2, backoff_base=0.01, timeout=2.0
    )
    with pytest.raises(EmbedderError, match="after 2 attempts: cannot connect"):
        embedder.embed(["Seat the bottom bracket."])


def test_parse_retry_after_reads_seconds_and_http_dates():
    # RFC 9110 section 10.2.3 [from memory]: delay-seconds or an HTTP-date (IMF-fixdate, RFC 9110
    # 5.6.7 [from memory]).
    assert parse_retry_after("120") == 120.0
    now = 946684799.0 - 30  # 30 s before 1999-12-31T23:59:59Z (that date's Unix time)
    assert parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now=now) == pytest.approx(30.0)
    assert parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now=now + 60) == 0.0
    assert parse_retry_after("soon") is None and parse_retry_after(None) is None


# --- refusals -------------------------------------------------------------------------------------


def test_a_400_is_not_retried_and_names_the_status_and_message(server):
    with pytest.raises(EmbedderError, match=r"HTTP 400 .*non-empty list of non-empty strings"):
        fast_embedder(server).embed(["Check the chain wear.", ""])
    assert [request.outcome for request in server.requests] == ["400"]


def test_a_refusal_in_one_batch_stops_the_others(server):
    texts = marrowby_texts(40)
    server.inject(Fault(status=400, message="input 3 is too long"), matches=lambda b: texts[0] in b)
    server.inject(Fault(status=503), times=100, matches=lambda b: texts[0] not in b)
    embedder = fast_embedder(server, batch_size=4, concurrency=2, backoff_base=0.2)
    with pytest.raises(EmbedderError, match=r"HTTP 400 .*input 3 is too long"):
        embedder.embed(texts)
    assert _embed_workers() == []
    # The other worker stopped at its next wait instead of working through every batch.
    assert len(server.requests) < 10


def test_a_401_says_which_key_variable_to_check(monkeypatch):
    monkeypatch.delenv("MARROWBY_EMBED_KEY", raising=False)
    with EmbeddingServer(model=MODEL, api_key="cog-7731") as server:
        unset = make_embedder(f"http:{server.url},{MODEL},MARROWBY_EMBED_KEY")
        with pytest.raises(
            EmbedderError, match=r"HTTP 401 .*not valid.*MARROWBY_EMBED_KEY is not set"
        ):
            unset.embed(["Bleed the rear brake."])
        monkeypatch.setenv("MARROWBY_EMBED_KEY", "wrong")
        wrong = make_embedder(f"http:{server.url},{MODEL},MARROWBY_EMBED_KEY")
        with pytest.raises(EmbedderError, match=r"HTTP 401 .*check the key in \$MARROWBY_EMBED"):
            wrong.embed(["Bleed the rear brake."])
        monkeypatch.setenv("MARROWBY_EMBED_KEY", "cog-7731")
        right = make_embedder(f"http:{server.url},{MODEL},MARROWBY_EMBED_KEY")
        assert right.embed(["Bleed the rear brake."]).shape == (1, 384)
        assert [r.outcome for r in server.requests] == ["401", "401", "200"]
        assert server.requests[-1].authorization == "Bearer cog-7731"
        assert "cog-7731" not in str(right.describe())


def test_an_unknown_model_names_the_endpoint(server):
    embedder = HttpEmbedder(server.url, "no-such-model", max_attempts=3)
    with pytest.raises(EmbedderError, match=r"HTTP 404 .*'no-such-model' does not exist"):
        embedder.embed(["Torque the stem bolts."])
    assert len(server.requests) == 1


# --- dimension ----------------------------------------------------------------------------------


def test_a_changed_dimension_after_the_first_answer_is_an_error(server):
    embedder = fast_embedder(server)
    embedder.embed(["Adjust the derailleur limit screws."])
    server.serve_dimension = 128
    with pytest.raises(EmbedderError, match=r"128-dimensional.*384 was set by the server's first"):
        embedder.embed(["Replace the brake pads."])


def test_a_configured_dimension_is_checked_on_the_first_answer(server):
    with pytest.raises(EmbedderError, match=r"384-dimensional.*768 was set by configuration"):
        fast_embedder(server, dimension=768).embed(["Inspect the fork crown."])


def test_vectors_of_different_lengths_in_one_answer_are_refused(server):
    embedder = fast_embedder(server)
    embedder.embed(["Lubricate the chain."])
    server.serve_dimension = 100
    with pytest.raises(EmbedderError, match="100-dimensional"):
        embedder.embed(["Clean the cassette.", "Measure the rotor."])


def test_the_dimension_is_probed_once_when_asked_before_any_call(server):
    embedder = fast_embedder(server)
    assert server.requests == []  # building it made no request
    assert embedder.dimension == 384 and embedder.dimension == 384
    assert len(server.requests) == 1


# --- the spec -----------------------------------------------------------------------------------


def test_the_spec_gives_model_id_url_and_key_variable(server):
    embedder = make_embedder(f"http:{server.url}/v1/,{MODEL},MARROWBY_EMBED_KEY")
    assert isinstance(embedder, HttpEmbedder)
    assert embedder.model_id == f"{server.url}#{MODEL}"  # a trailing /v1 is dropped
    assert embedder.endpoint == f"{server.url}/v1/embeddings"
    assert embedder.api_key_env == "MARROWBY_EMBED_KEY" and embedder.max_input_tokens == 254
    assert embedder.tokens.count_one("Marrowby frame") > 0
    assert server.requests == []
    for bad in ("http:", "http:http://127.0.0.1:9", "http:ftp://x,m", "http:http://h,m,k,extra"):
        with pytest.raises(EmbedderError):
            make_embedder(bad)


def test_spec_options_set_the_batching_and_are_checked(server, real_embedder):
    embedder = make_embedder(
        f"http:{server.url},{MODEL},MARROWBY_EMBED_KEY,batch=2,concurrency=1,timeout=7.5"
    )
    assert (embedder.batch_size, embedder.concurrency, embedder.timeout) == (2, 1, 7.5)
    assert embedder.api_key_env == "MARROWBY_EMBED_KEY"
    no_key = make_embedder(f"http:{server.url},{MODEL},batch=3,attempts=2")
    assert (no_key.api_key_env, no_key.batch_size, no_key.max_attempts) == (None, 3, 2)
    no_key.embed([sentence(random.Random(n)) for n in range(7)])
    assert len(server.requests) == 3  # 7 texts, 3 to a request
    for bad, says in (
        ("batch=0", "above 0"),
        ("batch=lots", "must be a number"),
        ("size=4", "NAME one of batch"),
        ("batch=", "NAME one of batch"),
    ):
        with pytest.raises(EmbedderError, match=says):
            make_embedder(f"http:{server.url},{MODEL},{bad}")


# --- end to end ---------------------------------------------------------------------------------


def test_an_index_syncs_and_searches_through_the_http_model(
    tmp_path, small_corpus, server, real_embedder
):
    spec = f"http:{server.url},{MODEL}"
    index = Index(tmp_path / "ix", model=spec)
    report = index.sync([small_corpus]).as_dict()
    assert report["failures"] == [] and report["documents"]["added"] == 3
    # Batching options may change between runs; the input budget, which sizes chunks, may not.
    again = Index(tmp_path / "ix", model=f"{spec},batch=4,concurrency=1")
    assert again.sync([small_corpus]).as_dict()["commit"] is None
    with pytest.raises(ModelMismatch, match="max_input_tokens"):
        Index(tmp_path / "ix", model=f"{spec},input_tokens=100").sync([small_corpus])
    hits = index.search("where is the rear brake hose routed", k=3)
    assert hits[0].path == "notices/ECN-0007.txt"
    assert index.status()["model"]["id"] == f"{server.url}#{MODEL}"

    # The same corpus through the in-process model: the same chunks, the same vectors.
    local = make_index(tmp_path / "local", real_embedder)
    local.sync([small_corpus])
    remote_rows = {row["text_hash"]: row["vector"] for row in chunk_rows(index)}
    local_rows = {row["text_hash"]: row["vector"] for row in chunk_rows(local)}
    assert remote_rows.keys() == local_rows.keys()
    hashes = sorted(remote_rows)
    similarity = cosines(
        np.array([remote_rows[h] for h in hashes]), np.array([local_rows[h] for h in hashes])
    )
    assert similarity.min() > MIN_COSINE_SAME_MODEL
    assert set(server.embedded.values()) == {1}  # each chunk text (and the query) sent once

    # Reopened without a spec, the index uses the recorded HTTP model; nothing changed, so
    # nothing is sent.
    sent_before = len(server.requests)
    reopened = Index(tmp_path / "ix")
    assert reopened.sync([small_corpus]).as_dict()["commit"] is None
    assert len(server.requests) == sent_before
    assert reopened.search("how do I true a wheel", k=1)[0].path == "training/truing.vtt"
