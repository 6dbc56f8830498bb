"""Console pages as HTML: the view's data through an autoescaping Jinja2 template.

Autoescape is on for every template, so a document whose name, heading or text holds
``<script>``, markup or quotes shows as text. The one piece of markup that is not escaped is the
history chart, which ``chart`` builds from numbers and escaped fields.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime
from importlib import resources
from typing import Any
from urllib.parse import urlencode

from jinja2 import Environment, PackageLoader, StrictUndefined
from markupsafe import Markup

from pipeline.console import chart, views

#: The assets upwell serves, by name; nothing else is served from the package.
STATIC_TYPES = {
    "console.css": "text/css; charset=utf-8",
    "console.js": "text/javascript; charset=utf-8",
    "favicon.svg": "image/svg+xml",
}


def href(path: str, **params: Any) -> str:
    """``path`` with the query parameters that have a value (lists repeat the name)."""
    kept = {k: v for k, v in params.items() if v not in (None, "", [], ())}
    return path + ("?" + urlencode(kept, doseq=True) if kept else "")


def clock(seconds: float | None) -> str:
    """Seconds as ``m:ss`` or ``h:mm:ss``, the way a transcript's time is read."""
    if seconds is None:
        return ""
    whole = int(seconds)
    h, rest = divmod(whole, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def when(text: str | None) -> str:
    """An ISO-8601 UTC time as ``2026-12-03 13:04:05 UTC``."""
    if not text:
        return "—"
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        return text
    return moment.strftime("%Y-%m-%d %H:%M:%S UTC")


def anchors(item: Mapping[str, Any]) -> str:
    """Where in its document a chunk or hit is: pages, heading path, lines, time range."""
    parts = []
    page, page_end = item.get("page"), item.get("page_end")
    if page is not None:
        parts.append(f"p. {page}" if page_end in (None, page) else f"pp. {page}–{page_end}")
    if item.get("heading"):
        parts.append(f"§ {item['heading']}")
    if item.get("line_start") is not None:
        parts.append(f"lines {item['line_start']}–{item['line_end']}")
    if item.get("start") is not None:
        parts.append(f"{clock(item['start'])}–{clock(item.get('end') or item['start'])}")
    return " · ".join(parts)


def _marked(text: str, query: str) -> Markup:
    out = Markup("")
    for piece, hit in views.marked(text, query):
        out += Markup("<mark>{}</mark>").format(piece) if hit else Markup.escape(piece)
    return out


def _history_chart(points: list[dict[str, Any]]) -> Markup:
    return Markup(chart.history_svg(points))


_ENV = Environment(
    loader=PackageLoader("pipeline.console", "templates"),
    autoescape=True,
    undefined=StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)
_ENV.globals.update(href=href, states=views.STATES)
_ENV.filters.update(
    clock=clock, when=when, anchors=anchors, marked=_marked, history_chart=_history_chart
)


def page(template: str, **context: Any) -> bytes:
    """A whole page; ``context`` needs ``page`` (the nav entry), ``title`` and ``json_href``."""
    context.setdefault("refresh", 0)
    context.setdefault("index_path", "")
    context.setdefault("watching", False)
    return _ENV.get_template(template).render(**context).encode("utf-8")


def static(name: str) -> tuple[bytes, str]:
    """(body, content type) of one console asset; NotFound for any other name."""
    kind = STATIC_TYPES.get(name)
    if kind is None:
        raise views.NotFound(f"no console asset {name!r}")
    body = resources.files("pipeline.console").joinpath("static", name).read_bytes()
    return body, kind
