"""``upwell watch`` as it runs under systemd: a real subprocess, real watchdog, real LanceDB,
HTTP on 127.0.0.1 with an ephemeral port.

Waits are bounded by generous deadlines so a slow shared machine fails loudly instead of hanging;
no test asserts how long anything took (the save-to-searchable latency is measured and printed
by ``test_save_to_searchable_latency_with_the_default_model``).
"""

from __future__ import annotations

import contextlib
import json
import os
import random
import shutil
import signal
import statistics
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from watchdog.observers import Observer

from pipeline.config import SourceConfig, load_config
from pipeline.index import Index
from pipeline.service.watching import SettleQueue
from pipeline.service.watching import SourceEvents as _SourceEvents
from pipeline.verify import verify_index
from tests.conftest import paragraph, write
from tests.support.service import (
    CHANGE_DEADLINE,
    START_DEADLINE,
    make_config,
    upwell,
    wait_for,
)


def table_snapshot(index_path: Path) -> dict[str, Any]:
    """What a clean build must equal: chunk ids and text hashes, document ids and content."""
    store = Index(index_path).store()
    store.refresh()
    chunks = store.table("chunks").to_lance().to_table(columns=["chunk_id", "doc_id", "text_hash"])
    docs = store.all_documents()
    return {
        "chunks": sorted(zip(*(chunks[c].to_pylist() for c in chunks.column_names), strict=True)),
        "documents": sorted(
            (d["doc_id"], d["content_hash"], d["status"], d["chunk_count"]) for d in docs
        ),
    }


def tombstoned(index_path: Path) -> set[str]:
    store = Index(index_path).store()
    store.refresh()
    return set(store.table("tombstones").to_lance().to_table()["doc_id"].to_pylist())


def clean_build(tmp: Path, config: Path) -> Path:
    """Index the sources of ``config`` as they are now, in a fresh index, in this process."""
    target = tmp / "clean-ix"
    shutil.rmtree(target, ignore_errors=True)
    sources = [s.folder_source() for s in load_config(config).sources]
    Index(target, model="hash").sync(sources, yes=True)
    return target


# --- in-process: the event shapes watchdog 7 produces here ------------------------------------


@contextmanager
def watching(root: Path, settle: float) -> Iterator[SettleQueue]:
    queue = SettleQueue(settle)
    source = SourceConfig(name="share", path=root.resolve())
    observer = Observer()
    observer.schedule(_SourceEvents(source, queue, lambda: None), str(root), recursive=True)
    observer.start()
    try:
        yield queue
    finally:
        observer.stop()
        observer.join(timeout=5)


def settled_paths(queue: SettleQueue, root: Path, want: set[str]) -> set[str]:
    got: set[str] = set()

    def done() -> bool:
        for _, path in queue.settled():
            got.add(path.resolve().relative_to(root.resolve()).as_posix())
        return want <= got

    wait_for(f"settled paths {sorted(want - got)}", done, CHANGE_DEADLINE)
    return got


def test_every_event_shape_reaches_the_settle_queue(tmp_path):
    root = tmp_path / "share"
    outside = tmp_path / "outside"
    write(root / "manual.md", "# Manual\n\nOriginal text.\n")
    write(root / "policy.md", "# Policy\n\nOriginal.\n")
    write(root / "leaving.md", "# Leaving\n\nSoon outside.\n")
    write(outside / "arriving.md", "# Arriving\n\nFrom outside.\n")
    write(outside / "folder" / "a.md", "# A\n")
    write(outside / "folder" / "sub" / "b.md", "# B\n")
    with watching(root, settle=0.3) as queue:
        time.sleep(0.3)  # the observer is scheduled before the first change
        # an editor's save: write a temp file, rename it over the original
        write(root / ".manual.md.swp", "# Manual\n\nEdited text.\n")
        os.replace(root / ".manual.md.swp", root / "manual.md")
        # cp over an existing file (no created event)
        shutil.copyfile(outside / "arriving.md", root / "policy.md")
        # mv into the tree (created only), mv out of it (deleted, late), a folder moved in
        os.rename(outside / "arriving.md", root / "arriving.md")
        os.rename(root / "leaving.md", outside / "leaving.md")
        os.rename(outside / "folder", root / "folder")
        got = settled_paths(
            queue,
            root,
            {
                "manual.md",
                "policy.md",
                "arriving.md",
                "leaving.md",
                "folder/a.md",
                "folder/sub/b.md",
            },
        )
    # editor temp files are ignored by the default patterns
    assert ".manual.md.swp" not in got


