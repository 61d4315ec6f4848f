"""Command-line interface: argument parsing only; every command calls the library.

``main(argv)`` returns the exit code: 0 success, 2 bad input (one message, no traceback).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path

import pandas as pd

from regional import __version__, io
from regional.errors import InputError, InputWarning
from regional.region import RegionSummary, describe_region, load_region

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
    """Return the argument parser with one sub-command per job (see :data:`PARSERS`)."""
    parser = argparse.ArgumentParser(
        prog="regional",
        description=DESCRIPTION,
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"regional {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for add_parser in PARSERS.values():
        add_parser(subparsers)
    return parser


# --------------------------------------------------------------------------------------------
# regional check REGION
# --------------------------------------------------------------------------------------------


def _check_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "check",
        help="validate a region's inputs and print a summary",
        description=(
            "Validate everything a region names (settings, basins, overlays, raster, series) "
            "and print a summary: basins, gauged and ungauged counts, record length per basin, "
            "attribute ranges, notes and warnings. Exit code 0 when the region is usable, 2 "
            "on an input error."
        ),
        epilog=CAUTION,
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")


def _check(args: argparse.Namespace) -> int:
    summary = describe_region(load_region(args.region))
    print(format_summary(summary))
    return 0


def format_summary(summary: RegionSummary) -> str:
    """The text ``regional check`` prints for a region summary."""
    period = _span(summary.period)
    n_days = (summary.period[1] - summary.period[0]).days + 1
    validation = _span(summary.validation) if summary.validation else "none"
    lines = [
        f"region: {summary.name}",
        f"basins: {summary.n_basins} {summary.geometry} ({summary.n_gauged} gauged, "
        f"{summary.n_ungauged} ungauged)",
        f"forcing: {period} ({n_days} days, common to all basins)",
        f"calibration: {_span(summary.calibration)}; validation: {validation}",
        "",
        "record length per basin (observed flow):",
        _indent(_records_text(summary.records)),
        "",
        "attribute ranges:",
        _indent(summary.attribute_ranges.to_string(float_format=_number)),
    ]
    if summary.notes:
        lines += ["", "notes:", *(f"  - {note}" for note in summary.notes)]
    n_warnings = len(summary.warnings)
    lines += ["", f"warnings: {n_warnings}" + (" (listed below)" if n_warnings else "")]
    lines.append("usable: yes")
    return "\n".join(lines)


def _records_text(records: pd.DataFrame) -> str:
    shown = records.copy()
    for column in ("first_flow", "last_flow"):
        shown[column] = shown[column].dt.strftime("%Y-%m-%d").fillna("-")
    return shown.to_string()


def _span(period: tuple[pd.Timestamp, pd.Timestamp]) -> str:
    return f"{period[0]:%Y-%m-%d}..{period[1]:%Y-%m-%d}"


def _number(value: float) -> str:
    return f"{value:.4g}"


def _indent(text: str) -> str:
    return "\n".join(f"  {line}" for line in text.splitlines())


# --------------------------------------------------------------------------------------------
# regional attributes REGION --out FILE.csv
# --------------------------------------------------------------------------------------------


def _attributes_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "attributes",
        help="write the basin attribute table as CSV",
        description=(
            "Validate a region and write its attribute table (one row per basin, indexed by "
            "basin_id): the user's own columns and the computed attributes."
        ),
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")
    parser.add_argument(
        "--out", required=True, type=Path, metavar="FILE.csv", help="CSV file to write"
    )


def _attributes(args: argparse.Namespace) -> int:
    region = load_region(args.region)
    path = io.write_csv(region.attributes, args.out)
    n_basins, n_columns = region.attributes.shape
    print(f"wrote {n_basins} basins x {n_columns} attributes to {path}")
    return 0


# --------------------------------------------------------------------------------------------
# Registries: one entry per sub-command (its parser builder, and the function it runs)
# --------------------------------------------------------------------------------------------

PARSERS: dict[str, Callable[[argparse._SubParsersAction], None]] = {
    "check": _check_parser,
    "attributes": _attributes_parser,
}

COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {
    "check": _check,
    "attributes": _attributes,
}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code.

    Input warnings are printed as ``warning: ...`` lines on stderr; an input error as one
    ``error: ...`` message on stderr with exit code 2.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    return _run(COMMANDS[args.command], args)


def _run(command: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> int:
    error: InputError | None = None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputWarning)
        try:
            code = command(args)
        except InputError as exc:
            code, error = 2, exc
        except KeyboardInterrupt:
            code, error = 130, None
            print("interrupted", file=sys.stderr)
    for record in caught:
        if issubclass(record.category, InputWarning):
            print(f"warning: {record.message}", file=sys.stderr)
        else:
            warnings.warn_explicit(record.message, record.category, record.filename, record.lineno)
    if error is not None:
        print(f"error: {error}", file=sys.stderr)
    return code


if __name__ == "__main__":
    sys.exit(main())
