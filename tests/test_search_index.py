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


def test_the_vector_index_is_trained_again_once_the_table_has_grown_fourfold(
    tmp_path, hash_embedder
):
    rng = random.Random(5)
    root = tmp_path / "guides"
    for n in range(5):
        write(root / f"guide-{n:02d}.md", f"# Guide {n}\n\n" + paragraph(rng))
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([root])
    store = ix.store()
    assert "chunks.vector (IVF_SQ)" in maintenance.ensure_indexes(store, vector_min_rows=1)
    trained_on = store.settings()[maintenance.VECTOR_INDEX_ROWS_SETTING]
    assert trained_on == store.count("chunks")
    # Growth below the factor keeps the index as trained.
    write(root / "guide-05.md", "# Guide 5\n\n" + paragraph(rng))
    ix.sync([root])
    assert not any("retrained" in c for c in maintenance.ensure_indexes(store))
    for n in range(6, 6 + 4 * trained_on):
        write(root / f"guide-{n:02d}.md", f"# Guide {n}\n\n" + paragraph(rng))
    ix.sync([root])  # the sync's own upkeep retrains once the table has grown fourfold
    rows = store.count("chunks")
    assert rows >= maintenance.VECTOR_INDEX_GROWTH * trained_on
    assert store.settings()[maintenance.VECTOR_INDEX_ROWS_SETTING] == rows
    # Retraining is not an interrupted batch, and the index still gives numpy's exact answer.
    assert ix.sync([root]).as_dict()["commit"] is None
    vectors = np.array([r["vector"] for r in chunk_rows(ix)], dtype=np.float64)
    ids = [r["chunk_id"] for r in chunk_rows(ix)]
    q = hash_embedder.embed(["true the rear wheel"])[0].astype(np.float64)
    cos = vectors @ q / (np.linalg.norm(vectors, axis=1) * np.linalg.norm(q))  # numpy reference
    hits = ix.search("true the rear wheel", k=5, mode="vector")
    assert [h.chunk_id for h in hits] == [ids[i] for i in np.argsort(-cos)[:5]]
