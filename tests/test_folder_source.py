"""The folder connector: what it lists, with which fingerprints, and what it refuses."""

from __future__ import annotations

import os

import pytest

from connectors.folder import FolderSource, path_matches
from pipeline.errors import DocumentUnreadable, SourceUnreachable
from tests.conftest import write


def test_lists_files_with_stat_fingerprints_and_skips_temp_and_hidden(tmp_path):
    root = tmp_path / "share"
    for rel in [
        "manual.md",
        "procedures/wheel.docx",
        "procedures/~$wheel.docx",
        "notes/draft.md~",
        "notes/.#lock",
        ".git/config.md",
        "training/.hidden/x.vtt",
        "training/a.vtt",
        "tmp/download.part",
        "tmp/keep.txt",
        "a/b/c/deep.srt",
    ]:
        write(root / rel, "x")
    source = FolderSource(name="share", root=root)
    items = {i.key: i for i in source.list_items()}
    assert sorted(items) == [
        "a/b/c/deep.srt",
        "manual.md",
        "procedures/wheel.docx",
        "tmp/keep.txt",
        "training/a.vtt",
    ]
    st = os.stat(root / "manual.md")  # reference: the OS's own stat of the file
    fp = items["manual.md"].fingerprint
    assert (fp.size, fp.mtime_ns, fp.inode) == (st.st_size, st.st_mtime_ns, st.st_ino)
    assert items["manual.md"].doc_id == "share:manual.md"


def test_include_and_exclude_patterns(tmp_path):
    root = tmp_path / "share"
    for rel in ["a.md", "b.txt", "drafts/c.md", "drafts/keep/d.md"]:
        write(root / rel, "x")
    source = FolderSource(name="s", root=root, include=("**/*.md",), exclude=("drafts/*",))
    assert sorted(i.key for i in source.list_items()) == ["a.md"]
    assert path_matches("drafts/keep/d.md", ("drafts/*",))
    assert not path_matches("a.md", ("drafts/*",))


def test_missing_root_and_vanished_file_are_errors(tmp_path):
    with pytest.raises(SourceUnreachable, match="does not exist"):
        list(FolderSource(name="s", root=tmp_path / "nope").list_items())
    (tmp_path / "file").write_text("x")
    with pytest.raises(SourceUnreachable, match="not a folder"):
        list(FolderSource(name="s", root=tmp_path / "file").list_items())
    with pytest.raises(DocumentUnreadable, match="vanished"):
        FolderSource(name="s", root=tmp_path).read("gone.md", 1000)


@pytest.mark.parametrize("exclude", [None, ("**/drafts/**", "**/*.tmp")])
def test_the_one_pass_change_listing_agrees_with_listing_then_comparing(tmp_path, exclude):

    root = tmp_path / "share"
    for n in range(30):
        write(root / f"bay-{n % 4}" / f"note-{n:02d}.md", f"# Note {n}\n\nSpokes for wheel {n}.\n")
    write(root / "drafts" / "plan.md", "# Plan\n")
    write(root / "scratch.tmp", "scratch")
    source = FolderSource(name="share", root=root)
    if exclude is not None:
        source = FolderSource(name="share", root=root, exclude=exclude)
    stored = {i.key: i.fingerprint.key() for i in source.list_items()}
    # Since the "last sync": two edits (one keeps its size), one new file, one removal, and
    # one document whose stored fingerprint is None (never read successfully).
    (root / "bay-0" / "note-00.md").write_text("# Note 0\n\nSpokes for wheel 0, trued.\n")
    path = root / "bay-1" / "note-01.md"
    st = path.stat()
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))
    write(root / "bay-2" / "note-new.md", "# New\n")
    (root / "bay-3" / "note-03.md").unlink()
    stored["bay-2/note-02.md"] = None

    keys, changed = source.list_changes(stored)
    expected = [i for i in source.list_items() if stored.get(i.key) != i.fingerprint.key()]
    assert keys == {i.key for i in source.list_items()}
    assert changed == expected
    assert sorted(i.key for i in changed) == [
        "bay-0/note-00.md",
        "bay-1/note-01.md",
        "bay-2/note-02.md",
        "bay-2/note-new.md",
    ]


def test_stat_fingerprints_keep_only_bare_stat_fingerprints(tmp_path):
    from pipeline.records import Fingerprint, StatFingerprints

    path = write(tmp_path / "a.md", "# A\n")
    st = path.stat()
    bare = Fingerprint(st.st_size, st.st_mtime_ns, st.st_ino).key()
    parsed = StatFingerprints.parse(
        {"a.md": bare, "tagged": "4:5:6:etag-1", "never": None, "odd": "x:y:z:"}
    )
    assert parsed == {
        "a.md": (st.st_size, st.st_mtime_ns, st.st_ino),
        "tagged": None,
        "never": None,
        "odd": None,
    }
    # The walk compares the parsed form and the string form alike.
    source = FolderSource(name="s", root=tmp_path)
    assert source.list_changes({"a.md": bare}) == ({"a.md"}, [])
    assert source.list_changes(parsed)[1] == []


def test_excludes_the_name_hint_cannot_summarise_still_apply(tmp_path):
    # A glob that is neither "literal first character" nor "* then a literal" turns the
    # shortcut off; the regex decides for every name, as fnmatch would (the reference).
    import fnmatch

    for name in ("keep.md", "draft-1.md", "draft-x.md", "notes.md"):
        write(tmp_path / name, "# N\n")
    source = FolderSource(name="s", root=tmp_path, exclude=("**/*-[0-9].md", "**/.*"))
    keys, _ = source.list_changes({})
    assert keys == {
        n
        for n in ("keep.md", "draft-1.md", "draft-x.md", "notes.md")
        if not fnmatch.fnmatch(n, "*-[0-9].md")
    }
