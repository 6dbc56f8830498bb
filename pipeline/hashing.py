"""Content hashes: the identity of documents and of embedded texts.

SHA-256 everywhere a hash names content ("Identity is content" in DEVELOPERS.md), so two equal
inputs always get the same name, whichever file, version or machine they came from.
"""

from __future__ import annotations

import hashlib
import threading
from os import PathLike
from pathlib import Path


def sha256_hex(data: bytes | str) -> str:
    """Lowercase hex SHA-256 of ``data``; a ``str`` is hashed as its UTF-8 encoding."""
    if isinstance(data, str):
        data = data.encode("utf-8")
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: str | PathLike[str], bufsize: int = 1 << 20) -> str:
    """Lowercase hex SHA-256 of a file's bytes, read in ``bufsize`` pieces.

    Memory use is bounded by ``bufsize`` whatever the file's size; the result equals
    ``sha256_hex(<whole file>)``.
    """
    if bufsize <= 0:
        raise ValueError(f"bufsize must be positive, got {bufsize}")
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        while block := stream.read(bufsize):
            digest.update(block)
    return digest.hexdigest()


_once: dict[tuple[str, int, int], str] = {}
_once_lock = threading.Lock()


def sha256_file_once(path: str | PathLike[str]) -> str:
    """``sha256_file``, computed once per process per (path, size, mtime): for files read
    often and rarely changed, such as model weights. ``hashlib.file_digest`` reads in large
    blocks straight into the hash, so a 23 MB model hashes in a few hundredths of a second."""
    resolved = Path(path).resolve()
    stat = resolved.stat()
    key = (str(resolved), stat.st_size, stat.st_mtime_ns)
    with _once_lock:
        cached = _once.get(key)
        if cached is None:
            with resolved.open("rb") as handle:
                cached = hashlib.file_digest(handle, "sha256").hexdigest()
            _once[key] = cached
        return cached


def text_hash(embed_text: str) -> str:
    """SHA-256 hex of the exact string the embedding model sees (context and text joined).

    No normalisation on purpose: the vector belongs to these characters, and any change to them
    must name a different vector.
    """
    return sha256_hex(embed_text)