def test_a_file_written_slowly_settles_once_after_its_last_write(tmp_path):
    root = tmp_path / "share"
    root.mkdir()
    with watching(root, settle=0.5) as queue:
        time.sleep(0.3)
        with open(root / "big.txt", "wb") as fh:
            for _ in range(256):  # 1 MB in 4 KB writes: hundreds of modified events
                fh.write(b"spoke tension " * 292 + b"\n")
                fh.flush()
        ready: list[tuple[str, Path]] = []
        wait_for("big.txt to settle", lambda: ready.extend(queue.settled()) or ready, 30)
        time.sleep(0.7)
        ready.extend(queue.settled())
    assert [p.name for _, p in ready] == ["big.txt"]  # one hand-over, not hundreds
    assert (root / "big.txt").stat().st_size == 256 * (14 * 292 + 1)


# --- subprocess: the whole service ------------------------------------------------------------


def test_watch_end_to_end_each_change_is_searchable_and_counted(tmp_path, watches):
    root = tmp_path / "share"
    write(root / "wheels.md", "# Wheels\n\nTrue the front wheel with spoke tension even.\n")
    w = watches(make_config(tmp_path, {"share": root})).wait_listening()
    wait_for("the start-up reconcile", w.commits_logged, 60)
    assert "wheels.md" in w.search_paths("wheel")
    assert w.get("/healthz")[0] == 200
    commits = w.metric("upwell_commits_total")
    assert commits >= 1 and w.metric("upwell_documents", 'source="share"') == 1

    # create
    write(root / "brakes.txt", "Bleed the rear brake with mineral oil, cinnabar bottle.\n")
    wait_for(
        "create",
        lambda: "cinnabar" in w.search_paths("cinnabar").get("brakes.txt", ""),
        CHANGE_DEADLINE,
    )
    # plain edit in place
    write(root / "brakes.txt", "Bleed the rear brake with mineral oil, vermilion bottle.\n")
    wait_for(
        "edit",
        lambda: "vermilion" in w.search_paths("vermilion").get("brakes.txt", ""),
        CHANGE_DEADLINE,
    )
    # edit by write-temp-then-rename
    write(root / "wheels.md.tmp", "# Wheels\n\nTrue the front wheel; record tension in ledger.\n")
    os.replace(root / "wheels.md.tmp", root / "wheels.md")
    wait_for(
        "save-by-rename",
        lambda: "ledger" in w.search_paths("ledger").get("wheels.md", ""),
        CHANGE_DEADLINE,
    )
    # rename
    os.rename(root / "brakes.txt", root / "brake-bleeding.txt")
    wait_for(
        "rename",
        lambda: set(w.search_paths("vermilion brake")) == {"brake-bleeding.txt", "wheels.md"},
        CHANGE_DEADLINE,
    )
    # delete
    os.remove(root / "brake-bleeding.txt")
    wait_for(
        "delete", lambda: set(w.search_paths("vermilion brake")) == {"wheels.md"}, CHANGE_DEADLINE
    )
    # bad files: reported, the service keeps running
    write(root / "broken.pdf", "this is not a PDF at all")
    (root / "empty.txt").write_bytes(b"")

    def failures() -> list[dict[str, Any]]:
        return w.json("/status")["failures"]

    bad = wait_for(
        "the bad files in status", lambda: len(failures()) == 2 and failures(), CHANGE_DEADLINE
    )
    assert {f["path"] for f in bad} == {"broken.pdf", "empty.txt"}
    assert w.metric("upwell_failures_total", 'reason="empty"') >= 1
    assert w.metric("upwell_failures_total", 'reason="corrupt"') >= 1
    assert w.get("/healthz")[0] == 200 and w.proc.poll() is None
    write(root / "after.md", "# After\n\nStill indexing after the bad files: saddle height.\n")
    wait_for(
        "a change after the bad files",
        lambda: "after.md" in w.search_paths("saddle"),
        CHANGE_DEADLINE,
    )

    assert w.metric("upwell_commits_total") >= commits + 6
    assert w.metric("upwell_chunks_reused_total") >= 1  # the rename reused its vectors
    assert w.metric("upwell_chunks_embedded_total") >= 4
    # the per-source gauges are refreshed just after the commit that search already sees
    wait_for("the gauges", lambda: w.metric("upwell_documents", 'source="share"') == 2, 30)
    assert w.metric("upwell_sync_duration_seconds_count") >= 7
    assert w.metric("upwell_last_commit_timestamp_seconds") > 0
    status = w.json("/status")
    assert status["service"]["paused"] is False and status["service"]["queue_depth"] >= 0
    assert w.get("/nothing")[0] == 404
    assert w.stop() == 0
    assert "failed share/broken.pdf" in w.text()


