"""Progress on stderr for long work, only when stderr is a terminal (quiet in scripts and CI)."""

from __future__ import annotations

import sys
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from typing import Any, TypeVar

from tqdm import tqdm

T = TypeVar("T")


class _NullBar:
    def update(self, n: int = 1) -> None:
        pass


class Progress:
    """tqdm bars when enabled; no output at all otherwise."""

    def __init__(self, enabled: bool | None = None) -> None:
        self.enabled = sys.stderr.isatty() if enabled is None else enabled

    def iterate(self, items: Iterable[T], desc: str) -> Iterator[T]:
        if not self.enabled:
            yield from items
            return
        total = len(items) if hasattr(items, "__len__") else None  # type: ignore[arg-type]
        yield from tqdm(items, desc=desc, total=total, unit="doc", leave=False, file=sys.stderr)

    @contextmanager
    def bar(self, total: int, desc: str) -> Iterator[Any]:
        if not self.enabled:
            yield _NullBar()
            return
        with tqdm(total=total, desc=desc, unit="chunk", leave=False, file=sys.stderr) as bar:
            yield bar
