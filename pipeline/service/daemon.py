"""``upwell watch``: watchers, a settle queue, schedules and one writer, in one process.

    watchdog observers ──path──▶ SettleQueue ──settled paths──▶ WorkQueue ──▶ the writer thread
    APScheduler (scans, reconcile, maintenance) ─────────────────▶ WorkQueue

Guarantees:

- Only the writer thread writes, and the process holds the index's writer lock for its whole
  life, so a second writer (watch or sync) exits with code 4.
- A path is handed on only once its size and mtime have stayed still for the settle time, so a
  file still being written is not read half-way (hundreds of modified events become one sync).
- A batch syncs the *whole* source the settled paths belong to, never a listing narrowed to those
  paths: the engine treats "not listed" as removed, and a whole-source listing is stat-only and
  cheap. That also covers every event shape watchdog 7 produces here: save-by-rename (the
  original gets no modified event, but the rename's destination is queued), ``cp`` over a file
  (modified only), ``mv`` in (created only), ``mv`` out (deleted late), a folder moved in.
- Write commands (``rollback``, ``resume``, ``tag``, ``erase``, ``maintain``, ...) run by hand
  while the service runs are handed to it over its owner-only control socket
  (``pipeline.service.control``) and run in the writer thread between two batches, with the
  caller's prompts and output. A rollback with ``--pause`` stops syncing at once; ``resume``
  lifts it and queues a reconcile.
- Between batches, and on idle turns while one is waiting, the writer merges the chunks table's
  small data files once that is due and searches have paused (``pipeline.engine.autocompact``:
  files only, no version removed); ``/status`` shows the last run under ``service.compaction``.
- SIGTERM/SIGINT stop intake, let the batch in hand commit, and return 0; what was queued but not
  synced is picked up by the reconcile at the next start. SIGHUP reloads the configuration.
"""

from __future__ import annotations

import errno
import logging
import os
import signal
import threading
import time
from collections.abc import Callable
from typing import Any

from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger
from watchdog.observers import Observer

from pipeline.config import Config, SourceConfig, load_config
from pipeline.console.views import Live
from pipeline.engine.autocompact import AutoCompactor, CompactionPolicy, SearchActivity
from pipeline.engine.reports import SyncReport
from pipeline.errors import ConfirmationRequired, SourceError, SyncPaused, UpwellError
from pipeline.history import PAUSED
from pipeline.index import Index
from pipeline.service.control import ControlServer, Session
from pipeline.service.metrics import ServiceMetrics
from pipeline.service.watching import POLL_SECONDS, SettleQueue, SourceEvents, WorkQueue

log = logging.getLogger("upwell.service")

# --- the service ---------------------------------------------------------------------------


