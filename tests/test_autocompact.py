"""The service's automatic compaction: due by fragments or by time, held back while searches
run (never for good), files only (every version stays readable, history, ``--as-of`` and
rollback unchanged), recorded so the next sync is not taken for an interrupted batch, and shown
in ``/status``. Real LanceDB throughout; the clock is a fake one where a test needs time to
pass, and no test asserts how long anything took."""

from __future__ import annotations

import contextlib
import json
import math
import re
import threading
import urllib.parse
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import lxml.html
import pyarrow as pa
import pytest

from pipeline.config import ServiceConfig, load_config
from pipeline.engine import autocompact
from pipeline.engine.autocompact import (
    AutoCompactor,
    CompactionPolicy,
    SearchActivity,
    small_fragments,
)
from pipeline.engine.recovery import interrupted
from pipeline.errors import StoreError
from pipeline.index import Index
from pipeline.store.schema import MAINTAINED_VERSIONS
from pipeline.verify import verify_index
from tests.conftest import write
from tests.support.service import START_DEADLINE, make_config, wait_for


class FakeClock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def note(root: Path, n: int) -> Path:
    """A new one-paragraph note: its sync is one commit that adds one small chunks fragment."""
    return write(
        root / f"note-{n:03d}.md",
        f"# Note {n}\n\nTorque the stem bolt number {n} to the value on card {n * 7}.\n",
    )


def chunk_ids(hits: list[Any]) -> list[str]:
    return [h.chunk_id for h in hits]


# --- the policy ------------------------------------------------------------------------------


def test_due_by_fragments_or_by_time_whichever_comes_first():
    policy = CompactionPolicy(fragments=4, every=600.0)
    assert policy.due(3, 10.0) is None
    assert "4 small fragments" in policy.due(4, 10.0)
    # the time trigger needs at least one fragment to merge: an idle index is left alone
    assert "600 s" in policy.due(1, 600.0)
    assert policy.due(0, 10**6) is None
    assert CompactionPolicy(enabled=False).due(100, 10**6) is None


def test_quiet_window_and_the_longest_wait():
    policy = CompactionPolicy(quiet=2.0, max_wait=300.0)
    assert not policy.may_start(quiet_for=1.9, waited=299.0)
    assert policy.may_start(quiet_for=2.0, waited=0.0)
    assert policy.may_start(quiet_for=0.0, waited=300.0)  # never put off for good


def test_search_activity_is_not_quiet_while_a_search_runs():
    clock = FakeClock()
    activity = SearchActivity(clock)
    assert activity.quiet_for() == math.inf  # no search yet
    with activity.searching():
        clock.now += 50
        assert activity.quiet_for() == 0.0
    clock.now += 3
    assert activity.quiet_for() == 3.0  # counted from the end of the last search
    assert activity.total == 1


def test_the_service_defaults_are_the_measured_ones():
    # The config module cannot import the store (it is read before LanceDB loads), so its
    # defaults are written out there; they must stay those pipeline.engine.autocompact measured.
    policy = CompactionPolicy.from_service(ServiceConfig())
    assert policy == CompactionPolicy()
    assert (policy.fragments, policy.every, policy.quiet) == (
        autocompact.AUTO_COMPACT_FRAGMENTS,
        autocompact.AUTO_COMPACT_EVERY,
        autocompact.AUTO_COMPACT_QUIET,
    )


# --- a run, on a real index ------------------------------------------------------------------


@pytest.fixture
def synced(tmp_path: Path) -> tuple[Index, Path]:
    share = tmp_path / "share"
    for n in range(3):
        note(share, n)
    index = Index(tmp_path / "ix", model="hash")
    index.sync([share])
    return index, share


