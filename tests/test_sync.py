"""The sync engine end to end: real LanceDB, real files, the real model where vectors matter.

Each test states one invariant of DEVELOPERS.md ("Invariants") and builds its own corpus in
tmp_path.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import threading
from pathlib import Path

import numpy as np
import pytest

from connectors.folder import FolderSource
from pipeline import formats
from pipeline.embedding.hashed import HashEmbedder
from pipeline.errors import (
    ConfirmationRequired,
    IndexLocked,
    IndexMissing,
    ModelMismatch,
    SourceUnreachable,
)
from pipeline.index import Index
from pipeline.locking import writer_lock
from pipeline.store.tables import Store
from tests.conftest import long_markdown, paragraph, write


def make_index(tmp_path: Path, embedder, **kw) -> Index:
    """An index in tmp_path that reuses the session's loaded embedder."""
    model = "hash" if isinstance(embedder, HashEmbedder) else None
    return Index(tmp_path / "index", model=model, embedder=embedder, **kw)


def chunk_rows(ix: Index) -> list[dict]:
    table = (
        ix.store()
        .table("chunks")
        .to_lance()
        .to_table(columns=["chunk_id", "doc_id", "text_hash", "ordinal", "vector"])
    )
    return sorted(table.to_pylist(), key=lambda r: r["chunk_id"])


# --- the first sync and search ---------------------------------------------------------------


def test_first_sync_indexes_every_document_and_search_cites_it(
    tmp_path, small_corpus, real_embedder
):
    ix = make_index(tmp_path, real_embedder)
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"]["added"] == 3
    assert report["documents"]["failed"] == 0
    assert report["chunks"]["reused"] == 0
    assert report["chunks"]["embedded"] >= 3

    hits = ix.search("how do I return a frame damaged in transit", k=3)
    assert hits[0].path == "policies/returns.md"
    assert hits[0].heading is not None and "Damaged frames" in hits[0].heading

    hits = ix.search("spoke tension when truing a wheel", k=1)
    assert hits[0].path == "training/truing.vtt"
    assert hits[0].start is not None and hits[0].end is not None and hits[0].end > hits[0].start

    hits = ix.search("brake hose routing", k=1)
    assert hits[0].path == "notices/ECN-0007.txt"
    # The notice is five lines (title, blank, text, blank, serial): one chunk, lines 1-5.
    assert (hits[0].line_start, hits[0].line_end) == (1, 5)


def test_search_scores_are_the_cosine_similarity_numpy_computes(
    tmp_path, small_corpus, real_embedder
):
    ix = make_index(tmp_path, real_embedder)
    ix.sync([small_corpus])
    query = "refund to the original card"
    hits = ix.search(query, k=50, mode="vector")
    # Reference: cosine similarity computed with numpy over the stored vectors.
    rows = chunk_rows(ix)
    vectors = np.array([r["vector"] for r in rows], dtype=np.float64)
    q = real_embedder.embed([query])[0].astype(np.float64)
    cos = vectors @ q / (np.linalg.norm(vectors, axis=1) * np.linalg.norm(q))
    expected = sorted(zip(cos, (r["chunk_id"] for r in rows), strict=True), reverse=True)
    assert [h.chunk_id for h in hits] == [cid for _, cid in expected]
    np.testing.assert_allclose([h.score for h in hits], [c for c, _ in expected], atol=1e-5)


# --- cheap checks first: nothing changed, nothing done -------------------------------------


