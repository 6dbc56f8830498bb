"""Extraction, chunking and embedding on a Dask cluster, while one writer commits.

    writer (holds the lock)                              workers (dask.distributed)
    lists sources, decides what changed ──documents──▶  read the bytes (or take the ones
                                                         sent), hash, extract, chunk
    keeps what the vector cache has   ◀──chunk texts──┘
    sends only new texts, 64 a task   ──texts──────▶   embed with the worker's own model
    commits each batch as in process  ◀──vectors─────┘

Nothing here decides what changed or writes a table: the engine does both exactly as it does in
process, so readers see the same atomic commits. The worker functions are module-level so
Dask pickles them by name, and each worker process loads its model once (``_model``).

A worker reads a document itself where it can reach the source: a folder source is read at the
same path (shared storage, or the same machine for a LocalCluster). Every other source, and
every source when ``ship_bytes`` is set, is read by the writer, which sends the bytes.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from functools import cache
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import formats
from pipeline.chunking import chunk_segments
from pipeline.embedding import make_embedder
from pipeline.errors import ExtractionError, UpwellError, UsageError
from pipeline.hashing import sha256_hex
from pipeline.records import ChunkSettings, ClusterSettings, Limits, SourceItem

log = logging.getLogger("upwell.engine")

EMBED_TEXTS_PER_TASK = 64  # the batch the in-process path embeds too
CONNECT_SECONDS = 10.0


class ClusterError(UpwellError):
    """The cluster cannot be reached, was lost mid-build, or does not match this writer."""


# --- what a worker runs ----------------------------------------------------------------------


@cache
def code_id() -> str:
    """The installed upwell version and a digest of its code: two processes with the same id
    extract, chunk and embed identically."""
    root = Path(__file__).resolve().parents[2]
    digest = hashlib.sha256()
    for package in ("pipeline", "connectors"):
        for path in sorted((root / package).rglob("*.py")):
            digest.update(str(path.relative_to(root)).encode())
            digest.update(path.read_bytes())
    try:
        version = metadata.version("upwell")
    except metadata.PackageNotFoundError:
        version = "unknown"
    return f"upwell {version} (code {digest.hexdigest()[:12]})"


_models: dict[str, Any] = {}


def _model(spec: str) -> Any:
    """This process's embedder for ``spec``, loaded on first use and kept."""
    if spec not in _models:
        _models[spec] = make_embedder(spec)
    return _models[spec]


def worker_identity(spec: str) -> dict[str, str]:
    """What the writer compares before it sends any work."""
    return {"code": code_id(), "model": _model(spec).model_id, "pid": str(os.getpid())}


@dataclass(frozen=True)
class Job:
    """One document for a worker: its item, and its bytes unless the worker reads them."""

    item: SourceItem
    source: Any  # the connector to read through, or None when ``data`` is given
    data: bytes | None
    read_error: str | None  # the writer's read failed: nothing to do but report it
    same_as: str | None  # the stored content hash: equal bytes need no extraction
    ocr: bool


def prepare_document(
    item: SourceItem,
    read: Callable[[], bytes],
    same_as: str | None,
    *,
    ocr: bool,
    limits: Limits,
    chunking: ChunkSettings,
    tokens: Any,
    budget: int,
) -> dict[str, Any]:
    """Read, hash, extract and chunk one document; bad input is a result, never an exception.
    What a cluster worker (``extract_job``) and the in-process producer thread both run.

    ``same_as`` is the stored content hash: equal bytes need no extraction. The result has
    ``error`` (and ``content_hash`` once the bytes were read), or ``content_hash`` and ``same``,
    or ``content_hash``, ``extracted`` and ``chunks``."""
    try:
        data = read()
    except ExtractionError as exc:
        return {"error": str(exc)}
    content_hash = sha256_hex(data)
    if same_as == content_hash:
        return {"content_hash": content_hash, "same": True}
    try:
        extracted = formats.extract(item.key, data, limits if ocr else replace(limits, ocr=False))
        chunks = chunk_segments(item.doc_id, extracted.segments, tokens, chunking, budget)
    except ExtractionError as exc:
        return {"error": str(exc), "content_hash": content_hash}
    return {"content_hash": content_hash, "extracted": extracted, "chunks": chunks}


