"""Extraction and embedding on a Dask cluster: LocalClusters and `dask scheduler` / `dask
worker` processes on 127.0.0.1, started by the tests, nothing else on the network.

The reference for "the same index" is an in-process build of the same corpus: chunk ids,
chunk text and documents must be equal, vectors within cosine 0.99999 (scipy's cosine
distance); the hash embedder's vectors must be equal exactly.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import lancedb
import pytest
from scipy.spatial.distance import cosine

from bench.corpora import write_corpus
from pipeline.engine.cluster import ClusterError
from pipeline.errors import UsageError
from pipeline.index import Index
from pipeline.records import ClusterSettings
from tests.conftest import REPO, write
from tests.support.service import PY, make_config, wait_for

pytestmark = pytest.mark.slow
DASK = str(Path(sys.executable).parent / "dask")
# The workers must import this checkout of upwell, whatever the environment has installed.
WORKER_ENV = {**os.environ, "PYTHONPATH": str(REPO)}


def chunks_of(index_path: Path) -> dict[str, dict[str, Any]]:
    rows = lancedb.connect(str(index_path)).open_table("chunks").to_arrow().to_pylist()
    return {r["chunk_id"]: r for r in rows}


def documents_of(index_path: Path) -> dict[str, tuple[Any, ...]]:
    rows = lancedb.connect(str(index_path)).open_table("documents").to_arrow().to_pylist()
    keep = ("content_hash", "status", "error", "segments", "chunk_count")
    return {r["doc_id"]: tuple(r[k] for k in keep) for r in rows}


def assert_same_index(a: Path, b: Path, *, exact: bool) -> None:
    ca, cb = chunks_of(a), chunks_of(b)
    assert ca.keys() == cb.keys() and ca
    for cid, row in ca.items():
        other = cb[cid]
        assert (row["text"], row["doc_id"], row["ordinal"]) == (
            other["text"],
            other["doc_id"],
            other["ordinal"],
        )
        if exact:
            assert row["vector"] == other["vector"], cid
        else:
            # scipy's cosine distance is 1 - cosine similarity
            assert 1.0 - cosine(row["vector"], other["vector"]) >= 0.99999, cid
    assert documents_of(a) == documents_of(b)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Processes:
    """`dask scheduler` and `dask worker` subprocesses; all killed at the end."""

    def __init__(self, tmp: Path) -> None:
        self.tmp = tmp
        self.procs: list[subprocess.Popen[bytes]] = []

    def start(self, *argv: str, env: dict[str, str] | None = None) -> subprocess.Popen[bytes]:
        log = open(self.tmp / f"dask-{len(self.procs)}.log", "wb")  # noqa: SIM115
        proc = subprocess.Popen(
            [DASK, *argv], stdout=log, stderr=log, env=env or WORKER_ENV, cwd=self.tmp
        )
        self.procs.append(proc)
        return proc

    def scheduler(self) -> tuple[str, subprocess.Popen[bytes]]:
        port = free_port()
        proc = self.start("scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard")
        address = f"tcp://127.0.0.1:{port}"
        wait_for("the scheduler to listen", lambda: _listening(port), 60)
        return address, proc

    def worker(self, address: str, env: dict[str, str] | None = None) -> subprocess.Popen[bytes]:
        return self.start(
            "worker",
            address,
            "--nworkers",
            "1",
            "--nthreads",
            "1",
            "--no-dashboard",
            "--host",
            "127.0.0.1",
            env=env,
        )

    def stop(self) -> None:
        for proc in self.procs:
            if proc.poll() is None:
                proc.kill()
                proc.wait(timeout=20)


def _listening(port: int) -> bool:
    with socket.socket() as s:
        return s.connect_ex(("127.0.0.1", port)) == 0


@pytest.fixture
def dask_processes(tmp_path: Path) -> Iterator[Processes]:
    procs = Processes(tmp_path)
    yield procs
    procs.stop()


@pytest.fixture
def local_cluster() -> Iterator[Any]:
    from distributed import LocalCluster

    cluster = LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address=None,
        env={"PYTHONPATH": str(REPO)},
    )
    yield cluster
    cluster.close()


def upwell(*argv: str, timeout: float = 600) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [PY, "-m", "pipeline.cli", *argv],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=timeout,
        env=WORKER_ENV,
    )


# --- the same index ------------------------------------------------------------------------------


def test_sync_workers_2_on_the_sample_corpus_equals_an_in_process_build(tmp_path):
    inproc = upwell("--index", str(tmp_path / "a"), "sync", "sample_corpus", "--json")
    assert inproc.returncode == 0, inproc.stderr
    cluster = upwell(
        "--index", str(tmp_path / "b"), "sync", "sample_corpus", "--workers", "2", "--json"
    )
    assert cluster.returncode == 0, cluster.stderr
    # the bundled model on both sides: vectors agree to cosine 0.99999
    assert_same_index(tmp_path / "a", tmp_path / "b", exact=False)
    # a second sync on the cluster finds nothing to do, like one in process
    again = upwell("--index", str(tmp_path / "b"), "sync", "sample_corpus", "--workers", "2")
    assert again.returncode == 0 and "nothing changed" in again.stdout


def test_a_worker_killed_mid_build_leaves_the_same_index(tmp_path, local_cluster):
    share = write_corpus(tmp_path / "share", 60)
    Index(tmp_path / "a", model="hash", batch_documents=10).sync([f"bench={share}"])
    index = Index(tmp_path / "b", model="hash", batch_documents=10)
    index.set_cluster(ClusterSettings(address=local_cluster.scheduler_address))
    killed: list[int] = []

    def kill_one_worker(commit: Any) -> None:
        if killed:
            return
        from distributed import Client

        with Client(local_cluster.scheduler_address) as client:
            pids = client.run(os.getpid)
        pid = sorted(pids.values())[0]
        os.kill(pid, signal.SIGKILL)  # the nanny starts a new worker; Dask reruns its tasks
        killed.append(pid)

    try:
        report = index.sync([f"bench={share}"], on_commit=kill_one_worker)
    finally:
        index.close_cluster()
    assert killed and len(report.commits) == 6
    assert report.counts.documents["added"] == 60
    assert_same_index(tmp_path / "a", tmp_path / "b", exact=True)


def test_a_bad_document_fails_on_a_worker_exactly_as_in_process(tmp_path, local_cluster):
    share = tmp_path / "share"
    write(share / "notes" / "ECN-0170.md", "# ECN-0170\n\nBrake pads: the new compound.\n")
    (share / "manuals").mkdir()
    (share / "manuals" / "broken.pdf").write_bytes(b"%PDF-1.7\n1 0 obj\ntruncated")
    (share / "manuals" / "broken.docx").write_bytes(b"PK\x03\x04 not really")
    a = Index(tmp_path / "a", model="hash")
    a.sync([f"s={share}"])
    b = Index(tmp_path / "b", model="hash")
    b.set_cluster(ClusterSettings(address=local_cluster.scheduler_address))
    try:
        report = b.sync([f"s={share}"])
    finally:
        b.close_cluster()
    assert report.counts.documents["failed"] == 2 and report.counts.documents["added"] == 1

    def reasons(index: Index) -> list[tuple[str, str, bool]]:
        return [
            (f["doc_id"], f["reason"], f["last_good_searchable"])
            for f in index.status()["failures"]
        ]

    assert reasons(b) == reasons(a) and len(reasons(a)) == 2
    assert_same_index(tmp_path / "a", tmp_path / "b", exact=True)


# --- faults --------------------------------------------------------------------------------------


def test_an_unreachable_scheduler_stops_the_sync_before_anything_is_read(tmp_path):
    port = free_port()  # nothing listens there
    done = upwell(
        "--index",
        str(tmp_path / "ix"),
        "sync",
        "sample_corpus",
        "--cluster",
        f"tcp://127.0.0.1:{port}",
        timeout=120,
    )
    assert done.returncode == 1
    assert f"cannot reach the Dask scheduler at tcp://127.0.0.1:{port}" in done.stderr
    assert not Index(tmp_path / "ix").exists  # no index was created either


def test_a_lost_scheduler_stops_the_sync_and_the_next_redoes_only_the_rest(
    tmp_path, dask_processes
):
    share = write_corpus(tmp_path / "share", 60)
    address, scheduler = dask_processes.scheduler()
    dask_processes.worker(address)
    index = Index(tmp_path / "ix", model="hash", batch_documents=10)
    index.set_cluster(ClusterSettings(address=address))

    def lose_the_scheduler(commit: Any) -> None:
        if scheduler.poll() is None:
            scheduler.kill()
            scheduler.wait(timeout=20)

    committed: list[Any] = []
    with pytest.raises(ClusterError, match="lost the Dask scheduler"):
        index.sync(
            [f"bench={share}"],
            on_commit=lambda c: (committed.append(c), lose_the_scheduler(c)),
        )
    index.close_cluster()
    index.set_cluster(None)
    assert committed  # the batches committed before the loss stay
    kept = index.status()["totals"]["documents"]
    assert 0 < kept < 60 and kept == sum(c.counts.documents["added"] for c in committed)
    report = index.sync([f"bench={share}"])  # in process now
    assert report.counts.documents["added"] == 60 - kept
    assert report.counts.documents["unchanged"] == kept
    assert index.status()["totals"]["documents"] == 60


def test_a_worker_running_other_code_is_refused_naming_both(tmp_path, dask_processes):
    other = tmp_path / "other-upwell"
    for package in ("pipeline", "connectors"):
        shutil.copytree(
            REPO / package, other / package, ignore=shutil.ignore_patterns("__pycache__")
        )
    changed = other / "pipeline" / "chunking.py"
    changed.write_text(changed.read_text() + "\n# a different build\n")
    address, _ = dask_processes.scheduler()
    dask_processes.worker(address, env={**os.environ, "PYTHONPATH": str(other)})
    index = Index(tmp_path / "ix", model="hash")
    index.set_cluster(ClusterSettings(address=address))
    try:
        with pytest.raises(UsageError) as caught:
            index.sync([f"s={REPO / 'sample_corpus'}"])
    finally:
        index.close_cluster()
    message = str(caught.value)
    assert "runs code" in message and message.count("(code ") == 2
    assert not Index(tmp_path / "ix").exists


# --- the service ---------------------------------------------------------------------------------


def test_watch_sends_a_big_batch_to_the_cluster_and_a_one_file_save_stays_in_process(
    tmp_path, watches
):
    share = tmp_path / "share"
    for n in range(8):
        write(share / f"ECN-01{n:02d}.md", f"# ECN-01{n:02d}\n\nChange {n}: new spoke nipples.\n")
    config = make_config(tmp_path, {"bench": share}, settle="0.2s")
    with open(config, "a", encoding="utf-8") as fh:
        fh.write("\n[cluster]\nworkers = 1\nmin_documents = 5\n")
    w = watches(config, WORKER_ENV).wait_listening()

    def documents() -> int | None:
        code, body = w.get("/status")
        return json.loads(body)["totals"]["documents"] if code == 200 else None

    wait_for("the start-up sync on the cluster", lambda: documents() == 8, 180)
    assert w.text().count("embedded on a local Dask cluster") == 1
    status = json.loads(w.get("/status")[1])
    assert status["service"]["cluster"]["workers"] == 1
    assert w.metric("upwell_cluster_workers") == 1
    write(share / "ECN-0199.md", "# ECN-0199\n\nOne more: rim tape.\n")
    wait_for("the one-file save", lambda: documents() == 9, 60)
    time.sleep(0.5)
    assert w.text().count("embedded on a local Dask cluster") == 1  # the save stayed here
    assert w.stop() == 0
