"""Command-line interface: argument parsing only; every command calls the library.

``main(argv)`` returns the exit code (:data:`EXIT_CODES`): every failure ends in one message on
stderr, never a traceback; ``command_line()`` is the ``regional`` program (``main`` in a process
of its own). The numeric libraries are imported inside the commands, after the signal handlers
are in place, so ``--help`` is quick and Ctrl-C while they load is one line; they are imported
with the cyclic garbage collector held off and their objects then set aside from it
(:func:`_loading_libraries`).
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import signal
import sys
import warnings
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from regional import __version__
from regional.errors import InputError, InputWarning, RunError

if TYPE_CHECKING:
    import pandas as pd

    from regional.config import Settings
    from regional.region import RegionSummary

CAUTION = (
    "Caution: flows estimated at ungauged sites carry large uncertainty. Read the leave-one-out "
    "skill and the bounds beside every estimate, and leave design decisions that affect safety "
    "(floods, dam safety, water supply) to local codes and licensed professional practice."
)

EXIT_CODES = {
    0: "done",
    2: "bad input, or an output location refused before any computation",
    3: "the system failed the run (disk full, no permission, cluster unreachable); earlier "
    "results are intact",
    130: "interrupted (Ctrl-C)",
    143: "terminated (SIGTERM)",
}
"""Exit codes of every command, as ``--help`` and the README list them."""

EXIT_TEXT = "Exit codes: " + "; ".join(f"{code} {text}" for code, text in EXIT_CODES.items())

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
        epilog=f"{CAUTION} {EXIT_TEXT}.",
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
            "attribute ranges, notes and warnings. It fails (exit code 2) on every input "
            "problem that would make 'regional run' fail; exit code 0 when the region is usable."
        ),
        epilog=f"{CAUTION} {EXIT_TEXT}.",
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")


def _check(args: argparse.Namespace) -> int:
    with _loading_libraries():
        from regional.region import describe_region, load_region

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
        f"{summary.n_ungauged} ungauged{_donors(summary.n_donor_only)})",
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
            "basin_id): the user's own columns and the computed attributes. An existing file "
            "is replaced once the new one is complete; an input of the region or a folder is "
            "refused."
        ),
        epilog=EXIT_TEXT + ".",
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")
    parser.add_argument(
        "--out", required=True, type=Path, metavar="FILE.csv", help="CSV file to write"
    )


def _attributes(args: argparse.Namespace) -> int:
    with _loading_libraries():
        from regional import io
        from regional.region import load_region

    settings = _settings(args.region)
    target = io.check_output_file(args.out, inputs=settings.input_paths())
    region = load_region(settings)
    path = io.write_csv(region.attributes, target)
    n_basins, n_columns = region.attributes.shape
    print(f"wrote {n_basins} basins x {n_columns} attributes to {path}")
    return 0


# --------------------------------------------------------------------------------------------
# regional convert REGION --out FILE.parquet
# --------------------------------------------------------------------------------------------


def _convert_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "convert",
        help="write the daily series as a Parquet store, one row group per basin",
        description=(
            "Check a region's basins and daily series and write the series once as a Parquet "
            "file with one row group per basin (same columns and units, values as float32), "
            "so that on a Dask cluster each task reads only its own basins. Then set [series] "
            "path in region.toml to the new file; results are the same as from the original "
            "file. An existing file is replaced once the new one is complete; an input of the "
            "region is refused."
        ),
        epilog=EXIT_TEXT + ".",
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")
    parser.add_argument(
        "--out", required=True, type=Path, metavar="FILE.parquet", help="Parquet file to write"
    )


def _convert(args: argparse.Namespace) -> int:
    with _loading_libraries():
        from regional import io
        from regional.region import convert_series

    settings = _settings(args.region)
    if not args.out.name.lower().endswith(io.PARQUET_SUFFIXES):
        raise InputError(
            f"refusing to write {args.out}: a series store is a Parquet file. Fix: name it "
            "with .parquet, e.g. series_store.parquet."
        )
    target = io.check_output_file(args.out, inputs=settings.input_paths())
    n_basins, n_rows = convert_series(settings, target)
    print(
        f"wrote {n_rows} daily records of {n_basins} basins to {target}, one row group per "
        f'basin. Use it: in region.toml, [series] path = "{target}"'
    )
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
            "figures, report.html and run.json to the output folder. The output folder must "
            "be new, empty, or an earlier results folder of regional (see docs/outputs.md); "
            "anything else is refused before any computation."
        ),
        epilog=f"{CAUTION} {EXIT_TEXT}.",
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")
    _add_run_options(parser)


def _add_run_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--out",
        type=Path,
        metavar="DIR",
        help="results folder (default: [output] folder of the region): new, empty, or an "
        "earlier results folder of regional, replaced only when the new results are complete",
    )
    parser.add_argument(
        "--scheduler", metavar="ADDRESS", help="run on a Dask cluster (tcp://host:8786)"
    )
    parser.add_argument(
        "--workers",
        type=_positive_int,
        metavar="N",
        help="start a local Dask cluster of N processes (N >= 1)",
    )
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 1; found {text!r}")
    return value


def _run_all(args: argparse.Namespace) -> int:
    with _loading_libraries():
        from regional.outputs import write_outputs
        from regional.pipeline import open_executor

    settings = _settings(args.region)
    target = _checked_out_folder(args, settings, update=False)
    # one executor for the chain and the figures: on a cluster the workers draw them too
    executor = open_executor(settings, scheduler=args.scheduler, workers=args.workers)
    try:
        result = _run_with_progress(args, settings, executor=executor)
        folder = write_outputs(result, target, executor=executor)
    finally:
        executor.close()
    print(format_run_summary(result))
    print(f"\nresults written to {folder}")
    print(CAUTION)
    return 0


def _settings(region: str) -> Settings:
    with _loading_libraries():
        from regional.config import load_settings
    return load_settings(region)


@contextlib.contextmanager
def _loading_libraries() -> Iterator[None]:
    """Import with the cyclic garbage collector held off, then set every object alive aside.

    numpy, pandas, numba, scipy and geopandas make some hundreds of thousands of objects as they
    load, all alive until the process ends; each full collection while they load, and each one
    after, walks them all in vain. :func:`gc.freeze` moves every object alive at the end of the
    block to the collector's permanent generation: later collections skip them, and objects made
    afterwards (the region's data) are collected as usual. On ``regional predict --sites`` at 5
    demo sites this and the same at exit (:func:`command_line`) took the process from 1.07-1.09 s
    to 0.83-0.92 s, and the demo ``run`` from 9.2 s to 8.1 s (benchmarks/reuse_sites.py).
    :func:`main` undoes the freeze before it returns, so a caller's own objects are not kept
    from the collector.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        gc.freeze()
        if enabled:
            gc.enable()


def _checked_out_folder(args: argparse.Namespace, settings: Settings, *, update: bool) -> Path:
    """The output folder, refused before any computation when a run must not write there."""
    from regional import io

    folder = args.out if args.out is not None else settings.output.folder
    return io.check_output_folder(
        folder, inputs=settings.input_paths(), region_folder=settings.folder, update=update
    )


def _run_with_progress(args: argparse.Namespace, settings: Settings, *, executor=None):
    with _loading_libraries():
        from regional.pipeline import run

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
        return run(
            settings,
            scheduler=args.scheduler,
            workers=args.workers,
            progress=progress,
            executor=executor,
        )
    finally:
        for bar in bars.values():
            bar.close()


def _donors(count: int) -> str:
    """ ", N donors only (user parameters, no flow)" when there are such basins, else ""."""
    return f", {count} donors only (user parameters, no flow)" if count else ""


def format_run_summary(result) -> str:
    """The table ``regional run`` prints: leave-one-out skill per model and method."""
    from regional.outputs import loo_summary

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
        f"basins: {len(result.region.gauged)} gauged, {len(result.region.ungauged)} ungauged"
        + _donors(len(result.region.donor_only)),
        "",
        "leave-one-out skill (each gauged basin predicted from the others; evaluation period):",
        table[columns].to_string(index=False, float_format=lambda v: f"{v:.3f}"),
        "",
        f"chosen for prediction: model {result.chosen_model}, method {result.chosen_method}",
    ]
    if result.region.constant_flow:
        lines.append(
            "treated as ungauged (constant observed flow): "
            + ", ".join(result.region.constant_flow)
        )
    if result.warnings:
        lines.append(f"warnings: {len(result.warnings)} (see report.html)")
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# regional predict REGION / regional screen REGION
# --------------------------------------------------------------------------------------------


