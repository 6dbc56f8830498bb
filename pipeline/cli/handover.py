"""Write commands run by a running ``upwell watch`` on the caller's behalf.

The command line asks ``writes(args)``; when a service holds the index it sends its words over
the control socket (``pipeline.service.control``) instead of running the command itself. The
service runs ``handler(parser)``: the same parser and command functions, printing and asking at
the caller's end, with the service's own index and configuration.
"""

from __future__ import annotations

import argparse
import os
from typing import Any

from pipeline.errors import EXIT_USAGE, UpwellError
from pipeline.index import Index
from pipeline.service.control import Session

#: Commands that write the index (``rollback --dry-run`` and plain ``verify`` only read).
WRITE_COMMANDS = frozenset(
    {"sync", "remove-source", "tag", "untag", "rollback", "resume", "erase", "maintain", "verify"}
)


def writes(args: argparse.Namespace) -> bool:
    """Whether the parsed command writes the index, so that a running service must run it."""
    if args.command == "rollback":
        return not args.dry_run
    if args.command == "verify":
        return bool(args.repair)
    return args.command in WRITE_COMMANDS


def run(args: argparse.Namespace, index: Index) -> int:
    """Run one parsed command; an UpwellError becomes its one-line message and exit code."""
    try:
        return int(args.func(args, index))
    except UpwellError as exc:
        print(f"upwell: error: {exc}", file=args.err)
        return exc.exit_code


def handler(parser: argparse.ArgumentParser, index: Index) -> Any:
    """The function ``upwell watch`` calls, in its writer thread, for each command handed over:
    ``handle(session, config) -> exit code``."""

    def handle(session: Session, config: Any) -> int:
        try:
            args = parser.parse_args(session.argv)
        except SystemExit as exc:  # the caller's own copy of the parser accepted these words
            return int(exc.code or EXIT_USAGE)
        args.out, args.err, args.confirm, args.cwd = (
            session.out,
            session.err,
            session.confirm,
            session.cwd,
        )
        if not writes(args):
            print("upwell: error: only write commands are handed to the service", file=args.err)
            return EXIT_USAGE
        args.config = config
        if getattr(args, "paths", None):  # folders named relative to the caller's folder
            args.paths = [os.path.join(session.cwd, p) for p in args.paths]
        return run(args, index)

    return handle
