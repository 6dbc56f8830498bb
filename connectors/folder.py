"""A local folder as a source: list files with stat fingerprints, read one file's bytes.

Listing never opens a file: it walks with ``os.scandir`` and takes size, mtime_ns and inode from
the directory entry, so an unchanged tree costs one stat per file and nothing else. A missing or
unreadable root is an error, never an empty source: that is the unmounted-share accident, and it
must not empty an index.
"""

from __future__ import annotations

import fnmatch
import os
import stat
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.errors import (
    DocumentTooLarge,
    DocumentUnreadable,
    SourcePermission,
    SourceUnreachable,
)
from pipeline.records import Fingerprint, SourceItem

# Editor and office temp files, lock files and partial downloads (common practice: these are the
# names vim, emacs, LibreOffice, Word and browsers use while a file is being written).
DEFAULT_EXCLUDE: tuple[str, ...] = (
    "**/.*",  # hidden files and folders, including the index folder itself
    "**/~$*",
    "**/~*",
    "**/*~",
    "**/*.tmp",
    "**/*.temp",
    "**/*.swp",
    "**/*.swx",
    "**/*.part",
    "**/*.crdownload",
    "**/#*#",
    "**/.~lock.*#",
)


def _match(rel: str, patterns: Sequence[str]) -> bool:
    """Glob match where "**/" also matches at the top level."""
    name = rel.rsplit("/", 1)[-1]
    for pattern in patterns:
        if fnmatch.fnmatchcase(rel, pattern):
            return True
        if pattern.startswith("**/"):
            tail = pattern[3:]
            if fnmatch.fnmatchcase(rel, tail) or fnmatch.fnmatchcase(name, tail):
                return True
            # a pattern for a folder component, such as "**/.*", also excludes what is inside it
            if any(fnmatch.fnmatchcase(part, tail) for part in rel.split("/")[:-1]):
                return True
    return False


@dataclass(frozen=True)
class FolderSource:
    """Files under ``root`` whose relative path passes include/exclude and ``accept``."""

    name: str
    root: Path
    include: tuple[str, ...] = ("**/*",)
    exclude: tuple[str, ...] = DEFAULT_EXCLUDE
    accept: Callable[[str], bool] = field(default=lambda key: True, compare=False)

    @classmethod
    def from_path(cls, path: str | os.PathLike[str], accept: Callable[[str], bool]) -> FolderSource:
        """A folder given on the command line: the source is named after the folder."""
        root = Path(path).expanduser().resolve()
        return cls(name=root.name or "root", root=root, accept=accept)

    @property
    def location(self) -> str:
        """Where the source lives, recorded in the index so a name keeps meaning one folder."""
        return str(self.root)

    def check_root(self) -> None:
        """Raise SourceUnreachable / SourcePermission unless the root is a readable folder."""
        try:
            st = self.root.stat()
        except FileNotFoundError:
            raise SourceUnreachable(
                f"source {self.name!r}: {self.root} does not exist (is the share mounted?); "
                "nothing was changed"
            ) from None
        except PermissionError:
            raise SourcePermission(
                f"source {self.name!r}: permission denied on {self.root}"
            ) from None
        if not stat.S_ISDIR(st.st_mode):
            raise SourceUnreachable(f"source {self.name!r}: {self.root} is not a folder")
        if not os.access(self.root, os.R_OK | os.X_OK):
            raise SourcePermission(f"source {self.name!r}: cannot read the folder {self.root}")

    def list_items(self) -> Iterator[SourceItem]:
        """Every accepted file with its stat fingerprint; sorted by key within each folder."""
        self.check_root()
        yield from self._walk(self.root, "")

    def _walk(self, folder: Path, prefix: str) -> Iterator[SourceItem]:
        try:
            with os.scandir(folder) as it:
                entries = sorted(it, key=lambda e: e.name)
        except PermissionError:
            if prefix == "":
                raise SourcePermission(f"source {self.name!r}: cannot list {folder}") from None
            return  # an unreadable subfolder is skipped; its documents stay as they were
        except FileNotFoundError:
            if prefix == "":
                raise SourceUnreachable(f"source {self.name!r}: {folder} vanished") from None
            return
        for entry in entries:
            rel = prefix + entry.name
            try:
                if entry.is_dir(follow_symlinks=False):
                    if not _match(rel + "/x", self.exclude):
                        yield from self._walk(Path(entry.path), rel + "/")
                    continue
                if not entry.is_file(follow_symlinks=False):
                    continue
                if _match(rel, self.exclude) or not _match(rel, self.include):
                    continue
                if not self.accept(rel):
                    continue
                st = entry.stat(follow_symlinks=False)
            except FileNotFoundError:
                continue  # gone between the listing and the stat
            yield SourceItem(
                source=self.name,
                key=rel,
                fingerprint=Fingerprint(size=st.st_size, mtime_ns=st.st_mtime_ns, inode=st.st_ino),
            )

    def read(self, key: str, max_bytes: int) -> bytes:
        """The file's bytes; DocumentUnreadable if it vanished or cannot be read."""
        path = self.root / key
        try:
            with open(path, "rb") as fh:
                size = os.fstat(fh.fileno()).st_size
                if size > max_bytes:
                    raise DocumentTooLarge(
                        f"{size:,} bytes is over the file size limit of {max_bytes:,} bytes"
                    )
                return fh.read(max_bytes + 1)
        except FileNotFoundError:
            raise DocumentUnreadable("the file vanished before it could be read") from None
        except PermissionError:
            raise DocumentUnreadable("permission denied when reading the file") from None
        except IsADirectoryError:
            raise DocumentUnreadable("the path is now a folder, not a file") from None
        except OSError as exc:
            raise DocumentUnreadable(f"could not read the file: {exc.strerror or exc}") from None
