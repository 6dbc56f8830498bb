"""Automatic file compaction between the service's syncs: when it is due, and the compaction.

Every sync of a saved file is one commit, and every commit appends a small fragment (a data
file, plus a deletion file on the fragment that held the document's old chunks) to the chunks
table. A flat search reads every fragment, so search slows as they pile up; the nightly
``maintain`` merges them, and until then ``upwell watch`` does it itself:

- **when**: once ``fragments`` small fragments have been written since the last compaction,
  or ``every`` seconds after the last one if at least one has (whichever comes first);
- **not during a search burst**: a due compaction starts only once searches have been quiet
  for ``quiet`` seconds (the HTTP API notes each search in a ``SearchActivity``), and is
  retried on the writer's next turn otherwise; after ``max_wait`` seconds of waiting it starts
  anyway, so a due compaction is never put off for good by a steady stream of searches;
- **what**: files only. Small fragments are merged; no version is removed, so history,
  ``--as-of`` search and rollback see no difference (retention stays with ``maintain``). The
  chunks and tombstones versions it leaves are recorded in ``MAINTAINED_VERSIONS`` as
  ``maintain`` records its own, or the next sync would take them for a batch whose writer died.

``AutoCompactor.run`` is the one entry point: the service's writer thread calls it after each
batch and on each idle turn, and the ``many_commits`` benchmark figure calls it after each
one-document sync, so the figure measures exactly what the service does. The caller holds the
writer lock; nothing else writes meanwhile.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from pipeline.engine.recovery import recover_for_writing
from pipeline.errors import StoreError, first_line
from pipeline.store.ids import utc_now
from pipeline.store.schema import MAINTAINED_VERSIONS
from pipeline.store.tables import Store
from pipeline.store.upkeep import TIDY_MIN_FRAGMENTS

# Defaults, measured with lancedb 0.40 / pylance 14 on this 2-core machine, shared and busy, so
# each search ratio is the median of alternating pairs (old version against new, 30 queries a
# side), which a busy machine slows alike:
# - Each small fragment a flat search reads costs about 0.1 ms: with k fragments written since
#   a compaction, 1,200 chunks (3.4 ms a query): k=4 1.12x, k=8 1.21x, k=16 1.39x; the bench's
#   75 chunks (2.6-3.8 ms): k=4 1.25x, k=8 1.41x, k=16 1.67x. Its 100 one-document syncs:
#   1.79x with no compaction; with this policy 1.07x after them and 1.21-1.22x where the last
#   run fell due (two runs of the ``many_commits`` figure).
# - A run costs about 10 us per row it rewrites (a merged fragment of 2,000 rows and 8 small
#   ones: 0.04 s; 10,000: 0.10 s; 50,000: 0.50 s); on the bench's table 30-60 ms, beside the
#   85-105 ms of the one-document sync itself.
# - A run adds two versions to the chunks table and one to the settings table, and versions
#   cost every reader: the service's API re-checks each table's latest version per request,
#   0.09 ms at 100 versions, 0.5 ms at 1,000, 1.1 ms at 3,000, until retention removes them.
# So 4: the worst a search meets between two runs stays at 1.25x on the smallest table (1.12x
# at 1,200 chunks), for a run per 4 syncs (under 10 ms a sync) and half again the chunks
# versions the syncs make. At 8 the worst was 1.4-1.6x (bench 1.64x) for a quarter again.
#: A compaction is due once this many small chunks fragments were written since the last one.
AUTO_COMPACT_FRAGMENTS = 4
#: ... or this many seconds after the last one (or the service's start), if any were: a few
#: saves are not left to slow search for more than ten minutes, and an idle index is not
#: touched at all.
AUTO_COMPACT_EVERY = 600.0
#: A due compaction waits until no search has begun or ended for this long. A couple of
#: seconds is common practice for "the user paused" (a result list is read and the query
#: refined within that), and a run takes well under a second.
AUTO_COMPACT_QUIET = 2.0
#: ... but never longer than this once due: searches that never pause for ``quiet`` seconds
#: are a steady load, not a burst, and a table left uncompacted slows every one of them.
AUTO_COMPACT_MAX_WAIT = 300.0
#: Chunks fragments with at least this many rows are left to the nightly ``maintain``: the
#: automatic run then rewrites at most about this many rows (0.1 s, above). Lance's default
#: target for a compacted fragment is 1,048,576 rows (pylance's compact_files documentation).
SMALL_FRAGMENT_ROWS = 10_000
#: The other tables are rewritten in the same run once one has this many fragments: the
#: sync's own ``upkeep.tidy_small_tables`` threshold, so the run adds no versions there that
#: the sync would not; it also covers the tombstones and settings tables, which no sync tidies.
SMALL_TABLE_FRAGMENTS = TIDY_MIN_FRAGMENTS
SMALL_TABLES = ("tombstones", "documents", "commits", "settings")


@dataclass(frozen=True)
class CompactionPolicy:
    """When a compaction is due and when it may start; the ``[service]`` keys ``auto_compact``,
    ``compact_fragments``, ``compact_every`` and ``compact_quiet`` set it."""

    enabled: bool = True
    fragments: int = AUTO_COMPACT_FRAGMENTS
    every: float = AUTO_COMPACT_EVERY
    quiet: float = AUTO_COMPACT_QUIET
    max_wait: float = AUTO_COMPACT_MAX_WAIT

    @classmethod
    def from_service(cls, service: Any) -> CompactionPolicy:
        """The policy a ``[service]`` section (``config.ServiceConfig``) sets: the service and
        the benchmark both build it here, so both run the same one."""
        return cls(
            enabled=service.auto_compact,
            fragments=service.compact_fragments,
            every=service.compact_every,
            quiet=service.compact_quiet,
        )

    def due(self, new_fragments: int, since_last: float) -> str | None:
        """Why a compaction is due, given the small fragments written since the last one and
        the seconds since it; None while it is not."""
        if not self.enabled or new_fragments < 1:
            return None
        if new_fragments >= self.fragments:
            return f"{new_fragments} small fragments since the last compaction"
        if since_last >= self.every:
            return f"{new_fragments} small fragments and {since_last:.0f} s since the last one"
        return None

    def may_start(self, quiet_for: float, waited: float) -> bool:
        """Whether a due compaction may start: searches quiet for ``quiet`` seconds, or it has
        already waited ``max_wait`` seconds for that."""
        return quiet_for >= self.quiet or waited >= self.max_wait


class SearchActivity:
    """When searches arrive and whether one is running; the HTTP API wraps each search in
    ``searching()`` and the writer asks ``quiet_for()``. Thread-safe."""

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._lock = threading.Lock()
        self._running = 0
        self._last: float | None = None
        self.total = 0

    @contextmanager
    def searching(self) -> Iterator[None]:
        with self._lock:
            self._running += 1
            self._last = self._clock()
            self.total += 1
        try:
            yield
        finally:
            with self._lock:
                self._running -= 1
                self._last = self._clock()

    def quiet_for(self) -> float:
        """Seconds since the last search began or ended; 0 while one runs, inf before any."""
        with self._lock:
            if self._running:
                return 0.0
            return math.inf if self._last is None else self._clock() - self._last


def small_fragments(store: Store, small_rows: int = SMALL_FRAGMENT_ROWS) -> int:
    """The chunks table's fragments under ``small_rows`` rows (read from the manifest)."""
    ds = store.table("chunks").to_lance()
    return sum(1 for f in ds.get_fragments() if f.metadata.physical_rows < small_rows)


