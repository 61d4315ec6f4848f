"""Command-line interface: argument parsing only; every command calls the library.

``main(argv)`` returns the exit code: 0 success, 2 bad input (one message, no traceback).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

from regional import __version__
from regional.errors import InputError

CAUTION = (
    "Caution: flows estimated at ungauged sites carry large uncertainty. Read the leave-one-out "
    "skill and the bounds beside every estimate, and leave design decisions that affect safety "
    "(floods, dam safety, water supply) to local codes and licensed professional practice."
)

DESCRIPTION = (
    "regional: daily flows and flow statistics at ungauged basins, by transferring calibrated "
    "storage-model parameters from the gauged basins of a region, with leave-one-out validation "
    "of how much skill the transfer keeps."
)


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser with one sub-command per job."""
    parser = argparse.ArgumentParser(
        prog="regional",
        description=DESCRIPTION,
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"regional {__version__}")
    parser.add_subparsers(dest="command", metavar="COMMAND")
    return parser


COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    try:
        return COMMANDS[args.command](args)
    except InputError as error:
        print(f"error: {error}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
