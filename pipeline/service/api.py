"""The service's HTTP API: ``/healthz``, ``/status``, ``/search`` and ``/metrics``.

Standard-library ``ThreadingHTTPServer``; every answer is JSON except ``/metrics`` (Prometheus
text format). Reads go through an ``Index`` of their own that never takes the writer lock, so
they work while the writer commits. When ``server.token_env`` is set, every request needs
``Authorization: Bearer <token>``; a non-loopback address cannot be configured without it.
"""

from __future__ import annotations

import hmac
import json
import logging
import os
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any, Protocol
from urllib.parse import parse_qs, urlsplit

from pipeline import retrieval
from pipeline.config import ServerConfig
from pipeline.errors import IndexMissing, UpwellError, UsageError
from pipeline.index import Hit, Index
from pipeline.service.metrics import CONTENT_TYPE, ServiceMetrics


class Service(Protocol):
    """What the API reads of the running service. The daemon provides it; the API never imports
    the daemon, so the dependency points one way (daemon -> api)."""

    index: Index
    metrics: ServiceMetrics
    busy: threading.Event
    started_at: float

    def problems(self) -> list[str]: ...

    def paused(self) -> bool: ...

    def queue_depth(self) -> int: ...

    def failing_sources(self) -> dict[str, str]: ...


log = logging.getLogger("upwell.http")
MAX_K = 100
#: The query parameters each endpoint takes; any other is a 400 that names it.
PARAMETERS: dict[str, set[str]] = {
    "/search": {"q", "k", "mode", "source", "path", "type", "since", "per_doc"},
    "/status": set(),
    "/healthz": set(),
    "/metrics": set(),
}


def hit_json(h: Hit) -> dict[str, Any]:
    """One search result with the keys of ``upwell search --json``."""
    return h.as_json()


class _Reader:
    """A lock-free view of the index for request threads; sees each new commit."""

    def __init__(self, index_path: Any, storage_options: dict[str, str] | None = None) -> None:
        self.index = Index(index_path, storage_options=storage_options)
        self._lock = threading.Lock()  # one LanceDB handle, one reader at a time

    def status(self) -> dict[str, Any]:
        with self._lock:
            self.index.store().refresh()
            return self.index.status()

    def search(self, query: str, k: int, **options: Any) -> list[Hit]:
        with self._lock:
            self.index.store().refresh()
            return self.index.search(query, k=k, **options)


class ApiServer(ThreadingHTTPServer):
    daemon_threads = True

    def __init__(self, address: tuple[str, int], service: Service, token: str | None):
        super().__init__(address, _Handler)
        self.service = service
        self.token = token
        self.reader = _Reader(service.index.path, service.index.storage_options)


