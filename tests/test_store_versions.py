"""A local store answers "which version?" from the stamp of each table's versions folder.

The check is against LanceDB itself: whatever the store says, the version a fresh handle opened
by LanceDB reads, and the rows another writer committed, must be what a reader sees after
``refresh()``.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import lancedb

from pipeline.store.tables import COARSE_STAMP_SETTLE_NS, STAMP_SETTLE_NS, Store

SETTINGS = {"format_version": 1, "model": "hash", "model_id": "hash", "dimension": 8}


def _age_versions_folders(path: Path, seconds: float) -> None:
    """Make every table's versions folder look untouched for ``seconds`` (as a quiet index
    is), so the store trusts its stamps."""
    old = time.time_ns() - int(seconds * 1e9)
    for folder in path.glob("*.lance/_versions"):
        os.utime(folder, ns=(old, old))


def _latest(path: Path, name: str) -> int:
    return int(lancedb.connect(str(path)).open_table(name).version)


def test_a_settled_store_reports_the_versions_lancedb_reports(tmp_path: Path) -> None:
    Store.create(tmp_path / "ix", SETTINGS)
    _age_versions_folders(tmp_path / "ix", 10)
    store = Store.open(tmp_path / "ix")
    store.refresh()
    for name in ("chunks", "documents", "tombstones", "settings", "commits", "vectors"):
        assert store.version(name) == _latest(tmp_path / "ix", name)
    # Its own write moves the settings table on: the answer follows at once.
    store.update_setting("probe", 1)
    assert store.version("settings") == _latest(tmp_path / "ix", "settings")
    assert store.settings()["probe"] == 1


def test_a_write_by_another_process_is_seen_after_refresh_even_on_a_trusted_stamp(
    tmp_path: Path,
) -> None:
    path = tmp_path / "ix"
    Store.create(path, SETTINGS)
    _age_versions_folders(path, 10)
    reader = Store.open(path)
    reader.refresh()  # trusts the aged stamps and keeps the versions
    before = reader.version("settings")
    assert "written_elsewhere" not in reader.settings()
    code = (
        "import sys; from pipeline.store.tables import Store; "
        "Store.open(sys.argv[1]).update_setting('written_elsewhere', 'yes')"
    )
    subprocess.run(
        [sys.executable, "-c", code, str(path)], check=True, cwd=Path(__file__).parents[1]
    )
    reader.refresh()
    assert reader.version("settings") == _latest(path, "settings") == before + 1
    assert reader.settings()["written_elsewhere"] == "yes"


def test_stamps_younger_than_the_settle_time_are_not_trusted(tmp_path: Path) -> None:
    # Two writes inside one file-system clock tick can leave the folder's mtime unchanged
    # (the "racy timestamp" case git documents for its index, common practice): a fresh
    # stamp must not be kept, so a second writer's change within the tick is still seen.
    path = tmp_path / "ix"
    Store.create(path, SETTINGS)
    folder = path / "settings.lance" / "_versions"
    now = time.time_ns() + 1  # "just written", and not a whole multiple of 10 ms
    os.utime(folder, ns=(now, now))
    reader = Store.open(path)
    reader.refresh()
    assert "settings" not in reader._known
    writer = Store.open(path)
    writer.update_setting("second", 2)
    os.utime(folder, ns=(now, now))  # as if the write fell in the same tick
    reader.refresh()
    assert reader.settings()["second"] == 2
    assert STAMP_SETTLE_NS >= 50_000_000  # several ticks of a 100 Hz kernel clock (from memory)


def test_a_whole_second_mtime_waits_for_the_coarse_settle_time(tmp_path: Path) -> None:
    # A file system that keeps whole seconds (FAT keeps two, from memory) shows mtimes that
    # are whole multiples of 10 ms: such a stamp is trusted only after the longer wait.
    path = tmp_path / "ix"
    Store.create(path, SETTINGS)
    folder = path / "settings.lance" / "_versions"
    second = (time.time_ns() // 1_000_000_000 - 1) * 1_000_000_000  # 1-2 s ago, whole second
    os.utime(folder, ns=(second, second))
    reader = Store.open(path)
    reader.refresh()
    assert "settings" not in reader._known
    older = second - COARSE_STAMP_SETTLE_NS
    os.utime(folder, ns=(older, older))
    reader.refresh()
    assert "settings" in reader._known
