"""The web console over HTTP: every page and its JSON twin against a real index with history
(tests/support/console.py), served on 127.0.0.1 by the server ``upwell serve`` runs.

Pages are parsed with lxml.html (libxml2's HTML parser, an independent reader of the markup);
table counts are checked against LanceDB's own ``count_rows`` at each version."""

from __future__ import annotations

import http.client
import json
import os
import re
import signal
import subprocess
import urllib.parse
from typing import Any

import lancedb
import lxml.html

from pipeline.index import Index
from tests.conftest import REPO
from tests.support.console import (
    BROKEN_NEW,
    BROKEN_OLD,
    DELETED,
    EDITED,
    HOSTILE_NAME,
    RENAMED,
    SOURCE,
    Console,
)
from tests.support.service import PY, wait_for

TOKEN_ENV = "UPWELL_CONSOLE_TEST_TOKEN"


def get(
    base: str, path: str, headers: dict[str, str] | None = None, method: str = "GET", body=None
) -> tuple[int, dict[str, str], bytes]:
    """One request with the path sent exactly as given (no client-side normalisation)."""
    netloc = urllib.parse.urlsplit(base).netloc
    conn = http.client.HTTPConnection(netloc, timeout=60)
    try:
        conn.request(method, path, body=body, headers=headers or {})
        answer = conn.getresponse()
        return answer.status, {k.lower(): v for k, v in answer.getheaders()}, answer.read()
    finally:
        conn.close()


def page(console: Console, path: str) -> Any:
    code, headers, body = get(console.base, path)
    assert code == 200, (path, code, body[:500])
    assert headers["content-type"].startswith("text/html")
    return lxml.html.fromstring(body)


def twin(console: Console, path: str) -> Any:
    code, headers, body = get(console.base, path)
    assert code == 200, (path, code, body[:500])
    assert headers["content-type"].startswith("application/json")
    return json.loads(body)


def q(**params: Any) -> str:
    return urllib.parse.urlencode(params, doseq=True)


def test_every_page_renders_and_names_its_json_twin(console):
    for path in (
        "/console/",
        "/console/search",
        "/console/search?q=seat+clamp+torque",
        "/console/history",
        "/console/failures",
        "/console/rollback-preview?to=before-cleanup",
        f"/console/document?{q(id=f'{SOURCE}:{EDITED}')}",
    ):
        doc = page(console, path)
        links = doc.xpath("//footer//a/@href")
        assert links, f"{path} links its JSON twin"
        twin_path = links[0]
        assert not twin_path.startswith("/console/")
        twin(console, twin_path)  # the twin answers 200 with JSON
        # every asset the page uses is upwell's own (no CDN, nothing leaves the machine)
        assets = doc.xpath("//script/@src | //link/@href | //img/@src")
        assert assets and all(a.startswith("/console/static/") for a in assets), assets
        for asset in assets:
            assert get(console.base, asset)[0] == 200


def test_the_overview_shows_each_source_with_kind_state_and_counts(console, console_history):
    status = twin(console, "/status")
    (source,) = status["sources"]
    assert source["name"] == SOURCE and source["kind"] == "folder"
    assert source["state"] == "current" and source["failed"] == 2
    doc = page(console, "/console/")
    row = doc.xpath(f'//tr[@data-source="{SOURCE}"]')[0]
    # readable without colour: the state is a word beside its icon
    assert "current" in row.xpath('string(.//*[contains(@class, "state")])')
    assert row.xpath('string(.//td[@data-label="Documents"])').strip() == str(source["documents"])
    assert "read-only" in doc.text_content()
    assert doc.get("data-refresh") is None  # nothing to refresh without a service


def test_markup_in_names_headings_and_text_shows_as_text(console, console_history):
    hostile = console_history.doc_id(HOSTILE_NAME)
    for path in (
        f"/console/document?{q(id=hostile)}",
        f"/console/search?{q(q='torque card never more bench note', k=20)}",
        "/console/history?" + q(to=console_history.commits[3]),
    ):
        code, _, body = get(console.base, path)
        assert code == 200
        doc = lxml.html.fromstring(body)
        # lxml.html sees only the console's own script, no injected element or handler
        assert doc.xpath("//script/@src") == ["/console/static/console.js"]
        assert not doc.xpath("//script[not(@src)]")
        assert not doc.xpath("//iframe | //*[@onerror] | //img[@src='x']")
        assert not doc.xpath("//b[contains(., '6 Nm')]")
        text = doc.text_content()
        assert "<img src=x onerror=alert(1)>" in text, path
        if "document" in path:
            assert "<script>alert('heading')</script>" in text
            assert "<script>alert('text')</script>" in text


