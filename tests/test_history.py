"""Version history: refs, diff, tags, rollback, search as of, rebuild, erasure and retention.

Real LanceDB throughout; the real model where search results are compared.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pyarrow as pa
import pytest
from lance.file import LanceFileReader

from pipeline import history
from pipeline.cli import main
from pipeline.errors import ConfirmationRequired, SyncPaused, UnknownVersion, UsageError
from pipeline.index import Index
from pipeline.store.tables import Store
from tests.conftest import write
from tests.test_sync import make_index

SECRET = "The loan-bike gate code is sevenfold-harbour-42."


class InjectedCrash(Exception):
    """Stands for the process dying at that point: nothing in upwell catches it."""


def three_commits(ix: Index, root: Path) -> list[dict]:
    """Sync, edit + add, then delete: three commits with known counts."""
    reports = [ix.sync([root]).as_dict()]
    write(
        root / "policies" / "returns.md", "# Returns policy\n\nReturns are accepted for 60 days.\n"
    )
    write(root / "policies" / "loans.md", f"# Loan bikes\n\n{SECRET}\n")
    reports.append(ix.sync([root]).as_dict())
    (root / "notices" / "ECN-0007.txt").unlink()
    reports.append(ix.sync([root]).as_dict())
    return reports


def test_history_lists_commits_newest_first_with_their_counts(
    tmp_path, small_corpus, hash_embedder
):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    log = ix.history()
    assert [c.id for c in log] == [r["commit"] for r in reversed(reports)]
    assert [c.version for c in log] == [r["version"] for r in reversed(reports)]
    assert log[0].documents["removed"] == 1 and log[2].documents["added"] == 3
    assert ix.history(limit=1)[0].id == reports[-1]["commit"]


def test_diff_counts_equal_what_the_syncs_reported(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    (small_corpus / "policies" / "loans.md").rename(small_corpus / "policies" / "loan-bikes.md")
    reports.append(ix.sync([small_corpus]).as_dict())
    for report in reports:
        d = ix.diff(report["commit"]).as_dict()["counts"]
        for k in ("added", "modified", "removed", "moved"):
            assert d["documents"][k] == report["documents"][k], (k, report)
        assert d["chunks"]["added"] == report["chunks"]["added"]
        assert d["chunks"]["removed"] == report["chunks"]["deleted"]
    moved = ix.diff(reports[-1]["commit"]).moved
    assert moved == (("share:policies/loans.md", "share:policies/loan-bikes.md"),)
    # Two refs: from the first commit to the last.
    span = ix.diff(reports[0]["commit"], reports[-1]["commit"])
    assert span.added == ("share:policies/loan-bikes.md",)
    assert span.removed == ("share:notices/ECN-0007.txt",)
    assert span.modified == ("share:policies/returns.md",)


def test_refs_resolve_by_prefix_version_tag_and_time(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    first, second, third = (ix.resolve(r["commit"]) for r in reports)
    assert ix.resolve(second.id[:14]) == second
    assert ix.resolve(str(second.version)) == second
    assert ix.resolve(f"v{third.version}") == third
    # A version between commits names the last commit at or before it: versions only grow,
    # so one below the second commit's is at or after the first's, and names the first.
    assert first.version <= second.version - 1
    assert ix.resolve(str(second.version - 1)) == first
    assert ix.resolve(second.time) == second
    assert ix.resolve(second.time.replace("Z", "+00:00")) == second
    ix.tag("before-delete", second.id)
    assert ix.resolve("before-delete") == second
    with pytest.raises(UnknownVersion, match="latest commits: .*tags: before-delete"):
        ix.resolve("no-such-thing")
    with pytest.raises(UnknownVersion, match="no commit at or before"):
        ix.resolve("2001-01-01T00:00:00Z")
    with pytest.raises(UsageError, match="already names"):
        ix.tag("before-delete")
    with pytest.raises(UsageError, match="not allowed"):
        ix.tag("upwell-internal")
    assert ix.untag("before-delete") == second.id
    assert ix.tags() == {}


def test_rollback_after_a_deletion_brings_the_document_back(tmp_path, small_corpus, real_embedder):
    ix = make_index(tmp_path, real_embedder)
    reports = three_commits(ix, small_corpus)
    assert not any(h.path.endswith("ECN-0007.txt") for h in ix.search("brake hose routing", k=10))

    with pytest.raises(ConfirmationRequired, match="1 documents come back"):
        ix.rollback(reports[1]["commit"])
    commit = ix.rollback(reports[1]["commit"], yes=True)
    assert commit.trigger == f"rollback to {reports[1]['commit']}"
    assert commit.documents["added"] == 1
    assert ix.search("brake hose routing", k=1)[0].path == "notices/ECN-0007.txt"
    assert ix.history()[0].id == commit.id
    # The history is kept, so the rollback itself can be rolled back.
    ix.rollback(reports[2]["commit"], yes=True)
    assert not any(h.path.endswith("ECN-0007.txt") for h in ix.search("brake hose routing", k=10))
    reasons = [t["reason"] for t in ix.store().table("tombstones").to_arrow().to_pylist()]
    assert reasons.count("rolled back") == 1


def test_search_as_of_an_earlier_commit_finds_a_deleted_document(
    tmp_path, small_corpus, real_embedder
):
    ix = make_index(tmp_path, real_embedder)
    reports = three_commits(ix, small_corpus)
    then = ix.search("brake hose routing", k=1, as_of=reports[1]["commit"])
    assert then[0].path == "notices/ECN-0007.txt"
    now = ix.search("brake hose routing", k=10)
    assert all(h.path != "notices/ECN-0007.txt" for h in now)
    first = ix.search("how long are returns accepted", k=3, as_of=reports[0]["commit"])
    assert any("30 days" in h.text for h in first)
    assert not any("60 days" in h.text for h in first)


def test_paused_rollback_stops_syncs_until_resume(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    ix.rollback(reports[1]["commit"], pause=True, yes=True)
    with pytest.raises(SyncPaused, match="upwell resume"):
        ix.sync([small_corpus])
    assert ix.status()["paused"]["rollback_to"] == reports[1]["commit"]
    assert ix.resume() is not None
    assert ix.status()["paused"] is None
    # Without the pause, the next sync re-applies what differs at the source: the delete.
    again = ix.sync([small_corpus]).as_dict()
    assert again["documents"]["removed"] == 1


def test_an_interrupted_rollback_is_completed_by_the_next_writer(
    tmp_path, small_corpus, hash_embedder, monkeypatch
):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    target = ix.resolve(reports[1]["commit"])
    real_restore = type(ix.store().table("documents")).restore
    calls = []

    def restore_then_crash(self, version=None):
        calls.append(self.name)
        if self.name == "documents":
            raise InjectedCrash("injected crash between the table restores")
        return real_restore(self, version)

    monkeypatch.setattr(type(ix.store().table("documents")), "restore", restore_then_crash)
    with pytest.raises(InjectedCrash):
        ix.rollback(target.id, yes=True)
    monkeypatch.undo()
    assert calls == ["chunks", "documents"]
    # Half done: chunks restored, documents not, no commit row yet.
    assert ix.store().settings()["pending_rollback"]["target"] == target.id

    fresh = make_index(tmp_path, hash_embedder)  # as a new process would open it
    fresh.tag("after-recovery")  # any writer completes the pending rollback first
    store = fresh.store()
    assert store.settings()["pending_rollback"] is None
    latest = fresh.history()[0]
    assert latest.trigger == f"rollback to {target.id}"
    now_docs = history.documents_at(store, store.versions()["documents"])
    then_docs = history.documents_at(store, target.documents_version)
    assert {d: r["content_hash"] for d, r in now_docs.items()} == {
        d: r["content_hash"] for d, r in then_docs.items()
    }
    assert sorted(history.chunk_ids_at(store, store.versions()["chunks"])) == sorted(
        history.chunk_ids_at(store, target.version)
    )


def _search_results(ix: Index, queries: list[str]) -> list[list[tuple[str, str]]]:
    return [[(h.doc_id, h.text) for h in ix.search(q, k=5)] for q in queries]


def test_rebuild_with_the_same_settings_embeds_nothing_and_searches_the_same(
    tmp_path, small_corpus, real_embedder
):
    ix = make_index(tmp_path, real_embedder)
    three_commits(ix, small_corpus)
    report = ix.rebuild(tmp_path / "rebuilt").as_dict()
    assert report["chunks"]["embedded"] == 0
    assert report["documents"]["added"] == 3
    rebuilt = Index(tmp_path / "rebuilt")
    rebuilt._embedder = real_embedder
    queries = ["returns accepted", "spoke tension", "loan bike gate code"]
    assert _search_results(rebuilt, queries) == _search_results(ix, queries)
    # The rebuilt index syncs on from where the old one was: nothing to read again.
    assert rebuilt.sync([small_corpus]).as_dict()["commit"] is None


def test_rebuild_with_other_chunking_reads_no_source(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    shutil.rmtree(small_corpus)  # no source: the stored text is enough
    report = ix.rebuild(
        tmp_path / "small", as_of=reports[1]["commit"], chunking={"max_tokens": 24, "min_tokens": 8}
    ).as_dict()
    assert report["documents"]["added"] == 4  # as of the second commit, the notice was there
    small = Index(tmp_path / "small")
    assert small.store().settings()["chunking"]["max_tokens"] == 24
    assert small.status()["totals"]["chunks"] > ix.status()["totals"]["chunks"]
    with pytest.raises(UsageError, match="already holds an index"):
        ix.rebuild(tmp_path / "small")


def _every_string_in_the_folder(folder: Path) -> str:
    """Every string value of every Lance data file, read with lance's own file reader, plus
    the raw bytes of every other file (manifests, transactions, indexes) decoded loosely."""
    parts = []
    for path in folder.rglob("*"):
        if not path.is_file():
            continue
        if path.suffix == ".lance" and "/data/" in str(path):
            table = LanceFileReader(str(path)).read_all().to_table()
            for column in table.columns:
                if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
                    parts.extend(v for v in column.to_pylist() if v)
        parts.append(path.read_bytes().decode("utf-8", "ignore"))
    return "\n".join(parts)


def test_erase_leaves_no_trace_in_any_file_of_the_index(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    three_commits(ix, small_corpus)
    ix.tag("kept-for-audit")
    assert SECRET in _every_string_in_the_folder(ix.path)
    (small_corpus / "policies" / "loans.md").unlink()  # gone at the source too

    with pytest.raises(ConfirmationRequired, match="earlier rollback points are lost"):
        ix.erase(["share/policies/loans.md"])
    result = ix.erase(["share/policies/loans.md"], yes=True)
    assert result["erased"] == ["share:policies/loans.md"]
    assert result["tags_dropped"] == ["kept-for-audit"]

    everything = _every_string_in_the_folder(ix.path)
    assert SECRET not in everything
    assert "sevenfold-harbour" not in everything
    assert "policies/loans.md" not in everything
    tombstones = ix.store().table("tombstones").to_arrow().to_pylist()
    erased = [t for t in tombstones if t["reason"] == "erased"]
    assert len(erased) == 1 and erased[0]["path"] is None and erased[0]["content_hash"] is None
    # The rest of the index is intact and searchable, and history says an erasure happened.
    assert ix.history()[0].trigger == "erase"
    assert ix.search("returns accepted", k=1)[0].path == "policies/returns.md"
    # The erase commit names versions that still exist (its row is written after the cleanup).
    erase_commit = ix.tag("after-erase")
    assert ix.search("returns accepted", k=1, as_of=erase_commit.id)
    assert ix.sync([small_corpus]).as_dict()["commit"] is None


@pytest.mark.parametrize("dies_in", ["add_tombstones", "scrub", "compaction"])
def test_an_erase_killed_midway_is_finished_by_the_next_writer(
    tmp_path, small_corpus, hash_embedder, monkeypatch, dies_in, capsys
):
    from pipeline.history import erase as maintenance

    ix = make_index(tmp_path, hash_embedder)
    three_commits(ix, small_corpus)
    ix.tag("kept-for-audit")
    (small_corpus / "policies" / "loans.md").unlink()

    def die(*args, **kwargs):
        raise RuntimeError(f"killed in {dies_in}")

    if dies_in == "add_tombstones":
        original = Store.add_tombstones

        def after_tombstones(self, rows):
            original(self, rows)
            die()

        monkeypatch.setattr(Store, "add_tombstones", after_tombstones)
    elif dies_in == "scrub":
        monkeypatch.setattr(maintenance, "_scrub_logs", die)
    else:
        monkeypatch.setattr(maintenance, "compact_and_clean", die)
    with pytest.raises(RuntimeError, match="killed"):
        ix.erase(["share/policies/loans.md"], yes=True)
    monkeypatch.undo()
    # Status says so, with a count and not the names.
    pending = make_index(tmp_path, hash_embedder).status()["pending_erase"]
    assert pending["documents"] == 1 and "loans" not in json.dumps(pending)
    capsys.readouterr()
    assert main(["--index", str(ix.path), "status"]) == 0
    assert "pending:   an erase of 1 documents was interrupted" in capsys.readouterr().out

    # Any writer finishes it first: here a tag, in a new process.
    again = make_index(tmp_path, hash_embedder)
    again.tag("after-erase")
    everything = _every_string_in_the_folder(again.path)
    assert SECRET not in everything and "policies/loans.md" not in everything
    tombstones = again.store().table("tombstones").to_arrow().to_pylist()
    assert [t["reason"] for t in tombstones if t["reason"] == "erased"] == ["erased"]
    assert [c.trigger for c in again.history()].count("erase") == 1
    assert "pending_erase" not in {k for k, v in again.store().settings().items() if v}
    assert again.status()["pending_erase"] is None
    assert again.sync([small_corpus]).as_dict()["commit"] is None


def test_maintain_keeps_tags_and_removes_only_untagged_old_versions(
    tmp_path, small_corpus, hash_embedder
):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    ix.tag("first", reports[0]["commit"])
    plan = ix.plan_retention(keep_days=0)
    assert [c.id for c in plan.commits_lost] == [reports[1]["commit"]]
    with pytest.raises(ConfirmationRequired, match="no longer be able to search as of them"):
        ix.maintain(keep_days=0)
    # Nothing older than 30 days: nothing to confirm, compaction only.
    result = ix.maintain()
    assert result["commits_past_retention"] == 0
    assert ix.search("returns", k=1, as_of=reports[1]["commit"])

    ix.maintain(keep_days=0, yes=True)
    # The tagged commit and the latest stay searchable; the untagged old one is gone.
    assert ix.search("returns", k=5, as_of="first")
    assert ix.search("returns", k=5)
    with pytest.raises(UnknownVersion, match="no longer stored"):
        ix.search("returns", k=5, as_of=reports[1]["commit"])
    assert [c.id for c in ix.history()] == [r["commit"] for r in reversed(reports)]
    assert "first" in ix.tags()


def test_rollback_from_the_command_line_asks_then_acts(tmp_path, small_corpus, capsys):
    ix = str(tmp_path / "ix")
    main(["--index", ix, "--model", "hash", "sync", str(small_corpus)])
    (small_corpus / "notices" / "ECN-0007.txt").unlink()
    main(["--index", ix, "sync", str(small_corpus)])
    capsys.readouterr()
    first = Index(ix).history()[-1].id
    assert main(["--index", ix, "rollback", first[:10], "--dry-run"]) == 0
    assert "1 documents come back" in capsys.readouterr().out
    code = main(["--index", ix, "rollback", first[:10]])  # no terminal, no --yes
    assert code == 2
    assert "Nothing was changed" in capsys.readouterr().err
    assert main(["--index", ix, "rollback", first[:10], "--yes", "--pause", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["paused"] is True and out["commit"]["trigger"].startswith("rollback to")
    assert main(["--index", ix, "sync", str(small_corpus)]) == 6
    assert "paused" in capsys.readouterr().err
    assert main(["--index", ix, "history", "--json"]) == 0
    commits = json.loads(capsys.readouterr().out)["commits"]
    assert set(commits[0]) >= {"id", "version", "time", "trigger", "documents", "chunks"}
    assert main(["--index", ix, "resume"]) == 0
    assert capsys.readouterr().out == "syncing resumed\n"
    assert main(["--index", ix, "diff", commits[0]["id"], "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["documents"]["added"] == ["share:notices/ECN-0007.txt"]


def test_store_folder_opens_after_history_operations(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    three_commits(ix, small_corpus)
    ix.maintain(yes=True)
    assert Store.open(ix.path).count("chunks") == ix.status()["totals"]["chunks"]


def test_erase_takes_the_path_on_disk_absolute_or_relative(
    tmp_path, small_corpus, hash_embedder, monkeypatch, capsys
):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    target = small_corpus / "policies" / "returns.md"
    # Absolute, as a person copies it from a file manager.
    result = ix.erase([str(target)], yes=True)
    assert result["erased"] == ["share:policies/returns.md"]
    # Relative to the current folder, with a glob, from the command line.
    monkeypatch.chdir(small_corpus)
    assert main(["--index", str(ix.path), "erase", "./notices/*.txt", "--yes"]) == 0
    out = capsys.readouterr().out
    assert "share:notices/ECN-0007.txt" in out
    # A place on disk outside every source matches nothing, and says so.
    with pytest.raises(UsageError, match="no document matches"):
        ix.erase([str(tmp_path / "elsewhere" / "returns.md")], yes=True)


def test_erase_from_the_cli_with_a_glob_and_with_no_match(
    tmp_path, small_corpus, hash_embedder, capsys
):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    index = str(ix.path)
    # No match: exit 2 (usage), one line that names the pattern, nothing changed.
    version = ix.status()["version"]
    assert main(["--index", index, "erase", "share/handbook/*", "--yes"]) == 2
    err = capsys.readouterr().err
    assert "no document matches share/handbook/*" in err
    assert ix.status()["version"] == version
    # A glob across folders: the documents in share/'s folders whose names end in "s".
    assert main(["--index", index, "erase", "share/*s/*.*", "--yes", "--json"]) == 0
    erased = json.loads(capsys.readouterr().out)["erased"]
    assert sorted(erased) == ["share:notices/ECN-0007.txt", "share:policies/returns.md"]
    ix.store().refresh()  # the command line erased through an Index of its own
    left = {d["path"] for d in ix.store().documents_of_source("share").values()}
    assert left == {"training/truing.vtt"}  # "training" does not end in "s"


def test_diff_and_search_take_documents_as_erase_does(
    tmp_path, small_corpus, hash_embedder, monkeypatch, capsys
):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    first, second = reports[0]["commit"], reports[1]["commit"]
    # The second commit modified returns.md and added loans.md.
    whole = ix.diff(second)
    assert (whole.modified, whole.added) == (
        ("share:policies/returns.md",),
        ("share:policies/loans.md",),
    )
    # By its path on disk, absolute: only that document, and only its chunks.
    only = ix.diff(second, paths=[str(small_corpus / "policies" / "returns.md")])
    assert (only.modified, only.added, only.removed) == (("share:policies/returns.md",), (), ())
    assert 0 < only.chunks_added < whole.chunks_added
    # Relative to the current folder, from the command line, across two commits.
    monkeypatch.chdir(small_corpus / "notices")
    index = str(ix.path)
    assert (
        main(
            [
                "--index",
                index,
                "diff",
                first,
                reports[2]["commit"],
                "--path",
                "./ECN-0007.txt",
                "--json",
            ]
        )
        == 0
    )
    d = json.loads(capsys.readouterr().out)
    assert d["documents"] == {
        "added": [],
        "modified": [],
        "removed": ["share:notices/ECN-0007.txt"],
        "moved": [],
    }
    # A name that matches nothing at either end says so.
    assert main(["--index", index, "diff", second, "--path", "share/handbook/*"]) == 2
    assert "no document matches share/handbook/*" in capsys.readouterr().err
    # search --path takes the same path on disk.
    monkeypatch.chdir(small_corpus)
    assert (
        main(
            [
                "--index",
                index,
                "search",
                "returns",
                "--mode",
                "keyword",
                "--path",
                "policies/returns.md",
                "--json",
            ]
        )
        == 0
    )
    paths = {h["path"] for h in json.loads(capsys.readouterr().out)["results"]}
    assert paths == {"policies/returns.md"}
    assert (
        main(
            [
                "--index",
                index,
                "search",
                "returns",
                "--mode",
                "keyword",
                "--path",
                str(tmp_path / "elsewhere.md"),
                "--json",
            ]
        )
        == 0
    )
    assert json.loads(capsys.readouterr().out)["results"] == []


def test_rollback_to_a_commit_whose_versions_maintain_removed_is_a_clear_error(
    tmp_path, small_corpus, hash_embedder
):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)
    ix.maintain(keep_days=0, yes=True)
    before = ix.status()
    with pytest.raises(UnknownVersion) as caught:
        ix.rollback(reports[0]["commit"], yes=True)
    message = str(caught.value)
    assert "no longer stored" in message and "upwell history" in message
    assert ".manifest" not in message and ".rs:" not in message  # no storage internals
    assert ix.status()["version"] == before["version"]  # nothing was changed
    with pytest.raises(UnknownVersion, match="no longer stored"):
        ix.search("returns", k=1, as_of=reports[0]["commit"])


def test_rollback_restores_a_modified_documents_earlier_text(tmp_path, small_corpus, hash_embedder):
    ix = make_index(tmp_path, hash_embedder)
    reports = three_commits(ix, small_corpus)  # the second commit changed returns.md to 60 days
    assert "60 days" in _text_of(ix, "share:policies/returns.md")
    ix.rollback(reports[0]["commit"], yes=True)
    text = _text_of(ix, "share:policies/returns.md")
    assert "60 days" not in text and "30 days" in text
    hits = ix.search("Returns are accepted for 60 days", k=5, mode="keyword")
    assert all("60 days" not in h.text for h in hits)


def _text_of(ix: Index, doc_id: str) -> str:
    rows = (
        ix.store()
        .table("chunks")
        .to_lance()
        .to_table(columns=["text"], filter=f"doc_id = '{doc_id}'")
    )
    return " ".join(rows["text"].to_pylist())


def test_rebuild_with_a_new_model_reembeds_everything_from_the_stored_text(
    tmp_path, small_corpus, hash_embedder, capsys
):
    ix = make_index(tmp_path, hash_embedder)
    ix.sync([small_corpus])
    shutil.rmtree(small_corpus)  # the stored text is enough
    into = tmp_path / "rebuilt"
    code = main(["--index", str(ix.path), "rebuild", "--into", str(into), "--new-model", "default"])
    assert code == 0, capsys.readouterr().err
    new = Index(into)
    assert new.store().settings()["model_id"] != ix.store().settings()["model_id"]
    assert new.status()["totals"]["chunks"] == ix.status()["totals"]["chunks"]
    # Every chunk was embedded by the new model: none of the hash model's vectors was reused.
    report = new.history()[0]
    assert report.chunks["embedded"] == new.status()["totals"]["chunks"]
    assert report.chunks["reused"] == 0
    assert new.search("how long do I have to return a bike", k=1)[0].path == "policies/returns.md"
