"""The ``labeler`` command: parses arguments, calls :mod:`labeler.workflow`, prints.

:mod:`labeler.cli.arguments` builds the parser, :mod:`labeler.cli.commands` holds one
function per command. Exit codes: 0 success; 1 a user error (one clear line on stderr);
2 a usage error; 130 interrupted.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence

from labeler.cli.arguments import build_parser
from labeler.errors import LabelerError

__all__ = ["main", "build_parser"]


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except LabelerError as exc:
        print(f"labeler: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("labeler: interrupted; saved work is kept", file=sys.stderr)
        return 130