def compact_files(
    store: Store,
    *,
    small_rows: int = SMALL_FRAGMENT_ROWS,
    table_fragments: int = SMALL_TABLE_FRAGMENTS,
) -> dict[str, Any]:
    """Merge the chunks table's small fragments (those under ``small_rows`` rows), and each of
    ``SMALL_TABLES`` that has ``table_fragments`` or more fragments. Files only: no version is
    removed. Records the chunks and tombstones versions it leaves (``MAINTAINED_VERSIONS``).
    Returns, per table rewritten, its fragments and data files before and after."""
    done: dict[str, Any] = {}
    for name in ("chunks", *SMALL_TABLES):
        table = store.table(name)
        table.checkout_latest()
        ds = table.to_lance()
        fragments = ds.get_fragments()
        if name == "chunks":
            left_out = [f.fragment_id for f in fragments if f.metadata.physical_rows >= small_rows]
            if len(fragments) - len(left_out) < 2:
                continue
        else:
            left_out = []
            if len(fragments) < table_fragments:
                continue
        version = int(table.version)
        try:
            ds.optimize.compact_files(excluded_fragment_ids=left_out or None)
        except (ValueError, RuntimeError, OSError) as exc:
            raise StoreError(f"compacting the {name} table failed: {first_line(exc)}") from None
        table.checkout_latest()
        if int(table.version) == version:
            continue  # nothing was worth merging (Lance made no version)
        if name in MAINTAINED_VERSIONS:
            store.update_setting(MAINTAINED_VERSIONS[name], int(table.version))
        after = table.to_lance().get_fragments()
        done[name] = {
            "fragments": [len(fragments), len(after)],
            "data_files": [_data_files(fragments), _data_files(after)],
            "version": int(table.version),
        }
    return done


def _data_files(fragments: list[Any]) -> int:
    return sum(len(f.data_files()) + (f.deletion_file() is not None) for f in fragments)


