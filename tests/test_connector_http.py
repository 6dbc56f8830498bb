"""The http connector against a real web server on 127.0.0.1 that the tests run in a thread.

The server (``Site``) serves invented Marrowby Cycle Works pages with ETag and Last-Modified
and answers conditional GETs as RFC 9110 section 13 [from memory] says; a test can make pages
answer 404, 503 or slowly, or stop the server (connection refused). It counts every request it
receives.
"""

from __future__ import annotations

import contextlib
import email.utils
import gzip
import hashlib
import re
import socket
import threading
import time
import tomllib
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest

from connectors.http import HttpSource, page_for
from pipeline.cli import main
from pipeline.config import parse_config
from pipeline.errors import SourcePermission, SourceUnreachable, UsageError
from pipeline.index import Index
from pipeline.records import Fingerprint

# A fixed Last-Modified time, so fingerprints can be checked exactly.
LAST_MODIFIED = 1_700_000_000


def page(title: str, *paragraphs: str) -> bytes:
    body = "".join(f"<p>{p}</p>" for p in paragraphs)
    return (
        f"<!DOCTYPE html><html><head><title>{title}</title></head><body>"
        f"<nav><a href='/'>Home</a></nav><h1>{title}</h1>{body}</body></html>"
    ).encode()


PAGES = {
    "/": page("Marrowby Cycle Works", "Hand-built touring frames from the Marrowby workshop."),
    "/manual/": page("Service manual", "Chapters on brakes, wheels and the headset."),
    "/manual/brakes": page(
        "Brake service",
        "Replace both brake pads on an axle together, never one on its own.",
        "Bleed hydraulic brakes once a year or when the lever feels soft.",
    ),
    "/manual/wheels": page("Wheel truing", "True the rim in the stand until the wobble is gone."),
    "/notes/ecn-14.txt": b"Engineering change notice 14: the seat clamp now uses an M6 bolt.\n",
}


