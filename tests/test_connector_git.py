"""The git connector against real repositories built here, and a polled folder from a config.

References outside the project: the git command-line client itself (``git rev-parse``,
``git cat-file``) and git's published object format (a blob id is the SHA-1 of
``b"blob <size>\\0" + content``; "Git Internals - Git Objects", Pro Git, from memory).
"""

from __future__ import annotations

import hashlib
import os
import re
import socket
import subprocess
import threading
import tomllib
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest

from connectors.git import GitSource, from_config
from pipeline.config import parse_config
from pipeline.errors import SourcePermission, SourceUnreachable, UsageError
from pipeline.index import Index
from pipeline.records import Limits
from tests.conftest import REPO, long_markdown, write

RETURNS = (
    "# Returns policy\n\n## Damaged frames\n\nA frame damaged in transit may be returned within "
    "30 days. Photograph the damage and keep the packaging.\n\n## Refunds\n\nRefunds are paid to "
    "the original card within ten working days.\n"
)
NOTICE = (
    "ENGINEERING CHANGE NOTICE ECN-0007\n\nThe rear brake hose is now routed inside the down "
    "tube, entering at the head tube port.\n\nEffective from frame serial 4100.\n"
)
TRUING = (
    "WEBVTT\n\n00:00:01.000 --> 00:00:06.500\nToday we true a front wheel in the stand.\n\n"
    "00:00:06.500 --> 00:00:12.000\nBring spoke tension up evenly, a quarter turn at a time.\n"
)


@pytest.fixture(autouse=True)
def hermetic_git(monkeypatch, tmp_path):
    """Neither the user's nor the system's git configuration changes what these tests see."""
    monkeypatch.setenv("GIT_CONFIG_GLOBAL", os.devnull)
    monkeypatch.setenv("GIT_CONFIG_NOSYSTEM", "1")
    monkeypatch.setenv("GIT_AUTHOR_NAME", "Marrowby Workshop")
    monkeypatch.setenv("GIT_AUTHOR_EMAIL", "workshop@marrowby.invalid")
    monkeypatch.setenv("GIT_COMMITTER_NAME", "Marrowby Workshop")
    monkeypatch.setenv("GIT_COMMITTER_EMAIL", "workshop@marrowby.invalid")


def git(repo: Path, *args: str) -> str:
    done = subprocess.run(
        ["git", "-C", str(repo), *args], capture_output=True, text=True, check=True, timeout=60
    )
    return done.stdout.strip()


def commit_all(repo: Path, message: str) -> str:
    git(repo, "add", "-A")
    git(repo, "commit", "-q", "-m", message)
    return git(repo, "rev-parse", "HEAD")


def new_repo(path: Path) -> Path:
    path.mkdir(parents=True)
    git(path, "init", "-q", "-b", "main")
    return path


def blob_id(data: bytes) -> str:
    # Git's object format (Pro Git, "Git Objects", from memory): sha1 of header + content.
    return hashlib.sha1(b"blob %d\0" % len(data) + data).hexdigest()


class CountingReads:
    """Wraps a connector and counts read() calls, so a test can prove nothing was read."""

    def __init__(self, inner: GitSource) -> None:
        self.inner = inner
        self.name = inner.name
        self.reads: list[str] = []

    @property
    def location(self) -> str:
        return self.inner.location

    @property
    def revision(self) -> str | None:
        return self.inner.revision

    def list_items(self):
        return self.inner.list_items()

    def read(self, key: str, max_bytes: int) -> bytes:
        self.reads.append(key)
        return self.inner.read(key, max_bytes)


def git_source(tmp_path: Path, url: str, **options) -> GitSource:
    def fail(key: str, problem: str):
        raise UsageError(f"{key} {problem}")

    return from_config("workshop", {"url": url, **options}, fail, tmp_path / "state" / "workshop")


def revisions(index: Index) -> list[str | None]:
    return [row["source_revision"] for row in index.store().commits()]