def test_the_history_chart_has_one_point_per_commit_with_the_tables_own_counts(
    console, console_history
):
    data = twin(console, "/history")
    log = Index(console_history.index_path).history()
    assert [c["id"] for c in data["commits"]] == [c.id for c in log]
    assert [p["id"] for p in data["chart"]] == [c.id for c in reversed(log)]
    doc = page(console, "/console/history")
    for series in ("documents", "chunks"):
        points = doc.xpath(f'//*[contains(@class, "point-{series}")]')
        assert [p.get("data-commit") for p in points] == [c.id for c in reversed(log)]
    assert len(doc.xpath('//*[contains(@class, "bar") and @data-commit]')) == len(log)
    # Reference: LanceDB's own row counts of the chunks table at each commit's version.
    db = lancedb.connect(str(console_history.index_path))
    chunks = db.open_table("chunks")
    for point in data["chart"]:
        version = next(c.version for c in log if c.id == point["id"])
        chunks.checkout(version)
        assert point["after"]["chunks"] == chunks.count_rows()
    # The bulk removal of the last commit is what the chart exists to show.
    last, before = data["chart"][-1], data["chart"][-2]
    assert last["after"]["documents"] < before["after"]["documents"]
    assert last["deleted"] > 0


def test_two_commits_give_their_diff_and_one_commit_its_changes(console, console_history):
    first, *_, last = console_history.commits
    diff = twin(console, "/history?" + q(**{"from": first, "to": last}))["diff"]
    docs = diff["documents"]
    assert console_history.doc_id(HOSTILE_NAME) in docs["added"]
    assert docs["modified"] == [console_history.doc_id(EDITED)]
    removed = set(docs["removed"])
    assert console_history.doc_id(DELETED) in removed
    assert all(d.startswith(f"{SOURCE}:training/") or d.endswith(DELETED) for d in removed)
    assert console_history.doc_id("training/workshop-induction.pptx") in removed
    doc = page(console, "/console/history?" + q(**{"from": first, "to": last}))
    added = doc.xpath('//div[@class="diff-added"]//a/text()')
    assert console_history.doc_id(HOSTILE_NAME) in added
    # `to` alone: that commit against its parent (the rename shows as a move)
    moved = twin(console, "/history?" + q(to=console_history.commits[2]))["diff"]
    assert moved["documents"]["moved"] == [
        {"from": console_history.doc_id(RENAMED[0]), "to": console_history.doc_id(RENAMED[1])}
    ]


def test_a_document_shows_its_versions_tombstones_failure_and_chunks(console, console_history):
    old, new = (console_history.doc_id(p) for p in RENAMED)
    moved_here = twin(console, "/document?" + q(id=new))
    assert [e["event"] for e in moved_here["events"]][-1] == "moved here"
    assert moved_here["events"][-1]["from"] == old
    gone = twin(console, "/document?" + q(id=old))
    assert gone["document"] is None and gone["tombstones"]
    assert [e["event"] for e in gone["events"]] == ["moved away", "added"]
    doc = page(console, "/console/document?" + q(id=old))
    assert "no longer in the index" in doc.text_content()

    edited = twin(console, "/document?" + q(id=console_history.doc_id(EDITED)))
    assert [e["event"] for e in edited["events"]] == ["modified", "added"]
    # chunks in reading order with their anchors (a plain-text file cites lines)
    ordinals = [c["ordinal"] for c in edited["chunks"]]
    assert ordinals == sorted(ordinals) and ordinals[0] == 0
    assert all(c["line_start"] is not None for c in edited["chunks"])

    failed = twin(console, "/document?" + q(id=console_history.doc_id(BROKEN_OLD)))
    assert failed["failure"]["reason"] and failed["failure"]["last_good_searchable"] is True
    assert failed["chunks"], "its last good version's chunks are still there"