class _Handler(BaseHTTPRequestHandler):
    server: ApiServer
    protocol_version = "HTTP/1.1"

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - stdlib's name
        pass  # requests are not logged: /metrics is scraped every few seconds

    def do_GET(self) -> None:  # noqa: N802 - stdlib's name
        if not self._authorised():
            self._send_json(
                401, {"error": "a bearer token is required"}, {"WWW-Authenticate": "Bearer"}
            )
            return
        url = urlsplit(self.path)
        query = parse_qs(url.query)
        routes = {
            "/healthz": self._healthz,
            "/status": self._status,
            "/search": self._search,
            "/metrics": self._metrics,
        }
        route = routes.get(url.path)
        if route is None:
            self._send_json(
                404, {"error": f"no such endpoint {url.path}", "endpoints": sorted(routes)}
            )
            return
        try:
            unknown = sorted(set(query) - PARAMETERS.get(url.path, set()))
            if unknown:
                known = ", ".join(sorted(PARAMETERS.get(url.path, set()))) or "none"
                raise UsageError(
                    f"unknown parameter {unknown[0]!r} for {url.path} (it takes: {known})"
                )
            route(query)
        except UsageError as exc:
            self._send_json(400, {"error": str(exc)})
        except IndexMissing as exc:
            self._send_json(503, {"error": str(exc)})
        except UpwellError as exc:
            self._send_json(500, {"error": str(exc)})
        except Exception as exc:
            log.exception("request failed")
            self._send_json(500, {"error": f"internal error: {type(exc).__name__}"})

    def _authorised(self) -> bool:
        token = self.server.token
        if token is None:
            return True
        given = self.headers.get("Authorization", "")
        scheme, _, value = given.partition(" ")
        return scheme.lower() == "bearer" and hmac.compare_digest(
            value.strip().encode(), token.encode()
        )

    def _healthz(self, query: dict[str, list[str]]) -> None:
        problems = self.server.service.problems()
        ok = not problems
        data: dict[str, Any] = {"ok": ok}
        if problems:
            data["problems"] = problems
        # The service is alive, but say which sources cannot be synced and why (an unmounted
        # share, a server that does not answer): their documents stay as they were.
        failing = self.server.service.failing_sources()
        if failing:
            data["sources_failing"] = failing
        self._send_json(200 if ok else 503, data)

    def _status(self, query: dict[str, list[str]]) -> None:
        service = self.server.service
        data = self.server.reader.status()
        data["service"] = {
            "queue_depth": service.queue_depth(),
            "paused": service.paused(),
            "writing": service.busy.is_set(),
            "pid": os.getpid(),
            "started_at": service.started_at,
        }
        self._send_json(200, data)

    def _search(self, query: dict[str, list[str]]) -> None:
        q = (query.get("q") or [""])[0]
        try:
            k = int((query.get("k") or ["5"])[0])
        except ValueError:
            raise UsageError("k must be a whole number") from None
        if not 1 <= k <= MAX_K:
            raise UsageError(f"k must be between 1 and {MAX_K}, not {k}")
        per_doc = None
        if query.get("per_doc"):
            try:
                per_doc = int(query["per_doc"][0])
            except ValueError:
                raise UsageError("per_doc must be a whole number") from None
        mode = (query.get("mode") or [retrieval.DEFAULT_MODE])[0]
        hits = self.server.reader.search(
            q,
            k,
            mode=mode,
            source=query.get("source") or None,
            paths=query.get("path") or (),
            types=query.get("type") or (),
            since=(query.get("since") or [None])[0],
            per_doc=per_doc,
        )
        self._send_json(200, {"query": q, "mode": mode, "results": [hit_json(h) for h in hits]})

    def _metrics(self, query: dict[str, list[str]]) -> None:
        self._send(200, self.server.service.metrics.render(), CONTENT_TYPE)

    def _send_json(self, code: int, data: Any, headers: dict[str, str] | None = None) -> None:
        body = json.dumps(data, ensure_ascii=False, default=str).encode("utf-8")
        self._send(code, body, "application/json; charset=utf-8", headers)

    def _send(
        self, code: int, body: bytes, content_type: str, headers: dict[str, str] | None = None
    ) -> None:
        self.send_response(code)
        self.send_header("Content-Type", content_type)
        self.send_header("Content-Length", str(len(body)))
        for name, value in (headers or {}).items():
            self.send_header(name, value)
        self.end_headers()
        self.wfile.write(body)


def start_http_server(service: Service, config: ServerConfig) -> ApiServer:
    """Bind and serve in a daemon thread; port 0 picks a free port (see ``server_address``)."""
    token = None
    if config.token_env:
        token = os.environ.get(config.token_env)
        if not token:
            raise UsageError(
                f"server.token_env names ${config.token_env}, which is not set or empty"
            )
    try:
        server = ApiServer((config.host, config.port), service, token)
    except OSError as exc:
        raise UpwellError(
            f"cannot listen on {config.host}:{config.port}: {exc.strerror or exc}"
        ) from None
    thread = threading.Thread(target=server.serve_forever, name="http", daemon=True)
    thread.start()
    return server
