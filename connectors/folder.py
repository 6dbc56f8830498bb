"""A local folder as a source: list files with stat fingerprints, read one file's bytes.

Listing never opens a file: it walks with ``os.scandir`` and takes size, mtime_ns and inode from
the directory entry, so an unchanged tree costs one stat per file and nothing else. A missing or
unreadable root is an error, never an empty source: that is the unmounted-share accident, and it
must not empty an index.
"""

from __future__ import annotations

import fnmatch
import os
import re
import stat
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property, lru_cache
from pathlib import Path
from typing import Any, ClassVar

from pipeline.errors import (
    DocumentTooLarge,
    DocumentUnreadable,
    SourcePermission,
    SourceUnreachable,
)
from pipeline.records import Fingerprint, SourceItem, StatFingerprints

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


class _Globs:
    """Glob patterns compiled once. ``*`` also matches ``/`` (fnmatch), and a pattern that
    starts with ``**/`` also matches at the top level and against a bare file or folder name."""

    def __init__(self, patterns: Sequence[str]) -> None:
        def combined(globs: list[str]) -> re.Pattern[str] | None:
            if not globs:
                return None
            return re.compile("|".join(f"(?:{fnmatch.translate(g)})" for g in globs))

        # "**/NAME" with no "/" in NAME means NAME at any depth: matching the last path
        # component is enough, and much cheaper than matching the whole path ("*" crosses "/").
        names = [p[3:] for p in patterns if p.startswith("**/") and "/" not in p[3:]]
        paths = [p for p in patterns if not (p.startswith("**/") and "/" not in p[3:])]
        paths += [p[3:] for p in paths if p.startswith("**/")]
        self._paths = combined(paths)
        self._names = combined(names)
        self.everything = any(p in ("*", "**", "**/*") for p in patterns)
        self.name_hint = _name_hint(names)

    def file(self, rel: str, name: str) -> bool:
        if self.everything:
            return True
        return bool(
            (self._paths and self._paths.match(rel)) or (self._names and self._names.match(name))
        )

    def folder(self, rel: str, name: str) -> bool:
        """Whether a folder's contents are covered, judged by its name or its path."""
        return bool(
            (self._names and self._names.match(name))
            or (self._paths and self._paths.match(rel + "/x"))
        )


def _name_hint(globs: Sequence[str]) -> tuple[frozenset[str], tuple[str, ...]] | None:
    """What a name must have for any of these name globs to match it: a first character
    (a glob that starts with a literal) or an ending (``*`` then a literal). A name with
    neither needs no regex match. None when a glob fits neither shape."""
    first: set[str] = set()
    tails: list[str] = []
    for glob in globs:
        if glob and glob[0] not in "*?[":
            first.add(glob[0])
        elif glob.startswith("*") and len(glob) > 1 and not any(c in glob[1:] for c in "*?["):
            tails.append(glob[1:])
        else:
            return None
    return frozenset(first), tuple(tails)


def _accept_all(key: str) -> bool:
    return True


@lru_cache(maxsize=64)
def _globs(patterns: tuple[str, ...]) -> _Globs:
    return _Globs(patterns)


def path_matches(rel: str, patterns: Sequence[str]) -> bool:
    """Whether a relative path is covered by the patterns, as the folder walk judges it: the
    file itself, or any folder on its way."""
    globs = _globs(tuple(patterns))
    parts = rel.split("/")
    if globs.file(rel, parts[-1]):
        return True
    return any(globs.folder("/".join(parts[: i + 1]), parts[i]) for i in range(len(parts) - 1))


