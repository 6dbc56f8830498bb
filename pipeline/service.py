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
- SIGTERM/SIGINT stop intake, let the batch in hand commit, and return 0; what was queued but not
  synced is picked up by the reconcile at the next start. SIGHUP reloads the configuration.
"""

from __future__ import annotations

import json
import logging
import os
import signal
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, TypeVar

from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger
from watchdog.events import FileSystemEvent, FileSystemEventHandler
from watchdog.observers import Observer

from connectors.folder import path_matches

from .config import Config, SourceConfig, load_config
from .errors import ConfirmationRequired, SourceError, SyncPaused, UpwellError
from .index import Index
from .metrics import ServiceMetrics
from .sync import SyncReport

log = logging.getLogger("upwell.service")
T = TypeVar("T")

POLL_SECONDS = 0.1  # how often settling paths are re-checked
MAX_SETTLE_WAIT = 60.0  # a file written for longer than this is synced anyway, and again later


# --- logging ---------------------------------------------------------------------------------


class JsonLineFormatter(logging.Formatter):
    """One JSON object per line: time, level, message, and the record's ``fields``."""

    def format(self, record: logging.LogRecord) -> str:
        data: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created)
            .astimezone()
            .isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "message": record.getMessage(),
        }
        data.update(getattr(record, "fields", {}))
        if record.exc_info:
            data["traceback"] = self.formatException(record.exc_info)
        return json.dumps(data, ensure_ascii=False, default=str)


