"""``upwell verify``: each kind of damage is found, named, and (where it can be) repaired.

The damage is made with LanceDB's own table API on a real index; "repaired" means the tables
then equal those of a clean build of the same folder, compared row by row.
"""

from __future__ import annotations

import json
import math
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import lance
import numpy as np
import pyarrow as pa
import pytest

from pipeline.cli import main
from pipeline.index import Index
from pipeline.store.ids import quote
from pipeline.verify import verify_index
from tests.conftest import write


def snapshot(path: Path) -> dict[str, Any]:
    store = Index(path).store()
    store.refresh()
    chunks = (
        store.table("chunks")
        .to_lance()
        .to_table(columns=["chunk_id", "doc_id", "text_hash", "ordinal"])
    )
    return {
        "chunks": sorted(zip(*(chunks[c].to_pylist() for c in chunks.column_names), strict=True)),
        "documents": sorted(
            (d["doc_id"], d["content_hash"], d["status"], d["chunk_count"])
            for d in store.all_documents()
        ),
    }


@pytest.fixture
def built(tmp_path, small_corpus) -> tuple[Path, Path]:
    ix = tmp_path / "ix"
    write(small_corpus / "notices" / "ECN-0008.txt", "ECN-0008\n\nSeat clamp torque is 5 Nm.\n")
    Index(ix, model="hash").sync([str(small_corpus)])
    return ix, small_corpus


def run_verify(capsys, ix: Path, *extra: str) -> tuple[int, dict[str, Any]]:
    code = main(["--index", str(ix), "verify", "--json", *extra])
    return code, json.loads(capsys.readouterr().out)


def checks(report: dict[str, Any]) -> set[tuple[str, str | None]]:
    return {(p["check"], p["doc_id"]) for p in report["problems"]}


def chunk_rows(ix: Path, doc_id: str) -> pa.Table:
    table = Index(ix).store().table("chunks")
    return table.to_lance().to_table(filter=f"doc_id = {quote(doc_id)}")


def test_a_fresh_build_is_consistent(built, capsys):
    ix, _ = built
    code, report = run_verify(capsys, ix)
    assert code == 0 and report["consistent"] and report["problems"] == []
    assert report["counted"]["documents"] == 4
    assert main(["--index", str(ix), "verify"]) == 0
    assert capsys.readouterr().out.strip().endswith("consistent")


def test_duplicate_chunk_ids_are_found_and_repaired(built, capsys, tmp_path):
    ix, share = built
    doc = "share:policies/returns.md"
    rows = chunk_rows(ix, doc)
    Index(ix).store().table("chunks").add(rows.slice(0, 1))  # the key is not enforced on add
    code, report = run_verify(capsys, ix)
    assert code == 5 and ("duplicate_chunk_id", doc) in checks(report)
    assert ("missing_chunks", doc) in checks(report)  # the row count no longer matches
    assert_repair_equals_clean_build(capsys, ix, share, tmp_path)


def test_orphan_chunks_are_found_and_removed(built, capsys, tmp_path):
    ix, share = built
    rows = chunk_rows(ix, "share:notices/ECN-0007.txt")
    ids = pa.array(["f" * 32] * rows.num_rows)
    orphan = rows.set_column(rows.schema.get_field_index("chunk_id"), "chunk_id", ids)
    orphan = orphan.set_column(
        orphan.schema.get_field_index("doc_id"), "doc_id", pa.array(["share:gone.txt"])
    )
    Index(ix).store().table("chunks").add(orphan.slice(0, 1))
    code, report = run_verify(capsys, ix)
    assert code == 5 and ("orphan_chunks", "share:gone.txt") in checks(report)
    assert_repair_equals_clean_build(capsys, ix, share, tmp_path)


def test_the_orphan_sweep_removes_chunks_a_killed_batch_left_behind(built, capsys):
    ix, _ = built
    rows = chunk_rows(ix, "share:notices/ECN-0007.txt").slice(0, 1)
    rows = rows.set_column(
        rows.schema.get_field_index("chunk_id"), "chunk_id", pa.array(["e" * 32])
    )
    rows = rows.set_column(
        rows.schema.get_field_index("doc_id"), "doc_id", pa.array(["share:deleted-later.txt"])
    )
    Index(ix).store().table("chunks").add(rows)  # a version no commit records, as a crash
    # The next writer, whatever it does, removes them first in a commit of its own.
    Index(ix).tag("after-the-crash")
    history = Index(ix).history()
    assert history[0].trigger == "recover:tag"
    assert history[0].changes["orphaned"] == ["share:deleted-later.txt"]
    code, report = run_verify(capsys, ix)
    assert code == 0, report["problems"]


def test_missing_chunks_are_found_and_reindexed(built, capsys, tmp_path):
    ix, share = built
    doc = "share:training/truing.vtt"
    first = chunk_rows(ix, doc)["chunk_id"][0].as_py()
    Index(ix).store().table("chunks").delete(f"chunk_id = {quote(first)}")
    code, report = run_verify(capsys, ix)
    assert code == 5 and checks(report) == {("missing_chunks", doc)}
    assert_repair_equals_clean_build(capsys, ix, share, tmp_path)