class Service:
    """One ``upwell watch`` process. ``run()`` blocks until stopped and returns the exit code."""

    def __init__(
        self,
        config: Config,
        index: Index,
        *,
        model: str | None = None,
        commands: Callable[[Session, Config], int] | None = None,
    ) -> None:
        """``commands(session, config)`` runs a write command handed over on the control
        socket (the command line supplies it); without it the socket is not opened."""
        self.config = config
        self.index = index
        self.model = model
        self.metrics = ServiceMetrics()
        self.stop_event = threading.Event()
        self.reload_requested = threading.Event()
        self.settle = SettleQueue(config.service.settle_seconds)
        self.work = WorkQueue()
        self.index.batch_documents = config.service.batch_documents
        self._observers: dict[str, Any] = {}
        # reload (main thread) and the hourly reconcile (scheduler thread) both start observers
        self._observers_lock = threading.RLock()
        self._scheduler: BackgroundScheduler | None = None
        self._writer: threading.Thread | None = None
        self._settler: threading.Thread | None = None
        self._http: Any = None
        self.busy = threading.Event()  # set while the writer is inside a sync
        self._failing: dict[str, str] = {}  # source -> why its last sync failed
        self._failing_class: dict[str, str] = {}  # source -> the failure's reason class
        self._syncing: str | None = None  # the source the writer is syncing now
        self.index_paused = threading.Event()  # the last sync was refused with SyncPaused
        self.started_at = time.time()
        self._commands = commands
        self._control: ControlServer | None = None
        # The HTTP API notes each search here; the writer compacts only once they pause.
        self.searches = SearchActivity()
        self.compactor = AutoCompactor(CompactionPolicy.from_service(config.service))
        self._compaction_waiting_logged = False

    # --- what the HTTP API reads ------------------------------------------------------------

    def healthy(self) -> bool:
        """Writer thread and scheduler both alive."""
        return not self.problems()

    def problems(self) -> list[str]:
        """Why the service is not healthy, one line each; empty when it is."""
        found = []
        if self._writer is None or not self._writer.is_alive():
            found.append("the writer thread is not running")
        # ``running`` is the scheduler's state flag and stays true if its thread dies, so the
        # thread itself is checked (BackgroundScheduler keeps it as ``_thread``).
        thread = getattr(self._scheduler, "_thread", None)
        if self._scheduler is None or not self._scheduler.running or thread is None:
            found.append("the scheduler is not running")
        elif not thread.is_alive():
            found.append("the scheduler's thread has died: scheduled rescans no longer run")
        if self.stop_event.is_set():
            found.append("the service is stopping")
        return found

    def paused(self) -> bool:
        """Paused by the configuration, or by a rollback that paused syncing (``upwell resume``)."""
        return self.config.service.paused or self.index_paused.is_set()

    def queue_depth(self) -> int:
        return len(self.settle) + self.work.depth()

    def live(self) -> Live:
        """What the console and ``/status`` show of the service beside the index's own record."""
        return Live(
            watching=True,
            paused=self.paused(),
            writing=self.busy.is_set(),
            syncing=self._syncing,
            queue_depth=self.queue_depth(),
            failing={
                name: (self._failing_class.get(name, "error"), why)
                for name, why in self.failing_sources().items()
            },
            kinds={s.name: s.kind for s in self.config.sources},
            problems=self.problems(),
            started_at=self.started_at,
            cluster=self.index.cluster_status(),
            compaction=self.compactor.status(),
        )

    # --- life cycle -------------------------------------------------------------------------

    def run(self, install_signals: bool = True) -> int:
        from pipeline.service.api import start_http_server

        with self.index.writing():
            log.info(
                f"upwell watch: pid {os.getpid()}, index {self.index.path}",
                extra={"fields": {"event": "start", "pid": os.getpid()}},
            )
            if install_signals:
                signal.signal(signal.SIGTERM, self._on_stop_signal)
                signal.signal(signal.SIGINT, self._on_stop_signal)
                signal.signal(signal.SIGHUP, lambda *_: self.reload_requested.set())
            self._refresh_pause()
            # Big batches (a first build, a reconcile after downtime) go to the cluster, reached
            # on first need; small ones, and every batch while it cannot be reached, stay here.
            self.index.set_cluster(self.config.cluster, fallback=True)
            self._http = start_http_server(self, self.config.server)
            host, port = self._http.server_address[:2]
            log.info(
                f"listening on http://{host}:{port}",
                extra={"fields": {"event": "listening", "host": host, "port": port}},
            )
            self._writer = threading.Thread(target=self._writer_loop, name="writer", daemon=True)
            self._settler = threading.Thread(target=self._settle_loop, name="settle", daemon=True)
            self._start_scheduler()
            if self._commands is not None:
                self._control = ControlServer(self.index.path, self.work.add_command)
                run_command = self._commands
                self._control.start(lambda session: run_command(session, self.config))
            self._apply_sources({}, {s.name: s for s in self.config.sources})
            self.reconcile("start")
            self._writer.start()
            self._settler.start()
            while not self.stop_event.is_set():
                self.stop_event.wait(0.2)
                if self.reload_requested.is_set():
                    self.reload_requested.clear()
                    self.reload()
            return self._shutdown()

    def _on_stop_signal(self, signum: int, frame: Any) -> None:
        self.stop_event.set()

    def _shutdown(self) -> int:
        log.info(
            "stopping: intake closed, finishing the batch in hand",
            extra={"fields": {"event": "stopping"}},
        )
        with self._observers_lock:
            observers = list(self._observers.values())
        for observer in observers:
            observer.stop()
        if self._scheduler is not None:
            self._scheduler.shutdown(wait=False)
        if self._writer is not None:
            self._writer.join(timeout=60)
        if self._control is not None:
            self._control.stop()
        for observer in observers:
            observer.join(timeout=2)
        if self._http is not None:
            self._http.shutdown()
            self._http.server_close()
        self.index.close_cluster()
        log.info("stopped", extra={"fields": {"event": "stopped"}})
        return 0

    def reconcile(self, trigger: str = "reconcile") -> None:
        """Queue a full sync of every configured source (repairs missed or overflowed events)."""
        for source in self.config.sources:
            self.work.add_source(source.name, trigger)
        self._watch_missing()

    def reload(self) -> None:
        """Re-read the configuration file; add and remove sources without a restart."""
        if self.config.file is None:
            return
        try:
            fresh = load_config(self.config.file)
        except UpwellError as exc:
            log.error(
                f"reload refused, keeping the running configuration: {exc}",
                extra={"fields": {"event": "reload_failed", "reason": str(exc)}},
            )
            return
        if fresh.index_path not in (None, self.config.index_path):
            log.warning(
                "index.path changed; that takes a restart, the rest is applied",
                extra={"fields": {"event": "reload_warning"}},
            )
        before = {s.name: s for s in self.config.sources}
        after = {s.name: s for s in fresh.sources}
        was_paused = self.config.service.paused
        if fresh.cluster != self.config.cluster:
            self.index.set_cluster(fresh.cluster, fallback=True)
        self.config = fresh
        self.settle.settle_seconds = fresh.service.settle_seconds
        self.compactor.policy = CompactionPolicy.from_service(fresh.service)
        self.index.batch_documents = fresh.service.batch_documents
        self._apply_sources(before, after)
        self._schedule_jobs()
        log.info(
            f"configuration reloaded: {len(after)} sources",
            extra={"fields": {"event": "reloaded", "sources": sorted(after)}},
        )
        for name in after:
            if name not in before or after[name] != before[name]:
                self.work.add_source(name, "reconcile")
        if was_paused and not fresh.service.paused:
            self.reconcile()

    # --- sources and observers ----------------------------------------------------------------

    def _apply_sources(
        self, before: dict[str, SourceConfig], after: dict[str, SourceConfig]
    ) -> None:
        with self._observers_lock:
            self._apply_sources_locked(before, after)

    def _apply_sources_locked(
        self, before: dict[str, SourceConfig], after: dict[str, SourceConfig]
    ) -> None:
        for name, source in before.items():
            if name not in after or after[name] != source:
                self._unwatch(name)
        for name, source in after.items():
            if source.watch and name not in self._observers:
                self._watch(source)

    def _watch(self, source: SourceConfig) -> None:
        observer = Observer()
        handler = SourceEvents(source, self.settle, self._queue_changed)
        try:
            observer.schedule(handler, str(source.path), recursive=True)
            observer.start()
        except OSError as exc:
            self.metrics.record_failure("source_unreachable")
            log.error(
                f"cannot watch source {source.name!r} at {source.path}: {exc}; "
                "retrying at the next reconcile",
                extra={"fields": {"event": "watch_failed", "source": source.name}},
            )
            return
        observer.name = f"watch-{source.name}"
        self._observers[source.name] = observer

    def _unwatch(self, name: str) -> None:
        with self._observers_lock:
            observer = self._observers.pop(name, None)
        if observer is not None:
            observer.stop()
            observer.join(timeout=2)

    def _watch_missing(self) -> None:
        with self._observers_lock:
            self._watch_missing_locked()

    def _watch_missing_locked(self) -> None:
        for source in self.config.sources:
            observer = self._observers.get(source.name)
            if observer is not None and not observer.is_alive():
                self._observers.pop(source.name)  # the watched folder went away
                observer = None
            if source.watch and observer is None and source.path and source.path.is_dir():
                self._watch(source)

    def _queue_changed(self) -> None:
        self.metrics.queue_depth.set(self.queue_depth())

    # --- schedules ----------------------------------------------------------------------------

    def _start_scheduler(self) -> None:
        self._scheduler = BackgroundScheduler(daemon=True)
        self._schedule_jobs()
        self._scheduler.start()

    def _schedule_jobs(self) -> None:
        scheduler = self._scheduler
        if scheduler is None:
            return
        for job in scheduler.get_jobs():
            job.remove()
        common = {"coalesce": True, "max_instances": 1, "misfire_grace_time": 300}
        scheduler.add_job(
            self.reconcile,
            IntervalTrigger(seconds=self.config.service.reconcile_every),
            id="reconcile",
            **common,
        )
        hour, minute = (int(x) for x in self.config.service.maintenance_at.split(":"))
        scheduler.add_job(
            self.work.add_maintenance,
            CronTrigger(hour=hour, minute=minute),
            id="maintenance",
            **common,
        )
        for source in self.config.sources:
            if source.every:
                scheduler.add_job(
                    self.work.add_source,
                    IntervalTrigger(seconds=source.every),
                    args=[source.name, "schedule"],
                    id=f"scan-{source.name}",
                    **common,
                )

    # --- the two worker threads -----------------------------------------------------------------

    def _settle_loop(self) -> None:
        while not self.stop_event.is_set():
            ready = self.settle.settled()
            per_source: dict[str, int] = {}
            for source, _path in ready:
                per_source[source] = per_source.get(source, 0) + 1
            for source, n in per_source.items():
                self.work.add_source(source, "watch", paths=n)
            self.metrics.queue_depth.set(self.queue_depth())
            self.stop_event.wait(POLL_SECONDS)

    def _writer_loop(self) -> None:
        service = self.config.service
        while not self.stop_event.is_set():
            work = self.work.take(self.stop_event, service.batch_seconds, service.batch_documents)
            if work is None:
                if self.compactor.worth_a_look():
                    self.compact_if_due()
                continue
            for command in work.commands:
                self.busy.set()
                try:
                    self.run_command(command)
                finally:
                    self.busy.clear()
            if self.paused():
                # dropped: unpausing queues a reconcile, which catches up
                if work.sources:
                    why = "by a rollback" if self.index_paused.is_set() else "by the configuration"
                    names = ", ".join(sorted(work.sources))
                    log.info(
                        f"syncing is paused {why}: skipped syncing {names}",
                        extra={
                            "fields": {"event": "skipped_paused", "sources": sorted(work.sources)}
                        },
                    )
                continue
            configured = {s.name: s for s in self.config.sources}
            self.busy.set()
            try:
                for name, trigger in work.sources.items():
                    if self.stop_event.is_set():
                        break
                    if name in configured:
                        self.sync_source(configured[name], trigger)
                if work.maintenance and not self.stop_event.is_set():
                    self.maintain()
            finally:
                self.busy.clear()
            self.metrics.queue_depth.set(self.queue_depth())
            self.compact_if_due()

    # --- writing (writer thread only) -----------------------------------------------------------

    def run_command(self, command: Callable[[], None]) -> None:
        """A write command handed over on the control socket; then whatever pause it set or
        lifted takes effect before the next batch."""
        was_paused = self.index_paused.is_set()
        command()
        self._refresh_pause()
        if was_paused and not self.index_paused.is_set():
            self.reconcile("resume")  # bring the index in line with the sources again

    def _refresh_pause(self) -> None:
        """Follow the index's own pause flag (set by ``rollback --pause``)."""
        try:
            paused = self.index.exists and bool(self.index.store().settings().get(PAUSED))
        except UpwellError:
            return
        if paused and not self.index_paused.is_set():
            log.warning(
                "syncing is paused by a rollback; `upwell resume` lifts the pause",
                extra={"fields": {"event": "paused"}},
            )
        (self.index_paused.set if paused else self.index_paused.clear)()

    def sync_source(self, source: SourceConfig, trigger: str) -> dict[str, Any] | None:
        """Sync one whole source; log the commit and each failure. Never raises UpwellError."""
        started = time.monotonic()
        self._syncing = source.name
        try:
            result = self.index.sync(
                [source.connector(self.index.state_root)],
                trigger=trigger,
                # Once stopping, no new batch starts; the batch in hand finishes and commits.
                should_stop=self.stop_event.is_set,
            )
        except SyncPaused as exc:
            if not self.index_paused.is_set():
                log.warning(str(exc), extra={"fields": {"event": "paused", "reason": str(exc)}})
            self.index_paused.set()
            return None
        except ConfirmationRequired as exc:
            # An emptied share (a mount point left without its mount) lands here: the status
            # records it too, since the sync itself could not.
            self._source_failed(
                source.name,
                "confirmation",
                f"source {source.name!r} not synced",
                exc,
                record=f"not synced: {exc}",
            )
            return None
        except SourceError as exc:
            self._source_failed(source.name, "source_unreachable", None, exc)
            return None
        except UpwellError as exc:
            self._source_failed(source.name, "error", f"source {source.name!r}", exc)
            return None
        except Exception as exc:
            if _is_disk_full(exc):
                # The batch failed whole (a commit lands entirely or not at all): the index is
                # at its previous version. Say so where people look, and go on; the next event
                # or scan retries, and recovery cleans up what the failed batch half wrote.
                self._source_failed(
                    source.name,
                    "disk_full",
                    f"source {source.name!r}",
                    exc,
                    record=f"not synced, the disk is full: {exc}",
                )
                return None
            self.metrics.record_failure("internal")
            log.exception(
                f"source {source.name!r}: unexpected error; will retry on the next event",
                extra={"fields": {"event": "failure", "source": source.name}},
            )
            return None
        finally:
            self._syncing = None
        self.index_paused.clear()
        self._failing.pop(source.name, None)
        seconds = time.monotonic() - started
        report = result.as_dict()
        self.metrics.record_sync(report, seconds)
        self._log_report(source.name, trigger, result, seconds)
        try:
            self.metrics.record_totals(self.index.status())
        except UpwellError:
            pass
        return report

    def _source_failed(
        self,
        source: str,
        reason_class: str,
        prefix: str | None,
        exc: Exception,
        *,
        record: str | None = None,
    ) -> None:
        """Count a failed sync of a whole source, log one line for it, and keep the reason for
        /healthz until the source syncs again. ``record``: also write it to the index's
        status, for a failure the sync itself did not record there."""
        self.metrics.record_failure(reason_class)
        log.error(
            f"{prefix}: {exc}" if prefix else str(exc),
            extra={"fields": {"event": "failure", "source": source, "reason": str(exc)}},
        )
        self._failing[source] = record or str(exc)
        self._failing_class[source] = reason_class
        if record is not None:
            try:
                self.index.record_source_error(source, record)
            except (OSError, UpwellError):
                pass  # a full disk may refuse this write too; the log line stands

    def failing_sources(self) -> dict[str, str]:
        """Source -> why its last sync failed, for the sources failing now."""
        return dict(sorted(self._failing.items()))

    def _log_report(self, source: str, trigger: str, result: SyncReport, seconds: float) -> None:
        """A line per commit of the sync (logged when the sync returns), a line per failure."""
        for commit in result.commits:
            d, c = commit.counts.documents, commit.counts.chunks
            log.info(
                f"commit {commit.commit_id} (version {commit.version}) source={source} "
                f"trigger={trigger}: {d['added']} added, {d['modified']} modified, "
                f"{d['removed']} removed, {d['moved']} moved, {d['failed']} failed; "
                f"{c['embedded']} chunks embedded, {c['reused']} reused, {c['deleted']} deleted",
                extra={
                    "fields": {
                        "event": "commit",
                        "source": source,
                        "trigger": trigger,
                        "commit": commit.commit_id,
                        "version": commit.version,
                        "documents": dict(d),
                        "chunks": dict(c),
                    }
                },
            )
        log.info(
            f"synced source={source} trigger={trigger}: {len(result.commits)} commits "
            f"in {seconds:.2f}s",
            extra={
                "fields": {
                    "event": "synced",
                    "source": source,
                    "trigger": trigger,
                    "commits": len(result.commits),
                    "seconds": round(seconds, 3),
                }
            },
        )
        for f in result.failures:
            log.warning(
                f"failed {f.source}/{f.path}: {f.reason}",
                extra={"fields": {"event": "failure", **f.as_dict()}},
            )

    def compact_if_due(self) -> dict[str, Any] | None:
        """Merge small data files if that is due and searches have paused (writer thread only,
        between batches, so never during a commit). Logs what it did; a failure is logged,
        counted and shown in /status, never raised: the next due point tries again."""
        if self.paused() or self.stop_event.is_set():
            return None  # paused: nothing is written, and syncs add no fragments meanwhile
        deferred = self.compactor.deferred
        try:
            store = self.index.store()
        except UpwellError:
            return None  # no index yet
        try:
            report = self.compactor.run(store, self.searches)
        except Exception as exc:
            self._compaction_waiting_logged = False
            self.metrics.record_failure("compaction")
            log.error(
                f"automatic compaction failed: {exc}; tried again when next due",
                extra={"fields": {"event": "failure", "reason": str(exc)}},
            )
            return None
        finally:
            if self.compactor.deferred > deferred:
                self.metrics.compactions_deferred.inc(self.compactor.deferred - deferred)
        if report is None:
            if self.compactor.deferred > deferred and not self._compaction_waiting_logged:
                self._compaction_waiting_logged = True
                log.info(
                    f"compaction due ({self.compactor.due_reason}): waiting for searches to pause",
                    extra={"fields": {"event": "compaction_waiting"}},
                )
            return None
        self._compaction_waiting_logged = False
        self.metrics.record_compaction()
        merged = ", ".join(
            f"{name} {t['fragments'][0]} -> {t['fragments'][1]} fragments"
            for name, t in report["tables"].items()
        )
        log.info(
            f"compacted ({report['reason']}): {merged or 'nothing to merge'} in "
            f"{report['seconds']:.2f}s; no version removed",
            extra={"fields": {"event": "compaction", **report}},
        )
        return report

    def maintain(self) -> None:
        """Run the index's maintenance, if this version of the engine has one."""
        maintain = getattr(self.index, "maintain", None)
        if maintain is None:
            log.info(
                "maintenance skipped: this index has no maintenance step yet",
                extra={"fields": {"event": "maintenance_skipped"}},
            )
            return
        started = time.monotonic()
        try:
            # Unattended, so no one can confirm: the configured retention is the consent.
            maintain(keep_days=self.config.service.keep_days, yes=True)
        except Exception as exc:  # maintenance never takes the service down
            self.metrics.record_failure("maintenance")
            log.error(
                f"maintenance failed: {exc}",
                extra={"fields": {"event": "failure", "reason": str(exc)}},
            )
            return
        log.info(
            f"maintenance done in {time.monotonic() - started:.1f}s",
            extra={"fields": {"event": "maintenance"}},
        )


def _is_disk_full(exc: BaseException) -> bool:
    """ENOSPC, as the OS raises it or as LanceDB passes on its message."""
    if isinstance(exc, OSError) and exc.errno == errno.ENOSPC:
        return True
    return "no space left on device" in str(exc).lower()
