"""The service's HTTP API and web console.

JSON (and ``/metrics`` in the Prometheus text format)::

    /healthz  /status  /search  /history  /rollback-preview  /document  /failures  /metrics

The console: every page ``/console/NAME`` has its JSON twin at ``/NAME`` with the same query
parameters, built by the same ``console.views`` function (the overview's twin is ``/status``)::

    /console/  /console/search  /console/history  /console/rollback-preview
    /console/document?id=DOC_ID  /console/failures  /console/static/<asset>

Standard-library ``ThreadingHTTPServer``. Reads go through an ``Index`` of their own that never
takes the writer lock, so they work while the writer commits; nothing here writes. When
``server.token_env`` is set, every request, page and asset alike, needs the token: as
``Authorization: Bearer <token>``, or, for a browser, the cookie ``/console/login`` sets. A
non-loopback address cannot be configured without a token. Work per request is bounded: lists
are paginated and a search takes at most 100 hits.
"""

from __future__ import annotations

import contextlib
import hashlib
import hmac
import json
import logging
import os
import threading
from collections.abc import Callable
from http.cookies import CookieError, SimpleCookie
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any, Protocol
from urllib.parse import parse_qs, urlsplit

from pipeline.config import ServerConfig
from pipeline.console import render, views
from pipeline.console.views import MAX_K, Live, NotFound
from pipeline.errors import IndexMissing, UnknownVersion, UpwellError, UsageError
from pipeline.index import Hit, Index
from pipeline.service.metrics import CONTENT_TYPE, ServiceMetrics


class Service(Protocol):
    """What the API reads of the running service. The daemon provides it (and ``upwell serve``
    a stand-in that watches nothing); the API never imports the daemon, so the dependency
    points one way (daemon -> api)."""

    index: Index
    metrics: ServiceMetrics
    busy: threading.Event
    started_at: float

    def problems(self) -> list[str]: ...

    def paused(self) -> bool: ...

    def queue_depth(self) -> int: ...

    def failing_sources(self) -> dict[str, str]: ...

    def live(self) -> Live: ...


log = logging.getLogger("upwell.http")
__all__ = ["MAX_K", "ApiServer", "Service", "hit_json", "start_http_server"]

