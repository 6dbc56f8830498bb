"""What every command module of the CLI shares: the help layout, JSON output, confirmation.

Each command module has ``register(sub)``, adding its commands to the ``upwell`` subparsers;
each command is ``cmd_NAME(args, index) -> exit code`` and calls one ``Index`` method. Exit
codes are the table in ``pipeline.errors``. A command prints to ``args.out`` and ``args.err``
and asks with ``args.confirm``: the terminal's, or, for a command handed to a running service,
the caller's terminal at the other end of the control socket.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import sys
import textwrap
from collections.abc import Iterator
from typing import Any, TextIO

from pipeline.errors import UsageError


class HelpFormatter(argparse.RawDescriptionHelpFormatter):
    """Fills prose paragraphs to the terminal width; keeps example blocks as written."""

    def _fill_text(self, text: str, width: int, indent: str) -> str:
        paragraphs = text.split("\n\n")
        out = []
        for para in paragraphs:
            lines = para.splitlines()
            if any(line.startswith(" ") for line in lines[1:]) or para.rstrip().endswith(":"):
                out.append(textwrap.indent(para, indent))
            else:
                out.append(
                    textwrap.fill(
                        " ".join(lines),
                        min(width, 92),
                        initial_indent=indent,
                        subsequent_indent=indent,
                    )
                )
        return "\n\n".join(out)


def json_out(data: Any, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    json.dump(data, out, indent=2, ensure_ascii=False, default=str)
    out.write("\n")


def confirm_on_terminal(message: str) -> bool:
    """Ask on the terminal; without one, refuse (the caller says to use --yes)."""
    if not sys.stdin.isatty():
        return False
    sys.stderr.write(message + " [y/N] ")
    sys.stderr.flush()
    return sys.stdin.readline().strip().lower() in ("y", "yes")


# --- a Dask cluster for one command ---------------------------------------------------------


def add_cluster_arguments(p: argparse.ArgumentParser) -> None:
    """``--workers N`` and ``--cluster ADDRESS``, for the commands that extract and embed."""
    group = p.add_mutually_exclusive_group()
    group.add_argument(
        "--workers",
        type=int,
        metavar="N",
        default=None,
        help="extract, chunk and embed in N local worker processes (a Dask LocalCluster that "
        "upwell starts and stops); this process still commits every batch",
    )
    group.add_argument(
        "--cluster",
        metavar="ADDRESS",
        default=None,
        help="use the running Dask scheduler at ADDRESS (tcp://HOST:8786); each worker needs "
        "the same upwell installed (`dask worker ADDRESS`). Default: [cluster] of the "
        "configuration, for batches of at least its min_documents",
    )


@contextlib.contextmanager
def cluster_for_command(args: argparse.Namespace, index: Any) -> Iterator[None]:
    """Use the cluster ``--workers``/``--cluster`` ask for (every batch), else the
    configuration's ``[cluster]`` (big batches only); put back what the index had, so a command
    handed to a running service leaves the service's own cluster as it was."""
    from pipeline.records import ClusterSettings

    workers, address = getattr(args, "workers", None), getattr(args, "cluster", None)
    config = getattr(args, "config", None)
    if workers is not None and workers < 1:
        raise UsageError(f"--workers must be 1 or more, not {workers}")
    if address is not None and not address.startswith(("tcp://", "tls://")):
        raise UsageError(f"--cluster {address!r} is not a scheduler address like tcp://HOST:8786")
    ship = bool(config and config.cluster and config.cluster.ship_bytes)
    if workers or address:
        wanted = ClusterSettings(workers=workers, address=address, ship_bytes=ship)
    elif config is not None and config.cluster is not None and index.cluster is None:
        wanted = config.cluster
    else:
        yield
        return
    before = index.cluster
    index.cluster = None
    index.set_cluster(wanted)
    try:
        yield
    finally:
        index.close_cluster()
        index.cluster = before
