"""What every command module of the CLI shares: the help layout, JSON output, confirmation.

Each command module has ``register(sub)``, adding its commands to the ``upwell`` subparsers;
each command is ``cmd_NAME(args, index) -> exit code`` and calls one ``Index`` method. Exit
codes are the table in ``pipeline.errors``. A command prints to ``args.out`` and ``args.err``
and asks with ``args.confirm``: the terminal's, or, for a command handed to a running service,
the caller's terminal at the other end of the control socket.
"""

from __future__ import annotations

import argparse
import json
import sys
import textwrap
from typing import Any, TextIO


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