def test_second_writer_is_refused_with_exit_4_while_search_works(tmp_path, watches):
    from pipeline.errors import IndexLocked

    root = tmp_path / "share"
    write(root / "frames.md", "# Frames\n\nA frame damaged in transit may be returned.\n")
    config = make_config(tmp_path, {"share": root})
    w = watches(config).wait_listening()
    wait_for("the first commit", w.commits_logged, 60)
    # A writer that is not the command line (the Python API here) cannot hand its work over.
    with pytest.raises(IndexLocked, match=f"process {w.proc.pid}"):
        Index(tmp_path / "ix", model="hash").sync([root])
    # `upwell sync` by hand is handed to the service, which runs it in its own writer.
    sync = upwell("--config", str(config), "sync")
    assert sync.returncode == 0, sync.stderr
    assert sync.stdout.startswith("documents: 0 added, 0 modified, 0 removed, 0 moved, 1 unch")
    assert "running a handed-over command: upwell --config" in w.text()
    second = watches(config)
    assert second.proc.wait(timeout=120) == 4
    assert f"process {w.proc.pid}" in second.text()
    search = upwell("--config", str(config), "search", "damaged frame", "--json")
    assert search.returncode == 0
    assert json.loads(search.stdout)["results"][0]["path"] == "frames.md"
    assert w.stop() == 0


def test_sigterm_mid_batch_leaves_each_batch_committed_whole_or_not_at_all(tmp_path, watches):
    root = tmp_path / "share"
    rng = random.Random(11)
    for i in range(240):
        write(root / f"procedure-{i:03d}.md", f"# Procedure {i}\n\n" + paragraph(rng, 8))
    config = make_config(tmp_path, {"share": root}, batch_documents=10)
    w = watches(config).wait_listening()
    ix = tmp_path / "ix"
    wait_for(
        "the first commit of the start-up sync",
        lambda: (ix / "settings.lance").exists() and Index(ix).store().count("commits") > 0,
        60,
    )
    signalled = time.monotonic()
    code = w.stop(signal.SIGTERM)
    print(f"\nSIGTERM to exit: {time.monotonic() - signalled:.2f} s")  # target: under 10 s
    assert code == 0
    index = Index(tmp_path / "ix")
    report = verify_index(index, drift=False)
    assert report.consistent, report.problems
    store = index.store()
    docs = store.all_documents()
    commits = store.commits()
    # Every committed batch is whole (10 documents each), and the stop came before the end.
    assert len(docs) == sum(c["documents_added"] for c in commits)
    assert all(c["documents_added"] == 10 for c in commits)
    assert 0 < len(docs) < 240
    # A restart finishes the job and equals a clean build.
    w2 = watches(config).wait_listening()
    wait_for(
        "the restart to catch up", lambda: w2.json("/status")["totals"]["documents"] == 240, 120
    )
    assert w2.stop() == 0
    assert table_snapshot(tmp_path / "ix") == table_snapshot(clean_build(tmp_path, config))