def test_a_run_merges_small_fragments_and_keeps_every_version(synced):
    index, share = synced
    first = index.history()[0]
    for n in range(3, 8):
        note(share, n)
        index.sync([share])
    store = index.store()
    chunks = store.table("chunks")
    versions_before = [v["version"] for v in chunks.to_lance().versions()]
    rows_at = {v: chunks.to_lance().checkout_version(v).count_rows() for v in versions_before}
    log_before = [c.id for c in index.history()]
    then = chunk_ids(index.search("stem bolt torque", k=10, as_of=first.id))
    now = chunk_ids(index.search("stem bolt torque", k=10))
    fragments_before = small_fragments(store)
    assert fragments_before >= 6

    compactor = AutoCompactor(CompactionPolicy(fragments=4))
    with index.writing():
        report = compactor.run(store)
    assert report is not None and "small fragments" in report["reason"]
    before, after = report["tables"]["chunks"]["fragments"]
    assert before == fragments_before and after < before
    assert small_fragments(store) == after

    # Files only: every earlier version is still listed, with the rows it had.
    chunks.checkout_latest()
    versions_after = [v["version"] for v in chunks.to_lance().versions()]
    assert set(versions_before) <= set(versions_after)
    assert len(versions_after) > len(versions_before)
    for version, rows in rows_at.items():
        assert chunks.to_lance().checkout_version(version).count_rows() == rows
    # History, search as of an old commit and the current search see no difference.
    assert [c.id for c in index.history()] == log_before
    assert chunk_ids(index.search("stem bolt torque", k=10, as_of=first.id)) == then
    assert chunk_ids(index.search("stem bolt torque", k=10)) == now
    assert verify_index(index, drift=False).consistent
    # Nothing new to merge: not due again.
    with index.writing():
        assert compactor.run(store) is None
    # A rollback to the old commit gives what search as of it gave.
    index.rollback(first.id, yes=True)
    assert chunk_ids(index.search("stem bolt torque", k=10)) == then


def test_the_next_sync_after_a_run_is_not_taken_for_an_interrupted_batch(synced):
    index, share = synced
    for n in range(3, 7):
        note(share, n)
        index.sync([share])
    store = index.store()
    with index.writing():
        report = AutoCompactor(CompactionPolicy(fragments=4)).run(store)
    assert report is not None
    chunks_version = int(store.table("chunks").version)
    assert report["chunks_version"] == chunks_version
    # The run moved the chunks table past the last commit's version and recorded where it
    # left it, as maintenance does; without that record recovery would see a dead batch.
    assert store.last_commit_versions()["chunks"] != chunks_version
    assert store.settings()[MAINTAINED_VERSIONS["chunks"]] == chunks_version
    assert not interrupted(store)
    note(share, 7)
    result = index.sync([share])
    assert [c.commit_id for c in result.commits] == [index.history()[0].id]
    assert not any(c.trigger.startswith("recover:") for c in index.history())


def test_a_run_first_recovers_a_batch_whose_writer_died(synced):
    # Recording the chunks version without recovering first would hide the dead batch.
    index, _share = synced
    store = index.store()
    chunks = store.table("chunks")
    row = chunks.to_lance().to_table(limit=1).to_pylist()[0]
    ghost = {**row, "chunk_id": "ghost-chunk", "doc_id": "share:ghost.md", "path": "ghost.md"}
    chunks.add(pa.Table.from_pylist([ghost], schema=chunks.schema))  # a batch with no commit
    assert interrupted(store)
    compactor = AutoCompactor(CompactionPolicy(fragments=2))
    with index.writing():
        report = compactor.run(store)
    assert report is not None
    assert index.history()[0].trigger == "recover:compact"
    assert "share:ghost.md" not in set(store.chunk_doc_id_column())
    assert not interrupted(store)


def test_a_due_run_waits_while_searches_continue_but_not_for_good(synced):
    index, share = synced
    for n in range(3, 6):
        note(share, n)
        index.sync([share])
    clock = FakeClock()
    searches = SearchActivity(clock)
    compactor = AutoCompactor(CompactionPolicy(fragments=2, quiet=2.0, max_wait=300.0), clock)
    store = index.store()

    def a_search_now() -> None:
        with searches.searching():
            index.search("stem bolt", k=3)

    with index.writing():
        for _turn in range(6):  # a search a second before each of the writer's turns
            a_search_now()
            clock.now += 1.0
            assert compactor.run(store, searches) is None
            assert compactor.due_reason and compactor.worth_a_look()
            clock.now += 49.0
        assert compactor.runs == 0 and compactor.deferred == 6
        # 300 s after it fell due it starts, although the searches have not paused
        a_search_now()
        clock.now += 1.0
        report = compactor.run(store, searches)
    assert report is not None and compactor.runs == 1
    assert report["waited_seconds"] >= 300.0 and compactor.status()["last"] == report
    assert not compactor.worth_a_look()


def test_due_by_time_with_fewer_fragments(synced):
    index, share = synced
    clock = FakeClock()
    compactor = AutoCompactor(CompactionPolicy(fragments=50, every=600.0), clock)
    store = index.store()
    note(share, 3)
    index.sync([share])
    with index.writing():
        assert compactor.run(store) is None  # 2 small fragments, 0 s: not yet
        assert not compactor.worth_a_look()
        clock.now += 600.0
        assert compactor.worth_a_look()  # an idle writer looks without a new commit
        report = compactor.run(store)
    assert report is not None and "600 s" in report["reason"]