#: The query parameters each endpoint takes; any other is a 400 that names it. A console page
#: takes the parameters of its JSON twin.
PARAMETERS: dict[str, set[str]] = {
    "/search": views.SEARCH_PARAMETERS,
    "/status": set(),
    "/healthz": set(),
    "/metrics": set(),
    "/history": {"page", "from", "to"},
    "/rollback-preview": {"to"},
    "/document": {"id", "page"},
    "/failures": {"page"},
}
#: Console page -> (its JSON twin, its template, its title).
PAGES = {
    "/console/": ("/status", "overview.html", "Overview"),
    "/console/search": ("/search", "search.html", "Search"),
    "/console/history": ("/history", "history.html", "History"),
    "/console/rollback-preview": ("/rollback-preview", "rollback.html", "Rollback preview"),
    "/console/document": ("/document", "document.html", "Document"),
    "/console/failures": ("/failures", "failures.html", "Failures"),
}
COOKIE = "upwell_token"
REFRESH_SECONDS = 5
_MAX_FORM_BYTES = 4096
_PAGE_HEADERS = {
    # Every asset is upwell's own: nothing may load from elsewhere, nothing may frame a page.
    "Content-Security-Policy": "default-src 'none'; script-src 'self'; style-src 'self'; "
    "img-src 'self' data:; connect-src 'self'; form-action 'self'; base-uri 'none'; "
    "frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}


def _cookie_value(token: str) -> str:
    """What the login cookie holds: a digest of the token, so the browser never stores the
    token itself (and no character of it needs quoting in a cookie)."""
    return hashlib.sha256(b"upwell-console:" + token.encode()).hexdigest()


def hit_json(h: Hit) -> dict[str, Any]:
    """One search result with the keys of ``upwell search --json``."""
    return h.as_json()


class _Reader:
    """A lock-free view of the index for request threads; sees each new commit."""

    def __init__(self, index_path: Any, storage_options: dict[str, str] | None = None) -> None:
        self.index = Index(index_path, storage_options=storage_options)
        self._lock = threading.Lock()  # one LanceDB handle, one reader at a time
        self.totals: dict[str, Any] = {}  # commit id -> totals after it; they never change

    def read(self, view: Callable[[Index], Any]) -> Any:
        with self._lock:
            self.index.store().refresh()
            return view(self.index)

    def status(self) -> dict[str, Any]:
        return self.read(lambda index: index.status())


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

    # --- dispatch -------------------------------------------------------------------------------

    def do_GET(self) -> None:  # noqa: N802 - stdlib's name
        url = urlsplit(self.path)
        path = url.path
        console = path == "/console" or path.startswith("/console/")
        if path in ("/", "/console"):
            self._redirect("/console/")
            return
        if not self._authorised():
            if console:
                self._login_page(path, None, 401)
            else:
                self._send_json(
                    401, {"error": "a bearer token is required"}, {"WWW-Authenticate": "Bearer"}
                )
            return
        query = parse_qs(url.query)
        if path == "/console/login":
            self._redirect("/console/")
        elif path.startswith("/console/static/"):
            self._asset(path.removeprefix("/console/static/"))
        elif path in PAGES:
            self._page(path, query)
        elif console:
            self._error_page(404, f"There is no console page {path}.")
        else:
            self._json_route(path, query)

    def do_POST(self) -> None:  # noqa: N802 - stdlib's name
        path = urlsplit(self.path).path
        if path != "/console/login":
            self._send_json(405, {"error": "the API and the console only read: use GET"})
            return
        length = int(self.headers.get("Content-Length") or 0)
        if length > _MAX_FORM_BYTES:
            self._send_json(413, {"error": "the form is too large"})
            return
        form = parse_qs(self.rfile.read(length).decode("utf-8", "replace"))
        wanted = (form.get("next") or ["/console/"])[0]
        # Only back into the console: never a redirect to another site.
        target = wanted if wanted.startswith("/console/") and "//" not in wanted else "/console/"
        token = self.server.token
        given = (form.get("token") or [""])[0]
        if token is None:
            self._redirect(target)
        elif hmac.compare_digest(given.encode(), token.encode()):
            cookie = f"{COOKIE}={_cookie_value(token)}; HttpOnly; SameSite=Strict; Path=/"
            self._redirect(target, {"Set-Cookie": cookie})
        else:
            self._login_page(target, "That token is not the one the service was started with.", 401)

    def _json_route(self, path: str, query: dict[str, list[str]]) -> None:
        routes: dict[str, Callable[[dict[str, list[str]]], None]] = {
            "/healthz": self._healthz,
            "/status": lambda q: self._send_json(200, self._view("/status", q)),
            "/search": lambda q: self._send_json(200, self._view("/search", q)),
            "/history": lambda q: self._send_json(200, self._view("/history", q)),
            "/rollback-preview": lambda q: self._send_json(200, self._view("/rollback-preview", q)),
            "/document": lambda q: self._send_json(200, self._view("/document", q)),
            "/failures": lambda q: self._send_json(200, self._view("/failures", q)),
            "/metrics": self._metrics,
        }
        route = routes.get(path)
        if route is None:
            self._send_json(404, {"error": f"no such endpoint {path}", "endpoints": sorted(routes)})
            return
        try:
            self._check_parameters(path, query)
            route(query)
        except UsageError as exc:
            self._send_json(400, {"error": str(exc)})
        except (NotFound, UnknownVersion) as exc:
            self._send_json(404, {"error": str(exc)})
        except IndexMissing as exc:
            self._send_json(503, {"error": str(exc)})
        except UpwellError as exc:
            self._send_json(500, {"error": str(exc)})
        except Exception as exc:
            log.exception("request failed")
            self._send_json(500, {"error": f"internal error: {type(exc).__name__}"})

    @staticmethod
    def _check_parameters(path: str, query: dict[str, list[str]]) -> None:
        known = PARAMETERS.get(path, set())
        unknown = sorted(set(query) - known)
        if unknown:
            listed = ", ".join(sorted(known)) or "none"
            raise UsageError(f"unknown parameter {unknown[0]!r} for {path} (it takes: {listed})")

    # --- what each endpoint shows -----------------------------------------------------------------

    def _view(self, twin: str, query: dict[str, list[str]]) -> Any:
        """The data of one page / JSON endpoint, read through the server's own ``Index``."""
        reader = self.server.reader
        if twin == "/status":
            live = self.server.service.live()
            data = reader.read(lambda index: views.overview(index, live))
            data["service"]["pid"] = os.getpid()
            return data
        if twin == "/search":
            with self._searching():
                data = reader.read(lambda index: views.search(index, query, default_k=5))
            if not data["query"]:  # the empty search form: what it offers to choose from
                data["choices"] = reader.read(views.search_choices)
            return data
        if twin == "/history":
            return reader.read(lambda index: views.history_page(index, query, reader.totals))
        if twin == "/rollback-preview":
            return reader.read(lambda index: views.rollback_preview(index, query))
        if twin == "/document":
            return reader.read(lambda index: views.document(index, query))
        if twin == "/failures":
            return reader.read(lambda index: views.failures(index, query))
        raise NotFound(f"no view {twin}")

    def _searching(self) -> contextlib.AbstractContextManager[None]:
        """Note a search while it runs, so the writer holds back a compaction until searches
        pause (``Service.searches``; a stand-in service without one notes nothing)."""
        activity = getattr(self.server.service, "searches", None)
        return activity.searching() if activity is not None else contextlib.nullcontext()

    def _page(self, path: str, query: dict[str, list[str]]) -> None:
        twin, template, title = PAGES[path]
        reader = self.server.reader
        live = self.server.service.live()
        context: dict[str, Any] = {
            "page": template.removesuffix(".html"),
            "title": title,
            "json_href": twin
            + (f"?{urlsplit(self.path).query}" if urlsplit(self.path).query else ""),
            "index_path": str(self.server.service.index.path),
            "watching": live.watching,
            "max_k": MAX_K,
        }
        try:
            self._check_parameters(twin, query)
            if path == "/console/":
                context["status"] = self._view(twin, query)
                context["refresh"] = REFRESH_SECONDS if live.watching else 0
            elif path == "/console/search":
                with self._searching():
                    context["result"] = reader.read(lambda index: views.search(index, query))
                context["choices"] = reader.read(views.search_choices)
            elif path == "/console/history":
                context["data"] = self._view(twin, query)
                context["choices"] = reader.read(views.ref_choices)
                context["selected"] = {
                    "from": views.one(query, "from"),
                    "to": views.one(query, "to"),
                }
            elif path == "/console/rollback-preview":
                context["plan"] = self._view(twin, query)
            elif path == "/console/document":
                data = self._view(twin, query)
                context["data"] = data
                row = data["document"]
                context["title"] = (
                    f"Document {row['source']}/{row['path']}"
                    if row
                    else (f"Document {data['doc_id']}")
                )
            else:
                context["data"] = self._view(twin, query)
        except UsageError as exc:
            self._error_page(400, str(exc))
            return
        except (NotFound, UnknownVersion) as exc:
            self._error_page(404, str(exc))
            return
        except IndexMissing as exc:
            self._error_page(503, str(exc))
            return
        except UpwellError as exc:
            self._error_page(500, str(exc))
            return
        except Exception as exc:
            log.exception("console page failed")
            self._error_page(500, f"internal error: {type(exc).__name__}")
            return
        self._send(200, render.page(template, **context), "text/html; charset=utf-8", _PAGE_HEADERS)

    def _asset(self, name: str) -> None:
        try:
            body, kind = render.static(name)
        except NotFound as exc:
            self._error_page(404, str(exc))
            return
        headers = {**_PAGE_HEADERS, "Cache-Control": "max-age=300"}
        self._send(200, body, kind, headers)

    def _error_page(self, code: int, message: str) -> None:
        titles = {400: "Cannot show that", 404: "Not found", 503: "No index yet"}
        body = render.page(
            "error.html",
            page="error",
            title=titles.get(code, "Something went wrong"),
            message=message,
            json_href="",
            index_path=str(self.server.service.index.path),
        )
        self._send(code, body, "text/html; charset=utf-8", _PAGE_HEADERS)

    def _login_page(self, next_path: str, message: str | None, code: int) -> None:
        body = render.page(
            "login.html",
            page="login",
            title="Token needed",
            message=message,
            next=next_path if next_path.startswith("/console/") else "/console/",
            json_href="",
        )
        self._send(code, body, "text/html; charset=utf-8", _PAGE_HEADERS)

    # --- token ----------------------------------------------------------------------------------

    def _authorised(self) -> bool:
        token = self.server.token
        if token is None:
            return True
        given = self.headers.get("Authorization", "")
        scheme, _, value = given.partition(" ")
        if scheme.lower() == "bearer" and hmac.compare_digest(
            value.strip().encode(), token.encode()
        ):
            return True
        try:
            cookies = SimpleCookie(self.headers.get("Cookie", ""))
        except CookieError:
            return False
        morsel = cookies.get(COOKIE)
        return morsel is not None and hmac.compare_digest(
            morsel.value.encode(), _cookie_value(token).encode()
        )

    # --- the JSON-only endpoints ------------------------------------------------------------------

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

    def _metrics(self, query: dict[str, list[str]]) -> None:
        service = self.server.service
        service.metrics.record_cluster(service.live().cluster)
        self._send(200, service.metrics.render(), CONTENT_TYPE)

    # --- sending --------------------------------------------------------------------------------

    def _redirect(self, target: str, headers: dict[str, str] | None = None) -> None:
        self._send(303, b"", "text/plain; charset=utf-8", {"Location": target, **(headers or {})})

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
