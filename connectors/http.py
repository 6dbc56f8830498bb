"""Pages of one web site as a source: a list of URLs or a sitemap, fetched with conditional GET.

Listing fetches every page, asking "changed since?" with the validators of the fingerprint the
index stored for it (``If-None-Match`` with its ETag, ``If-Modified-Since`` with its
Last-Modified date; RFC 9110 section 13 [from memory]). A 304 lists the stored fingerprint
unchanged, so the engine never reads the page; a 200 keeps the body (in ``state_dir``, not in
memory) for ``read`` and fingerprints it by its ETag, else by the SHA-256 of the body.

Nothing is removed on one bad answer. A 404 or 410 keeps the document until it has missed
``misses_before_removal`` listings in a row (counted in ``state_dir``); then it is left out and
the engine removes it. A timeout, a refused connection or a 5xx is retried with exponential
backoff and jitter, then the page is kept as it was and named in ``problems``. When no page at
all (or the sitemap) answers, the listing raises ``SourceUnreachable``: an unreachable site is
not an empty one.

Keys are URL paths relative to the site root. A path without a supported suffix names an HTML
page: ``/`` and ``/manual/`` become ``index.html`` and ``manual/index.html``, ``/manual/brakes``
becomes ``manual/brakes.html``; such a page must be served as ``text/html``.

HTTP is done with urllib3 rather than urllib.request: its connection pool keeps connections
alive between requests (a 1,000-page rescan reuses ``per_host`` connections instead of opening
1,000), bounds connections per host, and streams bodies so the size limit holds while reading.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import random
import shutil
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from email.utils import parsedate_to_datetime
from pathlib import Path
from typing import Any, ClassVar
from urllib.parse import unquote, urljoin, urlsplit, urlunsplit

import urllib3

from pipeline.errors import (
    DocumentTooLarge,
    DocumentUnreadable,
    SourcePermission,
    SourceUnreachable,
)
from pipeline.records import Fingerprint, SourceItem
from pipeline.units import parse_duration

log = logging.getLogger("upwell.connectors.http")

DEFAULT_TIMEOUT = 10.0
DEFAULT_RETRIES = 3
DEFAULT_MAX_BYTES = 20 * 1024 * 1024
DEFAULT_PER_HOST = 2
DEFAULT_MISSES_BEFORE_REMOVAL = 3
# The sitemaps protocol caps one sitemap file at 50,000 URLs and 50 MB uncompressed
# (https://www.sitemaps.org/protocol.html).
SITEMAP_MAX_BYTES = 50 * 1024 * 1024
SITEMAP_MAX_URLS = 50_000
SITEMAP_NAMESPACE = "{http://www.sitemaps.org/schemas/sitemap/0.9}"

#: Sent with every request (a gzip body is decoded on the way in).
_BASE_HEADERS = {"User-Agent": "upwell", "Accept-Encoding": "gzip"}
#: Redirects followed for one page, each within the site (same scheme and host).
MAX_REDIRECTS = 5
_REDIRECT_STATUSES = frozenset({301, 302, 303, 307, 308})

# Answers worth asking again: the server is busy or failing now (RFC 9110 section 15.6 [from
# memory];
# 429 from RFC 6585).
_RETRY_STATUSES = frozenset({429, 500, 502, 503, 504})
_GONE_STATUSES = frozenset({404, 410})
_REFUSED_STATUSES = frozenset({401, 403})
_BACKOFF_CAP_SECONDS = 30.0
_READ_CHUNK = 64 * 1024
_HTML_TYPES = ("text/html", "application/xhtml+xml")
_STALE_SPOOL_SECONDS = 24 * 3600.0


@dataclass(frozen=True)
class Page:
    """One configured or sitemap-listed URL and the document key it is indexed under."""

    url: str
    key: str
    # The key was made by adding ".html" or "index.html": the page must be served as HTML.
    must_be_html: bool


def page_for(url: str, accept: Callable[[str], bool]) -> Page:
    """The key of ``url``: its unquoted path relative to the site root, made to end with a
    supported suffix (``<dir>/index.html`` for a path ending in ``/``, else ``<path>.html``)."""
    path = unquote(urlsplit(url).path).lstrip("/")
    if path == "" or path.endswith("/"):
        return Page(url, path + "index.html", True)
    if accept(path):
        return Page(url, path, False)
    return Page(url, path + ".html", True)


def site_of(url: str) -> str:
    """``scheme://host[:port]`` of a URL, lower-cased: what one source may span."""
    parts = urlsplit(url)
    return f"{parts.scheme.lower()}://{parts.netloc.lower()}"