def _predict_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = _stage_parser(
        subparsers,
        "predict",
        help="flows, bounds and flow statistics at the ungauged basins, or at new sites",
        description=(
            "Write the estimates at the ungauged basins: parameters per method with intervals, "
            "daily flows in mm/day and m3/s with lower and upper bounds (built from the "
            "leave-one-out errors), flow statistics and applicability flags, into the results "
            "folder of an earlier 'regional run' (flows_ungauged.csv, parameters_ungauged.csv, "
            "coverage.csv, the 'ungauged' layer). When the inputs and settings are those the "
            "run was fitted from, the fitted region stored there is reused: no calibration, no "
            "leave-one-out, the same estimates. Otherwise the chain runs again (the reason is "
            "printed) and the report, figures, loo_summary.csv and run.json are brought up to "
            "date. With --sites, the estimates are made at new sites instead and written to "
            "their own folder."
        ),
    )
    parser.add_argument(
        "--sites",
        type=Path,
        metavar="SITES",
        help="vector file of new sites (polygons, or points with an area column) with the "
        "region's id column; their daily forcing in a file of the same name beside it "
        "(SITES.csv, .csv.gz or .parquet, the region's series columns, no flow)",
    )
    parser.add_argument(
        "--sites-out",
        type=Path,
        metavar="DIR",
        help="folder for the estimates at the sites (default: <SITES name>_estimates beside "
        "SITES): new, empty, or an earlier output of regional",
    )


