"""Search through LanceDB's vector and scalar indexes gives the exact answer numpy gives."""

from __future__ import annotations

import random

import numpy as np

from pipeline.store import upkeep as maintenance
from tests.conftest import paragraph, write
from tests.test_sync import chunk_rows, make_index


def test_indexed_search_returns_the_exact_top_k(tmp_path, hash_embedder):
    root = tmp_path / "guides"
    rng = random.Random(3)
    for n in range(40):
        write(
            root / f"guide-{n:02d}.md",
            f"# Guide {n}\n\n" + "\n\n".join(paragraph(rng) for _ in range(6)),
        )
    other = tmp_path / "other"
    for n in range(10):
        write(
            other / f"saddle-{n}.md",
            f"# Saddle {n}\n\nSaddle height {n}: set the saddle height.\n",
        )
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([root, other])
    store = ix.store()
    created = maintenance.ensure_indexes(store, scalar_min_rows=1, vector_min_rows=1)
    assert "chunks.vector (IVF_SQ)" in created and "chunks.doc_id" in created
    # Building indexes is not an interrupted batch: the next sync has nothing to do.
    assert ix.sync([root, other]).as_dict()["commit"] is None

    rows = chunk_rows(ix)
    vectors = np.array([r["vector"] for r in rows], dtype=np.float64)
    ids = [r["chunk_id"] for r in rows]
    for query in ["tighten the crank bolt", "true the rear wheel", "bleed the brake hose"]:
        hits = ix.search(query, k=10, mode="vector")
        q = hash_embedder.embed([query])[0].astype(np.float64)
        cos = vectors @ q / (np.linalg.norm(vectors, axis=1) * np.linalg.norm(q))  # numpy reference
        exact = [ids[i] for i in np.argsort(-cos)[:10]]
        assert [h.chunk_id for h in hits] == exact
        np.testing.assert_allclose([h.score for h in hits], np.sort(cos)[::-1][:10], atol=1e-4)
    # The other source's notes are all about saddle height: unfiltered, they come first; with
    # the filter, only the guides answer, and still three of them.
    assert {h.source for h in ix.search("saddle height", k=3, mode="vector")} == {"other"}
    for mode in ("vector", "hybrid"):
        filtered = ix.search("saddle height", k=3, source="guides", mode=mode)
        assert len(filtered) == 3 and {h.source for h in filtered} == {"guides"}, mode
