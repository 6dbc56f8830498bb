"""The ``init``, ``watch`` and ``verify`` commands: parse, call one function, print.

``cli.build_parser`` calls ``register(sub)``; each command gets ``(args, index)`` like the others,
and ``args.config`` holds the loaded ``Config`` (or None).
"""

from __future__ import annotations

import argparse
import dataclasses
from pathlib import Path
from typing import Any

from pipeline.cli import handover
from pipeline.cli.common import HelpFormatter, json_out
from pipeline.config import STARTER_TEXT, Config, ServerConfig, parse_listen
from pipeline.errors import EXIT_INCONSISTENT, EXIT_OK, IndexMissing, UsageError
from pipeline.index import Index
from pipeline.service.daemon import Service
from pipeline.service.logs import configure_logging
from pipeline.service.serve import serve
from pipeline.verify import repair_index, verify_index


def _need_config(args: argparse.Namespace, command: str) -> Config:
    config: Config | None = getattr(args, "config", None)
    if config is None:
        raise UsageError(
            f"`upwell {command}` needs a configuration: --config FILE or $UPWELL_CONFIG "
            "(`upwell init FILE` writes a starter file)"
        )
    return config


def cmd_init(args: argparse.Namespace, index: Index) -> int:
    target = Path(args.file)
    if target.exists() and not args.force:
        raise UsageError(f"{target} exists; pass --force to overwrite it")
    target.write_text(STARTER_TEXT, encoding="utf-8")
    print(
        f"wrote {target}: edit the [[source]] entries, then `upwell --config {target} watch`",
        file=args.out,
    )
    return 0


def cmd_watch(args: argparse.Namespace, index: Index) -> int:
    config = _need_config(args, "watch")
    if not config.sources:
        raise UsageError(f"config {config.file}: no [[source]] to watch")
    configure_logging(args.log_format)
    return Service(config, index, commands=handover.handler(args.parser, index)).run()


def cmd_serve(args: argparse.Namespace, index: Index) -> int:
    config: Config | None = getattr(args, "config", None)
    server = config.server if config else ServerConfig()
    if args.listen:
        try:
            host, port = parse_listen(args.listen)
        except ValueError as exc:
            raise UsageError(f"--listen: {exc}") from None
        server = dataclasses.replace(server, host=host, port=port)
    if args.token_env:
        server = dataclasses.replace(server, token_env=args.token_env)
    if not index.exists:
        raise IndexMissing(
            f"no index at {index.path}: `upwell sync FOLDER` or `upwell watch` builds one"
        )
    configure_logging(args.log_format)
    kinds = {s.name: s.kind for s in config.sources} if config else None

    def ready(url: str) -> None:
        print(f"upwell serve: console at {url} (read-only; Ctrl-C stops)", file=args.out)
        args.out.flush()

    return serve(index, server, kinds, ready=ready)


def cmd_verify(args: argparse.Namespace, index: Index) -> int:
    config: Config | None = getattr(args, "config", None)
    sources: Any = [s.connector(index.state_root) for s in config.sources] if config else None
    if args.repair:
        report = repair_index(index, sources, yes=args.yes)
    else:
        report = verify_index(index, sources, drift=not args.no_drift)
    if args.json:
        json_out(report.as_dict(), args.out)
    else:
        c = report.counted
        print(
            f"checked:   {c['documents']} documents, {c['chunks']} chunks, {c['commits']} "
            f"commits, {c['tombstones']} tombstones",
            file=args.out,
        )
        if report.repaired:
            print(f"repaired:  {len(report.repaired)} documents re-indexed", file=args.out)
        for p in report.problems:
            where = f"{p.doc_id}: " if p.doc_id else ""
            print(f"{p.check}: {where}{p.detail}", file=args.out)
        print(
            "consistent" if report.consistent else f"{len(report.problems)} problems", file=args.out
        )
    return EXIT_OK if report.consistent else EXIT_INCONSISTENT


def register(sub: Any) -> None:
    formatter_class = HelpFormatter
    """Add ``init``, ``watch`` and ``verify`` to the ``upwell`` subcommand parser."""
    p = sub.add_parser(
        "init",
        help="write a commented starter configuration file",
        description="Write a TOML configuration with every key commented: the index folder, the "
        "HTTP address, the service timings and one [[source]] to edit.",
        epilog="example:\n  upwell init /etc/upwell/upwell.toml",
        formatter_class=formatter_class,
    )
    p.add_argument("file", nargs="?", default="upwell.toml", metavar="FILE")
    p.add_argument("--force", action="store_true", help="overwrite an existing file")
    p.set_defaults(func=cmd_init)

    p = sub.add_parser(
        "watch",
        help="run as a service: watch the configured sources and keep the index current",
        description="Watch every configured source, sync each change once the file has settled, "
        "scan on the configured schedules, reconcile every source at start and hourly, and serve "
        "the web console (/console/) and the HTTP API (/healthz, /status, /search, "
        "/history, /document, /failures, /metrics) on server.listen. Runs in the foreground "
        "until SIGTERM or SIGINT (finishes the batch in hand, exits 0); SIGHUP reloads the "
        "configuration.",
        epilog="example:\n  upwell --config /etc/upwell/upwell.toml watch --log-format json\n\n"
        "exit codes: 0 stopped cleanly, 2 bad configuration, 4 another writer holds the index",
        formatter_class=formatter_class,
    )
    p.set_defaults(func=cmd_watch)

    p = sub.add_parser(
        "serve",
        help="serve the web console and the HTTP API over an index, read-only",
        description="Serve the read-only console (/console/: overview, search, history with its "
        "chart and diffs, documents, failures) and the HTTP API over any index, local or s3://, "
        "without watching or syncing and without taking the writer lock: for readers on other "
        "machines, or beside a service that writes elsewhere. Only loopback by default; on any "
        "other address every page, asset and API call needs the bearer token named by "
        "--token-env (or server.token_env). Runs in the foreground until SIGTERM or SIGINT.",
        epilog="examples:\n  upwell serve                     # http://127.0.0.1:8765/console/\n"
        "  upwell --index s3://ix/main serve --listen 127.0.0.1:9000\n"
        "  UPWELL_TOKEN=... upwell serve --listen 0.0.0.0:8765 --token-env UPWELL_TOKEN\n\n"
        "exit codes: 0 stopped cleanly, 2 bad address or missing token",
        formatter_class=formatter_class,
    )
    p.add_argument(
        "--listen",
        metavar="HOST:PORT",
        default=None,
        help="address to listen on (default: server.listen of the configuration, else "
        "127.0.0.1:8765; port 0 picks a free one)",
    )
    p.add_argument(
        "--token-env",
        metavar="VAR",
        default=None,
        help="environment variable holding the bearer token (needed off loopback)",
    )
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser(
        "verify",
        help="check the index for internal consistency and drift from the sources",
        description="Check for duplicate chunk ids, chunks without a document, documents without "
        "their chunks, vectors of the wrong dimension, gaps between the commit and tombstone "
        "logs and the tables, and files changed since their last sync. --repair re-syncs and "
        "re-indexes the affected documents (it needs the writer lock).",
        epilog="examples:\n  upwell --config upwell.toml verify\n  upwell verify --repair --json"
        "\n\nexit codes: 0 consistent, 5 problems found (after --repair: still found), "
        "4 another writer holds the index (--repair)",
        formatter_class=formatter_class,
    )
    p.add_argument("--repair", action="store_true", help="re-sync and re-index what is wrong")
    p.add_argument("--no-drift", action="store_true", help="skip the comparison with sources")
    p.add_argument("--yes", action="store_true", help="with --repair: do not ask before removals")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_verify)