@pytest.mark.slow
def test_kill_9_at_random_moments_then_restart_converges_to_a_clean_build(tmp_path, watches):
    root = tmp_path / "share"
    rng = random.Random(2024)
    next_id = 0

    def add(n: int) -> None:
        nonlocal next_id
        for _ in range(n):
            write(
                root / f"part-{next_id // 40}" / f"note-{next_id:04d}.md",
                f"# Note {next_id}\n\n" + paragraph(rng, 6),
            )
            next_id += 1

    add(160)
    config = make_config(tmp_path, {"share": root}, batch_documents=8)
    ix = tmp_path / "ix"
    deleted_while_indexed: set[str] = set()
    deleted: set[str] = set()
    kills = 0
    mid_sync = 0
    for _round in range(12):
        w = watches(config).wait_listening()
        time.sleep(rng.uniform(0.0, 1.5))
        w.proc.send_signal(signal.SIGKILL)
        assert w.stop(signal.SIGKILL) == -signal.SIGKILL
        kills += 1
        # the start-up sync logs its line when its last batch has committed
        mid_sync += "synced source=share trigger=start" not in w.text()
        # change the share while the service is down: edits, removals, additions
        indexed = set()
        if (ix / "settings.lance").exists():
            indexed = {d["doc_id"] for d in Index(ix).store().all_documents() if d["content_hash"]}
        files = sorted(p for p in root.rglob("*.md"))
        for p in rng.sample(files, 10):
            p.write_text(p.read_text() + "\n" + paragraph(rng, 2))
        for p in rng.sample(files, 3):
            doc_id = "share:" + p.relative_to(root).as_posix()
            if doc_id in deleted:
                continue
            if doc_id in indexed:
                deleted_while_indexed.add(doc_id)
            deleted.add(doc_id)
            p.unlink()
        add(24)
    sources = [s.folder_source() for s in load_config(config).sources]
    w = watches(config).wait_listening()
    wait_for("the final reconcile", lambda: "synced source=share trigger=start" in w.text(), 120)
    assert w.stop() == 0
    print(f"\ncrash test: {kills} kill -9, {mid_sync} of them before the start-up sync finished")
    assert kills >= 10 and mid_sync >= 5
    report = verify_index(Index(ix), sources)
    assert report.consistent, report.problems
    assert table_snapshot(ix) == table_snapshot(clean_build(tmp_path, config))
    # no lost tombstone: every removal of an indexed document is logged, and nothing else is
    assert deleted_while_indexed <= tombstoned(ix) <= deleted


def test_sighup_reload_adds_and_removes_sources_without_a_restart(tmp_path, watches):
    first, second = tmp_path / "first", tmp_path / "second"
    write(first / "a.md", "# A\n\nChain wear gauge reading.\n")
    write(second / "b.md", "# B\n\nHeadset bearing preload.\n")
    config = make_config(tmp_path, {"first": first})
    w = watches(config).wait_listening()
    wait_for("first", w.commits_logged, 60)
    assert "a.md" in w.search_paths("chain")
    make_config(tmp_path, {"first": first, "second": second})
    w.proc.send_signal(signal.SIGHUP)
    wait_for("second", lambda: "b.md" in w.search_paths("headset"), CHANGE_DEADLINE)
    make_config(tmp_path, {"second": second})
    w.proc.send_signal(signal.SIGHUP)
    wait_for("the second reload", lambda: w.text().count("configuration reloaded") == 2, 30)
    write(first / "c.md", "# C\n\nNot watched any more: derailleur hanger.\n")
    write(second / "d.md", "# D\n\nStill watched: brake rotor truing.\n")
    wait_for("d.md", lambda: "d.md" in w.search_paths("rotor"), CHANGE_DEADLINE)
    assert "c.md" not in w.search_paths("derailleur hanger")
    assert w.proc.poll() is None and w.stop() == 0


def test_bearer_token_is_required_when_configured_and_logs_are_json_lines(tmp_path, watches):
    root = tmp_path / "share"
    write(root / "a.md", "# A\n\nTorque the stem bolts.\n")
    config = make_config(tmp_path, {"share": root}, token_env="MARROWBY_TEST_TOKEN")
    env = {"MARROWBY_TEST_TOKEN": "s3cret-for-tests"}
    w = watches(config, env, "--log-format", "json")
    w.port = wait_for(
        "the listening line",
        lambda: next(
            (e["port"] for e in map(json.loads, w.text().splitlines()) if "port" in e), None
        ),
        START_DEADLINE,
    )
    assert w.get("/healthz")[0] == 401
    assert w.get("/healthz", token="wrong")[0] == 401
    wait_for("healthy", lambda: w.get("/healthz", token="s3cret-for-tests")[0] == 200, 30)
    wait_for("the first commit", lambda: '"event": "commit"' in w.text(), 60)
    assert w.stop() == 0
    events = [json.loads(line) for line in w.text().splitlines()]  # every line is JSON
    commit = next(e for e in events if e.get("event") == "commit")
    assert commit["source"] == "share" and commit["documents"]["added"] == 1
    assert events[-1]["event"] == "stopped"