class Site:
    """Pages by path; ``status`` forces an answer for a path (or ``"*"`` for all)."""

    def __init__(self, pages: dict[str, bytes], *, etags: bool = True, port: int = 0) -> None:
        self.pages = dict(pages)
        self.etags = etags
        self.status: dict[str, int] = {}
        self.delay: dict[str, float] = {}
        self.content_types: dict[str, str] = {}
        self.redirects: dict[str, str] = {}  # path -> Location of a 302
        self.gzipped: set[str] = set()  # paths sent with Content-Encoding: gzip
        self.unsized: set[str] = set()  # paths sent with no Content-Length, then closed
        self.requests: list[tuple[str, int, dict[str, str]]] = []  # path, status, headers
        self.lock = threading.Lock()
        self.in_flight = 0
        self.max_in_flight = 0
        self.connections: list[socket.socket] = []
        self._start(port)

    def _start(self, port: int) -> None:
        site = self

        class Handler(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"  # keep-alive, as real servers do

            def log_message(self, *args):  # quiet
                pass

            def setup(self):
                super().setup()
                with site.lock:
                    site.connections.append(self.connection)

            def do_GET(self):
                with site.lock:
                    site.in_flight += 1
                    site.max_in_flight = max(site.max_in_flight, site.in_flight)
                try:
                    self._answer()
                finally:
                    with site.lock:
                        site.in_flight -= 1

            def _answer(self):
                path = self.path
                if path in site.redirects:
                    with site.lock:
                        site.requests.append((path, 302, dict(self.headers)))
                    self.send_response(302)
                    self.send_header("Location", site.redirects[path])
                    self.send_header("Content-Length", "0")
                    self.end_headers()
                    return
                time.sleep(site.delay.get(path, site.delay.get("*", 0.0)))
                forced = site.status.get(path, site.status.get("*"))
                body = site.pages.get(path)
                etag = f'"{hashlib.md5(body).hexdigest()[:12]}"' if body is not None else None
                if forced is not None:
                    status = forced
                elif body is None:
                    status = 404
                elif site.etags and self.headers.get("If-None-Match"):
                    # RFC 9110 13.1.2 [from memory]: weak comparison of the listed entity tags.
                    tags = [
                        t.strip().removeprefix("W/")
                        for t in self.headers["If-None-Match"].split(",")
                    ]
                    status = 304 if etag in tags or "*" in tags else 200
                elif self.headers.get("If-Modified-Since"):
                    # RFC 9110 13.1.3 [from memory]: 304 when not modified since the given date.
                    since = email.utils.parsedate_to_datetime(self.headers["If-Modified-Since"])
                    status = 304 if LAST_MODIFIED <= since.timestamp() else 200
                else:
                    status = 200
                with site.lock:
                    site.requests.append((path, status, dict(self.headers)))
                self.send_response(status)
                if body is not None and status in (200, 304):
                    if site.etags:
                        self.send_header("ETag", etag)
                    self.send_header(
                        "Last-Modified", email.utils.formatdate(LAST_MODIFIED, usegmt=True)
                    )
                payload = body if status == 200 and body is not None else b""
                if status == 200 and path in site.gzipped:
                    payload = gzip.compress(payload, mtime=0)
                    self.send_header("Content-Encoding", "gzip")
                if status == 200:
                    kind = "text/plain" if path.endswith(".txt") else "text/html; charset=utf-8"
                    self.send_header("Content-Type", site.content_types.get(path, kind))
                if path in site.unsized:
                    self.close_connection = True  # the body ends when the connection does
                elif status != 304:
                    self.send_header("Content-Length", str(len(payload)))
                self.end_headers()
                self.wfile.write(payload)

        self.server = ThreadingHTTPServer(("127.0.0.1", port), Handler)
        self.server.daemon_threads = True
        self.port = self.server.server_address[1]
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    def url(self, path: str) -> str:
        return f"http://127.0.0.1:{self.port}{path}"

    def stop(self) -> None:
        """Go away as a crashed server does: stop listening and drop kept-alive connections."""
        self.server.shutdown()
        self.server.server_close()
        with self.lock:
            for connection in self.connections:
                with contextlib.suppress(OSError):
                    connection.shutdown(socket.SHUT_RDWR)
                connection.close()
            self.connections.clear()
        self.thread.join(timeout=5)

    def restart(self) -> None:
        """Come back on the same port after ``stop``."""
        self._start(self.port)

    def statuses(self) -> list[int]:
        with self.lock:
            return [status for _, status, _ in self.requests]

    def reset_log(self) -> None:
        with self.lock:
            self.requests.clear()


@pytest.fixture
def site():
    s = Site(PAGES)
    yield s
    with contextlib.suppress(Exception):
        s.stop()


def source_for(site: Site, state: Path, **options) -> HttpSource:
    options.setdefault("backoff_seconds", 0.01)  # keep retry waits short in tests
    options.setdefault("timeout", 5.0)
    return HttpSource("web", urls=[site.url(p) for p in PAGES], state_dir=state, **options)


def documents(index: Index) -> dict[str, dict]:
    return {row["path"]: row for row in index.store().documents_of_source("web").values()}


# --- listing ---------------------------------------------------------------------------------


def test_pages_are_keyed_by_path_and_fingerprinted_by_etag_and_last_modified(site, tmp_path):
    source = source_for(site, tmp_path / "state")
    items = {item.key: item for item in source.list_items()}
    assert sorted(items) == [
        "index.html",  # "/" names the site's index page
        "manual/brakes.html",  # no suffix: an HTML page
        "manual/index.html",
        "manual/wheels.html",
        "notes/ecn-14.txt",  # a supported suffix is kept
    ]
    fp = items["manual/brakes.html"].fingerprint
    body = PAGES["/manual/brakes"]
    # Reference: what the server sent (its ETag header) and the POSIX time it formatted.
    assert fp.tag == f'etag:"{hashlib.md5(body).hexdigest()[:12]}"'
    assert fp.mtime_ns == LAST_MODIFIED * 1_000_000_000
    assert fp.size == len(body)
    assert source.read("manual/brakes.html", 10**6) == body
    assert Fingerprint.parse(fp.key()) == fp


def test_without_etags_the_tag_is_the_sha256_of_the_body_and_if_modified_since_is_used(tmp_path):
    site = Site(PAGES, etags=False)
    try:
        index = Index(tmp_path / "ix", model="hash")
        source = source_for(site, tmp_path / "state")
        index.sync([source])
        stored = Fingerprint.parse(documents(index)["manual/wheels.html"]["fingerprint"])
        # Reference: hashlib's SHA-256 of the bytes the server served.
        assert stored.tag == "sha256:" + hashlib.sha256(PAGES["/manual/wheels"]).hexdigest()
        site.reset_log()
        report = index.sync([source])
        assert site.statuses() == [304] * len(PAGES)
        headers = site.requests[0][2]
        assert "If-None-Match" not in headers
        assert headers["If-Modified-Since"] == email.utils.formatdate(LAST_MODIFIED, usegmt=True)
        assert report.counts.documents["unchanged"] == len(PAGES)
    finally:
        site.stop()


def test_a_no_change_rescan_is_all_304s_and_commits_nothing(site, tmp_path):
    index = Index(tmp_path / "ix", model="hash")
    first = index.sync([source_for(site, tmp_path / "state")])
    assert first.counts.documents["added"] == len(PAGES)
    assert site.statuses() == [200] * len(PAGES)
    site.reset_log()
    versions = len(index.history())
    report = index.sync([source_for(site, tmp_path / "state")])
    assert site.statuses() == [304] * len(PAGES)  # counted server-side: no body was sent
    sent = {path: headers.get("If-None-Match") for path, _, headers in site.requests}
    assert sent["/manual/brakes"] == f'"{hashlib.md5(PAGES["/manual/brakes"]).hexdigest()[:12]}"'
    assert report.counts.documents["unchanged"] == len(PAGES)
    assert report.commits == [] and len(index.history()) == versions


def test_a_changed_page_is_fetched_and_reindexed_alone(site, tmp_path):
    index = Index(tmp_path / "ix", model="hash")
    index.sync([source_for(site, tmp_path / "state")])
    site.pages["/manual/wheels"] = page("Wheel truing", "Tension the spokes evenly, then true.")
    site.reset_log()
    report = index.sync([source_for(site, tmp_path / "state")])
    assert sorted(site.statuses()) == [200] + [304] * (len(PAGES) - 1)
    assert report.counts.documents["modified"] == 1
    assert report.counts.documents["unchanged"] == len(PAGES) - 1
    hits = index.search("tension the spokes evenly", k=1)
    assert hits[0].path == "manual/wheels.html"


def test_404_keeps_the_document_until_misses_reach_the_limit(site, tmp_path):
    index = Index(tmp_path / "ix", model="hash")
    state = tmp_path / "state"
    index.sync([source_for(site, state, misses_before_removal=3)])
    site.status["/manual/brakes"] = 404
    for miss in (1, 2):
        source = source_for(site, state, misses_before_removal=3)
        report = index.sync([source])
        assert "manual/brakes.html" in documents(index), f"removed after {miss} misses"
        assert report.counts.documents["removed"] == 0
        assert any("kept" in problem for key, problem in source.problems)
    # A page that answers again resets its count: one more 404 is a first miss, not a third.
    del site.status["/manual/brakes"]
    index.sync([source_for(site, state, misses_before_removal=3)])
    site.status["/manual/brakes"] = 410
    index.sync([source_for(site, state, misses_before_removal=3)])
    index.sync([source_for(site, state, misses_before_removal=3)])
    assert "manual/brakes.html" in documents(index)
    report = index.sync([source_for(site, state, misses_before_removal=3)])  # third miss in a row
    assert report.counts.documents["removed"] == 1
    assert "manual/brakes.html" not in documents(index)
    assert all(hit.path != "manual/brakes.html" for hit in index.search("brake pads", k=10))


def test_5xx_is_retried_with_backoff_then_the_page_is_kept_as_it_was(site, tmp_path, capsys):
    index = Index(tmp_path / "ix", model="hash")
    index.sync([source_for(site, tmp_path / "state")])
    before = documents(index)
    site.status["/manual/wheels"] = 503
    site.reset_log()
    source = source_for(site, tmp_path / "state", retries=2)
    report = index.sync([source])
    wheel_requests = [s for p, s, _ in site.requests if p == "/manual/wheels"]
    assert wheel_requests == [503, 503, 503]  # one try and two retries
    assert report.counts.documents["unchanged"] == len(PAGES)
    assert documents(index) == before
    assert source.problems == [("manual/wheels.html", "HTTP 503 after 3 attempts; kept as it was")]
    # Recorded where status shows it, until the page answers again.
    (web,) = index.status()["sources"]
    assert [(p["key"], p["problem"]) for p in web["problems"]] == source.problems
    assert main(["--index", str(tmp_path / "ix"), "status"]) == 0
    assert "problem: manual/wheels.html: HTTP 503 after 3 attempts" in capsys.readouterr().out
    del site.status["/manual/wheels"]
    index.sync([source])
    assert "problems" not in index.status()["sources"][0]


def test_every_page_failing_makes_the_source_unreachable_and_keeps_everything(site, tmp_path):
    index = Index(tmp_path / "ix", model="hash")
    state = tmp_path / "state"
    index.sync([source_for(site, state)])
    before = documents(index)
    site.status["*"] = 503
    with pytest.raises(SourceUnreachable, match="HTTP 503 after 2 attempts"):
        index.sync([source_for(site, state, retries=1)])
    site.status["*"] = 403
    with pytest.raises(SourcePermission, match="refused access"):
        index.sync([source_for(site, state)])
    site.status.clear()
    site.stop()  # the server goes away: connection refused
    with pytest.raises(SourceUnreachable, match="connection refused"):
        index.sync([source_for(site, state, retries=1)])
    assert documents(index) == before
    status = {s["name"]: s for s in index.status()["sources"]}
    assert "connection refused" in status["web"]["error"]["reason"]
    assert status["web"]["documents"] == len(PAGES)
    site.restart()
    site.reset_log()
    report = index.sync([source_for(site, state)])
    assert site.statuses() == [304] * len(PAGES)
    assert report.counts.documents["unchanged"] == len(PAGES)


def test_a_timeout_is_retried_then_the_page_is_kept(site, tmp_path):
    index = Index(tmp_path / "ix", model="hash")
    index.sync([source_for(site, tmp_path / "state")])
    site.delay["/manual/wheels"] = 1.0
    source = source_for(site, tmp_path / "state", timeout=0.2, retries=1)
    report = index.sync([source])
    assert report.counts.documents["unchanged"] == len(PAGES)
    assert source.problems == [("manual/wheels.html", "timed out after 2 attempts; kept as it was")]


@pytest.mark.parametrize("per_host", [1, 2])
def test_per_host_bounds_requests_in_flight(site, tmp_path, per_host):
    site.delay["*"] = 0.05  # long enough for requests to overlap if the client allows it
    list(source_for(site, tmp_path / "state", per_host=per_host).list_items())
    assert site.max_in_flight == per_host  # counted server-side


def test_oversized_and_mistyped_pages_fail_without_losing_anything(site, tmp_path):
    site.pages["/manual/frame"] = page("Frame sizes", "Sizes " * 400)
    site.content_types["/manual/wheels"] = "application/pdf"
    index = Index(tmp_path / "ix", model="hash")
    source = HttpSource(
        "web",
        urls=[site.url(p) for p in ("/manual/frame", "/manual/wheels", "/manual/brakes")],
        state_dir=tmp_path / "state",
        max_bytes=1000,
    )
    report = index.sync([source])
    reasons = {f.path: f.reason for f in report.failures}
    assert "over the size limit of 1,000 bytes" in reasons["manual/frame.html"]
    assert reasons["manual/wheels.html"] == "served as application/pdf, not as an HTML page"
    assert report.counts.documents["added"] == 1


def test_redirects_are_followed_within_the_site_only(site, tmp_path):
    other = Site(PAGES)  # another site: same pages, another host:port
    try:
        site.redirects["/old/brakes"] = "/manual/brakes"
        site.redirects["/away"] = other.url("/manual/brakes")
        site.redirects["/file"] = "file:///etc/passwd"
        site.redirects["/loop"] = "/loop"
        source = HttpSource(
            "web",
            urls=[site.url(p) for p in ("/old/brakes", "/away", "/file", "/loop", "/manual/")],
            state_dir=tmp_path / "state",
            backoff_seconds=0.01,
            retries=0,
        )
        items = {item.key: item for item in source.list_items()}
        assert sorted(items) == ["manual/index.html", "old/brakes.html"]
        assert source.read("old/brakes.html", 10**6) == PAGES["/manual/brakes"]
        problems = dict(source.problems)
        assert problems["away.html"].startswith(f"redirected to {other.url('/manual/brakes')}")
        assert "off the site" in problems["file.html"] and "attempt" not in problems["file.html"]
        assert problems["loop.html"].startswith("more than 5 redirects")
        assert other.requests == []  # the other host was never asked
    finally:
        other.stop()


def test_a_gzip_body_is_decoded_and_an_endless_body_is_cut_with_a_reason(site, tmp_path):
    site.gzipped.add("/manual/wheels")
    site.pages["/manual/frame"] = page("Frame sizes", "Sizes " * 400)
    site.unsized.add("/manual/frame")
    index = Index(tmp_path / "ix", model="hash")
    source = HttpSource(
        "web",
        urls=[site.url(p) for p in ("/manual/wheels", "/manual/frame")],
        state_dir=tmp_path / "state",
        max_bytes=1000,
    )
    report = index.sync([source])
    # Reference: gzip (RFC 1952) round trip by the standard library on the server side.
    assert "gzip" in site.requests[0][2].get("Accept-Encoding", "")
    wheels = index.search("true the rim", k=1, mode="keyword")[0]
    assert wheels.path == "manual/wheels.html" and "wobble" in wheels.text
    reasons = {f.path: f.reason for f in report.failures}
    assert "over the size limit of 1,000 bytes" in reasons["manual/frame.html"]


# --- sitemaps ------------------------------------------------------------------------------


def sitemap(*locations: str) -> bytes:
    # Format: https://www.sitemaps.org/protocol.html
    urls = "".join(f"<url><loc>{loc}</loc></url>" for loc in locations)
    return (
        '<?xml version="1.0" encoding="UTF-8"?>'
        f'<urlset xmlns="http://www.sitemaps.org/schemas/sitemap/0.9">{urls}</urlset>'
    ).encode()


def test_sitemap_lists_its_pages_and_skips_other_sites(site, tmp_path):
    site.pages["/sitemap.xml"] = sitemap(
        site.url("/manual/brakes"),
        site.url("/notes/ecn-14.txt"),
        "http://other.invalid/page.html",
        site.url("/search?q=brakes"),
    )
    source = HttpSource("web", sitemap=site.url("/sitemap.xml"), state_dir=tmp_path / "state")
    assert sorted(i.key for i in source.list_items()) == ["manual/brakes.html", "notes/ecn-14.txt"]
    assert [url for url, _ in source.problems] == [
        "http://other.invalid/page.html",
        site.url("/search?q=brakes"),
    ]
    assert source.location == site.url("/sitemap.xml")


def test_sitemap_index_is_followed_one_level(site, tmp_path):
    site.pages["/sitemap-manual.xml"] = sitemap(site.url("/manual/brakes"))
    site.pages["/sitemap-notes.xml"] = sitemap(site.url("/notes/ecn-14.txt"))
    children = "".join(
        f"<sitemap><loc>{site.url(p)}</loc></sitemap>"
        for p in ("/sitemap-manual.xml", "/sitemap-notes.xml")
    )
    site.pages["/sitemap.xml"] = (
        '<sitemapindex xmlns="http://www.sitemaps.org/schemas/sitemap/0.9">'
        f"{children}</sitemapindex>"
    ).encode()
    source = HttpSource("web", sitemap=site.url("/sitemap.xml"), state_dir=tmp_path / "state")
    assert sorted(i.key for i in source.list_items()) == ["manual/brakes.html", "notes/ecn-14.txt"]


@pytest.mark.parametrize(
    "body, message",
    [
        (None, "HTTP 404"),
        (sitemap(), "lists no usable pages"),
        (b"<urlset><url><loc>oops", "not a readable sitemap"),
        (
            b'<?xml version="1.0"?><!DOCTYPE lolz [<!ENTITY lol "lol">'
            b'<!ENTITY lol2 "&lol;&lol;&lol;&lol;">]><urlset><url><loc>&lol2;</loc></url></urlset>',
            "not a readable sitemap",  # entity declarations: refused, never expanded
        ),
    ],
    ids=["missing", "empty", "malformed", "entities"],
)
def test_a_bad_sitemap_is_an_unreachable_source_not_an_empty_one(site, tmp_path, body, message):
    if body is not None:
        site.pages["/sitemap.xml"] = body
    source = HttpSource("web", sitemap=site.url("/sitemap.xml"), state_dir=tmp_path / "state")
    with pytest.raises(SourceUnreachable, match=message):
        list(source.list_items())


# --- configuration -----------------------------------------------------------------------------


def config(**table) -> dict:
    return {"index": {"path": "ix"}, "source": [{"name": "web", "kind": "http", **table}]}


def test_config_builds_the_source_without_any_request(site, tmp_path):
    site.reset_log()
    cfg = parse_config(
        config(
            urls=[site.url("/manual/brakes"), site.url("/#top")],
            timeout="3s",
            retries=1,
            per_host=4,
            max_bytes=5000,
            misses_before_removal=2,
            every="10m",
        ),
        tmp_path / "upwell.toml",
    )
    source = cfg.source("web").connector(tmp_path / "state")
    assert site.requests == []  # from_config must be cheap
    assert (source.timeout, source.retries, source.per_host) == (3.0, 1, 4)
    assert (source.max_bytes, source.misses_before_removal) == (5000, 2)
    assert source.urls == (site.url("/manual/brakes"), site.url("/"))
    assert not (tmp_path / "state").exists()  # state is created lazily


@pytest.mark.parametrize(
    "table, message",
    [
        ({}, "urls.*or `sitemap` is required"),
        ({"urls": ["https://a.example/x"], "sitemap": "https://a.example/s.xml"}, "not both"),
        ({"urls": ["ftp://a.example/x"]}, "not an http"),
        ({"urls": ["https://a.example/find?q=1"]}, "query string"),
        ({"urls": ["https://a.example/x", "https://b.example/y"]}, "several sites"),
        ({"urls": ["https://a.example/x", "https://a.example/x.html"]}, "share the key"),
        ({"urls": ["https://a.example/x"], "retries": -1}, "retries.*at least 0"),
        ({"urls": ["https://a.example/x"], "timeout": "soon"}, "timeout"),
        ({"urls": ["https://a.example/x"], "depth": 2}, "unknown key"),
    ],
)
def test_bad_config_names_the_key(tmp_path, table, message):
    with pytest.raises(UsageError, match=message):
        parse_config(config(**table), tmp_path / "upwell.toml")


def test_readme_examples_for_http_sources_are_valid_configuration(tmp_path):
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    http = {}
    for block in re.findall(r"```toml\n(.*?)```", readme, flags=re.DOTALL):
        for source in parse_config(tomllib.loads(block), tmp_path / "upwell.toml").sources:
            if source.kind == "http":
                http[source.name] = source.connector(tmp_path / "state")
    assert http["marrowby-site"].sitemap == "https://docs.marrowby.example/sitemap.xml"
    notices = http["marrowby-notices"]
    assert [page_for(url, notices.accept).key for url in notices.urls] == [
        "notices/index.html",
        "notices/ecn-14.txt",
    ]


# --- end to end with the default model ---------------------------------------------------------


def test_pages_are_searchable_with_the_default_model_and_cite_their_heading(site, tmp_path):
    index = Index(tmp_path / "ix")  # the real default embedding model
    report = index.sync([source_for(site, tmp_path / "state")])
    assert report.counts.documents["added"] == len(PAGES)
    hit = index.search("how often should hydraulic brakes be bled", k=1)[0]
    assert hit.path == "manual/brakes.html"
    assert hit.heading == "Brake service"
    assert documents(index)["manual/brakes.html"]["title"] == "Brake service"
