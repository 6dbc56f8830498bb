"""The configuration file: one TOML file that every command (and the service) can read.

``load_config(path)`` returns a frozen ``Config`` or raises ``UsageError`` with one line that
names the file, the key and what is wrong with it, so an operator can fix it without a traceback.
``STARTER_TEXT`` is what ``upwell init`` writes: a commented file that loads as it is.

    [index]
    path = "/var/lib/upwell/index"

    [[source]]
    name = "handbook"
    path = "/srv/share/handbook"
"""

from __future__ import annotations

import ipaddress
import os
import re
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from connectors import KINDS as CONNECTOR_KINDS
from connectors import build as build_connector
from connectors.folder import DEFAULT_EXCLUDE, FolderSource
from pipeline import defaults, formats
from pipeline.errors import UsageError
from pipeline.locations import is_remote
from pipeline.records import ClusterSettings
from pipeline.units import parse_duration

CONFIG_ENV = "UPWELL_CONFIG"
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
_CLOCK = re.compile(r"^([01]\d|2[0-3]):([0-5]\d)$")
SOURCE_KINDS = tuple(CONNECTOR_KINDS)


@dataclass(frozen=True)
class SourceConfig:
    """One ``[[source]]`` table: which connector, whether it is watched, its scan schedule.

    ``options`` are the kind's own keys (a folder's ``path``, a repository's ``url`` ...);
    ``connector()`` builds a fresh connector for each sync.
    """

    name: str
    path: Path | None = None
    kind: str = "folder"
    watch: bool = True
    every: float | None = None  # seconds between scheduled full scans; None: none
    include: tuple[str, ...] = ("**/*",)
    exclude: tuple[str, ...] = DEFAULT_EXCLUDE
    ocr: bool = True  # images and PDF pages without a text layer are read by OCR
    options: Mapping[str, Any] = field(default_factory=dict, compare=False)
    file: Path | None = field(default=None, compare=False)

    def connector(self, state_root: Path | None = None) -> Any:
        """The connector the engine syncs; only items with a known format are listed.

        ``state_root`` is where connectors keep what they remember between runs (ETags, miss
        counts, a repository mirror): normally ``<index>/connector-state``.
        """
        if self.kind in ("folder", "polled"):
            return FolderSource(
                name=self.name,
                root=self.path or Path("."),
                include=self.include,
                exclude=self.exclude,
                suffixes=formats.SUPPORTED_SUFFIXES,
                ocr=self.ocr,
            )

        def fail(key: str, problem: str) -> Any:
            raise UsageError(f"config {self.file}: source {self.name!r}.{key} {problem}")

        state = (
            state_root or Path(defaults.INDEX_FOLDER) / defaults.CONNECTOR_STATE_FOLDER
        ) / self.name
        connector = build_connector(self.kind, self.name, self.options, fail, state)
        if not self.ocr:
            # The engine reads ``ocr`` off the connector it syncs; connectors are frozen
            # dataclasses built by their own modules, which need not know about OCR.
            object.__setattr__(connector, "ocr", False)
        return connector

    def folder_source(self) -> FolderSource:
        """The folder connector of a folder or polled source."""
        if self.kind not in ("folder", "polled"):
            raise UsageError(f"source {self.name!r} is a {self.kind} source, not a folder")
        folder: FolderSource = self.connector()
        return folder


@dataclass(frozen=True)
class ServerConfig:
    """``[server]``: where the HTTP API listens and which variable holds its bearer token."""

    host: str = "127.0.0.1"
    port: int = 8765
    token_env: str | None = None

    @property
    def loopback(self) -> bool:
        return _is_loopback(self.host)


@dataclass(frozen=True)
class ServiceConfig:
    """``[service]``: timings of ``upwell watch``."""

    settle_seconds: float = 1.0  # a file is read once size and mtime stayed still this long
    batch_seconds: float = 0.2  # after the first settled file, gather more for this long
    batch_documents: int = defaults.SERVICE_BATCH_DOCUMENTS
    reconcile_every: float = 3600.0
    maintenance_at: str = "03:30"  # local time, HH:MM
    paused: bool = False  # true: take events, write nothing until unpaused (SIGHUP)
    keep_days: float = (
        defaults.KEEP_DAYS
    )  # nightly maintenance keeps versions this many days (tagged: always)
    # Automatic compaction between syncs (files only, no version removed). The defaults are
    # measured: see pipeline.engine.autocompact, whose constants a test keeps them equal to.
    auto_compact: bool = True
    compact_fragments: int = 4  # due once this many small chunks fragments were written...
    compact_every: float = 600.0  # ...or this long after the last compaction, if any were
    compact_quiet: float = 2.0  # and it starts once searches have paused this long