@pytest.mark.slow
def test_save_to_searchable_latency_with_the_default_model(tmp_path, watches):
    """End to end with the real model; prints p50/p95 of file saved -> found by /search."""
    root = tmp_path / "share"
    write(root / "returns.md", "# Returns\n\nA frame damaged in transit may be returned.\n")
    w = watches(make_config(tmp_path, {"share": root}, model="default")).wait_listening()
    wait_for("start-up", w.commits_logged, 120)
    assert "returns.md" in w.search_paths("returned frame")
    topics = [
        ("saddle", "Set the saddle height so the knee is slightly bent at the bottom."),
        ("chain", "Replace the chain when the wear gauge drops into the links."),
        ("tyre", "Inflate the tyre to the pressure printed on its sidewall."),
        ("brake", "Bleed the hydraulic brake with mineral oil only."),
        ("headset", "Adjust the headset until the fork turns without play."),
    ]
    latencies = []
    for n in range(20):
        word, text = topics[n % len(topics)]
        name = f"note-{n:02d}.md"
        started = time.monotonic()
        if n % 2:  # every other save goes through a temp file and a rename, as editors do
            write(root / f".{name}.swp", f"# Note {n}\n\n{text}\n")
            os.replace(root / f".{name}.swp", root / name)
        else:
            write(root / name, f"# Note {n}\n\n{text}\n")
        wait_for(
            name, lambda name=name, text=text: name in w.search_paths(text, k=5), CHANGE_DEADLINE
        )
        latencies.append(time.monotonic() - started)
    # The model ranks the matching note first (meaning, not just shared words).
    top = w.json("/search?q=how+high+should+the+seat+be&k=1")["results"][0]
    assert "saddle" in top["text"]
    assert w.stop() == 0
    p50 = statistics.median(latencies)
    p95 = statistics.quantiles(latencies, n=20)[-1]
    print(f"\nsave-to-searchable over {len(latencies)} saves: p50 {p50:.2f} s, p95 {p95:.2f} s")


# --- the real service in this process: for injected faults and shortened schedules ---------


class InProcess:
    """``Service`` running in a thread of the test's own process, and its HTTP API."""

    def __init__(self, service: Any) -> None:
        self.service = service
        self.index = service.index

    def get(self, path: str) -> tuple[int, Any]:
        port = self.service._http.server_address[1]
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=10) as r:
                return r.status, json.loads(r.read())
        except urllib.error.HTTPError as exc:
            return exc.code, json.loads(exc.read())

    def json(self, path: str) -> Any:
        code, data = self.get(path)
        assert code == 200, (code, data)
        return data

    def failing(self) -> dict[str, str]:
        return self.json("/healthz").get("sources_failing", {})


@contextlib.contextmanager
def in_process(
    tmp_path: Path, sources: list[dict], *, service: dict | None = None, first_commit: bool = True
) -> Iterator[InProcess]:
    from pipeline.config import parse_config
    from pipeline.index import Index
    from pipeline.service.daemon import Service

    config = parse_config(
        {
            "index": {"path": str(tmp_path / "ix"), "model": "hash"},
            "server": {"listen": "127.0.0.1:0"},
            "service": service or {},
            "source": sources,
        },
        tmp_path / "upwell.toml",
    )
    running = Service(config, Index(config.index_path, model="hash"))
    runner = threading.Thread(target=running.run, kwargs={"install_signals": False}, daemon=True)
    runner.start()
    try:
        wait_for("the API to listen", lambda: running._http is not None, START_DEADLINE)
        if first_commit:

            def committed() -> bool:
                # A reader's view is re-read on refresh(); the store may have been opened
                # between its creation and its first commit.
                if not running.index.exists:
                    return False
                running.index.store().refresh()
                return bool(running.index.history())

            wait_for("the first sync to commit", committed, START_DEADLINE)
        yield InProcess(running)
    finally:
        running.stop_event.set()
        runner.join(timeout=60)


