"""Search modes (vector, keyword, hybrid), filters and per-document caps, from Python, the CLI
and the HTTP API, on real LanceDB with the real model; fusion and keyword ranking checked
against their published definitions and a reference BM25 library."""

from __future__ import annotations

import json
import math
import re
import threading
import time
import urllib.parse
import urllib.request
import warnings
from pathlib import Path

import bm25s
import lancedb
import numpy as np
import pyarrow as pa
import pytest
from lancedb.query import MatchQuery

from bench import quality
from pipeline import Index, UsageError
from pipeline.cli import main
from pipeline.config import ServerConfig
from pipeline.retrieval import Filters, glob_to_like, rrf_scores
from pipeline.service.api import start_http_server
from pipeline.service.metrics import ServiceMetrics
from tests.conftest import write

# --- reciprocal rank fusion against the paper ---


def test_rrf_matches_the_papers_formula_on_hand_made_lists():
    # Cormack, Clarke and Buettcher (SIGIR 2009): RRFscore(d) = sum_r 1 / (k + r(d)), k = 60,
    # ranks from 1; a list a document is absent from adds nothing.
    vector = ["a", "b", "c", "d"]
    keyword = ["c", "a", "e"]
    got = rrf_scores([vector, keyword], k=60)
    expected = {
        "a": 1 / 61 + 1 / 62,
        "b": 1 / 62,
        "c": 1 / 63 + 1 / 61,
        "d": 1 / 64,
        "e": 1 / 63,
    }
    assert got.keys() == expected.keys()
    for doc, score in expected.items():
        assert math.isclose(got[doc], score, rel_tol=1e-12)
    order = sorted(got, key=lambda d: -got[d])
    assert order[:2] == ["a", "c"]  # in both lists, near the top


# --- nDCG against its textbook definition ---


def test_dcg_and_ndcg_on_the_worked_example():
    # Jarvelin and Kekalainen (2002) worked example, gains G' = <3,2,3,0,0,1,2,2,3,0> with
    # discount log2 from rank 2: cumulated DCG' = <3, 5, 6.89, 6.89, 6.89, 7.28, 7.99, 8.66,
    # 9.61, 9.61> (the figures are from memory; each follows from the formula and is
    # recomputed here rank by rank).
    gains = [3, 2, 3, 0, 0, 1, 2, 2, 3, 0]
    expected = [3, 5, 6.89, 6.89, 6.89, 7.28, 7.99, 8.66, 9.61, 9.61]
    for i, want in enumerate(expected, start=1):
        assert quality.dcg(gains[:i]) == pytest.approx(want, abs=0.006)
    # Normalised by the ideal ordering of the same gains: 1 exactly when already ideal.
    assert quality.ndcg(sorted(gains, reverse=True), best_gain=3) == pytest.approx(1.0)
    assert quality.ndcg(gains, best_gain=3) == pytest.approx(
        quality.dcg(gains) / quality.dcg(sorted(gains, reverse=True))
    )
    # No relevant hit at all: 0; the answer exists, so a list of grade-1 hits is below 1.
    assert quality.ndcg([0] * 10) == 0.0
    assert 0 < quality.ndcg([1, 0, 0]) < 1


# --- keyword ranking against a reference BM25 ---

BM25_CORPUS = [
    "the rear brake caliper is bled with mineral oil after the hose is cut",
    "front brake pads wear faster in wet weather and need checking every month",
    "spoke tension is measured with a tensiometer and evened out around the wheel",
    "a true wheel spins without wobble past the brake pads",
    "the crank bolts are torqued to forty newton metres with thread locker",
    "mineral oil and brake fluid must never be mixed in one system",
    "returns of damaged frames need a photograph and the order number",
    "the chain is replaced when it has stretched by half a percent",
    "thread locker is applied to the stem bolts but never to the crank bolts",
    "wet weather riding wears chains brake pads and rims",
    "the warranty covers frame cracks for five years from delivery",
    "a hydraulic brake hose is shortened then the system is bled again",
    "bottom bracket bearings are pressed in with the proper tool",
    "tyre pressure depends on rider weight and tyre width",
    "the tensiometer reading is converted to newtons with the chart on the tool",
    "rims wear through when pads are left to run down to the metal",
]
BM25_QUERIES = [
    "brake pads wear",
    "mineral oil brake",
    "crank bolts thread locker",
    "tensiometer spoke",
    "wet weather chains",
    "frame warranty cracks",
]