class AutoCompactor:
    """The policy's state in one process: when the last compaction ran, how many small
    fragments it left, and what it did, for ``/status``. ``run`` is called by the one writer
    (the service's writer thread, or the benchmark between its syncs)."""

    def __init__(
        self,
        policy: CompactionPolicy | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.policy = policy or CompactionPolicy()
        self._clock = clock
        self._lock = threading.Lock()  # status() is read from the HTTP threads
        self._last_at = clock()  # the time trigger counts from the start
        self._left = 0  # small fragments the last compaction left (merged ones can stay small)
        self._counted: tuple[int, int] | None = None  # (chunks version, small fragments)
        self._due_since: float | None = None
        self.due_reason: str | None = None
        self.deferred = 0  # times a due compaction waited for searches to pause, in all
        self.runs = 0
        self.last: dict[str, Any] | None = None
        self.last_error: dict[str, Any] | None = None
        self.running = False

    def new_fragments(self, store: Store) -> int:
        """Small chunks fragments written since the last compaction (counted again only when
        the chunks table has a new version, so an idle check costs no read)."""
        version = store.version("chunks")
        if self._counted is None or self._counted[0] != version:
            self._counted = (version, small_fragments(store))
        small = self._counted[1]
        self._left = min(self._left, small)  # a `maintain` run merged them meanwhile
        return small - self._left

    def run(self, store: Store, searches: SearchActivity | None = None) -> dict[str, Any] | None:
        """Compact if due and searches are quiet; what was done, or None if nothing was.

        The caller holds the writer lock. Raises StoreError if the compaction fails; the next
        attempt then waits for the next due point (a failure is not retried on every turn)."""
        if not self.policy.enabled:
            return None
        now = self._clock()
        reason = self.policy.due(self.new_fragments(store), now - self._last_at)
        with self._lock:
            self.due_reason = reason
            if reason is None:
                self._due_since = None
                return None
            if self._due_since is None:
                self._due_since = now
            quiet = searches.quiet_for() if searches is not None else math.inf
            waited = now - self._due_since
            if not self.policy.may_start(quiet, waited):
                self.deferred += 1
                return None
        started = time.monotonic()
        self.running = True
        try:
            # Every writer finishes what a crashed one left first; recording the versions
            # below without it would hide an interrupted batch from the next sync.
            recover_for_writing(store, "compact")
            tables = compact_files(store)
        except Exception as exc:
            left = self._left_after(store)
            with self._lock:
                self._settle(left, now)
                self.last_error = {"at": utc_now(), "reason": reason, "error": first_line(exc)}
            if isinstance(exc, StoreError):
                raise
            raise StoreError(f"automatic compaction failed: {first_line(exc)}") from exc
        finally:
            self.running = False
        report = {
            "at": utc_now(),
            "reason": reason,
            "waited_seconds": round(waited, 3),
            "seconds": round(time.monotonic() - started, 3),
            "tables": tables,
            "chunks_version": int(store.table("chunks").version),
        }
        left = self._left_after(store)
        with self._lock:
            self._settle(left, now)
            self.runs += 1
            self.last = report
            self.last_error = None
        return report

    def worth_a_look(self) -> bool:
        """Whether an idle writer should call ``run``: a due compaction is waiting for searches
        to pause, or the time trigger has come for fragments already counted. (After a batch
        the writer calls ``run`` anyway; this keeps an idle turn free of reads.)"""
        with self._lock:
            if not self.policy.enabled:
                return False
            if self._due_since is not None:
                return True
            if self._counted is None or self._counted[1] - self._left < 1:
                return False
            return self._clock() - self._last_at >= self.policy.every

    @staticmethod
    def _left_after(store: Store) -> int:
        try:
            return small_fragments(store)
        except Exception:  # the store itself failing: count from nothing, the next run says why
            return 0

    def _settle(self, left: int, now: float) -> None:
        """After a run, done or failed: the next is due only at the next due point."""
        self._last_at = now
        self._left = left
        self._counted = None
        self._due_since = None
        self.due_reason = None

    def status(self) -> dict[str, Any]:
        """What ``/status`` shows under ``service.compaction``."""
        with self._lock:
            return {
                "enabled": self.policy.enabled,
                "policy": {
                    "fragments": self.policy.fragments,
                    "every_seconds": self.policy.every,
                    "quiet_seconds": self.policy.quiet,
                    "max_wait_seconds": self.policy.max_wait,
                },
                "running": self.running,
                "due": self.due_reason,
                "waiting_seconds": (
                    round(self._clock() - self._due_since, 3)
                    if self._due_since is not None
                    else None
                ),
                "deferred": self.deferred,
                "runs": self.runs,
                "last": self.last,
                "last_error": self.last_error,
            }