@dataclass(frozen=True)
class Config:
    """A whole configuration file, validated."""

    file: Path | None
    index_path: Path | str | None = None  # a str only for a URI such as "s3://bucket/prefix"
    model: str | None = None
    # [index] storage_options: passed to LanceDB for an index on object storage.
    index_storage_options: Mapping[str, str] = field(default_factory=dict, compare=False)
    server: ServerConfig = field(default_factory=ServerConfig)
    service: ServiceConfig = field(default_factory=ServiceConfig)
    # [cluster]: a Dask cluster for extraction and embedding; None: everything in process.
    cluster: ClusterSettings | None = None
    sources: tuple[SourceConfig, ...] = ()

    def source(self, name: str) -> SourceConfig:
        for s in self.sources:
            if s.name == name:
                return s
        known = ", ".join(s.name for s in self.sources) or "none"
        raise UsageError(f"no source named {name!r} in {self.file} (configured: {known})")


def config_path_from(option: str | None) -> Path | None:
    """The file named by ``--config``, else by $UPWELL_CONFIG, else None."""
    text = option or os.environ.get(CONFIG_ENV)
    return Path(text).expanduser() if text else None


def load_config(path: str | os.PathLike[str]) -> Config:
    """Read and validate a configuration file; UsageError with one line naming the key."""
    file = Path(path)
    try:
        raw = tomllib.loads(file.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UsageError(f"config {file}: no such file (`upwell init {file}` writes one)") from None
    except OSError as exc:
        raise UsageError(f"config {file}: cannot read it: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise UsageError(f"config {file}: not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise UsageError(f"config {file}: not valid TOML: {exc}") from None
    return parse_config(raw, file)


def parse_config(raw: Mapping[str, Any], file: Path | None = None) -> Config:
    """Validate an already-parsed TOML document; relative paths are taken from the file's folder."""
    check = _Checker(file)
    base = file.parent if file is not None else Path.cwd()
    check.only_keys("", raw, ("index", "server", "service", "cluster", "source"))

    index = check.table("index", raw.get("index", {}))
    check.only_keys("index", index, ("path", "model", "storage_options"))
    index_path: Path | str | None = None
    if "path" in index:
        index_text = check.string("index.path", index["path"])
        # A URI is kept as written; resolving it as a path would fold "s3://" into "s3:/".
        index_path = index_text if is_remote(index_text) else _resolve(base, index_text)
    storage_options = _parse_storage_options(
        check, check.table("index.storage_options", index.get("storage_options", {}))
    )
    if storage_options and not isinstance(index_path, str):
        check.fail("index.storage_options", "applies only to an index.path such as s3://bucket/ix")
    model = check.string("index.model", index["model"]) if "model" in index else None

    server = _parse_server(check, check.table("server", raw.get("server", {})))
    service = _parse_service(check, check.table("service", raw.get("service", {})))
    cluster = (
        _parse_cluster(check, check.table("cluster", raw["cluster"])) if "cluster" in raw else None
    )

    sources_raw = raw.get("source", [])
    if not isinstance(sources_raw, list):
        check.fail("source", "must be an array of tables, written [[source]]")
    sources = []
    for n, item in enumerate(sources_raw):
        sources.append(
            _parse_source(check, f"source[{n}]", check.table(f"source[{n}]", item), base)
        )
    names = [s.name for s in sources]
    for n, name in enumerate(names):
        if name in names[:n]:
            check.fail(f"source[{n}].name", f"{name!r} is used by two sources")
    return Config(
        file=file,
        index_path=index_path,
        model=model,
        index_storage_options=storage_options,
        server=server,
        service=service,
        cluster=cluster,
        sources=tuple(sources),
    )


def _parse_storage_options(check: _Checker, table: Mapping[str, Any]) -> dict[str, str]:
    """LanceDB takes string values only; TOML booleans and numbers are written as strings."""
    options = {}
    for key, value in table.items():
        if isinstance(value, bool):
            options[key] = "true" if value else "false"
        elif isinstance(value, (str, int, float)):
            options[key] = str(value)
        else:
            check.fail(f"index.storage_options.{key}", f"must be a string, not {_kind(value)}")
    return options


def _parse_server(check: _Checker, table: Mapping[str, Any]) -> ServerConfig:
    check.only_keys("server", table, ("listen", "token_env"))
    host, port = ServerConfig.host, ServerConfig.port
    if "listen" in table:
        listen = check.string("server.listen", table["listen"])
        try:
            host, port = parse_listen(listen)
        except ValueError as exc:
            check.fail("server.listen", str(exc))
    token_env = (
        check.string("server.token_env", table["token_env"]) if "token_env" in table else None
    )
    if not _is_loopback(host) and not token_env:
        check.fail(
            "server.listen",
            f"{host} is not a loopback address; set server.token_env to the name of an "
            "environment variable holding the bearer token",
        )
    return ServerConfig(host=host, port=port, token_env=token_env)


#: ``upwell watch`` sends a batch to the cluster from this many changed documents on.
CLUSTER_MIN_DOCUMENTS = 200


def _parse_cluster(check: _Checker, table: Mapping[str, Any]) -> ClusterSettings:
    check.only_keys("cluster", table, ("address", "workers", "min_documents", "ship_bytes"))
    address = check.string("cluster.address", table["address"]) if "address" in table else None
    workers = (
        check.integer("cluster.workers", table["workers"], minimum=1)
        if "workers" in table
        else None
    )
    if bool(address) == bool(workers):
        check.fail("cluster", "give either address (a running scheduler) or workers (local)")
    if address and not address.startswith(("tcp://", "tls://")):
        check.fail(
            "cluster.address", f"{address!r} is not a scheduler address like tcp://HOST:8786"
        )
    minimum = CLUSTER_MIN_DOCUMENTS
    if "min_documents" in table:
        minimum = check.integer("cluster.min_documents", table["min_documents"], minimum=0)
    ship = (
        check.boolean("cluster.ship_bytes", table["ship_bytes"]) if "ship_bytes" in table else False
    )
    return ClusterSettings(workers=workers, address=address, min_documents=minimum, ship_bytes=ship)


def _parse_service(check: _Checker, table: Mapping[str, Any]) -> ServiceConfig:
    keys = (
        "settle",
        "batch_window",
        "batch_documents",
        "reconcile_every",
        "maintenance_at",
        "paused",
        "keep_days",
        "auto_compact",
        "compact_fragments",
        "compact_every",
        "compact_quiet",
    )
    check.only_keys("service", table, keys)
    d = ServiceConfig()
    settle = check.duration("service.settle", table["settle"]) if "settle" in table else None
    window = (
        check.duration("service.batch_window", table["batch_window"])
        if "batch_window" in table
        else None
    )
    batch = d.batch_documents
    if "batch_documents" in table:
        batch = check.integer("service.batch_documents", table["batch_documents"], minimum=1)
    reconcile = (
        check.duration("service.reconcile_every", table["reconcile_every"])
        if "reconcile_every" in table
        else None
    )
    at = d.maintenance_at
    if "maintenance_at" in table:
        at = check.string("service.maintenance_at", table["maintenance_at"])
        if not _CLOCK.match(at):
            check.fail("service.maintenance_at", f'{at!r} is not a time of day such as "03:30"')
    paused = check.boolean("service.paused", table["paused"]) if "paused" in table else False
    keep = d.keep_days
    if "keep_days" in table:
        keep = check.integer("service.keep_days", table["keep_days"], minimum=1)
    auto_compact = d.auto_compact
    if "auto_compact" in table:
        auto_compact = check.boolean("service.auto_compact", table["auto_compact"])
    fragments = d.compact_fragments
    if "compact_fragments" in table:
        fragments = check.integer(
            "service.compact_fragments", table["compact_fragments"], minimum=1
        )
    every = d.compact_every
    if "compact_every" in table:
        every = check.duration("service.compact_every", table["compact_every"])
    quiet = d.compact_quiet
    if "compact_quiet" in table:
        quiet = check.duration("service.compact_quiet", table["compact_quiet"])
    return ServiceConfig(
        settle_seconds=settle if settle is not None else d.settle_seconds,
        batch_seconds=window if window is not None else d.batch_seconds,
        batch_documents=batch,
        reconcile_every=reconcile if reconcile is not None else d.reconcile_every,
        maintenance_at=at,
        paused=paused,
        keep_days=float(keep),
        auto_compact=auto_compact,
        compact_fragments=fragments,
        compact_every=every,
        compact_quiet=quiet,
    )


_COMMON_SOURCE_KEYS = ("name", "kind", "watch", "every", "ocr")
_FOLDER_KEYS = ("path", "include", "exclude")
DEFAULT_POLL_EVERY = 15 * 60.0  # a source nothing can watch is scanned this often by default


def _parse_source(
    check: _Checker, where: str, table: Mapping[str, Any], base: Path
) -> SourceConfig:
    if "name" not in table:
        check.fail(f"{where}.name", "is required")
    name = check.string(f"{where}.name", table["name"])
    if not _NAME.match(name):
        check.fail(
            f"{where}.name",
            f"{name!r} must be letters, digits, '.', '_' or '-', not starting with punctuation",
        )
    where = f"source {name!r}"
    kind = check.string(f"{where}.kind", table.get("kind", "folder"))
    if kind not in SOURCE_KINDS:
        check.fail(f"{where}.kind", f"{kind!r} is not a known kind ({', '.join(SOURCE_KINDS)})")
    watchable = kind == "folder"
    watch = check.boolean(f"{where}.watch", table["watch"]) if "watch" in table else watchable
    if watch and not watchable:
        check.fail(f"{where}.watch", f"a {kind} source cannot be watched; give it `every`")
    every = check.duration(f"{where}.every", table["every"]) if "every" in table else None
    if every is None and not watch:
        every = DEFAULT_POLL_EVERY
    ocr = check.boolean(f"{where}.ocr", table["ocr"]) if "ocr" in table else True
    if kind in ("folder", "polled"):
        check.only_keys(where, table, _COMMON_SOURCE_KEYS + _FOLDER_KEYS)
        if "path" not in table:
            check.fail(f"{where}.path", "is required")
        return SourceConfig(
            name=name,
            kind=kind,
            path=_resolve(base, check.string(f"{where}.path", table["path"])),
            watch=watch,
            every=every,
            ocr=ocr,
            include=check.patterns(f"{where}.include", table.get("include", ["**/*"])),
            # Configured excludes add to the defaults: editor and office temp files stay ignored.
            exclude=DEFAULT_EXCLUDE
            + tuple(
                p
                for p in check.patterns(f"{where}.exclude", table.get("exclude", []))
                if p not in DEFAULT_EXCLUDE
            ),
            file=check.file,
        )
    options = {k: v for k, v in table.items() if k not in _COMMON_SOURCE_KEYS}
    source = SourceConfig(
        name=name, kind=kind, watch=False, every=every, ocr=ocr, options=options, file=check.file
    )

    def fail(key: str, problem: str) -> Any:
        return check.fail(f"{where}.{key}", problem)

    # Build it once now, so a bad key is reported when the file is loaded, not at sync time.
    build_connector(kind, name, options, fail, Path(".upwell-state") / name)
    return source


def _resolve(base: Path, text: str) -> Path:
    path = Path(text).expanduser()
    return (path if path.is_absolute() else base / path).resolve()


def parse_listen(listen: str) -> tuple[str, int]:
    """``HOST:PORT`` (an IPv6 host in brackets) as (host, port); ValueError saying why not."""
    host, sep, port_text = listen.rpartition(":")
    host = host.strip("[]")
    if not sep or not host or not port_text.isdigit() or int(port_text) > 65535:
        raise ValueError(f'{listen!r} is not HOST:PORT, such as "127.0.0.1:8765"')
    return host, int(port_text)


def is_loopback(host: str) -> bool:
    """Whether ``host`` is this machine only: ``localhost`` or a loopback address."""
    return _is_loopback(host)


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


class _Checker:
    """Type checks that fail with ``config FILE: KEY: what is wrong``."""

    def __init__(self, file: Path | None) -> None:
        self.file = file

    def fail(self, key: str, problem: str) -> Any:
        prefix = f"config {self.file}: " if self.file else "config: "
        raise UsageError(f"{prefix}{key}: {problem}")

    def only_keys(self, where: str, table: Mapping[str, Any], known: tuple[str, ...]) -> None:
        for key in table:
            if key not in known:
                name = f"{where}.{key}" if where else key
                self.fail(name, f"unknown key (known here: {', '.join(known)})")

    def table(self, key: str, value: Any) -> Mapping[str, Any]:
        if not isinstance(value, dict):
            self.fail(key, f"must be a table, not {_kind(value)}")
        return value

    def string(self, key: str, value: Any) -> str:
        if not isinstance(value, str) or not value.strip():
            self.fail(key, f"must be a non-empty string, not {_kind(value)}")
        return value

    def boolean(self, key: str, value: Any) -> bool:
        if not isinstance(value, bool):
            self.fail(key, f"must be true or false, not {_kind(value)}")
        return value

    def integer(self, key: str, value: Any, minimum: int) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            self.fail(key, f"must be a whole number of at least {minimum}, not {value!r}")
        return value

    def duration(self, key: str, value: Any) -> float:
        return self._converted(key, value, parse_duration)

    def patterns(self, key: str, value: Any) -> tuple[str, ...]:
        if not isinstance(value, list) or not all(isinstance(p, str) and p for p in value):
            self.fail(key, f'must be a list of glob patterns such as ["**/*.md"], not {value!r}')
        return tuple(value)

    def _converted(self, key: str, value: Any, convert: Callable[[str], float]) -> float:
        if not isinstance(value, str):
            self.fail(key, f'must be a string such as "15m", not {_kind(value)}')
        try:
            return convert(value)
        except ValueError as exc:
            return self.fail(key, str(exc))


def _kind(value: Any) -> str:
    return {
        bool: "a boolean",
        int: "a number",
        float: "a number",
        str: "a string",
        list: "a list",
        dict: "a table",
    }.get(type(value), type(value).__name__)


STARTER_TEXT = """\
# upwell configuration. Every command reads it with --config FILE (or $UPWELL_CONFIG).
# Relative paths are taken from the folder this file is in.

[index]
# The index folder: LanceDB tables, history and the writer lock.
path = "index"
# Embedding model for a new index; an existing index keeps the model it was built with.
# model = "default"

[server]
# Where `upwell watch` serves the console (/console/) and /healthz, /status, /search, /metrics.
# A non-loopback address
# needs token_env: the name of an environment variable holding the bearer token.
listen = "127.0.0.1:8765"
# token_env = "UPWELL_TOKEN"

[service]
# settle = "1s"            # a file is read once its size and mtime stayed still this long
# batch_window = "0.2s"    # after the first settled file, gather more for this long
# batch_documents = 50     # documents per commit
# reconcile_every = "1h"   # full rescan of every source, repairing missed events
# maintenance_at = "03:30" # local time of the nightly maintenance
# paused = false           # true: keep watching, write nothing (reload with SIGHUP)
# keep_days = 30           # maintenance removes older versions (tagged ones are kept)
# auto_compact = true      # merge small data files between syncs (no version is removed)
# compact_fragments = 4    # ... once this many were written since the last time
# compact_every = "10m"    # ... or this long after it, whichever comes first
# compact_quiet = "2s"     # ... once searches have paused this long

# [cluster]
# Extract and embed big batches (a first build, a reconcile after downtime) on a Dask cluster;
# the service still commits every batch itself. Give address or workers, not both.
# address = "tcp://10.0.0.5:8786"   # a running `dask scheduler`; workers: `dask worker ADDRESS`
# workers = 2                       # or: local worker processes started by upwell
# min_documents = 200               # smaller batches stay in process
# ship_bytes = false                # true: the service reads each file and sends its bytes

# One [[source]] per folder. Names appear in search results and must stay stable.
[[source]]
name = "handbook"
kind = "folder"
path = "/srv/share/handbook"
watch = true                 # false: scanned on the schedule only
every = "15m"                # a full scan of this source on a schedule
include = ["**/*"]
exclude = ["**/drafts/**"]   # added to the built-in editor and office temp-file patterns
"""
