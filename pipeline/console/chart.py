"""The history chart, drawn as SVG on the server.

Why SVG from Python rather than a charting library in the browser: the chart is three small
series over at most a few hundred commits; a few dozen lines of SVG draw it with no vendored
script, no licence to carry, nothing to run before it shows, and it reads the same with
JavaScript off. Each point carries a ``<title>`` (the browser's own tooltip) and the history
table under the chart holds the same figures as text.

Three panels share one x axis, one step per commit (oldest left):

- documents searchable after each commit (line, round markers);
- chunks in the index after each commit (line, square markers);
- per commit, chunks embedded and reused (bars up) and deleted (bars down), so a bad ingest, a
  sudden drop, stands out below the zero line. The bars use a square-root scale, so the first
  build does not flatten every later commit, and each is labelled with its count.

The line panels span their values' own range (labelled on the axis), not zero upwards: a
drop of a few documents in a thousand must still show.

The values are escaped by the template engine that renders this markup; this module builds
numbers and the commit's own fields, and escapes those itself.
"""

from __future__ import annotations

from collections.abc import Sequence
from html import escape
from typing import Any

WIDTH = 760
LEFT = 64  # room for the y labels
RIGHT = 16
PANEL = 64  # height of each panel
GAP = 30  # between panels: the panel's title sits here
LABELLED_BARS = 30  # up to this many commits, each bar is labelled with its count


def _tick(x: float, y: float, text: str, anchor: str = "end") -> str:
    return (
        f'<text class="tick" x="{x:.1f}" y="{y:.1f}" text-anchor="{anchor}">{escape(text)}</text>'
    )


def _range(values: Sequence[float]) -> tuple[float, float]:
    """(low, high) of a line panel: the values' own range with a margin, so a drop of a few
    documents in a thousand still shows; the axis labels say where it starts."""
    if not values:
        return 0.0, 1.0
    low, high = min(values), max(values)
    margin = max((high - low) * 0.2, 1.0)
    return max(0.0, low - margin), high + margin


def _x(i: int, n: int) -> float:
    inset = 14  # the first and last bars stay clear of the axis labels
    span = WIDTH - LEFT - RIGHT - 2 * inset
    return LEFT + inset + (span / 2 if n == 1 else span * i / (n - 1))


def _label(point: dict[str, Any]) -> str:
    after = point.get("after") or {}
    return (
        f"v{point['version']} · {point['time']} · {point['trigger']}\n"
        f"after: {after.get('documents', '?')} documents, {after.get('chunks', '?')} chunks\n"
        f"chunks: {point['embedded']} embedded, {point['reused']} reused, "
        f"{point.get('added', 0)} added, {point['deleted']} deleted"
    )


def _line_panel(
    points: Sequence[dict[str, Any]], key: str, top_y: float, title: str, marker: str
) -> list[str]:
    n = len(points)
    values = [((p.get("after") or {}).get(key)) for p in points]
    low, high = _range([v for v in values if v is not None])
    per = PANEL / (high - low)
    base = top_y + PANEL
    out = [
        f'<text class="panel-title" x="{LEFT}" y="{top_y - 10:.1f}">{escape(title)}</text>',
        f'<line class="axis" x1="{LEFT}" y1="{base:.1f}" x2="{WIDTH - RIGHT}" y2="{base:.1f}"/>',
        _tick(LEFT - 6, top_y + 4, f"{high:.0f}"),
        _tick(LEFT - 6, base + 4, f"{low:.0f}"),
    ]
    runs: list[list[str]] = [[]]
    for i, v in enumerate(values):
        if v is None:  # retention removed that version: a gap in the line, not a zero
            runs.append([])
        else:
            runs[-1].append(f"{_x(i, n):.1f},{base - (v - low) * per:.1f}")
    for run in runs:
        if len(run) > 1:
            out.append(f'<polyline class="series-{key}" points="{" ".join(run)}"/>')
    for i, (p, v) in enumerate(zip(points, values, strict=True)):
        if v is None:
            continue
        x, y = _x(i, n), base - (v - low) * per
        title_text = escape(_label(p))
        data = f'data-commit="{escape(p["id"])}" data-value="{v}"'
        if marker == "circle":
            shape = f'<circle class="point point-{key}" cx="{x:.1f}" cy="{y:.1f}" r="3.5" {data}>'
            out.append(f"{shape}<title>{title_text}</title></circle>")
        else:
            shape = (
                f'<rect class="point point-{key}" x="{x - 3.5:.1f}" y="{y - 3.5:.1f}" '
                f'width="7" height="7" {data}>'
            )
            out.append(f"{shape}<title>{title_text}</title></rect>")
    return out


