"""An index with a history worth looking at, for the console tests, and a console server on it.

Built once per test session from a copy of sample_corpus/ with the bundled model, through the
same ``Index`` calls the CLI makes, in six commits:

1. the whole corpus is added;
2. a notice is edited;
3. a transcript is renamed and a policy deleted;
4. a note whose file name, heading and text hold markup and quotes is added, a broken PDF is
   added (it fails, never indexed) and a Word procedure is overwritten with junk (it fails, and
   its last good version stays searchable);
5. tagged ``before-cleanup``, then the whole training folder is removed: the sudden drop a bad
   ingest makes.
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from pipeline.config import ServerConfig
from pipeline.index import Index
from pipeline.service.api import ApiServer, start_http_server
from pipeline.service.serve import ReadOnlyService
from tests.conftest import REPO, write

SOURCE = "share"
#: Markup in a file name, a heading and body text: every page must show it as text.
HOSTILE_NAME = "notices/<img src=x onerror=alert(1)> \"quoted\" & 'single'.md"
HOSTILE_TEXT = (  # Markdown: the entities become the literal markup the index then holds
    "# &lt;script&gt;alert('heading')&lt;/script&gt; Bench note\n\n"
    'The torque card says &lt;b&gt;6 Nm&lt;/b&gt; &amp; "never more"; '
    "&lt;script&gt;alert('text')&lt;/script&gt; "
    '&lt;iframe src="http://127.0.0.1:9/"&gt;&lt;/iframe&gt; is not part of it.\n'
)
EDITED = "notices/ECN-0149.txt"
RENAMED = ("training/bleeding-the-hb2-brake.vtt", "training/hb2-brake-bleed.vtt")
DELETED = "policies/returns-policy.md"
BROKEN_NEW = "manuals/broken-torque-table.pdf"
BROKEN_OLD = "procedures/final-inspection.docx"


def chromium_path() -> str | None:
    """Debian's Chromium (``chromium``), another on the PATH, or the one $UPWELL_CHROMIUM names."""
    return os.environ.get("UPWELL_CHROMIUM") or next(
        (p for p in map(shutil.which, ("chromium", "chromium-browser")) if p), None
    )


@dataclass
class History:
    index_path: Path
    share: Path
    commits: list[str]  # commit ids, oldest first
    tag: str = "before-cleanup"

    def doc_id(self, path: str) -> str:
        return f"{SOURCE}:{path}"


def _sync(index: Index, share: Path) -> str:
    report = index.sync([f"{SOURCE}={share}"], yes=True)
    assert report.commits, "each step of the history changes something"
    return report.commits[-1].commit_id


def build_history(root: Path) -> History:
    share = root / "share"
    shutil.copytree(REPO / "sample_corpus", share)
    index = Index(root / "ix")
    commits = [_sync(index, share)]

    notice = share / EDITED
    notice.write_bytes(  # the notice is not UTF-8: add plain ASCII to its bytes
        notice.read_bytes()
        + b"\nAddendum: the forged collar also fits the Cinder city frame from serial 5200.\n"
    )
    commits.append(_sync(index, share))

    (share / RENAMED[0]).rename(share / RENAMED[1])
    (share / DELETED).unlink()
    commits.append(_sync(index, share))

    write(share / HOSTILE_NAME, HOSTILE_TEXT)
    (share / BROKEN_NEW).write_bytes(b"%PDF-1.7\n1 0 obj << /Type /Catalog >>\ntruncated")
    (share / BROKEN_OLD).write_bytes(b"PK\x03\x04 this is no longer a Word file")
    commits.append(_sync(index, share))

    index.tag("before-cleanup")
    shutil.rmtree(share / "training")
    commits.append(_sync(index, share))
    return History(index_path=root / "ix", share=share, commits=commits)


@pytest.fixture(scope="session")
def console_history(tmp_path_factory: pytest.TempPathFactory) -> History:
    return build_history(tmp_path_factory.mktemp("console"))


class Console:
    """A console server (``upwell serve``'s stand-in service) on 127.0.0.1 over an index."""

    def __init__(self, index_path: Path, token_env: str | None = None) -> None:
        self.service = ReadOnlyService(Index(index_path), kinds={SOURCE: "folder"})
        self.server: ApiServer = start_http_server(
            self.service, ServerConfig(host="127.0.0.1", port=0, token_env=token_env)
        )
        self.base = f"http://127.0.0.1:{self.server.server_address[1]}"

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture(scope="session")
def console(console_history: History) -> Iterator[Console]:
    served = Console(console_history.index_path)
    yield served
    served.close()