@pytest.mark.filterwarnings("ignore::pytest.PytestUnhandledThreadExceptionWarning")
def test_healthz_turns_unhealthy_when_the_writer_thread_dies(tmp_path, monkeypatch):
    from pipeline.service.daemon import Service

    def writer_dies(self):
        raise RuntimeError("writer killed by the test")

    monkeypatch.setattr(Service, "_writer_loop", writer_dies)
    write(tmp_path / "share" / "a.md", "# A\n\nThe seat clamp takes 6 Nm.\n")
    sources = [{"name": "share", "path": str(tmp_path / "share")}]
    with in_process(tmp_path, sources, first_commit=False) as s:
        wait_for("/healthz to say 503", lambda: s.get("/healthz")[0] == 503, START_DEADLINE)
        assert not s.service.healthy()


def test_scheduled_scans_and_the_reconcile_fire_on_their_own(tmp_path):
    # Intervals shortened to seconds; nothing but the scheduler asks for these syncs.
    office = tmp_path / "office"
    write(office / "a.md", "# A\n\nThe seat clamp takes 6 Nm.\n")
    sources = [{"name": "office", "kind": "polled", "path": str(office), "every": "1s"}]
    with in_process(tmp_path, sources, service={"reconcile_every": "2s"}) as s:
        write(office / "b.md", "# B\n\nA new note about bottle cages.\n")

        def paths() -> set[str]:
            s.index.store().refresh()
            return {d["path"] for d in s.index.store().documents_of_source("office").values()}

        wait_for("a scheduled sync to pick up b.md", lambda: "b.md" in paths(), START_DEADLINE)
        # A polled source has no watcher: only the schedule or the reconcile can have synced it.
        assert s.index.history()[0].trigger in ("schedule", "reconcile")


def test_the_nightly_maintenance_job_runs_when_its_time_comes(tmp_path):
    # Its clock is moved, not waited for: the job's next run is set to now.
    from datetime import datetime

    write(tmp_path / "share" / "a.md", "# A\n\nThe seat clamp takes 6 Nm.\n")
    with in_process(tmp_path, [{"name": "share", "path": str(tmp_path / "share")}]) as s:

        def maintained() -> bool:
            s.index.store().refresh()
            return "maintained_chunks_version" in s.index.store().settings()

        assert not maintained()
        job = s.service._scheduler.get_job("maintenance")
        assert "hour='3', minute='30'" in str(job.trigger)  # 03:30, the default
        job.modify(next_run_time=datetime.now(job.next_run_time.tzinfo))
        wait_for("maintenance to run", maintained, START_DEADLINE)


def test_an_unmounted_share_removes_nothing_says_why_and_recovers(tmp_path):
    share = tmp_path / "share"
    write(share / "a.md", "# A\n\nThe seat clamp takes 6 Nm.\n")
    write(share / "b.md", "# B\n\nBottle cage bolts are M5.\n")
    sources = [{"name": "share", "path": str(share)}]
    with in_process(tmp_path, sources, service={"reconcile_every": "1s"}) as s:
        # The share goes away, as an unmounted network share does.
        share.rename(tmp_path / "share-unmounted")
        wait_for("the missing share to be reported", lambda: "share" in s.failing(), 60)
        health = s.json("/healthz")
        assert health["ok"] is True and "share" in health["sources_failing"]["share"]
        status = s.json("/status")
        (source,) = status["sources"]
        assert source["documents"] == 2 and "error" in source  # nothing removed, and why
        assert source["state"] == "unreachable" and source["kind"] == "folder"
        # It comes back: the error clears by itself and nothing was lost.
        (tmp_path / "share-unmounted").rename(share)
        wait_for("the service to recover", lambda: not s.failing(), 60)
        assert s.json("/status")["totals"]["documents"] == 2
        # The mount point stays but is empty: removing every document needs confirmation,
        # which a service never gives itself. Nothing is removed, and /healthz says why.
        for name in ("a.md", "b.md"):
            (share / name).rename(tmp_path / name)
        wait_for("the emptied share to be reported", lambda: "share" in s.failing(), 60)
        assert "not synced" in s.failing()["share"]
        status = s.json("/status")
        assert status["totals"]["documents"] == 2
        assert status["sources"][0]["state"] == "failing"
        for name in ("a.md", "b.md"):
            (tmp_path / name).rename(share / name)
        wait_for("the service to recover", lambda: not s.failing(), 60)


