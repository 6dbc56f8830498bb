"""What the engine needs of a connector, and the fingerprint a connector lists."""

from __future__ import annotations

from collections.abc import Iterable
from typing import Protocol

from pipeline.records import (
    SourceItem,
)


class Source(Protocol):
    """What the engine needs of a connector."""

    @property
    def name(self) -> str: ...

    def list_items(self) -> Iterable[SourceItem]: ...

    def read(self, key: str, max_bytes: int) -> bytes: ...