def test_a_failed_run_raises_once_and_is_tried_again_at_the_next_due_point(synced, monkeypatch):
    index, share = synced
    for n in range(3, 6):
        note(share, n)
        index.sync([share])
    store = index.store()
    compactor = AutoCompactor(CompactionPolicy(fragments=2))

    def disk_full(*args: Any, **kwargs: Any) -> Any:
        raise StoreError("compacting the chunks table failed: No space left on device")

    monkeypatch.setattr(autocompact, "compact_files", disk_full)
    with index.writing(), pytest.raises(StoreError, match="No space left"):
        compactor.run(store)
    assert "No space left" in compactor.status()["last_error"]["error"]
    monkeypatch.undo()
    with index.writing():
        assert compactor.run(store) is None  # not on every turn: at the next due point
    for n in range(6, 8):
        note(share, n)
        index.sync([share])
    with index.writing():
        assert compactor.run(store) is not None
    assert compactor.status()["last_error"] is None


# --- the service -----------------------------------------------------------------------------


def _get(service: Any, path: str) -> Any:
    port = service._http.server_address[1]
    with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=30) as response:
        body = response.read()
    text = path == "/metrics" or path.startswith("/console/")
    return body.decode() if text else json.loads(body)


@contextlib.contextmanager
def service_running(tmp_path: Path, share: Path, **service: Any) -> Iterator[Any]:
    """The real ``Service`` in a thread of this process, from a configuration file (so a
    reload re-reads it), with its HTTP API on an ephemeral port."""
    from pipeline.service.daemon import Service

    config = load_config(make_config(tmp_path, {"share": share}, **service))
    running = Service(config, Index(config.index_path, model="hash"))
    runner = threading.Thread(target=running.run, kwargs={"install_signals": False}, daemon=True)
    runner.start()
    try:
        wait_for("the API to listen", lambda: running._http is not None, START_DEADLINE)
        yield running
    finally:
        running.stop_event.set()
        runner.join(timeout=60)


def commits(service: Any) -> int:
    index = Index(service.index.path)
    return len(index.history()) if index.exists else 0


def add_notes(service: Any, share: Path, numbers: range) -> None:
    """One note at a time, each waited for, so each is its own commit."""
    for n in numbers:
        had = commits(service)
        note(share, n)
        wait_for(f"note {n} to be committed", lambda h=had: commits(service) > h, START_DEADLINE)


def console_compaction(service: Any) -> str:
    """The Compaction row of the console's overview page, as a reader sees it (lxml.html)."""
    page = lxml.html.fromstring(_get(service, "/console/"))
    (row,) = page.xpath('//dt[text()="Compaction"]/following-sibling::dd')
    return " ".join(row.text_content().split())


def test_the_service_holds_a_due_compaction_during_a_search_burst_then_runs_it(tmp_path):
    share = tmp_path / "share"
    note(share, 0)
    # A quiet window of an hour: nothing but a reload can let the due compaction start.
    settings = {"settle": "0.2s", "compact_fragments": 3, "compact_quiet": "1h"}
    with service_running(tmp_path, share, **settings) as service:
        wait_for("the first commit", lambda: commits(service) >= 1, START_DEADLINE)
        stop_burst = threading.Event()

        def burst() -> None:
            while not stop_burst.is_set():
                _get(service, "/search?" + urllib.parse.urlencode({"q": "stem bolt"}))
                stop_burst.wait(0.05)

        searcher = threading.Thread(target=burst, daemon=True)
        searcher.start()
        try:
            wait_for("a search", lambda: service.searches.total > 0, START_DEADLINE)
            add_notes(service, share, range(1, 4))

            def waiting() -> Any:
                compaction = _get(service, "/status")["service"]["compaction"]
                return compaction if compaction["deferred"] > 0 else None

            compaction = wait_for("the compaction to be held back", waiting, START_DEADLINE)
        finally:
            stop_burst.set()
            searcher.join(timeout=30)
        assert compaction["due"] and compaction["runs"] == 0 and compaction["last"] is None
        assert "waiting" in console_compaction(service) and "searches" in console_compaction(
            service
        )
        assert small_fragments(Index(service.index.path).store()) >= 3
        # The burst is over; the operator shortens the quiet window and reloads (SIGHUP).
        make_config(tmp_path, {"share": share}, **{**settings, "compact_quiet": "0.5s"})
        service.reload_requested.set()

        def compacted() -> Any:
            compaction = _get(service, "/status")["service"]["compaction"]
            return compaction if compaction["runs"] >= 1 else None

        compaction = wait_for("the held-back compaction", compacted, START_DEADLINE)
        assert compaction["last"]["tables"]["chunks"]["fragments"][1] < 3
        assert compaction["last_error"] is None and compaction["due"] is None
        assert console_compaction(service).startswith("1 run, last at ")
        metrics = _get(service, "/metrics")
        assert re.search(r"^upwell_compactions_total 1\.0$", metrics, re.M)
        deferred = re.search(r"^upwell_compactions_deferred_total (\S+)$", metrics, re.M)
        assert deferred and float(deferred.group(1)) >= 1