def test_an_unreachable_web_source_removes_nothing_is_retried_on_schedule_and_clears(tmp_path):
    from tests.test_connector_http import PAGES, Site

    site = Site(PAGES)
    sources = [
        {
            "name": "web",
            "kind": "http",
            "urls": [site.url(p) for p in PAGES],
            "every": "1s",
            "retries": 0,
            "timeout": "2s",
        }
    ]
    try:
        with in_process(tmp_path, sources, service={"reconcile_every": "1h"}) as s:
            site.stop()  # connection refused from now on
            wait_for("the unreachable site to be reported", lambda: "web" in s.failing(), 60)
            (source,) = s.json("/status")["sources"]
            assert "connection refused" in source["error"]["reason"]
            assert source["documents"] == len(PAGES)  # nothing removed
            site.restart()
            site.reset_log()
            # The schedule asks again by itself; once the site answers, the error clears.
            wait_for("the schedule to retry and clear", lambda: not s.failing(), 60)
            assert site.statuses()  # asked again, with no one telling it to
            assert s.json("/status")["totals"]["documents"] == len(PAGES)
    finally:
        with contextlib.suppress(Exception):
            site.stop()


def test_a_full_disk_during_a_commit_loses_nothing_is_reported_and_passes(tmp_path, monkeypatch):
    import errno

    from pipeline.store.tables import Store

    office = tmp_path / "office"
    write(office / "a.md", "# A\n\nThe seat clamp takes 6 Nm.\n")
    sources = [{"name": "office", "kind": "polled", "path": str(office), "every": "1s"}]
    with in_process(tmp_path, sources) as s:
        before = s.index.history()[0].id
        original = Store.replace_chunks

        def disk_full(self, *args, **kwargs):
            raise OSError(errno.ENOSPC, "No space left on device")

        monkeypatch.setattr(Store, "replace_chunks", disk_full)  # the chunks write hits ENOSPC
        write(office / "b.md", "# B\n\nBottle cage bolts are M5.\n")
        wait_for("the full disk to be reported", lambda: "office" in s.failing(), 60)
        assert "disk is full" in s.failing()["office"]
        assert s.index.history()[0].id == before  # still at the previous version
        assert s.service.healthy()  # the service carries on
        monkeypatch.setattr(Store, "replace_chunks", original)  # space is back
        wait_for("the sync to go through once space returned", lambda: not s.failing(), 60)
        docs = s.index.store().documents_of_source("office")
        assert {d["path"] for d in docs.values()} == {"a.md", "b.md"}


def test_an_unreachable_s3_endpoint_removes_nothing_is_retried_on_schedule_and_clears(
    tmp_path, monkeypatch
):
    from tests.support.gate import Gate
    from tests.support.s3_server import running_s3_server

    for name in ("AWS_PROFILE", "AWS_SESSION_TOKEN"):
        monkeypatch.delenv(name, raising=False)
    monkeypatch.setenv("AWS_CONFIG_FILE", str(tmp_path / "no-aws-config"))
    monkeypatch.setenv("AWS_SHARED_CREDENTIALS_FILE", str(tmp_path / "no-aws-credentials"))
    monkeypatch.setenv("AWS_EC2_METADATA_DISABLED", "true")
    with running_s3_server() as s3:
        for name, value in s3.environment().items():
            monkeypatch.setenv(name, value)
        client = s3.client()
        client.create_bucket(Bucket="marrowby-brief")
        for key, body in (
            ("a.md", "# A\n\nThe seat clamp takes 6 Nm.\n"),
            ("b.md", "# B\n\nM5.\n"),
        ):
            client.put_object(Bucket="marrowby-brief", Key=key, Body=body.encode())
        # The service reaches the server through a gate the test can shut: the endpoint goes
        # down and comes back on the same address while the server keeps its objects.
        gate = Gate(int(s3.endpoint_url.rsplit(":", 1)[1]))
        sources = [
            {
                "name": "bucket",
                "kind": "s3",
                "bucket": "marrowby-brief",
                "endpoint_url": gate.url,
                "every": "1s",
            }
        ]
        try:
            with in_process(tmp_path, sources, service={"reconcile_every": "1h"}) as s:
                assert s.json("/status")["totals"]["documents"] == 2
                gate.shut()
                wait_for("the endpoint to be reported", lambda: "bucket" in s.failing(), 120)
                (source,) = s.json("/status")["sources"]
                assert "cannot be reached" in source["error"]["reason"]
                assert source["documents"] == 2  # nothing removed
                # While it is down, an object is added: only a retry after it answers sees it.
                client.put_object(Bucket="marrowby-brief", Key="c.md", Body=b"# C\n\nNew.\n")
                gate.reopen()
                wait_for("the schedule to retry and clear", lambda: not s.failing(), 120)

                def paths() -> set[str]:
                    s.index.store().refresh()
                    docs = s.index.store().documents_of_source("bucket")
                    return {d["path"] for d in docs.values()}

                wait_for("the new object to be synced", lambda: "c.md" in paths(), 60)
                assert paths() == {"a.md", "b.md", "c.md"}
        finally:
            gate.shut()