def test_listing_gives_blob_ids_and_skips_symlinks_hidden_and_unknown_formats(tmp_path):
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    write(repo / "notices" / "ECN-0007.txt", NOTICE)
    write(repo / "drawings" / "frame.dwg", "not a document format")
    write(repo / ".github" / "notes.md", "hidden folder")
    os.symlink("policies/returns.md", repo / "returns-link.md")
    head = commit_all(repo, "first")

    source = git_source(tmp_path, str(repo))
    items = {item.key: item for item in source.list_items()}

    assert sorted(items) == ["notices/ECN-0007.txt", "policies/returns.md"]
    for key, item in items.items():
        data = (repo / key).read_bytes()
        assert item.fingerprint.tag == blob_id(data)  # reference: git's object format
        assert item.fingerprint.tag == git(repo, "rev-parse", f"HEAD:{key}")  # reference: git
        assert item.fingerprint.size == len(data)
        assert source.read(key, 10_000) == data
    assert source.revision == head  # reference: git rev-parse HEAD in the origin


def test_subdir_include_and_exclude_and_a_branch_ref(tmp_path):
    repo = new_repo(tmp_path / "origin")
    write(repo / "docs" / "manual.md", "# Manual\n\nTrue the wheel.\n")
    write(repo / "docs" / "drafts" / "next.md", "# Draft\n\nNot yet.\n")
    write(repo / "docs" / "training" / "truing.vtt", TRUING)
    write(repo / "src" / "readme.md", "# Source code notes\n")
    commit_all(repo, "on main")
    git(repo, "checkout", "-q", "-b", "release")
    write(repo / "docs" / "release.md", "# Release notes\n\nFrame serial 4100 onwards.\n")
    release = commit_all(repo, "on release")
    git(repo, "checkout", "-q", "main")

    source = git_source(tmp_path, str(repo), subdir="docs", exclude=["**/drafts/**"])
    assert sorted(i.key for i in source.list_items()) == ["manual.md", "training/truing.vtt"]

    only_vtt = git_source(tmp_path / "b", str(repo), subdir="docs", include=["training/*"])
    assert [i.key for i in only_vtt.list_items()] == ["training/truing.vtt"]

    on_release = git_source(tmp_path / "c", repo.as_uri(), ref="release", subdir="docs/")
    keys = sorted(i.key for i in on_release.list_items())
    assert "release.md" in keys and on_release.revision == release
    assert on_release.location == f"{repo.as_uri()} (docs)"


def test_sync_counts_revisions_and_reads_through_edit_rename_delete(tmp_path):
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    write(repo / "notices" / "ECN-0007.txt", NOTICE)
    write(repo / "training" / "truing.vtt", TRUING)
    write(repo / "procedures" / "guide.md", long_markdown(20, seed=3))
    first = commit_all(repo, "first")
    index = Index(tmp_path / "ix", model="hash")
    source = CountingReads(git_source(tmp_path, str(repo)))

    report = index.sync([source])
    assert report.counts.documents["added"] == 4
    assert sorted(source.reads) == sorted(
        [
            "policies/returns.md",
            "notices/ECN-0007.txt",
            "training/truing.vtt",
            "procedures/guide.md",
        ]
    )
    assert revisions(index) == [first]

    # An edit and a new file: only those two blobs are read.
    write(repo / "policies" / "returns.md", RETURNS.replace("30 days", "45 days"))
    write(repo / "policies" / "warranty.md", "# Warranty\n\nFrames carry a five year warranty.\n")
    second = commit_all(repo, "edit and add")
    source.reads.clear()
    report = index.sync([source])
    assert sorted(source.reads) == ["policies/returns.md", "policies/warranty.md"]
    docs = report.counts.documents
    assert (docs["added"], docs["modified"], docs["moved"], docs["removed"]) == (1, 1, 0, 0)
    assert docs["unchanged"] == 3
    assert revisions(index)[-1] == second

    # A rename (git mv): the same blob under a new key is a move, nothing is embedded.
    git(repo, "mv", "procedures/guide.md", "procedures/workshop-guide.md")
    third = commit_all(repo, "rename")
    source.reads.clear()
    report = index.sync([source])
    assert source.reads == ["procedures/workshop-guide.md"]  # the new key, read once to hash
    docs = report.counts.documents
    assert (docs["added"], docs["modified"], docs["moved"], docs["removed"]) == (0, 0, 1, 0)
    assert report.counts.chunks["embedded"] == 0
    assert report.counts.chunks["reused"] > 0
    assert revisions(index)[-1] == third

    # A deletion: removed, nothing read.
    git(repo, "rm", "-q", "training/truing.vtt")
    fourth = commit_all(repo, "delete")
    source.reads.clear()
    report = index.sync([source])
    assert source.reads == []
    docs = report.counts.documents
    assert (docs["added"], docs["modified"], docs["moved"], docs["removed"]) == (0, 0, 0, 1)
    assert revisions(index)[-1] == fourth
    paths = {d["path"] for d in index.store().all_documents() if d["content_hash"]}
    assert paths == {
        "notices/ECN-0007.txt",
        "policies/returns.md",
        "policies/warranty.md",
        "procedures/workshop-guide.md",
    }


