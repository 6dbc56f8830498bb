"""``upwell serve``: the console and the HTTP API over an index, without watching anything.

For readers on other machines, or an index in object storage that a service elsewhere writes:
nothing is synced and the writer lock is never taken, so it runs beside ``upwell watch`` or
with no service at all. Every page reads the index as its latest commit left it.
"""

from __future__ import annotations

import logging
import signal
import threading
import time
from collections.abc import Mapping
from typing import Any

from pipeline.config import ServerConfig, is_loopback
from pipeline.console.views import Live
from pipeline.errors import UpwellError, UsageError
from pipeline.index import Index
from pipeline.service.api import start_http_server
from pipeline.service.metrics import ServiceMetrics

log = logging.getLogger("upwell.service")


class _TotalsMetrics(ServiceMetrics):
    """Without a writer there are no sync counters; the gauges are read at each scrape."""

    def __init__(self, index: Index) -> None:
        super().__init__()
        self._index = index
        self._lock = threading.Lock()

    def render(self) -> bytes:
        with self._lock:
            try:
                if self._index.exists:
                    self._index.store().refresh()
                    self.record_totals(self._index.status())
            except UpwellError:
                pass  # the scrape still answers, with the last figures it had
        return super().render()


class ReadOnlyService:
    """What the API reads of a service, for a server that watches nothing."""

    def __init__(self, index: Index, kinds: Mapping[str, str] | None = None) -> None:
        self.index = Index(index.path, storage_options=index.storage_options)
        self.metrics: ServiceMetrics = _TotalsMetrics(self.index)
        self.busy = threading.Event()  # never set: this server does not write
        self.started_at = time.time()
        self._kinds = dict(kinds or {})

    def problems(self) -> list[str]:
        return []

    def paused(self) -> bool:
        return False  # a rollback pause is the index's own record: the overview reads it there

    def queue_depth(self) -> int:
        return 0

    def failing_sources(self) -> dict[str, str]:
        return {}

    def live(self) -> Live:
        return Live(watching=False, kinds=self._kinds, started_at=self.started_at)


def serve(
    index: Index,
    server: ServerConfig,
    kinds: Mapping[str, str] | None = None,
    *,
    ready: Any = None,
    stop: threading.Event | None = None,
) -> int:
    """Serve until SIGTERM or SIGINT (or ``stop`` is set); 0 when stopped. ``ready`` is told
    the address once listening."""
    if not is_loopback(server.host) and not server.token_env:
        raise UsageError(
            f"{server.host} is not a loopback address: give --token-env VAR (or server.token_env "
            "in the configuration), the name of a variable holding the bearer token"
        )
    service = ReadOnlyService(index, kinds)
    http = start_http_server(service, server)
    host, port = str(http.server_address[0]), int(http.server_address[1])
    shown = f"[{host}]" if ":" in host else host
    log.info(
        f"upwell serve: console at http://{shown}:{port}/console/ (read-only), index {index.path}",
        extra={"fields": {"event": "listening", "host": host, "port": port}},
    )
    if ready is not None:
        ready(f"http://{shown}:{port}/console/")
    stop = stop or threading.Event()
    previous = {}
    if threading.current_thread() is threading.main_thread():
        for signum in (signal.SIGTERM, signal.SIGINT):
            previous[signum] = signal.signal(signum, lambda *_: stop.set())
    try:
        while not stop.wait(0.2):
            pass
    finally:
        http.shutdown()
        http.server_close()
        for signum, handler in previous.items():
            signal.signal(signum, handler)
    return 0