def extract_job(spec: str, chunking: ChunkSettings, limits: Limits, job: Job) -> dict[str, Any]:
    """Read (or take), hash, extract and chunk one document on a worker; never raises for bad
    input."""
    if job.read_error is not None:
        return {"error": job.read_error}
    data = job.data
    if data is None:
        root = getattr(job.source, "root", None)
        if root is not None and not Path(root).is_dir():
            return {"unreachable": f"the folder {root} is not there on this worker"}

    def read() -> bytes:
        return data if data is not None else job.source.read(job.item.key, limits.max_file_bytes)

    embedder = _model(spec)
    return prepare_document(
        job.item,
        read,
        job.same_as,
        ocr=job.ocr,
        limits=limits,
        chunking=chunking,
        tokens=embedder.tokens,
        budget=embedder.max_input_tokens,
    )


def embed_job(spec: str, texts: list[str]) -> np.ndarray:
    return np.asarray(_model(spec).embed(texts), dtype=np.float32)


# --- the writer's side -----------------------------------------------------------------------


class Prepared:
    """The extraction futures of one batch, taken in the batch's order."""

    def __init__(self, cluster: Cluster, futures: dict[str, Any]) -> None:
        self._cluster = cluster
        self._futures = futures

    def take(self, item: SourceItem) -> dict[str, Any]:
        future = self._futures.pop(item.doc_id)
        result = self._cluster.result(future)
        if "unreachable" in result:
            self.cancel()
            raise ClusterError(
                f"a worker cannot read {item.doc_id}: {result['unreachable']}; mount the "
                "source at the same path on every worker, or set [cluster] ship_bytes = true "
                "so the writer sends the bytes"
            )
        return result

    def cancel(self) -> None:
        if self._futures:
            self._cluster.client.cancel(list(self._futures.values()))
            self._futures.clear()