def _tokens(text: str) -> list[str]:
    return re.findall(r"[a-z0-9]+", text.lower())


def test_keyword_ranking_agrees_with_a_reference_bm25(tmp_path):
    # Robertson and Zaragoza, "The Probabilistic Relevance Framework: BM25 and Beyond" (2009):
    # the reference is bm25s (PyPI) with Lucene's variant, k1 = 1.2, b = 0.75, over the same
    # tokens: lower case, split on non-alphanumerics, no stemming, no stop words. LanceDB's
    # index is built with the same tokenisation. Tolerance: at least 9 of the top 10 agree
    # as a set for every query; the order may differ where scores tie or nearly tie (bm25s
    # uses float32, and the two differ in how they store document lengths).
    db = lancedb.connect(tmp_path / "db")
    table = db.create_table(
        "t", pa.table({"id": [str(i) for i in range(len(BM25_CORPUS))], "text": BM25_CORPUS})
    )
    with warnings.catch_warnings():  # lancedb 0.40 prefers create_index(config=FTS())
        warnings.simplefilter("ignore", DeprecationWarning)
        table.create_fts_index(
            "text", use_tantivy=False, stem=False, remove_stop_words=False, with_position=False
        )
    reference = bm25s.BM25(k1=1.2, b=0.75, method="lucene")
    reference.index([_tokens(t) for t in BM25_CORPUS], show_progress=False)
    for query in BM25_QUERIES:
        ours = [
            int(r["id"])
            for r in table.search(MatchQuery(query, "text"), query_type="fts").limit(10).to_list()
        ]
        docs, scores = reference.retrieve([_tokens(query)], k=10, show_progress=False)
        theirs = [int(d) for d, s in zip(docs[0], scores[0], strict=True) if s > 0]
        assert len(set(ours) & set(theirs)) >= min(9, len(theirs)), (query, ours, theirs)
        assert ours[0] == theirs[0], (query, ours, theirs)


# --- the modes on a real index ---