def test_no_change_rescan_reads_no_blob_even_after_an_unrelated_commit(tmp_path):
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    write(repo / "notices" / "ECN-0007.txt", NOTICE)
    commit_all(repo, "first")
    index = Index(tmp_path / "ix", model="hash")
    index.sync([git_source(tmp_path, str(repo))])
    commits_before = len(index.store().commits())

    source = CountingReads(git_source(tmp_path, str(repo)))  # a fresh connector, as each run
    report = index.sync([source])
    assert source.reads == []
    assert report.counts.documents["unchanged"] == 2
    assert report.commits == []

    # A new commit touching only a file no format accepts: new revision, still nothing read.
    write(repo / "drawings" / "frame.dwg", "image bytes")
    later = commit_all(repo, "photo")
    source = CountingReads(git_source(tmp_path, str(repo)))
    report = index.sync([source])
    assert source.reads == [] and report.commits == []
    assert source.revision == later
    assert len(index.store().commits()) == commits_before


def test_unreachable_repository_raises_with_gits_reason_and_keeps_the_documents(tmp_path):
    missing = git_source(tmp_path / "a", str(tmp_path / "no-such-repo"))
    with pytest.raises(SourceUnreachable) as caught:
        list(missing.list_items())
    # git's own words: the first line git itself prints when cloning this path.
    reference = subprocess.run(
        ["git", "clone", "--mirror", "--quiet", "--", str(tmp_path / "no-such-repo"), "x.git"],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=60,
    ).stderr.splitlines()[0]
    assert reference.startswith("fatal:") and reference.rstrip(".") in str(caught.value)
    assert missing.revision is None
    assert not (tmp_path / "a" / "state" / "workshop" / "mirror.git").exists()

    # A closed port on 127.0.0.1: connection refused, reported, not an empty listing.
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    refused = git_source(tmp_path / "b", f"http://127.0.0.1:{port}/workshop.git")
    with pytest.raises(SourceUnreachable, match="127.0.0.1"):
        list(refused.list_items())

    # Reachable once, then gone: the sync fails, the index keeps every document.
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    commit_all(repo, "first")
    index = Index(tmp_path / "ix", model="hash")
    index.sync([git_source(tmp_path, str(repo))])
    repo.rename(tmp_path / "origin-moved")
    with pytest.raises(SourceUnreachable, match="cannot fetch"):
        index.sync([git_source(tmp_path, str(repo))])
    status = index.status()
    assert status["totals"]["documents"] == 1
    assert "cannot fetch" in status["sources"][0]["error"]["reason"]

    # A ref that names nothing is unreachable too.
    (tmp_path / "origin-moved").rename(repo)
    with pytest.raises(SourceUnreachable, match="names no commit"):
        list(git_source(tmp_path, str(repo), ref="no-such-branch").list_items())
    with pytest.raises(SourceUnreachable, match="not a folder"):
        list(git_source(tmp_path, str(repo), subdir="nowhere").list_items())


