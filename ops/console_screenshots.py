"""Take the README's console screenshots from a scratch index of sample_corpus/.

    .venv/bin/python ops/console_screenshots.py      # writes ops/console/*.png

The index gets a short history: the share is added, a procedure edited, a notice deleted and a
policy renamed, then a bad ingest (the notices and training folders vanish, as when a mount
goes) and the rollback that undoes it. The console is served on 127.0.0.1 as ``upwell serve``
serves it and photographed in headless Chromium (Debian's ``chromium``; Playwright comes with
the test extra).
"""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from pipeline.config import ServerConfig  # noqa: E402
from pipeline.index import Index  # noqa: E402
from pipeline.service.api import start_http_server  # noqa: E402
from pipeline.service.serve import ReadOnlyService  # noqa: E402

OUT = REPO / "ops" / "console"


def build(root: Path) -> Path:
    share = root / "marrowby-share"
    shutil.copytree(REPO / "sample_corpus", share)
    index = Index(root / "ix")

    def sync() -> None:
        index.sync([str(share)], yes=True)

    sync()
    procedure = share / "procedures" / "wheel-truing-and-tensioning.docx"
    from docx import Document

    doc = Document(str(procedure))
    doc.add_paragraph("Check lateral run-out again after the first ride; re-true if over 0.5 mm.")
    doc.save(str(procedure))
    sync()
    (share / "notices" / "ECN-0141.txt").unlink()
    (share / "policies" / "returns-policy.md").rename(share / "policies" / "returns-and-refunds.md")
    sync()
    index.tag("before-move")
    # the bad ingest: two folders vanish, as when a mount goes
    for folder in ("notices", "training"):
        shutil.move(str(share / folder), str(root / folder))
    sync()
    index.rollback("before-move", yes=True)
    for folder in ("notices", "training"):
        shutil.move(str(root / folder), str(share / folder))
    sync()
    return root / "ix"


def main() -> int:
    from playwright.sync_api import sync_playwright

    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if chromium is None:
        print("needs Debian's chromium: apt-get install chromium", file=sys.stderr)
        return 1
    OUT.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        index_path = build(Path(tmp))
        server = start_http_server(
            ReadOnlyService(Index(index_path)), ServerConfig(host="127.0.0.1", port=0)
        )
        base = f"http://127.0.0.1:{server.server_address[1]}"
        try:
            with sync_playwright() as playwright:
                browser = playwright.chromium.launch(
                    executable_path=chromium, args=["--no-sandbox"]
                )
                page = browser.new_page(viewport={"width": 1000, "height": 640})
                page.goto(base + "/console/")
                page.screenshot(path=str(OUT / "overview.png"), full_page=True)
                page.goto(base + "/console/history")
                page.locator("figure.chart").screenshot(path=str(OUT / "history-chart.png"))
                browser.close()
        finally:
            server.shutdown()
            server.server_close()
    for name in ("overview.png", "history-chart.png"):
        print(f"wrote {OUT / name} ({(OUT / name).stat().st_size // 1024} KiB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
