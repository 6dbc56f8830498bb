"""A git repository as a source: the tracked files at one ref, listed with their blob ids.

Each listing brings a bare mirror (kept in the source's state folder) up to date with
``git fetch --prune``, resolves the ref to a commit, and lists that commit's tree with
``git ls-tree``. A blob id is a hash of the file's content, so it is a fingerprint that changes
exactly when the content does: an unchanged file is never read, and a renamed file keeps its blob
id (the engine sees the same content removed and added, and reuses its vectors). Reading one file
is one ``git cat-file blob``.

A repository that cannot be fetched, a ref or subfolder that does not exist, is an error that
quotes git, never an empty listing: an unreachable repository must not empty an index.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any, ClassVar

from connectors.folder import DEFAULT_EXCLUDE, path_matches
from pipeline.errors import (
    DocumentTooLarge,
    DocumentUnreadable,
    SourcePermission,
    SourceUnreachable,
)
from pipeline.records import Fingerprint, SourceItem

# A fetch of a large repository over a slow link can take minutes; one that takes longer than
# this is treated as unreachable so a scheduled run cannot hang forever.
FETCH_TIMEOUT_SECONDS = 600.0
# Local git operations on the mirror (rev-parse, ls-tree, cat-file) are fast; this only guards
# against a wedged process.
LOCAL_TIMEOUT_SECONDS = 120.0

MIRROR_FOLDER = "mirror.git"
_OPTION_KEYS = ("url", "ref", "subdir", "include", "exclude")
# Entries of `git ls-tree -l -z`: "<mode> <type> <object id> <size, padded>\t<path>".
_TREE_ENTRY = re.compile(rb"^(\d+) (\w+) ([0-9a-f]+) +(-|\d+)\t(.*)$", re.DOTALL)
_SYMLINK_MODE = b"120000"
# Words in git's stderr that mean "reached, but you may not" rather than "cannot reach".
_REFUSED = (
    "authentication failed",
    "permission denied",
    "could not read username",
    "could not read password",
    "access denied",
    "returned error: 401",
    "returned error: 403",
)


def _is_local_path(url: str) -> bool:
    """Whether git would take ``url`` as a local path: no scheme, and not scp-like host:path
    (git's rule: a colon before the first slash means a remote host)."""
    if "://" in url:
        return False
    colon, slash = url.find(":"), url.find("/")
    return colon < 0 or (0 <= slash < colon)


def _first_message(stderr: bytes) -> str:
    """The first line of git's stderr, which says what went wrong (``--quiet`` keeps progress
    lines out; an ssh failure comes before git's own "fatal:" line and is the more useful)."""
    for line in stderr.decode("utf-8", "replace").splitlines():
        if line.strip():
            return line.strip().rstrip(".")
    return ""


def _git_environment() -> dict[str, str]:
    env = dict(os.environ)
    # Never wait for a password on a terminal: a scheduled run has nobody to type it.
    env["GIT_TERMINAL_PROMPT"] = "0"
    # English messages, so a refusal can be told from an unreachable host.
    env["LC_ALL"] = "C"
    return env


class GitSource:
    """The files at ``ref`` of the repository at ``url`` (under ``subdir`` if given).

    Keys are paths relative to ``subdir`` (or the repository root), with ``/`` separators.
    Listed: regular files (not symlinks or submodules) passing include/exclude and ``accept``.
    After ``list_items``, ``revision`` is the commit id that was listed.
    """

    kind: ClassVar[str] = "git"  # what `upwell status` and the console call it

    def __init__(
        self,
        name: str,
        url: str,
        state_dir: Path,
        *,
        ref: str = "HEAD",
        subdir: str = "",
        include: Sequence[str] = ("**/*",),
        exclude: Sequence[str] = DEFAULT_EXCLUDE,
        accept: Callable[[str], bool] = lambda key: True,
    ) -> None:
        self.name = name
        self.url = url
        self.ref = ref
        self.subdir = subdir.strip("/")
        self.include = tuple(include)
        self.exclude = tuple(exclude)
        self.accept = accept
        self.state_dir = Path(state_dir)
        self._revision: str | None = None
        # key -> (blob id, size) of the last listing; read() needs the blob id of a key.
        self._blobs: dict[str, tuple[str, int]] = {}

    @property
    def location(self) -> str:
        """Where the source lives, recorded in the index so a name keeps meaning one place."""
        return f"{self.url} ({self.subdir})" if self.subdir else self.url

    @property
    def revision(self) -> str | None:
        """The commit id the last listing was taken at; None before any listing."""
        return self._revision

    @property
    def mirror(self) -> Path:
        return self.state_dir / MIRROR_FOLDER

    # --- listing --------------------------------------------------------------------------------

    def list_items(self) -> Iterator[SourceItem]:
        """Every accepted file at the ref with Fingerprint(size, tag=blob id); fetches first.

        Raises SourceUnreachable (or SourcePermission when git was refused) if the repository
        cannot be fetched or the ref or subfolder does not exist; nothing is yielded then.
        """
        self._update_mirror()
        commit = self._resolve_commit()
        tree = f"{commit}:{self.subdir}" if self.subdir else commit
        listing = self._git(
            ["ls-tree", "-r", "-l", "-z", tree],
            problem=(
                f"{self.subdir!r} is not a folder at {self.ref} ({commit[:12]})"
                if self.subdir
                else f"cannot list the files of {commit}"
            ),
        )
        blobs: dict[str, tuple[str, int]] = {}
        items: list[SourceItem] = []
        for entry in listing.split(b"\0"):
            match = _TREE_ENTRY.match(entry)
            if match is None:
                continue
            mode, kind, blob_id, size, raw_path = match.groups()
            # Submodules ("commit") have no content here; a symlink's blob is its target path,
            # and the folder connector does not follow links either.
            if kind != b"blob" or mode == _SYMLINK_MODE:
                continue
            key = raw_path.decode("utf-8", "replace")
            if path_matches(key, self.exclude) or not path_matches(key, self.include):
                continue
            if not self.accept(key):
                continue
            blob = blob_id.decode("ascii")
            blobs[key] = (blob, int(size))
            items.append(
                SourceItem(
                    source=self.name, key=key, fingerprint=Fingerprint(size=int(size), tag=blob)
                )
            )
        # Set only once the whole listing succeeded, so a failed run reports no revision.
        self._blobs = blobs
        self._revision = commit
        items.sort(key=lambda item: item.key)
        return iter(items)

    def _update_mirror(self) -> None:
        """Clone the mirror on first use, else fetch into it; the refs then match the remote."""
        if (self.mirror / "HEAD").exists():
            # An explicit URL and refspec: a changed `url` takes effect without editing the
            # mirror's remote configuration.
            self._git(
                ["fetch", "--prune", "--force", "--quiet", "--", self.url, "+refs/*:refs/*"],
                problem=f"cannot fetch {self.url}",
                timeout=FETCH_TIMEOUT_SECONDS,
            )
            return
        # Clone beside the final place and rename, so an interrupted clone is never taken for
        # a mirror by the next run.
        partial = self.state_dir / (MIRROR_FOLDER + ".partial")
        shutil.rmtree(partial, ignore_errors=True)
        self.state_dir.mkdir(parents=True, exist_ok=True)
        try:
            self._git(
                ["clone", "--mirror", "--quiet", "--", self.url, str(partial)],
                problem=f"cannot clone {self.url}",
                timeout=FETCH_TIMEOUT_SECONDS,
                in_mirror=False,
            )
        except (SourceUnreachable, SourcePermission):
            shutil.rmtree(partial, ignore_errors=True)
            raise
        shutil.rmtree(self.mirror, ignore_errors=True)  # a broken mirror without HEAD
        partial.rename(self.mirror)

    def _resolve_commit(self) -> str:
        out = self._git(
            ["rev-parse", "--verify", "--quiet", "--end-of-options", f"{self.ref}^{{commit}}"],
            problem=f"{self.ref!r} names no commit in {self.url}",
        )
        return out.decode("ascii").strip()

    # --- reading --------------------------------------------------------------------------------

    def read(self, key: str, max_bytes: int) -> bytes:
        """The file's bytes at the listed commit (one ``git cat-file blob``).

        DocumentTooLarge above ``max_bytes`` (judged from the listed size, before reading);
        DocumentUnreadable if the key was not in the last listing or git cannot produce the blob.
        """
        entry = self._blobs.get(key)
        if entry is None:
            raise DocumentUnreadable(f"{key} is not in the listing of {self.url} at {self.ref}")
        blob, size = entry
        if size > max_bytes:
            raise DocumentTooLarge(
                f"{size:,} bytes is over the file size limit of {max_bytes:,} bytes"
            )
        try:
            done = subprocess.run(
                ["git", "-C", str(self.mirror), "cat-file", "blob", blob],
                capture_output=True,
                stdin=subprocess.DEVNULL,
                env=_git_environment(),
                timeout=LOCAL_TIMEOUT_SECONDS,
                start_new_session=True,
                check=False,
            )
        except (OSError, subprocess.TimeoutExpired) as exc:
            raise DocumentUnreadable(f"git could not read blob {blob}: {exc}") from None
        if done.returncode != 0:
            raise DocumentUnreadable(
                f"git could not read blob {blob}: {_first_message(done.stderr) or 'no reason'}"
            )
        return done.stdout

    # --- running git ----------------------------------------------------------------------------

    def _git(
        self,
        args: list[str],
        *,
        problem: str,
        timeout: float = LOCAL_TIMEOUT_SECONDS,
        in_mirror: bool = True,
    ) -> bytes:
        """Run git; its stdout, or SourceUnreachable / SourcePermission quoting its stderr."""
        command = ["git", "-c", "protocol.file.allow=always"]
        if in_mirror:
            command += ["-C", str(self.mirror)]
        try:
            # A session of its own: git and ssh find no terminal to ask for a password on.
            done = subprocess.run(
                command + args,
                capture_output=True,
                stdin=subprocess.DEVNULL,
                env=_git_environment(),
                timeout=timeout,
                start_new_session=True,
                check=False,
            )
        except FileNotFoundError:
            raise SourceUnreachable(
                f"source {self.name!r}: the git command is not installed; nothing was changed"
            ) from None
        except subprocess.TimeoutExpired:
            raise SourceUnreachable(
                f"source {self.name!r}: {problem}: git took longer than {timeout:.0f} s; "
                "nothing was changed"
            ) from None
        if done.returncode != 0:
            reason = _first_message(done.stderr)
            message = f"source {self.name!r}: {problem}"
            message += f": {reason}; nothing was changed" if reason else "; nothing was changed"
            said = done.stderr.decode("utf-8", "replace").lower()
            if any(word in said for word in _REFUSED):
                raise SourcePermission(message)
            raise SourceUnreachable(message)
        return done.stdout


def _string_list(
    options: Mapping[str, Any], key: str, fail: Callable[[str, str], Any]
) -> tuple[str, ...]:
    value = options[key]
    if not isinstance(value, list) or not all(isinstance(p, str) and p for p in value):
        fail(key, f'must be a list of glob patterns such as ["**/*.md"], not {value!r}')
    return tuple(value)


def from_config(
    name: str, options: Mapping[str, Any], fail: Callable[[str, str], Any], state_dir: Path
) -> GitSource:
    """A ``kind = "git"`` source: ``url``, ``ref``, ``subdir``, ``include``, ``exclude``.

    Cheap: checks the options and touches neither the network nor the state folder. A local
    path in ``url`` is made absolute against the working directory.
    """
    from pipeline import formats

    for key in options:
        if key not in _OPTION_KEYS:
            fail(key, f"unknown key (known here: {', '.join(_OPTION_KEYS)})")
    url = options.get("url")
    if not isinstance(url, str) or not url.strip():
        fail("url", "is required: a repository path or any URL git can fetch")
    url = str(url).strip()
    if url.startswith("-"):
        fail("url", f"{url!r} must not start with '-'")
    if _is_local_path(url):
        url = str(Path(url).expanduser().absolute())
    ref = options.get("ref", "HEAD")
    if not isinstance(ref, str) or not ref.strip() or ref.startswith("-"):
        fail("ref", f'must be a branch, tag or commit id such as "main", not {ref!r}')
    subdir = options.get("subdir", "")
    if not isinstance(subdir, str) or ".." in subdir.split("/") or subdir.startswith("/"):
        fail("subdir", f'must be a folder inside the repository such as "docs", not {subdir!r}')
    include = _string_list(options, "include", fail) if "include" in options else ("**/*",)
    extra = _string_list(options, "exclude", fail) if "exclude" in options else ()
    return GitSource(
        name=name,
        url=url,
        state_dir=state_dir,
        ref=str(ref).strip(),
        subdir=str(subdir),
        include=include,
        # Configured excludes add to the defaults, as for folders (hidden files and temp files).
        exclude=DEFAULT_EXCLUDE + tuple(p for p in extra if p not in DEFAULT_EXCLUDE),
        accept=lambda key: formats.media_type_for(key) is not None,
    )
