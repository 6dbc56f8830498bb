"""The console in a real browser: Debian's Chromium, headless, driven through Playwright.

Every page is loaded against the six-commit index of tests/support/console.py, with no
JavaScript error and no request leaving 127.0.0.1, at a desktop and a phone size; a screenshot
of each is saved under test-artifacts/console/ (or $UPWELL_ARTIFACTS). Where no Chromium is
found the tests skip and say so; with UPWELL_REQUIRE_BROWSER=1 (CI sets it) they fail instead.
"""

from __future__ import annotations

import json
import os
import urllib.parse
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import REPO, write
from tests.support.console import EDITED, HOSTILE_NAME, RENAMED, SOURCE, chromium_path
from tests.support.service import make_config, wait_for

DESKTOP = {"width": 1280, "height": 900}
PHONE = {"width": 390, "height": 844}  # a phone-sized screen, common practice for layout tests


def _unavailable(why: str) -> None:
    if os.environ.get("UPWELL_REQUIRE_BROWSER"):
        pytest.fail(f"the browser tests must run here, but {why}")
    pytest.skip(f"console browser tests skipped: {why}")


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    executable = chromium_path()
    if executable is None:
        _unavailable("no Chromium found (apt-get install chromium, or set $UPWELL_CHROMIUM)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        _unavailable("the playwright package is not installed (pip install -e '.[test]')")
    with sync_playwright() as playwright:
        launched = playwright.chromium.launch(
            executable_path=executable, args=["--no-sandbox", "--disable-gpu"]
        )
        yield launched
        launched.close()


ARTIFACTS = Path(os.environ.get("UPWELL_ARTIFACTS") or REPO / "test-artifacts") / "console"


class Watched:
    """A page with every JavaScript error, console error and outside request it met."""

    def __init__(self, browser: Any, viewport: dict[str, int]) -> None:
        self.context = browser.new_context(viewport=viewport)
        self.page = self.context.new_page()
        self.errors: list[str] = []
        self.outside: list[str] = []
        self.dialogs: list[str] = []
        self.page.on("pageerror", lambda e: self.errors.append(f"page error: {e}"))
        self.page.on(
            "console",
            lambda m: (
                self.errors.append(f"console {m.type}: {m.text}") if m.type == "error" else None
            ),
        )
        self.page.on("request", self._request)
        self.page.on("dialog", self._dialog)

    def _request(self, request: Any) -> None:
        host = urllib.parse.urlsplit(request.url).hostname
        if request.url.startswith(("data:", "about:")) or host == "127.0.0.1":
            return
        self.outside.append(request.url)

    def _dialog(self, dialog: Any) -> None:
        self.dialogs.append(dialog.message)
        dialog.dismiss()

    def shot(self, name: str) -> Path:
        ARTIFACTS.mkdir(parents=True, exist_ok=True)
        path = ARTIFACTS / f"{name}.png"
        self.page.screenshot(path=str(path), full_page=True)
        return path

    def clean(self) -> None:
        assert not self.errors, self.errors
        assert not self.outside, f"requests left the machine: {self.outside}"
        assert not self.dialogs, f"a script ran: {self.dialogs}"

    def close(self) -> None:
        self.context.close()


@pytest.fixture
def desk(browser: Any) -> Iterator[Watched]:
    w = Watched(browser, DESKTOP)
    yield w
    w.close()


def _q(**params: Any) -> str:
    return urllib.parse.urlencode(params)


def pages(history: Any) -> dict[str, str]:
    return {
        "overview": "/console/",
        "search": "/console/search?" + _q(q="seat clamp torque", k=5),
        "history": "/console/history",
        "history-diff": "/console/history?"
        + _q(**{"from": history.commits[0], "to": history.commits[-1]}),
        "rollback-preview": "/console/rollback-preview?to=before-cleanup",
        "document": "/console/document?" + _q(id=history.doc_id(EDITED)),
        "document-removed": "/console/document?" + _q(id=history.doc_id(RENAMED[0])),
        "failures": "/console/failures",
        "not-found": "/console/document?" + _q(id=f"{SOURCE}:no/such.md"),
    }


@pytest.mark.parametrize("size", ["desktop", "phone"])
def test_every_page_loads_clean_fits_the_screen_and_is_screenshotted(
    browser, console, console_history, size
):
    w = Watched(browser, DESKTOP if size == "desktop" else PHONE)
    try:
        for name, path in pages(console_history).items():
            answer = w.page.goto(console.base + path)
            assert answer.status == (404 if name == "not-found" else 200), name
            assert w.page.locator("h1").inner_text().strip(), name
            # nothing wider than the screen: no sideways scrolling, on a phone either
            overflow = w.page.evaluate(
                "document.documentElement.scrollWidth - document.documentElement.clientWidth"
            )
            assert overflow <= 1, f"{name} is {overflow}px wider than the {size} screen"
            assert w.shot(f"{name}-{size}").stat().st_size > 0
            if name == "not-found":  # Chromium logs the page's own 404 as a console error
                w.errors = [e for e in w.errors if "status of 404" not in e]
            w.clean()
    finally:
        w.close()


def test_a_typed_query_returns_hits_with_citations_and_a_hit_opens_its_document(desk, console):
    page = desk.page
    page.goto(console.base + "/console/search")
    page.locator("#q").fill("how far must the seatpost go into the frame")
    page.locator("select[name=mode]").select_option("hybrid")
    page.locator("#q").press("Enter")
    page.wait_for_selector("li.hit")
    hits = page.locator("li.hit")
    assert 1 <= hits.count() <= 10
    first = hits.first
    citation = first.locator(".meta code").inner_text()
    assert citation.startswith(f"{SOURCE}/")
    assert first.locator("mark").count() >= 1  # the matched words are marked
    # the page shows what the JSON twin returns, in the same order
    twin = json.loads(
        page.request.get(
            console.base
            + "/search?"
            + _q(q="how far must the seatpost go into the frame", k=10, mode="hybrid")
        ).text()
    )
    assert [h.locator(".meta code").inner_text() for h in hits.all()] == [
        r["citation"] for r in twin["results"]
    ]
    first.locator("a.doc").click()
    page.wait_for_selector("ol.chunks")
    heading = page.locator("h1").inner_text()
    assert heading == f"Document {twin['results'][0]['source']}/{twin['results'][0]['path']}"
    assert page.locator("li.chunk").count() >= 1
    desk.shot("search-to-document")
    desk.clean()


def test_two_commits_picked_in_the_history_give_their_diff(desk, console, console_history):
    page = desk.page
    page.goto(console.base + "/console/history")
    first, *_, last = console_history.commits
    page.locator("select[name=from]").select_option(first)
    page.locator("select[name=to]").select_option(last)
    page.get_by_role("button", name="Show changes").click()
    page.wait_for_selector("#diff")
    twin = json.loads(
        page.request.get(console.base + "/history?" + _q(**{"from": first, "to": last})).text()
    )["diff"]
    for key in ("added", "modified", "removed"):
        shown = page.locator(f".diff-{key} li a").all_inner_texts()
        assert shown == twin["documents"][key], key
    assert console_history.doc_id(HOSTILE_NAME) in page.locator(".diff-added").inner_text()
    desk.shot("history-picked-diff")
    desk.clean()


def test_the_chart_has_one_point_per_commit_and_a_point_opens_its_changes(
    desk, console, console_history
):
    page = desk.page
    page.goto(console.base + "/console/history")
    points = page.locator("svg.history-chart .point-documents")
    assert points.count() == len(console_history.commits)
    assert page.locator("svg.history-chart .point-chunks").count() == len(console_history.commits)
    # the browser's own tooltip: each point's <title> names its commit's figures
    assert "documents" in (points.first.locator("title").text_content() or "")
    points.last.click()
    page.wait_for_url(f"**/console/history?to={console_history.commits[-1]}#diff")
    assert page.locator("#diff").is_visible()
    removed = page.locator(".diff-removed li").count()
    assert removed >= 1  # the last commit is the bulk removal
    desk.clean()


def test_markup_in_a_document_shows_as_text_and_runs_nothing(desk, console, console_history):
    page = desk.page
    page.goto(console.base + "/console/document?" + _q(id=console_history.doc_id(HOSTILE_NAME)))
    text = page.locator("ol.chunks").inner_text()
    assert "<script>alert('text')</script>" in text
    assert "<b>6 Nm</b>" in text
    assert page.locator("h1").inner_text().endswith(HOSTILE_NAME)
    assert page.locator("iframe").count() == 0
    desk.shot("markup-as-text")
    desk.clean()  # no dialog opened: no injected script ran


def test_the_pages_work_from_the_keyboard(desk, console):
    page = desk.page
    page.goto(console.base + "/console/history")
    page.keyboard.press("Tab")
    assert page.evaluate("document.activeElement.className") == "skip"
    page.keyboard.press("Enter")
    assert page.evaluate("document.activeElement.id") == "main"
    # the navigation is reachable and names the page it is on
    page.goto(console.base + "/console/")
    page.keyboard.press("Tab")  # skip link
    page.keyboard.press("Tab")  # brand
    focused = []
    for _ in range(4):
        page.keyboard.press("Tab")
        focused.append(page.evaluate("document.activeElement.textContent.trim()"))
    assert focused == ["Overview", "Search", "History", "Failures"]
    page.keyboard.press("Enter")
    page.wait_for_url("**/console/failures")
    current = page.locator("nav a[aria-current=page]").inner_text()
    assert current == "Failures"
    desk.clean()


def test_the_overview_refreshes_by_itself_while_the_service_runs(browser, watches, tmp_path):
    share = tmp_path / "share"
    write(share / "notices" / "ECN-0160.md", "# ECN-0160\n\nHeadset bearings: use the new seal.\n")
    w = watches(make_config(tmp_path, {"bench": share}, settle="0.2s")).wait_listening()

    def documents() -> int | None:
        code, body = w.get("/status")
        return json.loads(body)["totals"]["documents"] if code == 200 else None

    wait_for("the start-up sync", lambda: documents() == 1, 90)
    viewer = Watched(browser, DESKTOP)
    try:
        page = viewer.page
        page.goto(f"http://127.0.0.1:{w.port}/console/")
        assert page.locator("body").get_attribute("data-refresh")
        row = page.locator("tr[data-source=bench]")
        assert row.locator("td[data-label=Kind]").inner_text() == "folder"
        assert row.get_attribute("data-state") == "current"
        page.evaluate("window.__stillTheSamePage = true")
        write(share / "notices" / "ECN-0161.md", "# ECN-0161\n\nDropouts: new hanger.\n")
        wait_for(
            "the overview to show the new document without a reload",
            lambda: (
                page.locator("tr[data-source=bench] td[data-label=Documents]").inner_text().strip()
                == "2"
            ),
            60,
        )
        assert page.evaluate("window.__stillTheSamePage === true")
        assert "watching" in page.locator(".totals").inner_text()
        viewer.shot("overview-watching")
        viewer.clean()
    finally:
        viewer.close()
        assert w.stop() == 0