class _RefusingGitServer(BaseHTTPRequestHandler):
    """Answers every request of git's smart HTTP protocol with the status in the path."""

    def do_GET(self) -> None:  # noqa: N802 (the name http.server calls)
        status = int(self.path.strip("/").split("/")[0])
        self.send_response(status)
        if status == 401:
            self.send_header("WWW-Authenticate", 'Basic realm="marrowby"')
        self.send_header("Content-Length", "0")
        self.end_headers()

    def log_message(self, *args) -> None:
        pass


@pytest.fixture
def refusing_server():
    server = ThreadingHTTPServer(("127.0.0.1", 0), _RefusingGitServer)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}"
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=10)


def test_refused_credentials_are_a_permission_error_and_a_server_error_unreachable(
    tmp_path, refusing_server
):
    # 401 and 403 are refusals (RFC 9110 sections 15.5.2 and 15.5.4 [from memory]); git asks for no
    # password.
    for status in (401, 403):
        source = git_source(tmp_path / str(status), f"{refusing_server}/{status}/workshop.git")
        with pytest.raises(SourcePermission):
            list(source.list_items())
    source = git_source(tmp_path / "500", f"{refusing_server}/500/workshop.git")
    with pytest.raises(SourceUnreachable) as caught:
        list(source.list_items())
    assert not isinstance(caught.value, SourcePermission) and "500" in str(caught.value)


def test_file_over_the_size_limit_is_a_failure_and_the_rest_syncs(tmp_path):
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    write(repo / "notices" / "ECN-0007.txt", NOTICE)
    commit_all(repo, "first")
    index = Index(tmp_path / "ix", model="hash", limits=Limits(max_file_bytes=len(RETURNS) - 1))
    report = index.sync([git_source(tmp_path, str(repo))])
    assert report.counts.documents["added"] == 1
    assert [f.path for f in report.failures] == ["policies/returns.md"]
    assert "size limit" in report.failures[0].reason