def configure_logging(log_format: str = "text") -> None:
    """Log lines on stderr, as plain text or JSON lines."""
    handler = logging.StreamHandler(sys.stderr)
    if log_format == "json":
        handler.setFormatter(JsonLineFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    root = logging.getLogger("upwell")
    root.handlers[:] = [handler]
    root.setLevel(logging.INFO)
    root.propagate = False


# --- the settle queue ------------------------------------------------------------------------


def _stat_signature(path: Path) -> tuple[int, int] | None:
    try:
        st = path.stat()
    except OSError:
        return None  # gone (deleted or moved out): its absence has to settle too
    return (st.st_size, st.st_mtime_ns)


@dataclass
class _Settling:
    path: Path
    first_event: float
    last_change: float
    signature: tuple[int, int] | None


class SettleQueue:
    """Paths keyed by (source, path) that become ready once they stop changing.

    ``note`` (re)arms a path; ``settled`` returns the paths whose size and mtime have not changed
    for ``settle_seconds`` since the last event. Thread-safe.
    """

    def __init__(self, settle_seconds: float, clock: Callable[[], float] = time.monotonic):
        self.settle_seconds = settle_seconds
        self._clock = clock
        self._lock = threading.Lock()
        self._items: dict[tuple[str, str], _Settling] = {}

    def note(self, source: str, path: Path) -> None:
        now = self._clock()
        signature = _stat_signature(path)
        with self._lock:
            item = self._items.get((source, str(path)))
            if item is None:
                self._items[(source, str(path))] = _Settling(path, now, now, signature)
            else:
                item.last_change, item.signature = now, signature

    def settled(self) -> list[tuple[str, Path]]:
        now = self._clock()
        with self._lock:
            items = list(self._items.items())
        ready = []
        for key, item in items:
            signature = _stat_signature(item.path)  # stat outside the lock: it may be slow
            with self._lock:
                if signature != item.signature:
                    item.signature, item.last_change = signature, now
                quiet = now - item.last_change >= self.settle_seconds
                if quiet or now - item.first_event >= MAX_SETTLE_WAIT:
                    self._items.pop(key, None)
                    ready.append((key[0], item.path))
        return ready

    def __len__(self) -> int:
        with self._lock:
            return len(self._items)


# --- the work queue --------------------------------------------------------------------------


@dataclass
class _Work:
    sources: dict[str, str] = field(default_factory=dict)  # source name -> trigger
    paths: int = 0
    maintenance: bool = False
    first_at: float | None = None


class WorkQueue:
    """What the writer has to do next: sources to sync (with their trigger) and maintenance."""

    def __init__(self) -> None:
        self._cond = threading.Condition()
        self._work = _Work()

    def add_source(self, name: str, trigger: str, paths: int = 0) -> None:
        with self._cond:
            # A watch trigger does not downgrade a pending reconcile or scheduled scan.
            self._work.sources.setdefault(name, trigger)
            self._work.paths += paths
            if self._work.first_at is None:
                self._work.first_at = time.monotonic()
            self._cond.notify_all()

    def add_maintenance(self) -> None:
        with self._cond:
            self._work.maintenance = True
            if self._work.first_at is None:
                self._work.first_at = time.monotonic()
            self._cond.notify_all()

    def take(
        self, stop: threading.Event, window: float, max_paths: int, timeout: float = 0.5
    ) -> _Work | None:
        """The pending work, once ``window`` has passed since the first of it (or it is full)."""
        with self._cond:
            deadline = time.monotonic() + timeout
            while self._work.first_at is None:
                left = deadline - time.monotonic()
                if left <= 0 or stop.is_set():
                    return None
                self._cond.wait(min(left, 0.1))
            while not stop.is_set() and self._work.paths < max_paths:
                left = self._work.first_at + window - time.monotonic()
                if left <= 0:
                    break
                self._cond.wait(left)
            work, self._work = self._work, _Work()
            return work

    def depth(self) -> int:
        with self._cond:
            return self._work.paths


# --- watching ------------------------------------------------------------------------------


class _SourceEvents(FileSystemEventHandler):
    """Feeds every path an event names (both ends of a move) into the settle queue."""

    def __init__(self, source: SourceConfig, queue: SettleQueue, on_note: Callable[[], None]):
        self.source = source
        self.root = source.path or Path(".")  # only folder sources are watched
        self.queue = queue
        self.on_note = on_note

    def on_any_event(self, event: FileSystemEvent) -> None:
        if event.event_type in ("opened", "closed_no_write"):
            return
        if event.is_directory and event.event_type == "modified":
            return  # a folder's mtime moves with every file created in it: noise
        for raw in (event.src_path, getattr(event, "dest_path", "")):
            if not raw:
                continue
            path = Path(os.fsdecode(raw))
            try:
                rel = path.relative_to(self.root).as_posix()
            except ValueError:
                continue  # the far end of a move out of (or into) the tree
            if rel == ".":
                continue
            if not event.is_directory and self._ignored(rel):
                continue
            self.queue.note(self.source.name, path)
            self.on_note()

    def _ignored(self, rel: str) -> bool:
        # Editor temp files and the like would only cause an empty sync.
        return path_matches(rel, self.source.exclude) or not path_matches(rel, self.source.include)


# --- the service ---------------------------------------------------------------------------


class Service:
    """One ``upwell watch`` process. ``run()`` blocks until stopped and returns the exit code."""

    def __init__(self, config: Config, index: Index, *, model: str | None = None) -> None:
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
        self.index_paused = threading.Event()  # the last sync was refused with SyncPaused
        self.started_at = time.time()

    # --- what the HTTP API reads ------------------------------------------------------------

    def healthy(self) -> bool:
        """Writer thread and scheduler both alive."""
        writer_ok = self._writer is not None and self._writer.is_alive()
        scheduler_ok = self._scheduler is not None and self._scheduler.running
        return bool(writer_ok and scheduler_ok and not self.stop_event.is_set())

    def paused(self) -> bool:
        """Paused by the configuration, or by a rollback that paused syncing (``upwell resume``)."""
        return self.config.service.paused or self.index_paused.is_set()

    def queue_depth(self) -> int:
        return len(self.settle) + self.work.depth()

    # --- life cycle -------------------------------------------------------------------------

    def run(self, install_signals: bool = True) -> int:
        from .http_api import start_http_server

        with self.index.writing():
            log.info(
                f"upwell watch: pid {os.getpid()}, index {self.index.path}",
                extra={"fields": {"event": "start", "pid": os.getpid()}},
            )
            if install_signals:
                signal.signal(signal.SIGTERM, self._on_stop_signal)
                signal.signal(signal.SIGINT, self._on_stop_signal)
                signal.signal(signal.SIGHUP, lambda *_: self.reload_requested.set())
            self._http = start_http_server(self, self.config.server)
            host, port = self._http.server_address[:2]
            log.info(
                f"listening on http://{host}:{port}",
                extra={"fields": {"event": "listening", "host": host, "port": port}},
            )
            self._writer = threading.Thread(target=self._writer_loop, name="writer", daemon=True)
            self._settler = threading.Thread(target=self._settle_loop, name="settle", daemon=True)
            self._start_scheduler()
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
        for observer in observers:
            observer.join(timeout=2)
        if self._http is not None:
            self._http.shutdown()
            self._http.server_close()
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
        self.config = fresh
        self.settle.settle_seconds = fresh.service.settle_seconds
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
        handler = _SourceEvents(source, self.settle, self._queue_changed)
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
                continue
            if self.config.service.paused:
                continue  # dropped: unpausing queues a reconcile, which catches up
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

    # --- writing (writer thread only) -----------------------------------------------------------

    def sync_source(self, source: SourceConfig, trigger: str) -> dict[str, Any] | None:
        """Sync one whole source; log the commit and each failure. Never raises UpwellError."""
        started = time.monotonic()
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
            self._source_failed(
                source.name, "confirmation", f"source {source.name!r} not synced", exc
            )
            return None
        except SourceError as exc:
            self._source_failed(source.name, "source_unreachable", None, exc)
            return None
        except UpwellError as exc:
            self._source_failed(source.name, "error", f"source {source.name!r}", exc)
            return None
        except Exception:
            self.metrics.record_failure("internal")
            log.exception(
                f"source {source.name!r}: unexpected error; will retry on the next event",
                extra={"fields": {"event": "failure", "source": source.name}},
            )
            return None
        self.index_paused.clear()
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
        self, source: str, reason_class: str, prefix: str | None, exc: Exception
    ) -> None:
        """Count a failed sync of a whole source and log one line for it."""
        self.metrics.record_failure(reason_class)
        log.error(
            f"{prefix}: {exc}" if prefix else str(exc),
            extra={"fields": {"event": "failure", "source": source, "reason": str(exc)}},
        )

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