def _stage_parser(
    subparsers: argparse._SubParsersAction, name: str, *, help: str, description: str
) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        name, help=help, description=description, epilog=f"{CAUTION} {EXIT_TEXT}."
    )
    parser.add_argument("region", help="region folder holding region.toml, or the TOML file")
    _add_run_options(parser)
    return parser


def _predict(args: argparse.Namespace) -> int:
    settings = _settings(args.region)
    target = _checked_out_folder(args, settings, update=True)
    if args.sites is not None:
        return _predict_sites(args, settings, target)
    prediction, folder = _stage_reusing_the_fit(args, settings, target, stage="prediction")
    print(format_prediction(prediction))
    print(f"\nprediction written to {folder}")
    print(CAUTION)
    return 0


def _stage_reusing_the_fit(
    args: argparse.Namespace, settings: Settings, target: Path, *, stage: str
) -> tuple[object, Path]:
    """Prediction or screening from the stored fitted region, or from a new run (saying why).

    Returns the stage's result and the results folder it was written to.
    """
    with _loading_libraries():
        from regional.outputs import update_reused_outputs, update_stage_outputs
        from regional.predict import predict_region
        from regional.region import load_region
        from regional.reuse import stored_fit
        from regional.screen import screen_region

    fitted, reason = stored_fit(settings, target)
    if fitted is not None:
        print(f"reusing the fitted region stored in {target} (inputs and settings unchanged)")
        region = load_region(settings)
        make = predict_region if stage == "prediction" else screen_region
        made = make(fitted, region)
        return made, update_reused_outputs(target, region, **{stage: made})
    print(f"fitting the region again: {reason}")
    result = _run_with_progress(args, settings)
    made = getattr(result, stage)
    if made is None:
        raise InputError(f"the region has no ungauged basin: there is nothing for {stage}")
    return made, update_stage_outputs(result, target, stage=stage)


def _predict_sites(args: argparse.Namespace, settings: Settings, results: Path) -> int:
    with _loading_libraries():
        from regional import io
        from regional.reuse import predict_new_sites, stored_fit, write_site_outputs
        from regional.sites import load_sites

    sites_path = args.sites.expanduser().resolve()
    out = args.sites_out or sites_path.with_name(sites_path.name.split(".")[0] + "_estimates")
    out = io.check_output_folder(
        out,
        inputs=[*settings.input_paths(), sites_path],
        region_folder=settings.folder,
        update=False,
    )
    fitted, reason = stored_fit(settings, results)
    if fitted is None:
        print(f"fitting the region again: {reason}")
        from regional.outputs import write_outputs

        result = _run_with_progress(args, settings)
        write_outputs(result, results)
        fitted = result.fitted
    else:
        print(f"reusing the fitted region stored in {results} (inputs and settings unchanged)")
    sites = load_sites(sites_path, settings, area_crs=fitted.area_crs)
    prediction = predict_new_sites(fitted, sites)
    folder = write_site_outputs(out, prediction, sites, fitted_from=results)
    print(format_prediction(prediction, what="sites"))
    count = len(sites.attributes)
    print(f"\nestimates at {count} site{'' if count == 1 else 's'} written to {folder}")
    print(CAUTION)
    return 0


def format_prediction(prediction, *, what: str = "ungauged basins") -> str:
    """The table ``regional predict`` prints: one line per ungauged basin (or site)."""
    table = prediction.table
    names = [  # the chosen model's parameters, snow ones included: p, p_low, p_high, p_{method}
        c
        for c in table.columns
        if {f"{c}_low", f"{c}_high", f"{c}_{prediction.method}"} <= set(table.columns)
    ]
    columns = [*names, *(f"{n}_{side}" for n in names for side in ("low", "high"))]
    columns += ["mean_flow_mm", "q95_mm", "applicable"]
    coverage = prediction.coverage.set_index(["model", "method"]).loc[
        (prediction.model, prediction.method), "coverage"
    ]
    lines = [
        f"{what}: {len(prediction.table)}; model {prediction.model}, method "
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
            "Writes screening.csv, the 'screening' layer of results.gpkg and its figure into "
            "the results folder of an earlier 'regional run'."
        ),
    )


