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
from regional.compute import keep_freed_memory
from regional.errors import InputError, InputWarning
from regional.models import get_model
from regional.outputs import loo_summary, update_stage_outputs, write_outputs
from regional.pipeline import run
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
# regional run REGION [--out DIR]
# --------------------------------------------------------------------------------------------


def _run_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "run",
        help="the whole job: calibrate, validate every transfer, predict, write results",
        description=(
            "Check the region, compute attributes, calibrate the storage model at every gauged "
            "basin, validate every transfer method by leave-one-out against the calibrated "
            "(upper bound) and median (benchmark) baselines, estimate flows at the ungauged "
            "basins, screen candidate gauge sites, and write results.gpkg, CSV tables, "
            "figures, report.html and run.json to the output folder."
        ),
        epilog=CAUTION,
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")
    _add_run_options(parser)


def _add_run_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--out",
        type=Path,
        metavar="DIR",
        help="results folder (default: [output] folder of the region); replaced only when "
        "the new results are complete",
    )
    parser.add_argument(
        "--scheduler", metavar="ADDRESS", help="run on a Dask cluster (tcp://host:8786)"
    )
    parser.add_argument(
        "--workers", type=int, metavar="N", help="start a local Dask cluster of N processes"
    )
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


def _run_all(args: argparse.Namespace) -> int:
    result = _run_with_progress(args)
    folder = write_outputs(result, _out_folder(args, result))
    print(format_run_summary(result))
    print(f"\nresults written to {folder}")
    print(CAUTION)
    return 0


def _out_folder(args: argparse.Namespace, result) -> Path:
    return args.out if args.out is not None else result.settings.output.folder


def _run_with_progress(args: argparse.Namespace):
    bars: dict[str, object] = {}

    def progress(stage: str, done: int, total: int) -> None:
        if args.quiet:
            return
        from tqdm import tqdm

        bar = bars.get(stage)
        if bar is None or bar.total != total or bar.n > done:
            if bar is not None:
                bar.close()
            bar = bars[stage] = tqdm(total=total, desc=stage, unit="basin", file=sys.stderr)
        bar.update(done - bar.n)
        if done >= total:
            bar.close()

    try:
        return run(args.region, scheduler=args.scheduler, workers=args.workers, progress=progress)
    finally:
        for bar in bars.values():
            bar.close()


def format_run_summary(result) -> str:
    """The table ``regional run`` prints: leave-one-out skill per model and method."""
    table = loo_summary(result)
    columns = [
        "model",
        "method",
        "n_basins",
        "median_nse",
        "q25_nse",
        "q75_nse",
        "share_nse_gt_0_5",
        "median_kge",
        "gain_vs_median",
        "loss_vs_calibrated",
    ]
    columns += [c for c in ("coverage",) if c in table.columns]
    lines = [
        f"region: {result.settings.region.name}",
        f"basins: {len(result.region.gauged)} gauged, {len(result.region.ungauged)} ungauged",
        "",
        "leave-one-out skill (each gauged basin predicted from the others; evaluation period):",
        table[columns].to_string(index=False, float_format=lambda v: f"{v:.3f}"),
        "",
        f"chosen for prediction: model {result.chosen_model}, method {result.chosen_method}",
    ]
    if result.warnings:
        lines.append(f"warnings: {len(result.warnings)} (see report.html)")
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# regional predict REGION / regional screen REGION
# --------------------------------------------------------------------------------------------


def _predict_parser(subparsers: argparse._SubParsersAction) -> None:
    _stage_parser(
        subparsers,
        "predict",
        help="flows, bounds and flow statistics at the ungauged basins",
        description=(
            "Run the chain and write the estimates at the ungauged basins: parameters per "
            "method with intervals, daily flows in mm/day and m3/s with lower and upper bounds "
            "(built from the leave-one-out errors), flow statistics and applicability flags. "
            "Writes flows_ungauged.csv, parameters_ungauged.csv, coverage.csv, the 'ungauged' "
            "layer of results.gpkg and its figures into the results folder, keeping the other "
            "files of an earlier run."
        ),
    )


def _stage_parser(
    subparsers: argparse._SubParsersAction, name: str, *, help: str, description: str
) -> None:
    parser = subparsers.add_parser(name, help=help, description=description, epilog=CAUTION)
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")
    _add_run_options(parser)


def _predict(args: argparse.Namespace) -> int:
    result = _run_with_progress(args)
    if result.prediction is None:
        raise InputError("the region has no ungauged basin: there is nothing to predict")
    folder = update_stage_outputs(result, _out_folder(args, result), stage="prediction")
    print(format_prediction(result))
    print(f"\nprediction written to {folder}")
    print(CAUTION)
    return 0


def format_prediction(result) -> str:
    """The table ``regional predict`` prints: one line per ungauged basin."""
    prediction = result.prediction
    names = [p.name for p in get_model(result.chosen_model).parameters]
    columns = [*names, *(f"{n}_{side}" for n in names for side in ("low", "high"))]
    columns += ["mean_flow_mm", "q95_mm", "applicable"]
    coverage = prediction.coverage.set_index(["model", "method"]).loc[
        (prediction.model, prediction.method), "coverage"
    ]
    lines = [
        f"ungauged basins: {len(prediction.table)}; model {prediction.model}, method "
        f"{prediction.method}; bounds at {prediction.level:.0%}, leave-one-out coverage "
        f"{coverage:.1%}",
        prediction.table[columns].to_string(float_format=lambda v: f"{v:.4g}"),
    ]
    flagged = prediction.table[~prediction.table["applicable"].astype(bool)]
    for basin, reason in flagged["reason"].items():
        lines.append(f"  not applicable: {basin}: {reason}")
    return "\n".join(lines)


def _screen_parser(subparsers: argparse._SubParsersAction) -> None:
    _stage_parser(
        subparsers,
        "screen",
        help="rank candidate gauge sites by how much they would teach the region",
        description=(
            "Run the chain and rank candidate basins ([screening] candidates, default every "
            "ungauged basin) by how much a gauge there would reduce the prediction variance "
            "over the region's ungauged basins, combined with how much its donors disagree. "
            "Writes screening.csv, the 'screening' layer of results.gpkg and its figure."
        ),
    )


def _screen(args: argparse.Namespace) -> int:
    result = _run_with_progress(args)
    if result.screening is None:
        raise InputError("the region has no ungauged basin: there is no candidate to screen")
    folder = update_stage_outputs(result, _out_folder(args, result), stage="screening")
    table = result.screening.table
    print(
        table[["rank", "score", "variance_reduction", "donor_spread"]].to_string(
            float_format=lambda v: f"{v:.3g}"
        )
    )
    for basin, reason in table["reason"].items():
        print(f"  {basin}: {reason}")
    print(f"\nscreening written to {folder}")
    return 0


# --------------------------------------------------------------------------------------------
# Registries: one entry per sub-command (its parser builder, and the function it runs)
# --------------------------------------------------------------------------------------------

PARSERS: dict[str, Callable[[argparse._SubParsersAction], None]] = {
    "check": _check_parser,
    "attributes": _attributes_parser,
    "run": _run_parser,
    "predict": _predict_parser,
    "screen": _screen_parser,
}

COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {
    "check": _check,
    "attributes": _attributes,
    "run": _run_all,
    "predict": _predict,
    "screen": _screen,
}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code.

    Input warnings are printed as ``warning: ...`` lines on stderr; an input error as one
    ``error: ...`` message on stderr with exit code 2.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    keep_freed_memory()
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
