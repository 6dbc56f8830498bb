"""The one-writer rule: a file lock in the index folder.

Any process that writes (sync, watch, rollback, maintenance) holds it for the whole run; readers
(search, status, history) never take it. A second writer fails at once with the holder's pid
instead of waiting or interleaving commits.

An index on object storage (``s3://bucket/prefix``) has no folder to lock, and object storage
offers no lock a file-lock library can use. Its lock is a local file keyed by the URI under
``$XDG_CACHE_HOME/upwell/locks`` (default ``~/.cache/upwell/locks``): it keeps a second writer
on the same machine out. Across machines the rule is operational: one writer per index (one
machine runs ``upwell watch`` or ``sync`` for it); any number of machines may search it.
"""

from __future__ import annotations

import hashlib
import os
import re
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from filelock import FileLock, Timeout

from pipeline.errors import IndexLocked
from pipeline.locations import is_remote

LOCK_NAME = ".writer.lock"
PID_NAME = ".writer.pid"
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def uri_key(uri: str) -> str:
    """A file name that stands for one index URI: readable, and unique by its hash."""
    readable = _UNSAFE.sub("_", uri.split("://", 1)[-1]).strip("_")[:80]
    return f"{readable}-{hashlib.sha256(uri.encode('utf-8')).hexdigest()[:16]}"


def machine_folder(purpose: str) -> Path:
    """``$XDG_CACHE_HOME/upwell/PURPOSE`` (XDG Base Directory spec: default ``~/.cache``)."""
    cache = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(cache) / "upwell" / purpose


def lock_files(index_path: str | os.PathLike[str]) -> tuple[Path, Path]:
    """(lock file, pid file) of an index: in its folder, or keyed by its URI on this machine."""
    if is_remote(index_path):
        key = uri_key(os.fspath(index_path))
        folder = machine_folder("locks")
        return folder / f"{key}.lock", folder / f"{key}.pid"
    folder = Path(index_path)
    return folder / LOCK_NAME, folder / PID_NAME


def holder_pid(index_path: str | os.PathLike[str]) -> int | None:
    try:
        return int(lock_files(index_path)[1].read_text().strip())
    except (OSError, ValueError):
        return None


@contextmanager
def writer_lock(index_path: str | os.PathLike[str]) -> Iterator[None]:
    """Hold the index's writer lock; IndexLocked (exit code 4) if another process has it.

    For an index on object storage this excludes writers on this machine only (see above).
    """
    lock_file, pid_file = lock_files(index_path)
    lock_file.parent.mkdir(parents=True, exist_ok=True)
    lock = FileLock(str(lock_file), timeout=0)
    try:
        lock.acquire()
    except Timeout:
        pid = holder_pid(index_path)
        who = f"process {pid}" if pid else "another process"
        raise IndexLocked(
            f"the index at {os.fspath(index_path)} is being written by {who}; wait for it to "
            "finish (readers such as search and status work meanwhile)"
        ) from None
    try:
        pid_file.write_text(f"{os.getpid()}\n")
        yield
    finally:
        try:
            pid_file.unlink()
        except OSError:
            pass
        lock.release()