def test_a_vector_that_is_not_finite_is_found(built, capsys, tmp_path):
    ix, share = built
    doc = "share:notices/ECN-0008.txt"
    table = Index(ix).store().table("chunks")
    rows = chunk_rows(ix, doc)
    dim = rows.schema.field("vector").type.list_size
    bad = np.full(dim, np.nan, dtype=np.float32)
    # numpy's isfinite is the reference for "not finite" (IEEE 754 NaN)
    assert not np.isfinite(bad).all() and math.isnan(float(bad[0]))
    vectors = pa.FixedSizeListArray.from_arrays(pa.array(np.tile(bad, rows.num_rows)), dim)
    rows = rows.set_column(rows.schema.get_field_index("vector"), "vector", vectors)
    # LanceDB refuses NaN vectors on write; the lance dataset API below it does not, which is
    # how a damaged vector could get in.
    table.delete(f"doc_id = {quote(doc)}")
    lance.write_dataset(rows, table.to_lance().uri, mode="append")
    code, report = run_verify(capsys, ix)
    assert code == 5 and ("bad_vector", doc) in checks(report)
    assert_repair_equals_clean_build(capsys, ix, share, tmp_path)


def test_a_removal_without_its_tombstone_is_a_log_gap(built, capsys):
    ix, share = built
    (share / "notices" / "ECN-0008.txt").unlink()
    Index(ix).sync([str(share)])
    code, _ = run_verify(capsys, ix)
    assert code == 0
    Index(ix).store().table("tombstones").delete("doc_id = 'share:notices/ECN-0008.txt'")
    code, report = run_verify(capsys, ix)
    assert code == 5 and checks(report) == {("log_gap", "share:notices/ECN-0008.txt")}
    # not something a re-sync can invent: repair leaves it reported
    assert main(["--index", str(ix), "verify", "--repair"]) == 5
    capsys.readouterr()


def test_drift_against_the_source_is_reported_and_repaired(built, capsys, tmp_path):
    ix, share = built
    write(share / "policies" / "returns.md", "# Returns policy\n\nReturns within 60 days now.\n")
    write(share / "policies" / "new.md", "# New\n\nA brand new policy about test rides.\n")
    (share / "notices" / "ECN-0008.txt").unlink()
    code, report = run_verify(capsys, ix)
    assert code == 5
    assert checks(report) == {
        ("drift", "share:policies/returns.md"),
        ("drift", "share:policies/new.md"),
        ("drift", "share:notices/ECN-0008.txt"),
    }
    code, _ = run_verify(capsys, ix, "--no-drift")
    assert code == 0
    assert_repair_equals_clean_build(capsys, ix, share, tmp_path)
    store = Index(ix).store()
    assert "share:notices/ECN-0008.txt" in set(
        store.table("tombstones").to_lance().to_table()["doc_id"].to_pylist()
    )


def test_an_unreachable_source_is_reported_not_treated_as_empty(built, capsys):
    ix, share = built
    shutil.move(share, share.with_name("unmounted"))
    report = verify_index(Index(ix))
    assert not report.consistent
    assert [p.check for p in report.problems] == ["drift"]
    assert "does not exist" in report.problems[0].detail


def test_repair_needs_the_writer_lock(built, capsys):
    ix, _ = built
    # Another process holds the lock, as a running service would.
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            textwrap.dedent(f"""
            import sys, time
            from pipeline.locking import writer_lock
            with writer_lock({str(ix)!r}):
                print("held", flush=True)
                sys.stdin.readline()
        """),
        ],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
        cwd=Path(__file__).resolve().parents[1],
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        assert main(["--index", str(ix), "verify", "--repair"]) == 4
        assert f"process {holder.pid}" in capsys.readouterr().err
    finally:
        holder.stdin.close()
        holder.wait(timeout=30)


def assert_repair_equals_clean_build(capsys, ix: Path, share: Path, tmp_path: Path) -> None:
    code, report = run_verify(capsys, ix, "--repair", "--yes")
    assert code == 0, report["problems"]
    clean = tmp_path / "clean"
    shutil.rmtree(clean, ignore_errors=True)
    Index(clean, model="hash").sync([str(share)])
    assert snapshot(ix) == snapshot(clean)


def test_repair_without_yes_repairs_what_removes_nothing_and_asks_before_a_mass_removal(
    built, capsys
):
    ix, share = built
    # Drift that adds and changes only: no confirmation is needed, --yes or not.
    write(share / "policies" / "new.md", "# New\n\nA brand new policy about test rides.\n")
    code, _ = run_verify(capsys, ix, "--repair")
    assert code == 0
    assert run_verify(capsys, ix)[0] == 0
    # Drift that would remove most of the source (an emptied share): without --yes, repair
    # refuses with exit code 2 (no terminal to ask on) and removes nothing.
    before = Index(ix).status()["totals"]["documents"]
    for path in list(share.rglob("*")):
        if path.is_file() and path.name != "new.md":
            path.unlink()
    assert main(["--index", str(ix), "verify", "--repair"]) == 2
    assert "--yes" in capsys.readouterr().err
    assert Index(ix).status()["totals"]["documents"] == before