@pytest.fixture(scope="module")
def share(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("search") / "share"
    write(
        root / "notices" / "ECN-0141.txt",
        "Engineering change notice ECN-0141\n\nThe seat clamp bolt of the Tern 700 frame is "
        "now torqued to 6 Nm instead of 5 Nm, because clamps slipped on test rides.\n",
    )
    write(
        root / "notices" / "ECN-0149.txt",
        "Engineering change notice ECN-0149\n\nThe seat post of the Tern 700 frame now ships "
        "with carbon assembly paste, so it does not creak in cold weather.\n",
    )
    write(
        root / "policies" / "returns.md",
        "# Returns\n\n## Damaged on arrival\n\nPhotograph the damage and send the pictures "
        "with your order number within seven days; we collect the bicycle at our cost.\n\n"
        "## Change of mind\n\nUnridden bicycles can be returned within thirty days.\n",
    )
    write(
        root / "training" / "brakes.vtt",
        "WEBVTT\n\n00:00:01.000 --> 00:00:09.000\n<v Elspeth Varga>The HB2 brake takes "
        "mineral oil only, never brake fluid.\n\n00:00:09.000 --> 00:00:20.000\n<v Elspeth "
        "Varga>Bleed it from the caliper upwards until no bubbles come out.\n",
    )
    long_manual = "\n\n".join(
        f"## Section {i}\n\nWheel truing step {i}: spin the wheel, find the wobble and "
        f"tighten the spokes on the opposite side a quarter turn at a time, then check again."
        for i in range(1, 40)
    )
    write(root / "manuals" / "wheels.md", "# Wheel manual\n\n" + long_manual + "\n")
    return root


@pytest.fixture(scope="module")
def index(share, real_embedder, tmp_path_factory) -> Index:
    ix = Index(tmp_path_factory.mktemp("search-index") / "ix", embedder=real_embedder)
    ix.sync([share])
    return ix


def test_keyword_mode_finds_an_identifier_first(index):
    hits = index.search("ECN-0141", k=3, mode="keyword")
    assert hits[0].path == "notices/ECN-0141.txt"
    assert hits[0].keyword_rank == 1 and hits[0].vector_rank is None
    assert hits[0].score > 0  # BM25


def test_vector_mode_scores_are_cosines_and_carry_no_keyword_rank(index, real_embedder):
    hits = index.search("what oil goes in the brake", k=2, mode="vector")
    assert hits[0].path == "training/brakes.vtt"
    assert all(h.keyword_rank is None and h.vector_rank for h in hits)
    # The score is the cosine similarity of the two unit vectors (numpy as the reference).
    q = real_embedder.embed(["what oil goes in the brake"])[0]
    rows = (
        index.store()
        .table("chunks")
        .to_lance()
        .to_table(columns=["chunk_id", "vector"], filter=f"chunk_id = '{hits[0].chunk_id}'")
    )
    v = np.asarray(rows["vector"][0].as_py(), dtype=np.float32)
    assert hits[0].score == pytest.approx(
        float(q @ v / np.linalg.norm(q) / np.linalg.norm(v)), abs=1e-4
    )


def test_hybrid_is_the_default_and_reports_both_ranks(index):
    hits = index.search("mineral oil for the HB2 brake", k=5)
    assert hits[0].path == "training/brakes.vtt"
    assert hits[0].vector_rank is not None and hits[0].keyword_rank is not None
    assert hits[0].score == pytest.approx(
        1 / (60 + hits[0].vector_rank) + 1 / (60 + hits[0].keyword_rank)
    )
    assert [h.score for h in hits] == sorted((h.score for h in hits), reverse=True)


NASTY = [
    '"seat clamp',
    "ECN-0141: torque",
    "(seat AND clamp) OR *",
    "seat\\clamp",
    "brake)) ]] {{",
    "-clamp +bolt",
    "x' OR '1'='1",
    "path LIKE '%'",
    "NOT torque",
]


@pytest.mark.parametrize("mode", ["vector", "keyword", "hybrid"])
def test_queries_are_plain_text_in_every_mode(index, mode):
    for query in NASTY:
        index.search(query, k=3, mode=mode)  # no error: nothing in it is parsed
    if mode != "vector":
        # The words still count as words: the notice about the seat clamp comes first.
        for query in ['"seat clamp', "(seat AND clamp) OR *", "ECN-0141: torque", "seat\\clamp"]:
            assert index.search(query, k=1, mode=mode)[0].path == "notices/ECN-0141.txt", query
    # An injection attempt in a filter value is a value, not SQL: nothing matches it.
    assert index.search("clamp", k=3, mode=mode, source="x' OR '1'='1") == []


def test_empty_and_punctuation_only_queries_are_usage_errors(index):
    for query in ["", "   ", "?!", '"" ()', "***"]:
        with pytest.raises(UsageError):
            index.search(query, k=3)


def test_a_query_of_ten_thousand_characters_works_and_says_it_was_cut(index, capsys):
    query = ("seat clamp torque " * 600)[:10_000]
    assert index.search(query, k=3, mode="hybrid")
    assert main(["--index", str(index.path), "search", query, "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["results"] and any("tokens" in note for note in data["notes"])


def test_filters_return_k_hits_when_k_match(index):
    # The long manual's chunks would fill the whole list; a type filter must still return
    # k transcript-or-notice hits (prefiltered), not the few that survive in a short list.
    for mode in ["vector", "keyword", "hybrid"]:
        # (keyword needs a word the notices hold: "frame"; the rest only the manual has)
        hits = index.search("wheel spokes wobble frame", k=3, mode=mode, types=["txt"])
        assert len(hits) == 2 and {h.path for h in hits} == {
            "notices/ECN-0141.txt",
            "notices/ECN-0149.txt",
        }, mode
        hits = index.search("seat clamp spokes", k=4, mode=mode, paths=["share/manuals/*"])
        assert len(hits) == 4 and all(h.path == "manuals/wheels.md" for h in hits), mode
        hits = index.search("seat clamp brake", k=4, mode=mode, paths=["*.vtt"])
        assert [h.path for h in hits] == ["training/brakes.vtt"] * len(hits) and hits, mode


def test_per_doc_caps_hits_from_one_document(index):
    hits = index.search("wheel truing step", k=4, per_doc=1, mode="hybrid")
    assert len({h.doc_id for h in hits}) == len(hits) == 4
    capped = index.search("wheel truing step", k=6, per_doc=2, mode="vector")
    counts: dict[str, int] = {}
    for h in capped:
        counts[h.doc_id] = counts.get(h.doc_id, 0) + 1
    assert max(counts.values()) <= 2 and len(capped) == 6


def test_since_keeps_documents_changed_at_or_after(index, share):
    assert index.search("seat", k=5, since="2999-01-01T00:00:00Z") == []
    assert len(index.search("seat", k=5, since="2000-01-01T00:00:00Z")) == 5


def test_glob_to_like_escapes_like_wildcards():
    assert glob_to_like("manuals/*.pdf") == "manuals/%.pdf"
    assert glob_to_like("a_b%c?.md") == "a\\_b\\%c_.md"
    assert glob_to_like("**/x") == "%/x"
    where = Filters(sources=("o'brien",), types=("md",)).where()
    assert "'o''brien'" in where and "media_type = 'text/markdown'" in where


def test_an_unknown_type_names_the_known_ones(index):
    with pytest.raises(UsageError, match="docx"):
        index.search("seat", types=["dwg"])


# --- new commits are searchable by keyword at once; as-of; erase ---


def test_a_new_commit_is_searchable_by_keyword_at_once_and_as_of_keeps_the_old(
    tmp_path, real_embedder
):
    root = tmp_path / "share"
    write(root / "a.md", "# Parts\n\nThe hub spacer is part MCW-HUB-SP-12.\n")
    ix = Index(tmp_path / "ix", embedder=real_embedder)
    ix.sync([root])
    first = ix.history()[0].id
    write(root / "b.md", "# Parts\n\nThe new derailleur hanger is part MCW-DH-77Q.\n")
    ix.sync([root])
    hits = ix.search("MCW-DH-77Q", k=1, mode="keyword")
    assert hits and hits[0].path == "b.md"
    old = ix.search("MCW-DH-77Q", k=3, mode="keyword", as_of=first)
    assert all(h.path == "a.md" for h in old)


def test_erase_purges_the_words_from_every_file_under_the_index(tmp_path, real_embedder):
    root = tmp_path / "share"
    secret = "zqvxwordle"
    write(root / "keep.md", "# Kept\n\nThe seat clamp bolt takes 6 Nm.\n")
    write(root / "gone.md", f"# Gone\n\nThe code name of the prototype was {secret}.\n")
    ix = Index(tmp_path / "ix", embedder=real_embedder)
    ix.sync([root])
    assert ix.search(secret, k=1, mode="keyword")[0].path == "gone.md"
    ix.maintain(keep_days=30, yes=True)  # fold the keyword index, so its files hold the word
    assert any(
        secret.encode() in p.read_bytes() for p in (tmp_path / "ix").rglob("*") if p.is_file()
    )
    ix.erase(["share/gone.md"], yes=True)
    for path in (tmp_path / "ix").rglob("*"):
        if path.is_file():
            assert secret.encode() not in path.read_bytes().lower(), path
    assert ix.search("seat clamp", k=1, mode="keyword")[0].path == "keep.md"


# --- the CLI and the HTTP API ---


def test_cli_modes_filters_and_json_keys(index, capsys):
    args = ["--index", str(index.path), "search", "ECN-0141", "--json", "-k", "2"]
    assert main([*args, "--mode", "keyword", "--type", "txt"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["mode"] == "keyword"
    top = data["results"][0]
    assert top["path"] == "notices/ECN-0141.txt"
    assert {"score", "vector_rank", "keyword_rank"} <= top.keys()
    assert top["vector_rank"] is None and top["keyword_rank"] == 1
    assert main(["--index", str(index.path), "search", "?!"]) == 2
    assert "no letters or digits" in capsys.readouterr().err


class _ServiceStandIn:
    """The few attributes the API reads of the daemon (its protocol), over a real index."""

    def __init__(self, index: Index) -> None:
        self.index = index
        self.metrics = ServiceMetrics()
        self.busy = threading.Event()
        self.started_at = time.time()

    def problems(self) -> list[str]:
        return []

    def paused(self) -> bool:
        return False

    def queue_depth(self) -> int:
        return 0

    def failing_sources(self) -> dict[str, str]:
        return {}


def test_http_search_takes_the_mode_and_filters(index):
    server = start_http_server(_ServiceStandIn(index), ServerConfig(host="127.0.0.1", port=0))
    try:
        port = server.server_address[1]

        def get(**params):
            url = f"http://127.0.0.1:{port}/search?" + urllib.parse.urlencode(params, doseq=True)
            try:
                with urllib.request.urlopen(url, timeout=60) as r:
                    return r.status, json.loads(r.read())
            except urllib.error.HTTPError as exc:
                return exc.code, json.loads(exc.read())

        code, data = get(q="ECN-0141", k=2, mode="keyword")
        assert code == 200 and data["mode"] == "keyword"
        assert data["results"][0]["path"] == "notices/ECN-0141.txt"
        code, data = get(q="seat clamp brake", k=3, type=["vtt"], per_doc=1)
        assert code == 200 and [r["path"] for r in data["results"]] == ["training/brakes.vtt"]
        code, data = get(q="seat", mode="fuzzy")
        assert code == 400
    finally:
        server.shutdown()
        server.server_close()


def test_verify_reports_a_missing_keyword_index(tmp_path, hash_embedder):
    from pipeline.verify import verify_index

    root = tmp_path / "share"
    write(root / "a.md", "# Parts\n\nThe hub spacer is part MCW-HUB-SP-12.\n")
    ix = Index(tmp_path / "ix", model="hash", embedder=hash_embedder)
    ix.sync([root])
    assert not [p for p in verify_index(ix, drift=False).problems if p.check == "keyword_index"]
    chunks = ix.store().table("chunks")
    chunks.drop_index("text_idx")
    problems = [p for p in verify_index(ix, drift=False).problems if p.check == "keyword_index"]
    assert problems and "chunks.text" in problems[0].detail
    # The next sync builds it again, and keyword search works as before.
    write(root / "b.md", "# More\n\nA second part, MCW-HUB-SP-14.\n")
    ix.sync([root])
    assert not [p for p in verify_index(ix, drift=False).problems if p.check == "keyword_index"]
    assert ix.search("MCW-HUB-SP-14", k=1, mode="keyword")[0].path == "b.md"


def test_the_snippet_is_taken_around_the_best_matching_sentence():
    from pipeline.retrieval import best_snippet, highlight

    text = " ".join(f"Filler sentence number {i} about nothing much." for i in range(30))
    text += " The HB2 caliper takes mineral oil only. " + text
    snippet = best_snippet(text, "which oil for the HB2 caliper", 120)
    assert snippet.startswith("… The HB2 caliper takes mineral oil only.")
    assert len(snippet) <= 130
    marked = highlight("Mineral oil only, never brake fluid.", "mineral OIL", "[", "]")
    assert marked == "[Mineral] [oil] only, never brake fluid."


def test_http_search_refuses_bad_input_with_400_and_survives_load(index):
    import http.client
    from concurrent.futures import ThreadPoolExecutor

    server = start_http_server(_ServiceStandIn(index), ServerConfig(host="127.0.0.1", port=0))
    port = server.server_address[1]

    def status_of(path: str) -> int:
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=60)
        try:
            conn.request("GET", path)
            response = conn.getresponse()
            response.read()
            return response.status
        finally:
            conn.close()

    try:
        assert status_of("/search?q=seat&k=abc") == 400
        assert status_of("/search?q=seat&k=0") == 400
        assert status_of("/search?q=seat&k=101") == 400
        assert status_of("/search?q=seat&kk=3") == 400  # unknown parameter, named
        assert status_of("/search?q=%3F%21") == 400  # punctuation only
        assert status_of("/search?q=seat&per_doc=x") == 400
        assert status_of("/status?verbose=1") == 400
        assert status_of("/search?q=%ff%fe%fd+seat") == 200  # invalid UTF-8 is replaced
        # A 1 MB query string: http.server refuses a request line over 64 KiB with 414.
        assert status_of("/search?q=" + "a" * 1_000_000) == 414
        # A bounded load: 240 requests from 8 threads, every one answered, none a 500.
        paths = ["/search?q=seat+clamp&k=3", "/search?q=ECN-0141&mode=keyword", "/healthz"]
        with ThreadPoolExecutor(max_workers=8) as pool:
            codes = list(pool.map(status_of, [paths[i % 3] for i in range(240)]))
        assert codes.count(200) == 240
        assert status_of("/healthz") == 200
    finally:
        server.shutdown()
        server.server_close()


def test_http_search_is_503_until_the_index_exists(tmp_path):
    empty = Index(tmp_path / "not-yet", model="hash")
    server = start_http_server(_ServiceStandIn(empty), ServerConfig(host="127.0.0.1", port=0))
    try:
        url = f"http://127.0.0.1:{server.server_address[1]}/search?q=seat"
        with pytest.raises(urllib.error.HTTPError) as caught:
            urllib.request.urlopen(url, timeout=30)
        assert caught.value.code == 503
        assert "index" in json.loads(caught.value.read())["error"]
    finally:
        server.shutdown()
        server.server_close()


def test_a_token_variable_that_is_empty_refuses_to_start(index, monkeypatch):
    monkeypatch.setenv("MARROWBY_EMPTY_TOKEN", "")
    with pytest.raises(UsageError, match="not set or empty"):
        start_http_server(
            _ServiceStandIn(index),
            ServerConfig(host="127.0.0.1", port=0, token_env="MARROWBY_EMPTY_TOKEN"),
        )


def test_an_address_beyond_loopback_is_served_only_with_the_token(index, monkeypatch):
    from pipeline.config import parse_config

    # Configuration refuses a non-loopback address without a token ...
    with pytest.raises(UsageError, match="not a loopback address"):
        parse_config({"server": {"listen": "0.0.0.0:8765"}})
    # ... and with one, every request needs it. Bound on all addresses, reached (as the
    # rules of this machine allow) only through 127.0.0.1.
    monkeypatch.setenv("MARROWBY_TOKEN", "s3cret-for-tests")
    config = parse_config({"server": {"listen": "0.0.0.0:0", "token_env": "MARROWBY_TOKEN"}})
    server = start_http_server(_ServiceStandIn(index), config.server)
    try:
        url = f"http://127.0.0.1:{server.server_address[1]}/search?q=seat"
        with pytest.raises(urllib.error.HTTPError) as caught:
            urllib.request.urlopen(url, timeout=30)
        assert caught.value.code == 401
        request = urllib.request.Request(url, headers={"Authorization": "Bearer s3cret-for-tests"})
        with urllib.request.urlopen(request, timeout=30) as response:
            assert response.status == 200
    finally:
        server.shutdown()
        server.server_close()
