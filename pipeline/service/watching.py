"""From file-system events to settled paths, and the queue of work for the one writer."""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from watchdog.events import FileSystemEvent, FileSystemEventHandler

from connectors.folder import path_matches
from pipeline.config import SourceConfig

POLL_SECONDS = 0.1  # how often settling paths are re-checked
MAX_SETTLE_WAIT = 60.0  # a file written for longer than this is synced anyway, and again later


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
    commands: list[Callable[[], None]] = field(default_factory=list)  # run before the syncs
    first_at: float | None = None


class WorkQueue:
    """What the writer has to do next: commands handed over by the command line, sources to
    sync (with their trigger) and maintenance."""

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

    def add_command(self, run: Callable[[], None]) -> None:
        """A command for the writer; it does not wait for the batch window."""
        with self._cond:
            self._work.commands.append(run)
            if self._work.first_at is None:
                self._work.first_at = time.monotonic()
            self._cond.notify_all()

    def take(
        self, stop: threading.Event, window: float, max_paths: int, timeout: float = 0.5
    ) -> _Work | None:
        """The pending work, once ``window`` has passed since the first of it (or it is full,
        or a command is waiting)."""
        with self._cond:
            deadline = time.monotonic() + timeout
            while self._work.first_at is None:
                left = deadline - time.monotonic()
                if left <= 0 or stop.is_set():
                    return None
                self._cond.wait(min(left, 0.1))
            while not stop.is_set() and self._work.paths < max_paths and not self._work.commands:
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


class SourceEvents(FileSystemEventHandler):
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