def _bars_panel(points: Sequence[dict[str, Any]], top_y: float) -> list[str]:
    n = len(points)
    # Above the line: chunks the commit put in, embedded (solid) or taken from the vector
    # cache or, for a rollback, from an earlier version (outlined).
    kept = [max(p["reused"], p.get("added", 0) - p["embedded"]) for p in points]
    up = [p["embedded"] + k for p, k in zip(points, kept, strict=True)]
    down = [p["deleted"] for p in points]
    biggest = max([1, *up, *down])
    half = PANEL / 2
    zero = top_y + half

    room = half - (13 if n <= LABELLED_BARS else 0)  # labelled bars keep room for the label

    def height(count: int) -> float:
        # square-root scale: the first build's thousands do not flatten a later drop of ten
        return room * (count / biggest) ** 0.5

    step = (WIDTH - LEFT - RIGHT) / max(n, 1)
    width = max(2.0, min(18.0, step * 0.6))
    out = [
        f'<text class="panel-title" x="{LEFT}" y="{top_y - 10:.1f}">'
        "Chunks per commit: embedded ▮, reused or restored (outlined) up; "
        "deleted ▮ down (√)</text>",
        f'<line class="axis" x1="{LEFT}" y1="{zero:.1f}" x2="{WIDTH - RIGHT}" y2="{zero:.1f}"/>',
        _tick(LEFT - 6, zero + 4, "0"),
    ]
    if n > LABELLED_BARS:  # too many bars to label each: mark the scale's ends instead
        out.append(_tick(LEFT - 6, top_y + 4, f"+{biggest}"))
        out.append(_tick(LEFT - 6, top_y + PANEL + 4, f"−{biggest}"))
    for i, p in enumerate(points):
        x = _x(i, n) - width / 2
        title_text = escape(_label(p))
        embedded_h = height(up[i]) - height(kept[i])
        reused_h = height(kept[i])
        deleted_h = height(p["deleted"])
        group = [f'<g class="bar" data-commit="{escape(p["id"])}"><title>{title_text}</title>']
        if embedded_h:
            group.append(
                f'<rect class="bar-embedded" x="{x:.1f}" y="{zero - embedded_h:.1f}" '
                f'width="{width:.1f}" height="{embedded_h:.1f}"/>'
            )
        if reused_h:
            group.append(
                f'<rect class="bar-reused" x="{x:.1f}" y="{zero - embedded_h - reused_h:.1f}" '
                f'width="{width:.1f}" height="{reused_h:.1f}"/>'
            )
        if deleted_h:
            group.append(
                f'<rect class="bar-deleted" x="{x:.1f}" y="{zero:.1f}" '
                f'width="{width:.1f}" height="{deleted_h:.1f}"/>'
            )
        if n <= LABELLED_BARS:
            cx = x + width / 2
            if up[i]:
                group.append(_tick(cx, zero - embedded_h - reused_h - 3, f"+{up[i]}", "middle"))
            if down[i]:
                group.append(_tick(cx, zero + deleted_h + 11, f"−{down[i]}", "middle"))
        group.append("</g>")
        out.append("".join(group))
    return out


def history_svg(points: Sequence[dict[str, Any]]) -> str:
    """The chart of ``points`` (the ``chart`` list of the history view, oldest first)."""
    n = len(points)
    if not n:
        return ""
    height = GAP + PANEL + GAP + PANEL + GAP + PANEL + 30
    y1 = GAP
    y2 = y1 + PANEL + GAP
    y3 = y2 + PANEL + GAP
    parts = [
        f'<svg class="history-chart" viewBox="0 0 {WIDTH} {height}" role="img" '
        f'aria-labelledby="chart-title" xmlns="http://www.w3.org/2000/svg">',
        f'<title id="chart-title">The index over its last {n} commits: documents and chunks '
        "after each commit, and chunks embedded, reused and deleted per commit</title>",
        *_line_panel(points, "documents", y1, "Documents searchable after each commit ●", "circle"),
        *_line_panel(points, "chunks", y2, "Chunks in the index after each commit ■", "square"),
        *_bars_panel(points, y3),
    ]
    base = y3 + PANEL + 18
    for i in sorted({0, n - 1, *range(0, n, max(1, n // 8))}):
        parts.append(_tick(_x(i, n), base, f"v{points[i]['version']}", "middle"))
    parts.append("</svg>")
    return "\n".join(parts)
