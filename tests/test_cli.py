"""The command line: JSON keys scripts rely on, exit codes, and one clear line per error."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.cli import main
from pipeline.index import Index
from tests.conftest import REPO


def run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_sync_search_status_json_keys(tmp_path, small_corpus, capsys):
    ix = str(tmp_path / "ix")
    code, out, _ = run(
        capsys, "--index", ix, "--model", "hash", "sync", str(small_corpus), "--json"
    )
    assert code == 0
    report = json.loads(out)
    assert set(report) >= {"commit", "version", "documents", "chunks", "failures"}
    assert set(report["documents"]) == {
        "added",
        "modified",
        "removed",
        "moved",
        "unchanged",
        "failed",
    }
    assert set(report["chunks"]) >= {"embedded", "reused", "deleted"}
    assert isinstance(report["commit"], str) and isinstance(report["version"], int)

    code, out, _ = run(capsys, "--index", ix, "search", "spoke tension", "-k", "2", "--json")
    assert code == 0
    results = json.loads(out)["results"]
    assert len(results) == 2
    for r in results:
        assert set(r) >= {"score", "path", "source", "text", "page", "heading", "start", "end"}
        assert r["source"] == "share"
        assert -1.0 <= r["score"] <= 1.0
    vtt = [r for r in results if r["path"].endswith(".vtt")]
    assert all(r["start"] is not None and r["page"] is None for r in vtt)

    code, out, _ = run(capsys, "--index", ix, "status", "--json")
    st = json.loads(out)
    assert st["totals"]["documents"] == 3
    assert st["totals"]["chunks"] >= 3
    assert st["sources"][0]["name"] == "share"
    assert st["last_commit"]["id"] == report["commit"]
    assert st["model"]["id"] == "hash-384-v1"
    assert st["failures"] == []


def test_failed_document_gives_exit_3_and_shows_in_status(tmp_path, small_corpus, capsys):
    ix = str(tmp_path / "ix")
    (small_corpus / "broken.pdf").write_bytes(b"%PDF-1.4\n% cut off here")
    code, _, err = run(capsys, "--index", ix, "--model", "hash", "sync", str(small_corpus))
    assert code == 3
    assert "broken.pdf" in err
    code, out, _ = run(capsys, "--index", ix, "status")
    assert code == 0
    assert re.search(r"failed:\s+share/broken\.pdf: .+", out)


def test_mass_removal_without_yes_exits_2_and_changes_nothing(tmp_path, small_corpus, capsys):
    ix = str(tmp_path / "ix")
    run(capsys, "--index", ix, "--model", "hash", "sync", str(small_corpus))
    for p in list(small_corpus.rglob("*.md")) + list(small_corpus.rglob("*.vtt")):
        p.unlink()
    code, _, err = run(capsys, "--index", ix, "sync", str(small_corpus))
    assert code == 2
    assert "--yes" in err and "Nothing was changed" in err
    code, out, _ = run(capsys, "--index", ix, "sync", str(small_corpus), "--yes", "--json")
    assert code == 0 and json.loads(out)["documents"]["removed"] == 2


def test_remove_source_asks_then_tombstones_every_document_and_rollback_undoes_it(
    tmp_path, small_corpus, capsys
):
    ix = str(tmp_path / "ix")
    memos = tmp_path / "memos"
    memos.mkdir()
    (memos / "memo.md").write_text("# Memo\n\nThe stores close early on Friday.\n")
    assert run(capsys, "--index", ix, "--model", "hash", "sync", str(small_corpus))[0] == 0
    assert run(capsys, "--index", ix, "sync", str(memos))[0] == 0
    before = json.loads(run(capsys, "--index", ix, "status", "--json")[1])

    # Not on a terminal and without --yes: it says what would go, and nothing changes.
    code, _, err = run(capsys, "--index", ix, "remove-source", "share")
    assert code == 2 and "3 documents" in err and "Nothing was changed" in err
    code, _, err = run(capsys, "--index", ix, "remove-source", "nosuch", "--yes")
    assert code == 2 and "no source named 'nosuch'" in err and "memos, share" in err

    code, out, _ = run(capsys, "--index", ix, "remove-source", "share", "--yes", "--json")
    assert code == 0 and json.loads(out)["documents"]["removed"] == 3
    st = json.loads(run(capsys, "--index", ix, "status", "--json")[1])
    assert [s["name"] for s in st["sources"]] == ["memos"]
    tombstones = Index(ix).store().table("tombstones").to_arrow().to_pylist()
    assert sorted(t["path"] for t in tombstones) == sorted(
        p.relative_to(small_corpus).as_posix() for p in small_corpus.rglob("*") if p.is_file()
    )
    assert {t["reason"] for t in tombstones} == {"source removed"}
    # The folder may now be synced under its name again from anywhere, and a rollback to
    # the commit before the removal brings the documents back.
    code, _, _ = run(
        capsys, "--index", ix, "rollback", before["last_commit"]["id"], "--yes", "--json"
    )
    assert code == 0
    st = json.loads(run(capsys, "--index", ix, "status", "--json")[1])
    assert st["totals"]["documents"] == before["totals"]["documents"]


def test_remove_source_refuses_a_source_still_configured(tmp_path, small_corpus, capsys):
    config = tmp_path / "upwell.toml"
    config.write_text(
        f'[index]\npath = "{tmp_path / "ix"}"\nmodel = "hash"\n\n[[source]]\nname = "share"\n'
        f'kind = "folder"\npath = "{small_corpus}"\n'
    )
    assert run(capsys, "--config", str(config), "sync")[0] == 0
    code, _, err = run(capsys, "--config", str(config), "remove-source", "share", "--yes")
    assert code == 2 and "still in the configuration" in err


def test_errors_are_one_line_without_traceback(tmp_path, capsys):
    code, _, err = run(capsys, "--index", str(tmp_path / "none"), "status")
    assert code == 1
    assert err.count("\n") == 1 and err.startswith("upwell: error: no upwell index")
    code, _, err = run(
        capsys,
        "--index",
        str(tmp_path / "ix"),
        "--model",
        "hash",
        "sync",
        str(tmp_path / "missing"),
    )
    assert code == 1
    assert "does not exist" in err and "Traceback" not in err


def test_usage_error_exit_code_and_help_examples(capsys, tmp_path, monkeypatch):
    monkeypatch.delenv("UPWELL_CONFIG", raising=False)
    assert main(["--index", str(tmp_path / "ix"), "sync"]) == 2  # no folder and no config
    assert "nothing to sync" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["search"])  # a missing argument is argparse's usage error
    assert exc.value.code == 2
    with pytest.raises(SystemExit):
        main(["--help"])
    out = capsys.readouterr().out
    assert "examples:" in out and "upwell sync sample_corpus" in out
    for command in (
        "sync",
        "search",
        "status",
        "history",
        "diff",
        "tag",
        "rollback",
        "rebuild",
        "erase",
        "maintain",
    ):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        assert "example" in capsys.readouterr().out


def test_console_script_is_installed():
    exe = Path(sys.executable).with_name("upwell")
    out = subprocess.run([str(exe), "--help"], capture_output=True, text=True, check=True).stdout
    assert out.startswith("usage: upwell")


@pytest.mark.slow
def test_readme_demo_runs_as_written(tmp_path):
    """`make demo` runs ops/demo.sh: run it the same way and check what it claims."""
    env = dict(os.environ, BIN=str(Path(sys.executable).parent))
    proc = subprocess.run(
        ["bash", "ops/demo.sh"], cwd=REPO, env=env, capture_output=True, text=True, timeout=900
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = proc.stdout
    syncs = re.findall(
        r"documents: (\d+) added, (\d+) modified, (\d+) removed, (\d+) moved, (\d+) unchanged, "
        r"(\d+) failed\nchunks:\s+(\d+) embedded, (\d+) reused",
        out,
    )
    assert len(syncs) == 4
    first, unchanged, edit, remove_and_move = [tuple(map(int, s)) for s in syncs]
    assert first[0] == 18 and first[5] == 0 and first[6] >= 100
    assert unchanged[4] == 18 and unchanged[6] == 0
    assert edit[1] == 1 and 1 <= edit[6] <= 3
    assert remove_and_move[2:4] == (1, 1) and remove_and_move[6] == 0
    assert "workshop-service-manual.pdf, p. 8" in out
    assert "bleeding-the-hb2-brake.vtt, 00:00:18-00:00:34" in out
    # The spreadsheet row and the PDF attached to a saved e-mail are found with their anchors.
    assert "spares-price-list.xlsx, § Brakes" in out and "HB2-114" in out
    assert "ECN-0156-torque-card.eml, p. 1, § ECN-0156-torque-card.pdf" in out
    # Text that only the scanned notice holds, found through OCR.
    assert "paint-shop-noticeboard.png, p. 1" in out and "green lamp" in out


def test_files_of_types_upwell_does_not_read_are_counted_by_suffix_not_skipped_silently(
    tmp_path, capsys
):
    share = tmp_path / "share"
    (share / "drawings").mkdir(parents=True)
    (share / "notes.md").write_text("# Notes\n\nThe seat clamp takes 6 Nm.\n")
    for i in range(3):
        (share / "drawings" / f"frame-{i}.DWG").write_bytes(b"AC1027")
    (share / "archive.zip").write_bytes(b"PK\x05\x06" + bytes(18))
    (share / "LICENCE").write_text("no suffix\n")
    (share / ".hidden.dwg").write_bytes(b"x")  # excluded by default: not part of the share
    (share / "~$notes.docx").write_bytes(b"x")  # an office lock file: excluded too
    ix = str(tmp_path / "ix")

    # The reference count: the standard library's walk, minus what the default excludes drop
    # and the types upwell reads.
    expected: dict[str, int] = {}
    for _, _, files in os.walk(share):
        for name in files:
            if name.startswith((".", "~")) or name.endswith(".md"):
                continue
            suffix = Path(name).suffix.lower()
            expected[suffix] = expected.get(suffix, 0) + 1
    assert expected == {".dwg": 3, ".zip": 1, "": 1}

    code, out, _ = run(capsys, "--index", ix, "--model", "hash", "sync", str(share))
    assert code == 0
    assert "skipped:   share: 3 .dwg, 1 (no suffix), 1 .zip (types upwell does not read)" in out
    code, out, _ = run(capsys, "--index", ix, "sync", str(share), "--json")
    assert json.loads(out)["skipped"] == {"share": expected}
    code, out, _ = run(capsys, "--index", ix, "status", "--json")
    (source,) = json.loads(out)["sources"]
    assert source["skipped"] == expected and source["documents"] == 1
    code, out, _ = run(capsys, "--index", ix, "status")
    assert "  skipped: 3 .dwg, 1 (no suffix), 1 .zip" in out

    # Once they are gone, the next sync clears the count.
    for path in [*(share / "drawings").iterdir(), share / "archive.zip", share / "LICENCE"]:
        path.unlink()
    code, out, _ = run(capsys, "--index", ix, "sync", str(share), "--json")
    assert json.loads(out)["skipped"] == {}
    code, out, _ = run(capsys, "--index", ix, "status", "--json")
    assert "skipped" not in json.loads(out)["sources"][0]
