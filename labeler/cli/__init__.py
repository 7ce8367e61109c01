"""The ``labeler`` command: parses arguments, calls :mod:`labeler.workflow`, prints.

:mod:`labeler.cli.arguments` builds the parser, :mod:`labeler.cli.commands` (and :mod:`labeler.cli.team`) hold one
function per command, :mod:`labeler.cli.boundary` turns whatever goes wrong into one line.
Exit codes: 0 success; 1 an error (one clear line on stderr; the traceback only with
``labeler --debug``); 2 a usage error; 130 interrupted.
"""

from __future__ import annotations

from collections.abc import Sequence

from labeler.cli.arguments import build_parser
from labeler.cli.boundary import run_command

__all__ = ["main", "build_parser"]


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    return run_command(args.func, args, debug=args.debug)