def test_long_documents_page_their_chunks(console, console_history):
    manual = console_history.doc_id("manuals/workshop-service-manual.pdf")
    first = twin(console, "/document?" + q(id=manual))
    paging = first["paging"]
    assert paging["total"] > paging["per_page"] and len(first["chunks"]) == paging["per_page"]
    second = twin(console, "/document?" + q(id=manual, page=2))
    assert second["chunks"][0]["ordinal"] == paging["per_page"]
    doc = page(console, "/console/document?" + q(id=manual))
    assert doc.xpath('//a[@rel="next"]')


def test_failures_list_reason_since_and_whether_the_last_good_version_is_searchable(
    console, console_history
):
    data = twin(console, "/failures")
    by_path = {f["path"]: f for f in data["failures"]}
    assert set(by_path) == {BROKEN_NEW, BROKEN_OLD}
    assert by_path[BROKEN_NEW]["last_good_searchable"] is False
    assert by_path[BROKEN_OLD]["last_good_searchable"] is True
    assert all(f["reason"] and f["since"] for f in by_path.values())
    doc = page(console, "/console/failures")
    rows = doc.xpath('//tr[@class="failure"]')
    assert len(rows) == 2
    text = doc.text_content()
    assert "still searchable" in text and "never indexed" in text


def test_the_rollback_preview_plans_gives_the_command_and_changes_nothing(console, console_history):
    before = len(Index(console_history.index_path).history())
    plan = twin(console, "/rollback-preview?" + q(to="before-cleanup"))
    come_back = set(plan["documents"]["come_back"])
    assert come_back and all(d.startswith(f"{SOURCE}:training/") for d in come_back)
    assert plan["documents"]["go_away"] == []
    tag_commit = console_history.commits[3]
    assert plan["command"].endswith(f"rollback {tag_commit}")
    assert str(console_history.index_path) in plan["command"]
    doc = page(console, "/console/rollback-preview?" + q(to="before-cleanup"))
    assert doc.xpath('string(//code[@id="rollback-command"])') == plan["command"]
    assert "changes nothing" in doc.text_content()
    assert len(Index(console_history.index_path).history()) == before


def test_search_marks_matched_words_and_searches_as_of_an_earlier_commit(console, console_history):
    doc = page(console, "/console/search?" + q(q="wheel truing spoke tension", k=5))
    hits = doc.xpath('//li[@class="hit"]')
    assert 1 <= len(hits) <= 5
    marks = {m.lower() for m in doc.xpath("//li[@class='hit']//mark/text()")}
    assert marks and marks <= {"wheel", "truing", "spoke", "tension"}
    assert all(h.xpath('.//a[@class="doc"]/@href') for h in hits)
    # The training folder is gone now; as of the tag, its transcripts are found again.
    words = "lacing a rear wheel crossing pattern"
    now = twin(console, "/search?" + q(q=words, k=10))
    then = twin(console, "/search?" + q(q=words, k=10, as_of="before-cleanup"))
    assert not any(r["path"].startswith("training/") for r in now["results"])
    assert any(r["path"].startswith("training/") for r in then["results"])
    # the filters the CLI has: type and source
    typed = twin(console, "/search?" + q(q="torque", k=10, type="pdf"))
    assert typed["results"] and all(r["path"].endswith(".pdf") for r in typed["results"])


def test_work_per_request_is_bounded_and_bad_requests_say_why(console):
    for path in ("/search?q=seat&k=101", "/console/search?q=seat&k=101"):
        code, _, body = get(console.base, path)
        assert code == 400 and b"between 1 and 100" in body
    assert get(console.base, "/history?page=0")[0] == 400
    assert get(console.base, "/console/history?pages=2")[0] == 400  # unknown parameter
    code, _, body = get(console.base, "/console/history?" + q(to="no-such-tag"))
    assert code == 404 and b"no-such-tag" in body
    assert get(console.base, "/rollback-preview")[0] == 400