def test_a_failed_compaction_is_shown_in_status_and_the_service_goes_on(tmp_path, monkeypatch):
    share = tmp_path / "share"
    note(share, 0)

    def disk_full(*args: Any, **kwargs: Any) -> Any:
        raise StoreError("compacting the chunks table failed: No space left on device")

    real = autocompact.compact_files
    monkeypatch.setattr(autocompact, "compact_files", disk_full)
    with service_running(tmp_path, share, settle="0.2s", compact_fragments=2) as service:
        wait_for("the first commit", lambda: commits(service) >= 1, START_DEADLINE)
        add_notes(service, share, range(1, 3))

        def failed() -> Any:
            return _get(service, "/status")["service"]["compaction"]["last_error"]

        error = wait_for("the failure in /status", failed, START_DEADLINE)
        assert "No space left on device" in error["error"]
        counted = 'upwell_failures_total{reason="compaction"} 1.0'
        wait_for("the failure counted", lambda: counted in _get(service, "/metrics"), 30)
        assert service.healthy()
        monkeypatch.setattr(autocompact, "compact_files", real)
        add_notes(service, share, range(3, 5))  # syncing went on; the next due point retries

        def compacted() -> Any:
            compaction = _get(service, "/status")["service"]["compaction"]
            return compaction if compaction["runs"] >= 1 else None

        compaction = wait_for("a compaction after the failure", compacted, START_DEADLINE)
        assert compaction["last_error"] is None


def test_watch_compacts_on_its_own_and_every_version_stays_readable(tmp_path, watches):
    share = tmp_path / "share"
    note(share, 0)
    config = make_config(tmp_path, {"share": share}, settle="0.2s", compact_fragments=4)
    w = watches(config).wait_listening()
    ix = tmp_path / "ix"

    def history() -> list[Any]:
        index = Index(ix)
        return index.history() if index.exists else []

    def add(n: int) -> None:
        had = len(history())
        note(share, n)
        wait_for(f"note {n}", lambda: len(history()) > had, START_DEADLINE)

    wait_for("the first commit", lambda: history(), START_DEADLINE)
    first = history()[-1]
    then = chunk_ids(Index(ix).search("stem bolt torque", k=10, as_of=first.id))
    add(1)
    store = Index(ix).store()
    versions_seen = {v["version"] for v in store.table("chunks").to_lance().versions()}
    for n in range(2, 5):
        add(n)

    def compaction() -> Any:
        found = w.json("/status")["service"]["compaction"]
        return found if found["runs"] >= 1 else None

    done = wait_for("an automatic compaction", compaction, START_DEADLINE)
    last = done["last"]
    assert last["tables"]["chunks"]["fragments"][0] >= 4
    assert last["tables"]["chunks"]["fragments"][1] < last["tables"]["chunks"]["fragments"][0]
    assert "compacted (" in w.text() and w.metric("upwell_compactions_total") == 1

    index = Index(ix)
    store = index.store()
    store.refresh()
    versions_now = {v["version"] for v in store.table("chunks").to_lance().versions()}
    assert versions_seen <= versions_now  # no version removed
    assert chunk_ids(index.search("stem bolt torque", k=10, as_of=first.id)) == then
    assert store.settings()[MAINTAINED_VERSIONS["chunks"]] == last["chunks_version"]
    assert not interrupted(store)
    # The next sync is an ordinary commit, not the recovery of a batch that never finished.
    had = len(index.history())
    add(5)
    newest = history()
    assert len(newest) == had + 1 and newest[0].trigger == "watch"
    assert not any(c.trigger.startswith("recover:") for c in newest)
    assert verify_index(Index(ix), drift=False).consistent
    assert w.stop() == 0