def _screen(args: argparse.Namespace) -> int:
    settings = _settings(args.region)
    target = _checked_out_folder(args, settings, update=True)
    screening, folder = _stage_reusing_the_fit(args, settings, target, stage="screening")
    table = screening.table
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
    "convert": _convert_parser,
    "run": _run_parser,
    "predict": _predict_parser,
    "screen": _screen_parser,
}

COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {
    "check": _check,
    "attributes": _attributes,
    "convert": _convert,
    "run": _run_all,
    "predict": _predict,
    "screen": _screen,
}


class Terminated(BaseException):
    """Raised in the main thread when the process receives SIGTERM (handled like Ctrl-C)."""


_STOPS_RECEIVED: list[BaseException] = []
"""Signals received during this command: a compiled library that is importing when Ctrl-C
arrives can turn the interruption into an ``ImportError`` (numpy does), which is then reported
as the interruption it was."""


def _on_terminate(signum, frame) -> None:
    raise _received(Terminated())


def _on_interrupt(signum, frame) -> None:
    raise _received(KeyboardInterrupt())


def _received(stop: BaseException) -> BaseException:
    _STOPS_RECEIVED.append(stop)
    return stop


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code (:data:`EXIT_CODES`).

    Input warnings are printed as ``warning: ...`` lines on stderr; a failure as one
    ``error: ...`` line (or ``interrupted`` / ``terminated``) on stderr, never a traceback.
    SIGTERM is handled like Ctrl-C: temporary files are removed, earlier results stay intact.
    """
    _STOPS_RECEIVED.clear()
    previous = _handle_signals()
    frozen_before = gc.get_freeze_count()
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if args.command is None:
            parser.print_help()
            return 0
        return _run(COMMANDS[args.command], args)
    except (KeyboardInterrupt, Terminated) as stop:  # while parsing, before a command runs
        return _stopped(stop)
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
        if not frozen_before:
            gc.unfreeze()  # the libraries' objects set aside by _loading_libraries, back


def command_line() -> None:
    """The ``regional`` program: :func:`main` on the process's arguments, then exit with its code.

    Every object still alive is set aside from the cyclic garbage collector before the exit
    (:func:`gc.freeze`): the interpreter's teardown would otherwise walk them all in its
    collections (about 0.15 s after ``predict --sites``, measured) to free memory the operating
    system takes back anyway. Every output is written, closed and moved into place by then, and
    standard output and error are flushed at exit as always.
    """
    code = main()
    gc.freeze()
    sys.exit(code)


def _handle_signals() -> dict[int, object]:
    """Install this command's SIGTERM and SIGINT handlers; return the ones they replace."""
    try:
        return {
            signal.SIGTERM: signal.signal(signal.SIGTERM, _on_terminate),
            signal.SIGINT: signal.signal(signal.SIGINT, _on_interrupt),
        }
    except ValueError:  # not the main thread: leave signals alone
        return {}


def _run(command: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> int:
    error: str | None = None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputWarning)
        try:
            from regional.compute import keep_freed_memory

            keep_freed_memory()
            code = command(args)
        except InputError as exc:
            code, error = 2, str(exc)
        except RunError as exc:
            code, error = 3, str(exc)
        except OSError as exc:
            code, error = 3, _system_message(exc)
        except MemoryError:
            code, error = 3, "out of memory. Fix: run fewer basins or models at once."
        except (KeyboardInterrupt, Terminated) as stop:
            code = _stopped(stop)
        except ImportError:
            if not _STOPS_RECEIVED:
                raise
            code = _stopped(_STOPS_RECEIVED[-1])
    for record in caught:
        if issubclass(record.category, InputWarning):
            print(f"warning: {record.message}", file=sys.stderr)
        else:
            warnings.warn_explicit(record.message, record.category, record.filename, record.lineno)
    if error is not None:
        print(f"error: {error}", file=sys.stderr)
    return code


def _system_message(error: OSError) -> str:
    where = f": {error.filename}" if error.filename else ""
    return f"{error.strerror or error}{where}. Fix: check the disk, the path and its permissions."


def _stopped(stop: BaseException) -> int:
    terminated = isinstance(stop, Terminated)
    what = "terminated (SIGTERM)" if terminated else "interrupted (Ctrl-C)"
    print(f"{what}: stopped; temporary files removed, earlier results intact", file=sys.stderr)
    return 143 if terminated else 130


if __name__ == "__main__":
    command_line()