@dataclass(frozen=True)
class FolderSource:
    """Files under ``root`` whose relative path passes include/exclude and ``accept``."""

    kind: ClassVar[str] = "folder"  # what `upwell status` and the console call it

    name: str
    root: Path
    include: tuple[str, ...] = ("**/*",)
    exclude: tuple[str, ...] = DEFAULT_EXCLUDE
    accept: Callable[[str], bool] = field(default=_accept_all, compare=False)
    # File suffixes to list (lower case, with the dot); checked inline, before ``accept``.
    suffixes: frozenset[str] | None = None
    # Files the last full listing left out because upwell does not read their type, counted by
    # suffix ("" for none), so a sync and status can say what the index does not cover.
    skipped: dict[str, int] = field(default_factory=dict, compare=False, hash=False)
    # Whether images and PDF pages without a text layer are read by OCR (``ocr = false``).
    ocr: bool = True

    @cached_property
    def _excluded(self) -> _Globs:
        return _globs(tuple(self.exclude))

    @cached_property
    def _included(self) -> _Globs:
        return _globs(tuple(self.include))

    @classmethod
    def from_path(
        cls,
        path: str | os.PathLike[str],
        accept: Callable[[str], bool] | None = None,
        *,
        suffixes: frozenset[str] | None = None,
    ) -> FolderSource:
        """A folder given on the command line: the source is named after the folder."""
        root = Path(path).expanduser().resolve()
        if accept is None:
            return cls(name=root.name or "root", root=root, suffixes=suffixes)
        return cls(name=root.name or "root", root=root, accept=accept, suffixes=suffixes)

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
        """Every accepted file with its stat fingerprint, in directory order."""
        self.check_root()
        self.skipped.clear()
        yield from self._walk(self.root)

    def list_changes(
        self, unchanged_if: Mapping[str, str | None] | StatFingerprints
    ) -> tuple[set[str], list[SourceItem]]:
        """Every accepted key, and the items whose fingerprint key (``Fingerprint.key()``)
        is not ``unchanged_if[key]``, in one walk: an unchanged file makes no item at all.
        ``unchanged_if`` may come parsed already (``StatFingerprints``), as a sync passes it."""
        self.check_root()
        self.skipped.clear()
        if not isinstance(unchanged_if, StatFingerprints):
            unchanged_if = StatFingerprints.parse(unchanged_if)
        keys: set[str] = set()
        changed = list(self._walk(self.root, unchanged_if, keys))
        return keys, changed

    def _walk(
        self,
        top: Path,
        unchanged_if: StatFingerprints | None = None,
        keys: set[str] | None = None,
    ) -> Iterator[SourceItem]:
        # The hot loop of a no-change rescan: one scandir per folder, one lstat per file, and as
        # little Python per entry as possible (measured against a bare scandir+stat walk). An
        # explicit stack, not recursion: each level of nested generators costs every item.
        # With ``unchanged_if`` every key goes into ``keys`` and only changed files are yielded.
        compare = unchanged_if is not None and keys is not None
        stored: Callable[[str], Any] = unchanged_if.get if compare else dict().get
        add_key: Callable[[str], None] = keys.add if compare else set().add
        excluded, included, accept = self._excluded, self._included, self.accept
        source, suffixes = self.name, self.suffixes
        # The usual case (include everything, exclude by file name only) is one regex match
        # per file, without the method calls of the general case.
        by_name_only = included.everything and excluded._paths is None
        skip_name = excluded._names.match if by_name_only and excluded._names else None
        # Most names cannot match any exclude (the defaults start with ".", "~" or "#" or end
        # in a temp suffix): two C-level checks decide that before the regex runs.
        hint = excluded.name_hint if skip_name is not None else None
        first_chars, tails = hint if hint is not None else (frozenset(), ())
        accept_all = accept is _accept_all
        # Suffixes as written: str.endswith with a tuple is one call; other cases are looked up
        # lower-cased, as before.
        suffix_tuple = tuple(suffixes) if suffixes is not None else ()
        stack: list[tuple[str | Path, str]] = [(top, "")]
        while stack:
            folder, prefix = stack.pop()
            try:
                with os.scandir(folder) as it:
                    entries = list(it)
            except PermissionError:
                if prefix == "":
                    raise SourcePermission(f"source {source!r}: cannot list {folder}") from None
                continue  # an unreadable subfolder is skipped; its documents stay as they were
            except FileNotFoundError:
                if prefix == "":
                    raise SourceUnreachable(f"source {source!r}: {folder} vanished") from None
                continue
            for entry in entries:
                name = entry.name
                rel = prefix + name
                try:
                    if entry.is_dir(follow_symlinks=False):
                        # Folders are judged once here, so files inside need no folder checks.
                        if not excluded.folder(rel, name):
                            stack.append((entry.path, rel + "/"))
                        continue
                    if (
                        suffixes is not None
                        and not name.endswith(suffix_tuple)
                        and name[name.rfind(".") :].lower() not in suffixes
                    ):
                        # Off the hot path: only files of a type upwell does not read get here.
                        self._count_skipped(rel, name)
                        continue
                    if by_name_only:
                        if (
                            skip_name is not None
                            and (hint is None or name[0] in first_chars or name.endswith(tails))
                            and skip_name(name)
                        ):
                            continue
                    elif excluded.file(rel, name) or not included.file(rel, name):
                        continue
                    if not accept_all and not accept(rel):
                        continue
                    st = entry.stat(follow_symlinks=False)
                except FileNotFoundError:
                    continue  # gone between the listing and the stat
                if not stat.S_ISREG(st.st_mode):
                    continue  # symlinks, sockets, devices
                if compare:
                    add_key(rel)
                    # A tuple, not fingerprint_string(): formatting a string per file was a
                    # fifth of this loop's own time (tests/test_folder_source.py keeps the two
                    # comparisons equal).
                    if stored(rel) == (st.st_size, st.st_mtime_ns, st.st_ino):
                        continue
                yield SourceItem(source, rel, Fingerprint(st.st_size, st.st_mtime_ns, st.st_ino))

    def _count_skipped(self, rel: str, name: str) -> None:
        """Count a file left out for its type, unless include/exclude leave it out anyway
        (editor backups, hidden files): those are not part of what the source covers."""
        if self._excluded.file(rel, name) or not self._included.file(rel, name):
            return
        dot = name.rfind(".")
        suffix = name[dot:].lower() if dot > 0 else ""
        self.skipped[suffix] = self.skipped.get(suffix, 0) + 1

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


def from_config(
    name: str, options: Mapping[str, Any], fail: Callable[[str, str], Any], state_dir: Path
) -> FolderSource:
    """A ``kind = "folder"`` or ``"polled"`` source: ``path``, ``include``, ``exclude``."""
    from pipeline import formats

    path = options.get("path")
    if not isinstance(path, str) or not path:
        fail("path", "is required: the folder to index")
    include = tuple(options.get("include", ("**/*",)))
    extra = tuple(p for p in options.get("exclude", ()) if p not in DEFAULT_EXCLUDE)
    return FolderSource(
        name=name,
        root=Path(str(path)),
        include=include,
        # Configured excludes add to the defaults: editor and office temp files stay ignored.
        exclude=DEFAULT_EXCLUDE + extra,
        suffixes=formats.SUPPORTED_SUFFIXES,
    )