def test_unchanged_resync_embeds_nothing_and_makes_no_commit(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    version = ix.store().table("chunks").version
    report = ix.sync([small_corpus]).as_dict()
    assert report["commit"] is None
    assert report["documents"]["unchanged"] == 3
    assert report["chunks"] == {"embedded": 0, "reused": 0, "added": 0, "deleted": 0}
    assert ix.store().table("chunks").version == version


def test_touched_file_is_reread_but_nothing_is_embedded(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    before = chunk_rows(ix)
    target = small_corpus / "notices" / "ECN-0007.txt"
    os.utime(target, ns=(target.stat().st_atime_ns, target.stat().st_mtime_ns + 5_000_000_000))
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"]["unchanged"] == 3
    assert report["chunks"]["embedded"] == 0
    assert chunk_rows(ix) == before
    # The new fingerprint is stored: the third sync does not read the file again.
    assert ix.sync([small_corpus]).as_dict()["commit"] is None


# --- identity is content: edits re-embed only what changed -------------------------------


def _long_doc_corpus(tmp_path: Path) -> tuple[Path, Path]:
    root = tmp_path / "guides"
    doc = write(root / "workshop-guide.md", long_markdown(70))
    return root, doc


def test_long_document_has_30_chunks_or_more(tmp_path, hash_embedder):
    root, _ = _long_doc_corpus(tmp_path)
    ix = make_index(tmp_path, hash_embedder)
    report = ix.sync([root]).as_dict()
    assert report["chunks"]["embedded"] >= 30


def test_editing_one_paragraph_reembeds_at_most_three_chunks(tmp_path, real_embedder):
    root, doc = _long_doc_corpus(tmp_path)
    ix = make_index(tmp_path, real_embedder)
    first = ix.sync([root]).as_dict()
    paragraphs = doc.read_text().split("\n\n")
    target = len(paragraphs) // 2
    assert not paragraphs[target].startswith("#")
    paragraphs[target] = paragraph(random.Random(99))
    doc.write_text("\n\n".join(paragraphs))
    report = ix.sync([root]).as_dict()
    assert report["documents"]["modified"] == 1
    assert 1 <= report["chunks"]["embedded"] <= 3
    total = first["chunks"]["embedded"]
    assert report["chunks"]["reused"] >= total - 4


def test_inserting_a_paragraph_at_the_top_reembeds_at_most_three_chunks(tmp_path, real_embedder):
    root, doc = _long_doc_corpus(tmp_path)
    ix = make_index(tmp_path, real_embedder)
    ix.sync([root])
    text = doc.read_text()
    title, rest = text.split("\n\n", 1)
    doc.write_text(f"{title}\n\n{paragraph(random.Random(5))}\n\n{rest}")
    report = ix.sync([root]).as_dict()
    assert report["documents"]["modified"] == 1
    assert 1 <= report["chunks"]["embedded"] <= 3


def test_renaming_a_file_embeds_nothing_and_reports_a_move(tmp_path, small_corpus, real_embedder):
    ix = make_index(tmp_path, real_embedder)
    ix.sync([small_corpus])
    (small_corpus / "policies" / "returns.md").rename(small_corpus / "policies" / "returns-2027.md")
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"]["moved"] == 1
    assert report["documents"]["removed"] == 0
    assert report["documents"]["added"] == 0
    assert report["chunks"]["embedded"] == 0
    hits = ix.search("return a damaged frame", k=1)
    assert hits[0].path == "policies/returns-2027.md"
    tombstones = ix.store().table("tombstones").to_arrow().to_pylist()
    assert [(t["doc_id"], t["reason"]) for t in tombstones] == [
        ("share:policies/returns.md", "moved")
    ]


def test_deleting_a_file_leaves_no_chunk_and_one_tombstone(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    n_before = ix.store().count("chunks")
    (small_corpus / "notices" / "ECN-0007.txt").unlink()
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"]["removed"] == 1
    rows = chunk_rows(ix)
    assert not [r for r in rows if r["doc_id"] == "share:notices/ECN-0007.txt"]
    assert report["chunks"]["deleted"] == n_before - len(rows)
    tombstones = ix.store().table("tombstones").to_arrow().to_pylist()
    assert len(tombstones) == 1
    t = tombstones[0]
    assert t["doc_id"] == "share:notices/ECN-0007.txt"
    assert t["reason"] == "gone at source"
    assert t["chunks_version"] == ix.store().table("chunks").version
    assert t["content_hash"] and t["chunk_count"] >= 1


def test_one_batch_is_one_version_of_the_chunks_table(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    v = ix.store().table("chunks").version
    (small_corpus / "notices" / "ECN-0007.txt").unlink()
    write(
        small_corpus / "policies" / "returns.md", "# Returns policy\n\nNo returns after 90 days.\n"
    )
    write(
        small_corpus / "policies" / "warranty.md",
        "# Warranty\n\nFrames carry a five-year warranty.\n",
    )
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"] | {"unchanged": 0} == {
        "added": 1,
        "modified": 1,
        "removed": 1,
        "moved": 0,
        "unchanged": 0,
        "failed": 0,
    }
    assert len(report["commits"]) == 1
    assert ix.store().table("chunks").version == v + 1 == report["version"]


# --- nothing is lost silently ----------------------------------------------------------------


def test_failed_edit_keeps_last_good_version_searchable(tmp_path, small_corpus, real_embedder):
    ix = make_index(tmp_path, real_embedder)
    ix.sync([small_corpus])
    before = [r for r in chunk_rows(ix) if r["doc_id"] == "share:policies/returns.md"]
    rng = random.Random(1)  # random bytes: a binary file saved under a text name
    (small_corpus / "policies" / "returns.md").write_bytes(
        bytes(rng.getrandbits(8) for _ in range(3000))
    )
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"]["failed"] == 1
    assert report["failures"][0]["path"] == "policies/returns.md"
    assert "binary" in report["failures"][0]["reason"]
    after = [r for r in chunk_rows(ix) if r["doc_id"] == "share:policies/returns.md"]
    assert after == before
    assert ix.search("return a damaged frame", k=1)[0].path == "policies/returns.md"
    status = ix.status()
    assert status["failures"][0]["path"] == "policies/returns.md"
    assert status["failures"][0]["last_good_searchable"] is True
    # An unchanged bad file is not retried on every sync.
    assert ix.sync([small_corpus]).as_dict()["commit"] is None
    # Fixing the file clears the failure.
    write(small_corpus / "policies" / "returns.md", "# Returns policy\n\nReturns within 60 days.\n")
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"]["modified"] == 1
    assert ix.status()["failures"] == []


def test_new_bad_documents_are_reported_and_the_rest_is_indexed(
    tmp_path, small_corpus, hash_embedder
):
    (small_corpus / "empty.md").write_bytes(b"")
    (small_corpus / "broken.pdf").write_bytes(b"%PDF-1.7\n1 0 obj\n<< /Type /Catalog")
    (small_corpus / "fake.docx").write_bytes(b"this is not a zip file")
    ix = make_index(tmp_path, hash_embedder)
    report = ix.sync([small_corpus]).as_dict()
    assert report["documents"]["added"] == 3
    assert sorted(f["path"] for f in report["failures"]) == ["broken.pdf", "empty.md", "fake.docx"]
    assert all(f["reason"] for f in report["failures"])
    assert len(ix.status()["failures"]) == 3
    # A bad file that is later removed just leaves: no tombstone for a never-indexed document.
    (small_corpus / "empty.md").unlink()
    ix.sync([small_corpus])
    assert ix.store().count("tombstones") == 0
    assert len(ix.status()["failures"]) == 2


class VanishingFolder(FolderSource):
    """A real folder source whose file disappears between listing and reading."""

    def list_changes(self, unchanged_if):
        listing = super().list_changes(unchanged_if)
        (self.root / "notices" / "ECN-0007.txt").unlink()
        return listing


def test_file_vanishing_between_listing_and_reading_is_a_failure(
    tmp_path, small_corpus, hash_embedder
):
    ix = make_index(tmp_path, hash_embedder)
    source = VanishingFolder(
        name="share", root=small_corpus, accept=lambda k: formats.media_type_for(k) is not None
    )
    report = ix.sync([source]).as_dict()
    assert report["documents"]["added"] == 2
    assert report["failures"] == [
        {
            "source": "share",
            "path": "notices/ECN-0007.txt",
            "reason": "the file vanished before it could be read",
        }
    ]
    # The next sync sees it gone.
    ix.sync([small_corpus])
    assert ix.status()["failures"] == []


def test_missing_source_root_is_an_error_not_an_empty_source(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    chunks = ix.store().count("chunks")
    shutil.move(small_corpus, tmp_path / "unmounted")
    with pytest.raises(SourceUnreachable, match="does not exist"):
        ix.sync([small_corpus])
    assert ix.store().count("chunks") == chunks


def test_removing_more_than_half_of_a_source_asks_first(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    shutil.rmtree(small_corpus / "policies")
    shutil.rmtree(small_corpus / "training")
    with pytest.raises(ConfirmationRequired, match="remove 2 of its 3 documents"):
        ix.sync([small_corpus])
    assert ix.store().count("tombstones") == 0
    asked = []
    with pytest.raises(ConfirmationRequired):
        ix.sync([small_corpus], confirm=lambda msg: asked.append(msg) or False)
    assert len(asked) == 1
    report = ix.sync([small_corpus], yes=True).as_dict()
    assert report["documents"]["removed"] == 2


def test_removing_exactly_half_of_a_source_does_not_ask(tmp_path, small_corpus, hash_embedder):
    # The guard is "more than half": 2 of 4 documents is half, and goes ahead unasked.
    write(small_corpus / "notices" / "ECN-0008.txt", "ECN-0008\n\nNew bottle cage bolts.\n")
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    assert ix.status()["totals"]["documents"] == 4
    shutil.rmtree(small_corpus / "notices")
    asked = []
    report = ix.sync([small_corpus], confirm=lambda msg: asked.append(msg) or False).as_dict()
    assert asked == [] and report["documents"]["removed"] == 2


def test_sources_are_independent(tmp_path, small_corpus, hash_embedder):
    other = tmp_path / "handbook"
    write(other / "welcome.md", "# Welcome\n\nThe workshop opens at seven.\n")
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus, other])
    # Syncing one source alone never removes the other's documents.
    report = ix.sync([other]).as_dict()
    assert report["documents"]["removed"] == 0
    sources = {s["name"]: s["documents"] for s in ix.status()["sources"]}
    assert sources == {"share": 3, "handbook": 1}


# --- the index converges after a crash at any write ---------------------------------------


@pytest.mark.parametrize(
    "step", ["add_vectors", "add_tombstones", "replace_chunks", "upsert_documents", "add_commit"]
)
def test_crash_at_any_write_then_rerun_equals_a_clean_run(
    tmp_path, small_corpus, hash_embedder, monkeypatch, step
):
    def edit(root: Path) -> None:
        (root / "notices" / "ECN-0007.txt").unlink()
        write(root / "policies" / "returns.md", "# Returns policy\n\nReturns within 45 days.\n")
        write(root / "policies" / "new.md", "# Loan bikes\n\nLoan bikes are free for a day.\n")

    clean_root = tmp_path / "clean" / "share"
    shutil.copytree(small_corpus, clean_root)
    clean = Index(tmp_path / "clean-index", model="hash", embedder=hash_embedder)
    clean.sync([clean_root])
    edit(clean_root)
    clean.sync([clean_root])

    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    edit(small_corpus)
    original = getattr(Store, step)

    def crash(self, *args, **kwargs):
        raise RuntimeError(f"injected crash in {step}")

    monkeypatch.setattr(Store, step, crash)
    with pytest.raises(RuntimeError, match="injected crash"):
        ix.sync([small_corpus])
    monkeypatch.setattr(Store, step, original)
    ix2 = make_index(tmp_path, hash_embedder)  # a new process would open the index afresh
    ix2.sync([small_corpus])

    def snapshot(index: Index) -> dict:
        s = index.store()
        return {
            "chunks": [
                (r["chunk_id"], r["doc_id"], r["text_hash"], r["ordinal"], tuple(r["vector"]))
                for r in chunk_rows(index)
            ],
            "documents": sorted(
                (d["doc_id"].split(":", 1)[1], d["content_hash"], d["status"], d["chunk_count"])
                for d in s.all_documents()
            ),
            "tombstones": sorted(
                (t["path"], t["content_hash"], t["reason"])
                for t in s.table("tombstones").to_arrow().to_pylist()
            ),
            "vectors": sorted(s.table("vectors").to_arrow()["text_hash"].to_pylist()),
        }

    assert snapshot(ix2) == snapshot(clean)
    assert ix2.sync([small_corpus]).as_dict()["commit"] is None


# --- the index folder ----------------------------------------------------------------------


def test_opening_with_another_model_names_both(tmp_path, small_corpus, hash_embedder):
    ix = Index(tmp_path / "index", model="hash")
    ix.sync([small_corpus])
    other = Index(tmp_path / "index", model="default")
    with pytest.raises(ModelMismatch) as err:
        other.sync([small_corpus])
    assert "hash" in str(err.value) and "MiniLM" in str(err.value)
    # Without a model named, the index's own model is used.
    again = Index(tmp_path / "index")
    assert again.sync([small_corpus]).as_dict()["commit"] is None


def test_a_second_writer_is_refused(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    with writer_lock(ix.path):
        with pytest.raises(IndexLocked, match=f"process {os.getpid()}"):
            ix.sync([small_corpus])


def test_reading_a_missing_index_is_a_clear_error(tmp_path):
    with pytest.raises(IndexMissing, match="no upwell index"):
        Index(tmp_path / "nothing").status()


def test_settings_are_recorded_in_the_index(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    settings = ix.store().settings()
    assert settings["model_id"] == hash_embedder.model_id
    assert settings["dimension"] == 384
    assert settings["chunking"]["max_tokens"] > settings["chunking"]["min_tokens"] > 0
    json.dumps(settings)


def test_a_source_name_keeps_meaning_one_folder(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    elsewhere = tmp_path / "other" / "share"
    write(elsewhere / "memo.md", "# Memo\n\nThe stores close early on Friday.\n")
    with pytest.raises(ConfirmationRequired, match="was synced from"):
        ix.sync([elsewhere])
    assert ix.status()["totals"]["documents"] == 3
    # Named apart, both folders are indexed side by side.
    ix.sync([f"memos={elsewhere}"])
    assert {s["name"]: s["documents"] for s in ix.status()["sources"]} == {"share": 3, "memos": 1}
    # A share that really moved is accepted with yes=True; its files are hashed, not re-embedded.
    moved = tmp_path / "mnt" / "share"
    shutil.copytree(small_corpus, moved)
    report = ix.sync([moved], yes=True).as_dict()
    assert report["chunks"]["embedded"] == 0
    assert ix.store().settings()["source_locations"]["share"] == str(moved)


def test_a_long_running_writer_holds_the_lock_across_syncs(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    other = make_index(tmp_path, hash_embedder)
    with ix.writing():
        ix.sync([small_corpus])  # re-entrant for the holder
        with pytest.raises(IndexLocked):
            other.sync([small_corpus])
        ix.sync([small_corpus])
    assert other.sync([small_corpus]).as_dict()["commit"] is None


def test_chunks_left_by_a_crash_are_removed_when_their_file_is_gone(
    tmp_path, small_corpus, hash_embedder, monkeypatch
):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    write(
        small_corpus / "policies" / "loans.md", "# Loan bikes\n\nLoan bikes are free for a day.\n"
    )
    monkeypatch.setattr(Store, "upsert_documents", lambda self, *a, **k: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        ix.sync([small_corpus])  # chunks written, document rows not: the process "died"
    monkeypatch.undo()
    (small_corpus / "policies" / "loans.md").unlink()  # and the file went away meanwhile
    restarted = make_index(tmp_path, hash_embedder)  # as a new process
    report = restarted.sync([small_corpus]).as_dict()
    assert report["documents"]["removed"] == 0  # never committed, so never counted or logged
    assert report["chunks"]["deleted"] >= 1
    doc_ids = {r["doc_id"] for r in chunk_rows(restarted)}
    assert "share:policies/loans.md" not in doc_ids
    assert restarted.store().count("tombstones") == 0
    # With nothing interrupted since, the next sync does not scan for orphans at all.
    assert make_index(tmp_path, hash_embedder).sync([small_corpus]).as_dict()["commit"] is None


def die_after_the_chunks_of_a_new_file(tmp_path, root, embedder, monkeypatch) -> None:
    """Index ``root``, add loans.md, and "die" in the next sync after its chunks are written
    but before its document row; the file then goes away while the writer is down."""
    ix = make_index(tmp_path, embedder)
    ix.sync([root])
    write(root / "loans.md", "# Loan bikes\n\nLoan bikes are free for a day.\n")
    monkeypatch.setattr(Store, "upsert_documents", lambda self, *a, **k: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        ix.sync([root])
    monkeypatch.undo()
    (root / "loans.md").unlink()


def test_a_second_crash_after_a_commit_does_not_hide_chunks_left_by_the_first(
    tmp_path, small_corpus, hash_embedder, monkeypatch
):
    # Found by the kill -9 test in test_service.py: the clean-up of a crash's chunks ran with a
    # source's last batch, so a second crash after an earlier batch had committed recorded a
    # clean version and the orphans stayed searchable for good.
    die_after_the_chunks_of_a_new_file(tmp_path, small_corpus, hash_embedder, monkeypatch)
    for p in (small_corpus / "policies" / "returns.md", small_corpus / "notices" / "ECN-0007.txt"):
        p.write_text(p.read_text() + "\nAn added line about tyre levers.\n")
    restarted = make_index(tmp_path, hash_embedder, batch_documents=1)
    landed = []
    report = restarted.sync(
        [small_corpus], should_stop=lambda: bool(landed), on_commit=landed.append
    )
    assert report.interrupted and len(landed) == 1  # the writer "dies" after one commit
    recovery = restarted.history()[0]
    assert recovery.trigger == "recover:sync" and recovery.chunks["deleted"] >= 1
    assert recovery.changes["orphaned"] == ["share:loans.md"]
    assert "share:loans.md" not in {r["doc_id"] for r in chunk_rows(restarted)}
    rest = make_index(tmp_path, hash_embedder).sync([small_corpus]).as_dict()
    assert rest["documents"]["modified"] == 2  # the recovery stopped the sync before either
    triggers = [c.trigger for c in make_index(tmp_path, hash_embedder).history()]
    assert triggers.count("recover:sync") == 1


def test_a_tombstone_of_a_batch_that_died_is_dropped_when_its_file_came_back(
    tmp_path, small_corpus, hash_embedder, monkeypatch
):
    from pipeline.verify import verify_index

    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    notice = small_corpus / "notices" / "ECN-0007.txt"
    away = tmp_path / "ECN-0007.txt"
    notice.rename(away)  # moved off the share for a moment
    monkeypatch.setattr(Store, "replace_chunks", lambda self, *a, **k: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        ix.sync([small_corpus])  # the removal's tombstone is written, then the writer "dies"
    monkeypatch.undo()
    assert make_index(tmp_path, hash_embedder).store().count("tombstones") == 1
    away.rename(notice)  # back, same inode and mtime: the same fingerprint as indexed
    restarted = make_index(tmp_path, hash_embedder)
    assert restarted.sync([small_corpus]).as_dict()["documents"]["unchanged"] == 3
    # The removal never happened, so nothing may say it did.
    assert restarted.store().count("tombstones") == 0
    assert restarted.history()[0].trigger == "recover:sync"
    assert verify_index(restarted, [FolderSource(name="share", root=small_corpus)]).consistent


def test_any_writer_recovers_first_so_maintenance_cannot_hide_a_crash(
    tmp_path, small_corpus, hash_embedder, monkeypatch
):
    die_after_the_chunks_of_a_new_file(tmp_path, small_corpus, hash_embedder, monkeypatch)
    # The next writer is maintenance, which records the versions it leaves: it must clean up
    # before, or the next sync would take the orphaned chunks for maintenance's own.
    restarted = make_index(tmp_path, hash_embedder)
    restarted.maintain(keep_days=30, yes=True)
    assert restarted.history()[0].trigger == "recover:maintain"
    assert "share:loans.md" not in {r["doc_id"] for r in chunk_rows(restarted)}
    assert restarted.sync([small_corpus]).as_dict()["commit"] is None


def test_a_sync_of_many_commits_compacts_the_tables_a_rescan_reads(tmp_path, hash_embedder):
    from pipeline.store.upkeep import TIDY_MIN_FRAGMENTS

    root = tmp_path / "many"
    n = TIDY_MIN_FRAGMENTS + 4
    for i in range(n):
        write(root / f"note-{i:02d}.md", f"# Note {i}\n\nWorkshop note {i} about spoke {i}.\n")
    ix = make_index(tmp_path, hash_embedder, batch_documents=1)
    report = ix.sync([root])
    assert len(report.commits) == n
    store = ix.store()
    for name in ("documents", "commits"):
        assert len(store.table(name).to_lance().get_fragments()) < TIDY_MIN_FRAGMENTS, name
    # Compaction removed no version: the index as of the first commit is still there.
    first = ix.history()[-1]
    hits = ix.search("workshop note about a spoke", k=n, as_of=first.id)
    assert len({h.doc_id for h in hits}) == 1
    assert len(ix.history()) == n and ix.sync([root]).as_dict()["commit"] is None


def test_should_stop_ends_a_sync_between_batches(tmp_path, hash_embedder):
    root = tmp_path / "many"
    for n in range(7):
        write(root / f"note-{n}.md", f"# Note {n}\n\nWorkshop note number {n} about spokes.\n")
    ix = make_index(tmp_path, hash_embedder, batch_documents=3)
    landed = []
    report = ix.sync([root], should_stop=lambda: len(landed) >= 2, on_commit=landed.append)
    assert report.interrupted and len(report.commits) == 2 == len(landed)
    assert report.as_dict()["documents"]["added"] == 6
    rest = ix.sync([root]).as_dict()
    assert rest["documents"]["added"] == 1 and not rest["interrupted"]


def test_an_unreachable_source_is_reported_in_status_until_it_is_back(
    tmp_path, small_corpus, hash_embedder
):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    shutil.move(small_corpus, tmp_path / "away")
    with pytest.raises(SourceUnreachable):
        ix.sync([small_corpus])
    (source,) = ix.status()["sources"]
    assert "does not exist" in source["error"]["reason"] and source["documents"] == 3
    shutil.move(tmp_path / "away", small_corpus)
    ix.sync([small_corpus])
    assert "error" not in ix.status()["sources"][0]


def test_a_build_read_ahead_on_the_producer_thread_equals_one_read_in_line(
    tmp_path, hash_embedder, monkeypatch
):
    # Several batches in process: each next batch is read, extracted and chunked on the
    # producer thread while the batch before it is embedded and committed. The index must be
    # the one a single batch read on the writer's own thread gives, bad input included.
    share = tmp_path / "share"
    shutil.copytree(Path(__file__).parents[1] / "sample_corpus", share)
    write(share / "zz-late" / "broken.pdf", "%PDF-1.7 cut off here")
    write(share / "zz-late" / "not-word.docx", "plain text under a Word name")
    threads: set[str] = set()
    extract = formats.extract

    def noting_thread(*args, **kwargs):
        threads.add(threading.current_thread().name)
        return extract(*args, **kwargs)

    monkeypatch.setattr(formats, "extract", noting_thread)
    ahead = Index(tmp_path / "ahead", model="hash", embedder=hash_embedder, batch_documents=3)
    ahead_report = ahead.sync([f"share={share}"])
    assert threads and all(t.startswith("upwell-extract") for t in threads)
    threads.clear()
    inline = Index(tmp_path / "inline", model="hash", embedder=hash_embedder, batch_documents=500)
    inline_report = inline.sync([f"share={share}"])
    assert threads == {threading.current_thread().name}

    assert len(ahead_report.commits) > 3 and len(inline_report.commits) == 1
    assert ahead_report.counts.documents == inline_report.counts.documents
    assert ahead_report.counts.chunks["embedded"] == inline_report.counts.chunks["embedded"]

    def chunks(ix: Index) -> dict[str, tuple]:
        rows = ix.store().table("chunks").to_arrow().to_pylist()
        return {r["chunk_id"]: (r["doc_id"], r["text"], tuple(r["vector"])) for r in rows}

    def documents(ix: Index) -> dict[str, tuple]:
        rows = ix.store().all_documents()
        return {r["doc_id"]: (r["status"], r["content_hash"], r["error"]) for r in rows}

    assert chunks(ahead) == chunks(inline) and len(chunks(inline)) > 20
    assert documents(ahead) == documents(inline)
    failed = {d: e for d, (status, _, e) in documents(ahead).items() if status == "failed"}
    assert set(failed) == {"share:zz-late/broken.pdf", "share:zz-late/not-word.docx"}
    assert all(failed.values())