class Cluster:
    """A Dask client with upwell's two stages; ``close()`` stops a cluster it started."""

    def __init__(self, settings: ClusterSettings, spec: str, model_id: str) -> None:
        from distributed import Client, LocalCluster

        self.settings = settings
        self.spec = spec
        self._local: Any = None
        # Seconds the writer spent waiting on workers: the rest of a build is the writer's own
        # work, which bounds how many workers one writer can keep busy.
        self.waited = 0.0
        try:
            if settings.address:
                self.client = Client(settings.address, timeout=CONNECT_SECONDS)
            else:
                self._local = LocalCluster(
                    n_workers=int(settings.workers or 1),
                    threads_per_worker=1,
                    processes=True,
                    host="127.0.0.1",
                    dashboard_address=None,
                    silence_logs=logging.ERROR,
                )
                self.client = Client(self._local, timeout=CONNECT_SECONDS)
        except (OSError, TimeoutError) as exc:
            self.close()
            raise ClusterError(
                f"cannot reach {settings.describe()}: {exc}; nothing was read or changed"
            ) from None
        try:
            self.client.wait_for_workers(1, timeout=CONNECT_SECONDS * 6)
            self._check_workers(model_id)
        except BaseException:
            self.close()
            raise

    @property
    def address(self) -> str:
        return str(self.client.scheduler.address)

    def _check_workers(self, model_id: str) -> None:
        mine = {"code": code_id(), "model": model_id}
        try:
            theirs = self.client.run(worker_identity, self.spec)
        except (OSError, TimeoutError) as exc:
            raise ClusterError(f"lost {self.settings.describe()}: {exc}") from None
        for worker, identity in sorted(theirs.items()):
            for key in ("code", "model"):
                if identity[key] != mine[key]:
                    raise UsageError(
                        f"worker {worker} runs {key} {identity[key]!r} but this writer runs "
                        f"{mine[key]!r}: install the same upwell (and model) on every worker"
                    )

    def describe(self) -> dict[str, Any]:
        """Workers and tasks in flight, for ``/status`` and ``/metrics``."""
        try:
            info = self.client.scheduler_info()
            processing = self.client.processing()
        except (OSError, TimeoutError):
            return {"address": self.settings.address, "workers": 0, "tasks_in_flight": 0}
        return {
            "address": self.address,
            "workers": len(info.get("workers", {})),
            "tasks_in_flight": sum(len(v) for v in processing.values()),
        }

    def result(self, future: Any) -> Any:
        from distributed.client import FutureCancelledError

        started = time.perf_counter()
        try:
            return future.result()
        except (OSError, TimeoutError, FutureCancelledError) as exc:
            raise ClusterError(
                f"lost {self.settings.describe()} mid-build ({type(exc).__name__}: {exc}); "
                "the batches already committed stay, and the next sync redoes only the rest"
            ) from None
        finally:
            self.waited += time.perf_counter() - started

    def submit_extract(
        self,
        source: Any,
        items: Sequence[SourceItem],
        known: dict[str, dict[str, Any]],
        *,
        chunking: ChunkSettings,
        limits: Limits,
        ocr: bool,
    ) -> Prepared:
        """Start extracting and chunking ``items`` on the workers; nothing waits here except
        the writer's own reads when it sends the bytes."""
        by_worker = not self.settings.ship_bytes and getattr(source, "root", None) is not None
        futures: dict[str, Any] = {}
        for item in items:
            row = known.get(item.doc_id)
            data, read_error = None, None
            if not by_worker:
                try:
                    data = source.read(item.key, limits.max_file_bytes)
                except ExtractionError as exc:
                    read_error = str(exc)
            job = Job(
                item=item,
                source=source if by_worker else None,
                data=data,
                read_error=read_error,
                same_as=row["content_hash"] if row else None,
                ocr=ocr,
            )
            futures[item.doc_id] = self.client.submit(
                extract_job, self.spec, chunking, limits, job, pure=False
            )
        return Prepared(self, futures)

    def embed(self, texts: list[str], on_done: Any = None) -> list[np.ndarray]:
        """Vectors of ``texts``, in order, embedded on the workers."""
        if not texts:
            return []
        from distributed import as_completed

        parts = [
            texts[i : i + EMBED_TEXTS_PER_TASK] for i in range(0, len(texts), EMBED_TEXTS_PER_TASK)
        ]
        futures = [self.client.submit(embed_job, self.spec, p, pure=False) for p in parts]
        order = {f.key: n for n, f in enumerate(futures)}
        done: dict[int, np.ndarray] = {}
        started, waited_before = time.perf_counter(), self.waited
        try:
            for future in as_completed(futures):
                done[order[future.key]] = self.result(future)
                if on_done is not None:
                    on_done(len(parts[order[future.key]]))
        except BaseException:
            self.client.cancel(futures)
            raise
        finally:  # the whole wait, counted once (result() above counts its own part)
            self.waited = waited_before + (time.perf_counter() - started)
        return [v for n in range(len(parts)) for v in done[n]]

    def close(self) -> None:
        client = getattr(self, "client", None)
        with contextlib.suppress(Exception):
            if client is not None:
                client.close()
        with contextlib.suppress(Exception):
            if self._local is not None:
                self._local.close()


class LazyCluster:
    """The cluster an index uses, connected (or started) on first need and kept until
    ``close()``: a service pays for it only when a batch is big enough, and once.

    ``fallback``: if the cluster cannot be reached, say so and work in process (the service);
    without it the error stops the sync before anything is read (a command)."""

    def __init__(self, settings: ClusterSettings, *, fallback: bool = False) -> None:
        self.settings = settings
        self.fallback = fallback
        self._cluster: Cluster | None = None

    def get(self, spec: str, model_id: str) -> Cluster | None:
        if self._cluster is not None:
            return self._cluster
        try:
            self._cluster = Cluster(self.settings, spec, model_id)
        except ClusterError as exc:
            if not self.fallback:
                raise
            log.warning(
                f"{exc}: this batch is done in process",
                extra={"fields": {"event": "cluster_unreachable", "reason": str(exc)}},
            )
            return None
        return self._cluster

    def forget(self) -> None:
        """Drop a cluster that was lost; the next need connects again."""
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    def describe(self) -> dict[str, Any] | None:
        return self._cluster.describe() if self._cluster is not None else None

    def close(self) -> None:
        self.forget()