def test_no_url_reaches_the_file_system_and_unknown_ids_are_404_pages(console):
    for path in (
        "/console/static/../../pyproject.toml",
        "/console/static/..%2F..%2Fpyproject.toml",
        "/console/static/views.py",
        "/console/static/",
        "/console/nowhere",
    ):
        code, headers, body = get(console.base, path)
        assert code == 404, path
        assert b"[project]" not in body
    for doc_id in ("../../../etc/passwd", "/etc/passwd", f"{SOURCE}:no/such/file.md"):
        code, headers, body = get(console.base, "/console/document?" + q(id=doc_id))
        assert code == 404 and headers["content-type"].startswith("text/html")
        assert b"root:" not in body
        assert get(console.base, "/document?" + q(id=doc_id))[0] == 404


def test_pages_forbid_foreign_content_and_framing(console):
    _, headers, _ = get(console.base, "/console/")
    policy = headers["content-security-policy"]
    assert "default-src 'none'" in policy and "frame-ancestors 'none'" in policy
    assert headers["x-content-type-options"] == "nosniff"
    assert get(console.base, "/console/", method="POST")[0] == 405


def test_with_a_token_every_page_and_asset_needs_it(console_history, monkeypatch):
    monkeypatch.setenv(TOKEN_ENV, "marrowby-bench-7f3a")
    served = Console(console_history.index_path, token_env=TOKEN_ENV)
    try:
        base = served.base
        for path in ("/console/", "/console/static/console.css", "/console/history", "/status"):
            code, _, body = get(base, path)
            assert code == 401, path
            assert b"6 Nm" not in body and b"sample" not in body
        code, _, body = get(base, "/console/history")
        assert b'name="token"' in body  # a browser gets the form to give the token
        bearer = {"Authorization": "Bearer marrowby-bench-7f3a"}
        assert get(base, "/console/static/console.css", bearer)[0] == 200
        form = {"Content-Type": "application/x-www-form-urlencoded"}
        code, headers, _ = get(
            base, "/console/login", form, "POST", q(token="wrong", next="/console/history")
        )
        assert code == 401 and "set-cookie" not in headers
        code, headers, _ = get(
            base, "/console/login", form, "POST", q(token="marrowby-bench-7f3a", next="//x.test/")
        )
        assert code == 303 and headers["location"] == "/console/"  # never to another site
        cookie = headers["set-cookie"].split(";")[0]
        assert "marrowby-bench-7f3a" not in cookie  # the browser keeps a digest, not the token
        assert "HttpOnly" in headers["set-cookie"]
        assert get(base, "/console/history", {"Cookie": cookie})[0] == 200
        assert get(base, "/console/", {"Cookie": "upwell_token=forged"})[0] == 401
    finally:
        served.close()


# --- the `upwell serve` command ------------------------------------------------------------------


def serve_argv(index_path: Any, listen: str) -> list[str]:
    return [PY, "-m", "pipeline.cli", "--index", str(index_path), "serve", "--listen", listen]


def test_upwell_serve_serves_the_console_read_only_and_stops_cleanly(console_history, tmp_path):
    proc = subprocess.Popen(
        serve_argv(console_history.index_path, "127.0.0.1:0"),
        cwd=REPO,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    try:
        line = wait_for("serve to say where it listens", proc.stdout.readline, 90)
        url = re.search(r"(http://127\.0\.0\.1:\d+)/console/", line)
        assert url, line
        code, _, body = get(url.group(1), "/console/")
        assert code == 200 and b"read-only server" in body
        # the writer lock stays free: a sync of the index can run beside it
        index = Index(console_history.index_path)
        with index.writing():
            pass
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)
        proc.stdout.close()


def test_upwell_serve_refuses_an_open_address_without_a_token(console_history):
    env = {k: v for k, v in os.environ.items() if k != TOKEN_ENV}
    done = subprocess.run(
        serve_argv(console_history.index_path, "0.0.0.0:0"),
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
        env=env,
    )
    assert done.returncode == 2
    assert "not a loopback address" in done.stderr and "--token-env" in done.stderr


def test_upwell_serve_on_a_missing_index_says_so(tmp_path):
    done = subprocess.run(
        [PY, "-m", "pipeline.cli", "--index", str(tmp_path / "none"), "serve"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode != 0 and "no index at" in done.stderr


def test_serve_help_teaches_the_address_and_token_rule():
    done = subprocess.run(
        [PY, "-m", "pipeline.cli", "serve", "--help"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 0
    for words in ("--listen", "--token-env", "read-only", "loopback", "s3://"):
        assert words in done.stdout
