"""Sources upwell syncs. Each connector lists items with cheap fingerprints and reads one item's
bytes (see ``connectors.base.Source``); one that can push changes is also watched by the service.

``build(kind, ...)`` makes the connector a ``[[source]]`` table of the configuration names.
Each kind's module has ``from_config(name, options, fail, state_dir)``: ``options`` are the
table's kind-specific keys, ``fail(key, problem)`` raises the configuration error, and
``state_dir`` is a private folder for whatever the connector must remember between runs.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

# kind -> "module:function". Imported on use, so a kind's dependencies load only when used.
KINDS: dict[str, str] = {
    "folder": "connectors.folder:from_config",
    "polled": "connectors.folder:from_config",
    "git": "connectors.git:from_config",
    "http": "connectors.http:from_config",
    "s3": "connectors.s3:from_config",
}


def build(
    kind: str,
    name: str,
    options: Mapping[str, Any],
    fail: Callable[[str, str], Any],
    state_dir: Path,
) -> Any:
    module_name, function = KINDS[kind].split(":")
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        return fail("kind", f"{kind!r} is not available in this install ({exc.name} is missing)")
    return getattr(module, function)(name, options, fail, state_dir)