def test_config_checks_git_options_without_touching_disk_or_network(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    raw = {
        "source": [
            {
                "name": "workshop",
                "kind": "git",
                "url": "https://git.marrowby.invalid/workshop.git",
                "ref": "main",
                "every": "10m",
            }
        ]
    }
    config = parse_config(raw, tmp_path / "upwell.toml")
    assert config.sources[0].every == 600 and config.sources[0].watch is False
    connector = config.sources[0].connector(tmp_path / "ix" / "connector-state")
    assert isinstance(connector, GitSource) and connector.ref == "main"
    assert list(tmp_path.iterdir()) == []  # no state folder, no clone, until a sync lists it

    bad_tables = [
        ({"ref": "main"}, "url"),
        ({"url": "x", "branch": "main"}, "branch"),
        ({"url": "--upload-pack=touch"}, "url"),
        ({"url": "x", "ref": "-x"}, "ref"),
        ({"url": "x", "subdir": "../etc"}, "subdir"),
        ({"url": "x", "include": "*.md"}, "include"),
    ]
    for options, key in bad_tables:
        table = {"name": "workshop", "kind": "git", **options}
        with pytest.raises(UsageError, match=rf"'workshop'\.{key}"):
            parse_config({"source": [table]}, tmp_path / "upwell.toml")


def test_polled_folder_source_from_config_syncs_on_its_schedule(tmp_path):
    share = tmp_path / "share"
    write(share / "policies" / "returns.md", RETURNS)
    write(share / "notices" / "ECN-0007.txt", NOTICE)
    write(share / "notices" / "ECN-0007.txt~", "an editor backup")
    raw = {
        "source": [
            {
                "name": "office",
                "kind": "polled",
                "path": "share",
                "every": "5m",
                "exclude": ["notices/old/**"],
            }
        ]
    }
    config = parse_config(raw, tmp_path / "upwell.toml")  # path taken from the file's folder
    polled = config.sources[0]
    assert (polled.kind, polled.watch, polled.every) == ("polled", False, 300.0)
    assert polled.path == share.resolve()

    index = Index(tmp_path / "ix", model="hash")
    report = index.sync([polled.connector(index.state_root)])
    assert report.counts.documents["added"] == 2
    write(share / "notices" / "old" / "ECN-0001.txt", "Superseded.\n")
    write(share / "policies" / "returns.md", RETURNS.replace("30 days", "45 days"))
    report = index.sync([polled.connector(index.state_root)])
    docs = report.counts.documents
    assert (docs["added"], docs["modified"], docs["unchanged"]) == (0, 1, 1)


def test_git_source_end_to_end_with_the_default_model(tmp_path):
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    write(repo / "notices" / "ECN-0007.txt", NOTICE)
    write(repo / "training" / "truing.vtt", TRUING)
    commit_all(repo, "first")
    index = Index(tmp_path / "ix")  # the default model (bundled weights)
    index.sync([git_source(tmp_path, repo.as_uri())])
    hits = index.search("where is the rear brake hose routed", k=1)
    assert hits[0].path == "notices/ECN-0007.txt"

    git(repo, "mv", "notices/ECN-0007.txt", "notices/ECN-0007-brake-hose.txt")
    commit_all(repo, "rename")
    report = index.sync([git_source(tmp_path, repo.as_uri())])
    assert report.counts.documents["moved"] == 1 and report.counts.chunks["embedded"] == 0
    hits = index.search("where is the rear brake hose routed", k=1)
    assert hits[0].path == "notices/ECN-0007-brake-hose.txt"


def test_readme_examples_for_polled_and_git_sources_are_valid_configuration(tmp_path):
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```toml\n(.*?)```", readme, flags=re.DOTALL)
    kinds = {}
    for block in blocks:
        config = parse_config(tomllib.loads(block), tmp_path / "upwell.toml")
        for source in config.sources:
            kinds[source.kind] = source
    assert kinds["polled"].every == 600 and kinds["polled"].watch is False
    git_example = kinds["git"].connector(tmp_path / "state")
    assert (git_example.ref, git_example.subdir) == ("main", "docs")


def test_a_force_push_that_rewrites_history_syncs_to_the_new_tree(tmp_path):
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    write(repo / "notices" / "ECN-0007.txt", NOTICE)
    commit_all(repo, "first")
    write(repo / "notices" / "ECN-0008.txt", "ECN-0008\n\nBottle cage bolts are now M5.\n")
    pushed = commit_all(repo, "a commit that will be taken back")
    index = Index(tmp_path / "ix", model="hash")
    index.sync([git_source(tmp_path, str(repo))])
    assert revisions(index)[-1] == pushed
    # The branch is rewritten: the last commit is dropped and another takes its place, so the
    # mirror's old tip is no ancestor of the new one.
    git(repo, "reset", "-q", "--hard", "HEAD~1")
    write(repo / "policies" / "warranty.md", "# Warranty\n\nFrames carry a five year warranty.\n")
    rewritten = commit_all(repo, "the rewritten history")
    report = index.sync([git_source(tmp_path, str(repo))])
    assert revisions(index)[-1] == rewritten
    docs = report.counts.documents
    assert (docs["added"], docs["removed"]) == (1, 1)
    paths = {d["path"] for d in index.store().documents_of_source("workshop").values()}
    assert paths == {"policies/returns.md", "notices/ECN-0007.txt", "policies/warranty.md"}


def test_submodules_are_skipped(tmp_path):
    inner = new_repo(tmp_path / "inner")
    write(inner / "readme.md", "# Inner\n\nA vendored repository.\n")
    commit_all(inner, "inner")
    repo = new_repo(tmp_path / "origin")
    write(repo / "policies" / "returns.md", RETURNS)
    git(repo, "-c", "protocol.file.allow=always", "submodule", "add", "-q", str(inner), "vendor")
    commit_all(repo, "with a submodule")
    assert "160000 commit" in git(repo, "ls-tree", "HEAD", "vendor")  # a gitlink, mode 160000
    source = git_source(tmp_path, str(repo))
    keys = sorted(item.key for item in source.list_items())
    assert keys == ["policies/returns.md"]  # neither the gitlink nor the inner repository's files