def test_a_git_remote_that_goes_away_removes_nothing_is_retried_on_schedule_and_clears(
    tmp_path, monkeypatch
):
    from tests.test_connector_git import commit_all, new_repo

    for name, value in {
        "GIT_CONFIG_GLOBAL": os.devnull,
        "GIT_CONFIG_NOSYSTEM": "1",
        "GIT_AUTHOR_NAME": "Marrowby Workshop",
        "GIT_AUTHOR_EMAIL": "workshop@marrowby.invalid",
        "GIT_COMMITTER_NAME": "Marrowby Workshop",
        "GIT_COMMITTER_EMAIL": "workshop@marrowby.invalid",
    }.items():
        monkeypatch.setenv(name, value)
    origin = new_repo(tmp_path / "origin")
    write(origin / "a.md", "# A\n\nThe seat clamp takes 6 Nm.\n")
    write(origin / "b.md", "# B\n\nBottle cage bolts are M5.\n")
    commit_all(origin, "two notes")
    sources = [{"name": "workshop", "kind": "git", "url": str(origin), "every": "1s"}]
    with in_process(tmp_path, sources, service={"reconcile_every": "1h"}) as s:
        assert s.json("/status")["totals"]["documents"] == 2
        origin.rename(tmp_path / "origin-gone")  # the remote is gone
        wait_for("the missing remote to be reported", lambda: "workshop" in s.failing(), 60)
        (source,) = s.json("/status")["sources"]
        assert "fatal:" in source["error"]["reason"]  # git's own words
        assert source["documents"] == 2  # nothing removed
        (tmp_path / "origin-gone").rename(origin)
        write(origin / "c.md", "# C\n\nA new note about chain wear.\n")
        commit_all(origin, "a third note")
        wait_for("the schedule to retry and clear", lambda: not s.failing(), 60)

        def paths() -> set[str]:
            s.index.store().refresh()
            return {d["path"] for d in s.index.store().documents_of_source("workshop").values()}

        wait_for("the new commit to be synced", lambda: "c.md" in paths(), 60)
        assert paths() == {"a.md", "b.md", "c.md"}


@pytest.mark.filterwarnings("ignore::pytest.PytestUnhandledThreadExceptionWarning")
def test_healthz_turns_unhealthy_when_the_scheduler_dies(tmp_path):
    write(tmp_path / "share" / "a.md", "# A\n\nThe seat clamp takes 6 Nm.\n")
    with in_process(tmp_path, [{"name": "share", "path": str(tmp_path / "share")}]) as s:
        assert s.get("/healthz")[0] == 200
        scheduler = s.service._scheduler

        def dies() -> float:
            raise RuntimeError("scheduler killed by the test")

        # The scheduler's thread runs _process_jobs each time it wakes; raising there ends it.
        scheduler._process_jobs = dies
        scheduler.wakeup()
        wait_for("/healthz to say 503", lambda: s.get("/healthz")[0] == 503, 60)
        assert not s.service.healthy()
        assert "scheduler" in json.dumps(s.get("/healthz")[1])
