"""Where an index lives: a folder on this machine, or a URI on object storage."""

from __future__ import annotations

import os
import re

_URI = re.compile(r"^[A-Za-z][A-Za-z0-9+.-]*://")


def is_remote(path: str | os.PathLike[str]) -> bool:
    """Whether an index path is a URI on object storage (``s3://bucket/prefix``), not a folder."""
    return bool(_URI.match(os.fspath(path)))
