"""The one-writer rule: a file lock in the index folder.

Any process that writes (sync, watch, rollback, maintenance) holds it for the whole run; readers
(search, status, history) never take it. A second writer fails at once with the holder's pid
instead of waiting or interleaving commits.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from filelock import FileLock, Timeout

from .errors import IndexLocked

LOCK_NAME = ".writer.lock"
PID_NAME = ".writer.pid"


def holder_pid(index_path: str | os.PathLike[str]) -> int | None:
    try:
        return int((Path(index_path) / PID_NAME).read_text().strip())
    except (OSError, ValueError):
        return None


@contextmanager
def writer_lock(index_path: str | os.PathLike[str]) -> Iterator[None]:
    """Hold the index's writer lock; IndexLocked (exit code 4) if another process has it."""
    folder = Path(index_path)
    folder.mkdir(parents=True, exist_ok=True)
    lock = FileLock(str(folder / LOCK_NAME), timeout=0)
    try:
        lock.acquire()
    except Timeout:
        pid = holder_pid(folder)
        who = f"process {pid}" if pid else "another process"
        raise IndexLocked(
            f"the index at {folder} is being written by {who}; wait for it to finish "
            "(readers such as search and status work meanwhile)"
        ) from None
    try:
        (folder / PID_NAME).write_text(f"{os.getpid()}\n")
        yield
    finally:
        try:
            (folder / PID_NAME).unlink()
        except OSError:
            pass
        lock.release()