def url_problem(url: str) -> str | None:
    """Why ``url`` cannot be a page of a source, or None if it can."""
    parts = urlsplit(url)
    if parts.scheme.lower() not in ("http", "https") or not parts.hostname:
        return "is not an http:// or https:// URL"
    if parts.query:
        return "has a query string; a page must be named by its path alone"
    return None


def without_fragment(url: str) -> str:
    parts = urlsplit(url.strip())
    return urlunsplit((parts.scheme, parts.netloc, parts.path or "/", parts.query, ""))


def conditional_headers(fp: Fingerprint | None) -> dict[str, str]:
    """Validators for a conditional GET from a stored fingerprint (RFC 9110 13.1.2 and
    13.1.3 [from memory])."""
    headers: dict[str, str] = {}
    if fp is None:
        return headers
    if fp.tag.startswith("etag:"):
        headers["If-None-Match"] = fp.tag[len("etag:") :]
    if fp.mtime_ns > 0:
        when = time.gmtime(fp.mtime_ns // 1_000_000_000)
        headers["If-Modified-Since"] = time.strftime("%a, %d %b %Y %H:%M:%S GMT", when)
    return headers


def _last_modified_ns(value: str | None) -> int:
    if not value:
        return 0
    try:
        return int(parsedate_to_datetime(value).timestamp()) * 1_000_000_000
    except (TypeError, ValueError, IndexError, OverflowError):
        return 0


@dataclass(frozen=True)
class _Answer:
    """The last answer to a GET after retries: a status, or None when nothing answered."""

    status: int | None
    headers: Mapping[str, str] = field(default_factory=dict)
    body: bytes = b""
    truncated: bool = False  # the body was longer than the limit; ``body`` is its start
    problem: str = ""  # why nothing answered (timeout, refused) or what the status means


@dataclass(frozen=True)
class _Fetched:
    """A page answered 200 during listing; its body waits in the spool for ``read``."""

    fingerprint: Fingerprint
    spool: Path | None  # None: nothing kept (unchanged, too large or wrongly typed)
    refusal: str = ""  # why ``read`` must fail; empty with no spool: fetch again on read
    too_large: bool = False


class HttpSource:
    """The pages of one site, listed with conditional GETs; see the module docstring."""

    kind: ClassVar[str] = "http"  # what `upwell status` and the console call it

    def __init__(
        self,
        name: str,
        *,
        urls: Sequence[str] = (),
        sitemap: str | None = None,
        state_dir: Path,
        timeout: float = DEFAULT_TIMEOUT,
        retries: int = DEFAULT_RETRIES,
        max_bytes: int = DEFAULT_MAX_BYTES,
        per_host: int = DEFAULT_PER_HOST,
        misses_before_removal: int = DEFAULT_MISSES_BEFORE_REMOVAL,
        backoff_seconds: float = 0.5,
        accept: Callable[[str], bool] | None = None,
    ) -> None:
        if bool(urls) == bool(sitemap):
            raise ValueError("give either urls or sitemap")
        from pipeline import formats

        self.name = name
        self.accept = accept or (lambda key: formats.media_type_for(key) is not None)
        self.urls = tuple(without_fragment(u) for u in urls)
        self.sitemap = without_fragment(sitemap) if sitemap else None
        self.state_dir = Path(state_dir)
        self.timeout = timeout
        self.retries = retries
        self.max_bytes = max_bytes
        self.per_host = per_host
        self.misses_before_removal = misses_before_removal
        self.backoff_seconds = backoff_seconds
        self.problems: list[tuple[str, str]] = []  # (key or URL, what went wrong), last listing
        self._known: dict[str, Fingerprint] = {}
        self._primed = False  # without stored fingerprints there is nothing to count misses of
        self._spool: Path | None = None
        self._fetched: dict[str, _Fetched] = {}
        self._pages: dict[str, Page] = {}
        self._pool: urllib3.PoolManager | None = None
        self._lock = threading.Lock()

    # --- what the engine calls --------------------------------------------------------------

    @property
    def location(self) -> str:
        """The sitemap URL, or the site the URLs belong to."""
        return self.sitemap or site_of(self.urls[0])

    def prime(self, known: Mapping[str, str]) -> None:
        """Take the stored fingerprints (key -> fingerprint key) for conditional GETs."""
        self._known = {}
        self._primed = True
        for key, text in known.items():
            fp = Fingerprint.parse(text)
            if fp is not None:
                self._known[key] = fp

    def list_items(self) -> Iterator[SourceItem]:
        """Every page with a fingerprint; pages that could not be fetched keep their stored one.

        Raises SourceUnreachable when the sitemap, or every page, cannot be fetched, and
        SourcePermission when every page refused access (401/403). Miss counts are saved only
        when the listing succeeds.
        """
        self.problems = []
        self._reset_spool()
        pages = self._sitemap_pages() if self.sitemap else self._configured_pages()
        self._pages = {p.key: p for p in pages}
        with ThreadPoolExecutor(max_workers=self.per_host, thread_name_prefix="upwell-http") as ex:
            answers = list(ex.map(self._check, pages))

        # A 200, 304, 404 or 410 is the site speaking about a page; anything else is not.
        answered = [a for a in answers if a.status in (200, 304) or a.status in _GONE_STATUSES]
        if not answered:
            if answers and all(a.status in _REFUSED_STATUSES for a in answers):
                raise SourcePermission(
                    f"source {self.name!r}: every page of {self.location} refused access "
                    f"(HTTP {answers[0].status}); nothing was changed"
                )
            first = answers[0].problem if answers else "no pages"
            raise SourceUnreachable(
                f"source {self.name!r}: no page of {self.location} could be fetched ({first}); "
                "nothing was changed"
            )

        misses = self._load_misses()
        items: list[SourceItem] = []
        for page, answer in zip(pages, answers, strict=True):
            item = self._item_for(page, answer, misses)
            if item is not None:
                items.append(item)
        if self._primed:
            # Counts of keys the index no longer knows are dropped: removed, or never indexed.
            self._save_misses({k: n for k, n in misses.items() if k in self._known})
        for key, problem in self.problems:
            log.warning("source %s: %s: %s", self.name, key, problem)
        yield from items

    def read(self, key: str, max_bytes: int) -> bytes:
        """The page's bytes as fetched during listing (or fetched now, if it was not)."""
        fetched = self._fetched.pop(key, None)
        if fetched is None:
            return self._read_now(key, max_bytes)
        if fetched.too_large:
            raise DocumentTooLarge(
                f"the page is over the size limit of {min(max_bytes, self.max_bytes):,} bytes"
            )
        if fetched.spool is None:
            if not fetched.refusal:
                return self._read_now(key, max_bytes)
            raise DocumentUnreadable(fetched.refusal)
        try:
            data = fetched.spool.read_bytes()
            fetched.spool.unlink()
        except OSError as exc:
            raise DocumentUnreadable(f"the fetched page was lost: {exc}") from None
        if len(data) > max_bytes:
            raise DocumentTooLarge(
                f"{len(data):,} bytes is over the file size limit of {max_bytes:,} bytes"
            )
        return data

    # --- pages ----------------------------------------------------------------------------------

    def _configured_pages(self) -> list[Page]:
        return [page_for(url, self.accept) for url in self.urls]

    def _sitemap_pages(self) -> list[Page]:
        assert self.sitemap is not None
        site = site_of(self.sitemap)
        locations = self._sitemap_locations(self.sitemap, nested=True)
        pages: dict[str, Page] = {}
        for url in locations:
            url = without_fragment(url)
            problem = url_problem(url)
            if problem is None and site_of(url) != site:
                # The sitemaps protocol allows only URLs of the sitemap's own host.
                problem = f"is not on {site}, the sitemap's site"
            if problem is not None:
                self.problems.append((url, f"skipped: {problem}"))
                continue
            page = page_for(url, self.accept)
            if page.key in pages:
                if pages[page.key].url != url:
                    self.problems.append(
                        (url, f"skipped: same key {page.key!r} as {pages[page.key].url}")
                    )
                continue
            pages[page.key] = page
        if not pages:
            raise SourceUnreachable(
                f"source {self.name!r}: the sitemap {self.sitemap} lists no usable pages; "
                "an empty sitemap is not taken to mean every page is gone; nothing was changed"
            )
        return list(pages.values())

    def _sitemap_locations(self, url: str, *, nested: bool) -> list[str]:
        answer = self._get(url, {}, SITEMAP_MAX_BYTES)
        if answer.status != 200:
            what = answer.problem or f"HTTP {answer.status}"
            raise SourceUnreachable(
                f"source {self.name!r}: cannot fetch the sitemap {url} ({what}); "
                "nothing was changed"
            )
        if answer.truncated:
            raise SourceUnreachable(
                f"source {self.name!r}: the sitemap {url} is over {SITEMAP_MAX_BYTES:,} bytes"
            )
        root = parse_sitemap_xml(answer.body, f"source {self.name!r}: the sitemap {url}")
        locations = [
            (loc.text or "").strip()
            for loc in root.iter(f"{SITEMAP_NAMESPACE}loc")
            if (loc.text or "").strip()
        ][:SITEMAP_MAX_URLS]
        if root.tag == f"{SITEMAP_NAMESPACE}sitemapindex":
            if not nested:
                raise SourceUnreachable(
                    f"source {self.name!r}: the sitemap index {url} lists another index"
                )
            out: list[str] = []
            for child in locations:
                if site_of(child) != site_of(url):
                    self.problems.append((child, "skipped: a sitemap on another site"))
                    continue
                out.extend(self._sitemap_locations(without_fragment(child), nested=False))
            return out
        return locations

    # --- one page --------------------------------------------------------------------------

    def _check(self, page: Page) -> _Answer:
        known = self._known.get(page.key)
        answer = self._get(page.url, conditional_headers(known), self.max_bytes)
        if answer.status == 200:
            self._keep_body(page, answer, known)
        return answer

    def _keep_body(self, page: Page, answer: _Answer, known: Fingerprint | None) -> None:
        etag = answer.headers.get("etag")
        tag = f"etag:{etag}" if etag else "sha256:" + hashlib.sha256(answer.body).hexdigest()
        size = int(answer.headers.get("content-length") or len(answer.body))
        fp = Fingerprint(
            size=size if answer.truncated else len(answer.body),
            mtime_ns=_last_modified_ns(answer.headers.get("last-modified")),
            tag=tag,
        )
        content_type = answer.headers.get("content-type", "").split(";")[0].strip().lower()
        if answer.truncated:
            fetched = _Fetched(fp, None, too_large=True)
        elif page.must_be_html and content_type and content_type not in _HTML_TYPES:
            fetched = _Fetched(fp, None, f"served as {content_type}, not as an HTML page")
        elif known is not None and known.key() == fp.key():
            fetched = _Fetched(fp, None)  # the engine will not read it; if it does, fetch again
        else:
            spool = self._spool_folder() / hashlib.sha256(page.key.encode()).hexdigest()[:32]
            spool.write_bytes(answer.body)
            fetched = _Fetched(fp, spool)
        with self._lock:
            self._fetched[page.key] = fetched

    def _item_for(self, page: Page, answer: _Answer, misses: dict[str, int]) -> SourceItem | None:
        """The listed item for one answer, or None to leave the page out (the engine removes a
        known document that is left out)."""
        known = self._known.get(page.key)
        fingerprint: Fingerprint | None
        if answer.status == 200:
            fingerprint = self._fetched[page.key].fingerprint
            misses.pop(page.key, None)
        elif answer.status == 304 and known is not None:
            fingerprint = known
            misses.pop(page.key, None)
        elif answer.status in _GONE_STATUSES:
            if known is None:
                return None  # never indexed: nothing to keep or count
            misses[page.key] = min(misses.get(page.key, 0) + 1, self.misses_before_removal)
            if misses[page.key] >= self.misses_before_removal:
                self.problems.append(
                    (page.key, f"HTTP {answer.status} {misses[page.key]} times in a row; removed")
                )
                return None
            self.problems.append(
                (
                    page.key,
                    f"HTTP {answer.status} ({misses[page.key]} of "
                    f"{self.misses_before_removal} misses before removal); kept",
                )
            )
            fingerprint = known
        else:
            # Unreachable after retries, refused, or an answer that says nothing about the page:
            # keep it as it was; its miss count neither grows nor resets.
            what = answer.problem or f"HTTP {answer.status}"
            self.problems.append((page.key, f"{what}; kept as it was"))
            fingerprint = known
        if fingerprint is None:
            return None
        return SourceItem(source=self.name, key=page.key, fingerprint=fingerprint)

    def _read_now(self, key: str, max_bytes: int) -> bytes:
        page = self._pages.get(key)
        if page is None:
            raise DocumentUnreadable(f"{key} is not a page of this source")
        limit = min(max_bytes, self.max_bytes)
        answer = self._get(page.url, {}, limit)
        if answer.status != 200:
            raise DocumentUnreadable(
                f"could not fetch {page.url}: {answer.problem or f'HTTP {answer.status}'}"
            )
        if answer.truncated:
            raise DocumentTooLarge(f"the page is over the size limit of {limit:,} bytes")
        return answer.body

    # --- HTTP -----------------------------------------------------------------------------------

    def _http(self) -> urllib3.PoolManager:
        with self._lock:
            if self._pool is None:
                self._pool = urllib3.PoolManager(
                    num_pools=4,
                    maxsize=self.per_host,
                    block=True,  # at most per_host connections to the site, ever
                    headers=_BASE_HEADERS,
                )
            return self._pool

    def _get(self, url: str, headers: Mapping[str, str], limit: int) -> _Answer:
        """GET with retries on timeouts, refused connections, 429 and 5xx; exponential backoff
        with jitter between attempts. Returns the last answer (status None if none came)."""
        answer = _Answer(None, problem="not tried")
        for attempt in range(self.retries + 1):
            if attempt:
                # Exponential backoff with jitter (common practice), so clients that failed
                # together do not all come back at the same instant.
                delay = self.backoff_seconds * 2 ** (attempt - 1) * random.uniform(0.5, 1.5)
                time.sleep(min(delay, _BACKOFF_CAP_SECONDS))
            answer = self._get_once(url, headers, limit)
            if answer.status is not None and answer.status not in _RETRY_STATUSES:
                return answer
        if answer.status is not None:
            answer = _Answer(answer.status, answer.headers, problem=f"HTTP {answer.status}")
        attempts = self.retries + 1
        return _Answer(
            answer.status,
            answer.headers,
            problem=f"{answer.problem} after {attempts} attempt{'s' * (attempts > 1)}",
        )

    def _get_once(self, url: str, headers: Mapping[str, str], limit: int) -> _Answer:
        deadline = time.monotonic() + self.timeout
        origin = urlsplit(url)[:2]
        current = url
        for _hop in range(MAX_REDIRECTS + 1):
            try:
                response = self._http().request(
                    "GET",
                    current,
                    # Given per request, these replace the pool's headers: name them all.
                    headers={**_BASE_HEADERS, **headers},
                    preload_content=False,
                    timeout=urllib3.Timeout(connect=self.timeout, read=self.timeout),
                    retries=urllib3.Retry(
                        total=None, connect=0, read=0, status=0, other=0, redirect=0
                    ),
                    redirect=False,
                )
            except urllib3.exceptions.MaxRetryError as exc:
                return _Answer(None, problem=_describe(exc.reason or exc))
            except (urllib3.exceptions.HTTPError, OSError) as exc:
                return _Answer(None, problem=_describe(exc))
            location = response.headers.get("Location")
            if response.status not in _REDIRECT_STATUSES or not location:
                break
            response.drain_conn()
            response.release_conn()
            target = urljoin(current, location)
            if urlsplit(target)[:2] != origin:
                # Only within the site and its scheme: never to another host, never to
                # another scheme (https to http, or file:).
                # An answer (its status), not a failure to answer: asking again would not help.
                return _Answer(
                    response.status,
                    problem=f"redirected to {target}, off the site; upwell follows redirects "
                    "only within the site and its scheme",
                )
            current = target
        else:
            return _Answer(response.status, problem=f"more than {MAX_REDIRECTS} redirects")
        try:
            received = {k.lower(): v for k, v in response.headers.items()}
            if response.status != 200:
                return _Answer(response.status, received)
            declared = received.get("content-length", "")
            if declared.isdigit() and int(declared) > limit:
                return _Answer(200, received, truncated=True)
            body = bytearray()
            for piece in response.stream(_READ_CHUNK):
                body += piece
                if len(body) > limit:
                    return _Answer(200, received, bytes(body[: limit + 1]), truncated=True)
                if time.monotonic() > deadline:
                    return _Answer(None, problem=f"timed out after {self.timeout:g}s reading")
            return _Answer(200, received, bytes(body))
        except (urllib3.exceptions.HTTPError, OSError) as exc:
            return _Answer(None, problem=_describe(exc))
        finally:
            response.release_conn()

    # --- state ------------------------------------------------------------------------------

    def _misses_file(self) -> Path:
        return self.state_dir / "misses.json"

    def _load_misses(self) -> dict[str, int]:
        try:
            data = json.loads(self._misses_file().read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return {}
        return {str(k): int(v) for k, v in data.items()} if isinstance(data, dict) else {}

    def _save_misses(self, misses: dict[str, int]) -> None:
        if not misses and not self._misses_file().exists():
            return
        self.state_dir.mkdir(parents=True, exist_ok=True)
        temporary = self._misses_file().with_suffix(".tmp")
        temporary.write_text(json.dumps(misses, sort_keys=True), encoding="utf-8")
        os.replace(temporary, self._misses_file())  # atomic: a crash leaves the old counts

    def _spool_folder(self) -> Path:
        """This listing's own folder of fetched bodies (another process listing the same source,
        such as ``verify``, has its own)."""
        with self._lock:
            if self._spool is None:
                parent = self.state_dir / "fetched"
                parent.mkdir(parents=True, exist_ok=True)
                self._spool = Path(tempfile.mkdtemp(dir=parent))
            return self._spool

    def _reset_spool(self) -> None:
        # Bodies this object fetched in an earlier listing and never read are stale now;
        # folders a crashed process left behind go once they are a day old.
        self._fetched = {}
        if self._spool is not None:
            shutil.rmtree(self._spool, ignore_errors=True)
            self._spool = None
        parent = self.state_dir / "fetched"
        if parent.is_dir():
            for folder in parent.iterdir():
                try:
                    if time.time() - folder.stat().st_mtime > _STALE_SPOOL_SECONDS:
                        shutil.rmtree(folder, ignore_errors=True)
                except OSError:
                    continue


def _describe(exc: BaseException) -> str:
    # NewConnectionError subclasses urllib3's ConnectTimeoutError, so it is asked first.
    if isinstance(exc, urllib3.exceptions.NewConnectionError | ConnectionRefusedError):
        return "connection refused" if "refused" in str(exc).lower() else "cannot connect"
    if isinstance(exc, (urllib3.exceptions.TimeoutError, TimeoutError)):
        return "timed out"
    text = str(exc)
    return text.split(": ", 1)[-1] if ": " in text else (text or type(exc).__name__)


def parse_sitemap_xml(data: bytes, what: str) -> Any:
    """The root element of a sitemap, parsed with defusedxml when installed; otherwise with
    xml.etree after refusing any DOCTYPE (a sitemap needs none, and entity expansion is how XML
    bombs work). Raises SourceUnreachable for anything that is not well-formed XML."""
    try:
        from defusedxml import ElementTree as safe_tree  # type: ignore[import-untyped]
    except ImportError:
        safe_tree = None
    if len(data) > SITEMAP_MAX_BYTES:
        raise SourceUnreachable(f"{what} is over {SITEMAP_MAX_BYTES:,} bytes")
    try:
        if safe_tree is not None:
            return safe_tree.fromstring(data)
        if b"<!DOCTYPE" in data[:4096].upper():
            raise SourceUnreachable(f"{what} declares a DOCTYPE, which a sitemap never needs")
        import xml.etree.ElementTree as tree

        return tree.fromstring(data)
    except SourceUnreachable:
        raise
    except Exception as exc:  # ParseError, and defusedxml's refusals (entities, DTDs)
        raise SourceUnreachable(f"{what} is not a readable sitemap ({exc})") from None


def from_config(
    name: str, options: Mapping[str, Any], fail: Callable[[str, str], Any], state_dir: Path
) -> HttpSource:
    """A ``kind = "http"`` source: ``urls`` or ``sitemap``, ``timeout``, ``retries``,
    ``max_bytes``, ``per_host``, ``misses_before_removal``. Cheap: no request is made."""
    known = ("urls", "sitemap", "timeout", "retries", "max_bytes", "per_host",
             "misses_before_removal")  # fmt: skip
    for key in options:
        if key not in known:
            fail(key, f"unknown key (known here: {', '.join(known)})")
    urls = options.get("urls")
    sitemap = options.get("sitemap")
    if (urls is None) == (sitemap is None):
        fail("urls", "or `sitemap` is required (one of them, not both)")
    if urls is not None:
        if not isinstance(urls, list) or not urls or not all(isinstance(u, str) for u in urls):
            fail("urls", 'must be a non-empty list of URLs such as ["https://host/page.html"]')
        for url in urls:
            problem = url_problem(url.strip())
            if problem:
                fail("urls", f"{url!r} {problem}")
        sites = {site_of(u.strip()) for u in urls}
        if len(sites) > 1:
            fail("urls", f"span several sites ({', '.join(sorted(sites))}); use one source each")
        from pipeline import formats

        accept = lambda key: formats.media_type_for(key) is not None  # noqa: E731
        seen: dict[str, str] = {}
        for url in urls:
            page = page_for(without_fragment(url), accept)
            if page.key in seen and seen[page.key] != page.url:
                fail("urls", f"{url!r} and {seen[page.key]!r} would share the key {page.key!r}")
            seen[page.key] = page.url
    if sitemap is not None:
        if not isinstance(sitemap, str) or url_problem(sitemap.strip()):
            fail("sitemap", "must be the http:// or https:// URL of a sitemap.xml")

    def count(key: str, default: int, minimum: int) -> int:
        value = options.get(key, default)
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            fail(key, f"must be a whole number of at least {minimum}, not {value!r}")
        return int(value)

    timeout = DEFAULT_TIMEOUT
    if "timeout" in options:
        try:
            timeout = parse_duration(str(options["timeout"]))
        except ValueError as exc:
            fail("timeout", str(exc))
    return HttpSource(
        name,
        urls=tuple(dict.fromkeys(u.strip() for u in urls)) if urls else (),
        sitemap=sitemap.strip() if sitemap else None,
        state_dir=state_dir,
        timeout=timeout,
        retries=count("retries", DEFAULT_RETRIES, 0),
        max_bytes=count("max_bytes", DEFAULT_MAX_BYTES, 1),
        per_host=count("per_host", DEFAULT_PER_HOST, 1),
        misses_before_removal=count("misses_before_removal", DEFAULT_MISSES_BEFORE_REMOVAL, 1),
    )
