"""Turn a :class:`~regional.result.RunResult` into the tables, layers, figures, report and
manifest of a results folder, and hand them to :mod:`regional.io` to write atomically.

Building the content (pure) is kept apart from writing it (``io.write_run_folder``): a failed or
interrupted run never touches the previous results.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterator
from dataclasses import fields, is_dataclass, replace
from functools import partial
from pathlib import Path
from typing import Any

import geopandas as gpd
import pandas as pd

from regional import __version__, io
from regional.compute import InProcessExecutor
from regional.crossval import CALIBRATED
from regional.fittedfiles import FOLDER, META, fitted_files
from regional.predicted import Prediction, flow_parts
from regional.region import Region
from regional.report import figure_jobs, render_report
from regional.report import figures as plots
from regional.report.html import report_pieces
from regional.report.jobs import draw_jobs, series_parts, without_series
from regional.result import RunResult, software_versions
from regional.reuse import with_basin_columns, with_geometry, with_level
from regional.screen import Screening

SCORE_NAMES = ("nse", "kge", "kge_r", "kge_alpha", "kge_beta", "log_nse", "pbias", "n_days")


def write_outputs(
    result: RunResult, folder: str | Path, *, figures: bool = True, executor=None
) -> Path:
    """Write every output of a run into ``folder`` (replaced only once complete).

    Parameters
    ----------
    result : RunResult
        From :func:`regional.pipeline.run`.
    folder : str or Path
        Results folder; an existing one is replaced only after the new one is complete, and
        only when it is an earlier results folder of regional (else InputError, see
        :func:`regional.io.check_output_folder`).
    figures : bool, default True
        Draw the figures and the report (False: tables and layers only).
    executor : optional
        Where the figures are drawn (:mod:`regional.compute`): default in this process, one
        at a time; on a cluster each figure is a task (:func:`start_figures`) and the tables
        and layers are built here meanwhile.

    Returns
    -------
    Path
        The results folder.
    """
    folder = _checked(result, folder, update=False)
    now = _now()
    result = replace(result, stages={stage: now for stage in _stages_present(result)})
    images = report = None
    if figures:
        # started now, taken once the tables and layers are written: on a cluster the workers
        # draw meanwhile; in process one figure at a time (drawn, rendered to PNG, written,
        # dropped); the report then embeds them one at a time from their files
        images = start_figures(result, executor)
        report = partial(report_pieces, result)
    return io.write_run_folder(
        Path(folder),
        tables=table_builders(result),
        layers=layer_builders(result),
        crs=result.region.basins.crs,
        figures=images or {},
        report=report,
        manifest=run_manifest(result),
        files=fitted_region_files(result),
    )


def start_figures(result: RunResult, executor=None) -> Callable[[], Iterator[tuple[str, bytes]]]:
    """Start drawing every figure of a run; the returned call gives their PNG images as
    (figure name, bytes) pairs, in report order.

    In this process (no executor, or an in-process one) each figure is drawn as its pair is
    taken, from the run itself (drawn, rendered, handed on: one figure in memory). On a
    cluster every figure is a task: the run without its daily series is scattered once and
    each task receives the daily series its figure reads (:mod:`regional.report.jobs`), so
    the workers draw while the caller goes on; the call gives each image when it is taken
    (the client holds one at a time).
    """
    executor = executor if executor is not None else InProcessExecutor()
    jobs = figure_jobs(result)
    if executor.name != "dask":
        return partial(_drawn_here, jobs, result)
    names = [job.name for job in jobs]
    jobs = sorted(jobs, key=lambda job: -job.panels)  # the costliest first (stable)
    # each job's series as built on the workers where they stayed there (regional.kept)
    chunks = [[(job, series_parts(job, result))] for job in jobs]
    takers = executor.start_each(draw_jobs, chunks, without_series(result))
    taken = {job.name: take for job, take in zip(jobs, takers, strict=True)}

    def images() -> Iterator[tuple[str, bytes]]:
        # each image fetched as it is written: the client holds one at a time
        return ((name, taken.pop(name)()[0]) for name in names)

    return images


def _drawn_here(jobs: list, result: RunResult) -> Iterator[tuple[str, bytes]]:
    for job in jobs:
        [png] = draw_jobs([(job, None)], result)
        yield job.name, png


def fitted_region_files(result: RunResult) -> dict[str, io.ExtraFile]:
    """The ``fitted/`` files of a run (empty without a fitted region): see docs/outputs.md."""
    if result.fitted is None:
        return {}
    meta, tables = fitted_files(result.fitted)
    return {META: meta, **tables}


def update_stage_outputs(result: RunResult, folder: str | Path, *, stage: str) -> Path:
    """Write the files of one stage (``"prediction"`` or ``"screening"``) into ``folder``.

    ``folder`` must hold an earlier full run (its ``run.json``). The other files of that run
    are kept; each file written is replaced atomically. The report is rebuilt (the figures of
    the other stages read back from the folder) and ``run.json`` updated, so both state the
    prediction level in force and when each stage wrote the folder.
    """
    folder = _checked(result, folder, update=True)
    previous = io.read_manifest(folder) or {}
    stages = dict(previous.get("stages", {})) | {stage: _now()}
    result = replace(result, stages=stages)
    if stage == "prediction":
        tables = prediction_tables(result.prediction, result.region)
        tables |= statistics_tables(result)
        tables["loo_summary.csv"] = loo_summary(result)
        layers = {
            "ungauged": prediction_layer(result.prediction, result.region, result.statistics)
        }
        drawn = plots.prediction_figures(result)
    elif stage == "screening":
        screening = with_basin_columns(result.screening.table, result.region)
        tables = {"screening.csv": screening.reset_index()}
        layers = {"screening": with_geometry(screening, result.region.basins)}
        drawn = {"screening": plots.screening_bars(result)}
    else:
        raise ValueError(f"unknown stage {stage!r}: 'prediction' or 'screening'")
    images = {name: io.figure_png(figure) for name, figure in drawn.items()}
    report = render_report(result, io.read_figures(folder) | images)
    manifest = previous | _stage_manifest(result)
    return io.update_run_folder(
        Path(folder),
        tables=tables,
        layers=layers,
        crs=result.region.basins.crs,
        figures=images,
        report=report,
        manifest=manifest,
        files=fitted_region_files(result),
    )


def update_reused_outputs(
    folder: str | Path,
    region: Region,
    *,
    prediction: Prediction | None = None,
    screening: Screening | None = None,
) -> Path:
    """Write a stage computed from the stored fitted region into its results folder.

    The inputs and settings are those the folder's run was fitted from, so the stage's tables
    are those the run wrote (rewritten, byte for byte the same); the layers, report, figures
    and the statistics (from the run's leave-one-out) stay as they are; ``run.json`` records
    when the stage ran and that it reused the fitted region.
    """
    folder = Path(folder)
    previous = io.read_manifest(folder) or {}
    stages = dict(previous.get("stages", {}))
    reused = set((previous.get("reused_fitted_region") or {}).get("stages", []))
    tables: dict[str, pd.DataFrame] = {}
    if prediction is not None:
        tables |= prediction_tables(prediction, region)
        stages["prediction"] = _now()
        reused.add("prediction")
    if screening is not None:
        tables["screening.csv"] = with_basin_columns(screening.table, region).reset_index()
        stages["screening"] = _now()
        reused.add("screening")
    reused = {"folder": str(folder / FOLDER), "stages": sorted(reused)}
    return io.update_run_folder(
        folder,
        tables=tables,
        layers={},
        crs=region.basins.crs,
        figures={},
        manifest=previous | {"stages": stages, "reused_fitted_region": reused},
    )


def _checked(result: RunResult, folder: str | Path, *, update: bool) -> Path:
    """The folder, refused when a run must not write there (docs/outputs.md)."""
    settings = result.settings
    return io.check_output_folder(
        folder, inputs=settings.input_paths(), region_folder=settings.folder, update=update
    )


def _now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")


def _stages_present(result: RunResult) -> list[str]:
    stages = ["run"]
    stages += ["prediction"] if result.prediction is not None else []
    return stages + (["screening"] if result.screening is not None else [])


# --------------------------------------------------------------------------------------------
# Tables


def result_tables(result: RunResult) -> dict[str, pd.DataFrame]:
    """CSV tables by file name (index not written unless it is ``basin_id``)."""
    return {name: build() for name, build in table_builders(result).items()}


def table_builders(result: RunResult) -> dict[str, Callable[[], pd.DataFrame]]:
    """The calls building each CSV table of :func:`result_tables`, by file name: the results
    folder is written one table at a time, none built before its turn (a large region's
    client holds one table, not all of them)."""
    builders = {
        "loo_scores.csv": partial(_loo_scores, result),
        "loo_summary.csv": partial(loo_summary, result),
        "regression_coefficients.csv": partial(_coefficients, result),
        "calibration.csv": partial(_calibration, result),
    }
    if any(run.donor_counts is not None for run in result.runs.values()):
        builders["donor_counts.csv"] = partial(donor_counts, result)
    if result.prediction is not None:
        builders |= _prediction_builders(result.prediction, result.region)
    builders |= _statistics_builders(result)
    if result.screening is not None:
        builders["screening.csv"] = partial(_screening_table, result)
    return builders


def _given(table: pd.DataFrame) -> pd.DataFrame:
    return table


def _screening_table(result: RunResult) -> pd.DataFrame:
    return with_basin_columns(result.screening.table, result.region).reset_index()


def statistics_tables(result: RunResult) -> dict[str, pd.DataFrame]:
    """``statistics_loo.csv``, ``statistics_summary.csv`` and, with ungauged basins,
    ``statistics_ungauged.csv`` (see docs/statistics.md); none without statistics."""
    return {name: build() for name, build in _statistics_builders(result).items()}


def _statistics_builders(result: RunResult) -> dict[str, Callable[[], pd.DataFrame]]:
    statistics = result.statistics
    if statistics is None:
        return {}
    builders = {
        "statistics_loo.csv": partial(_given, statistics.loo),
        "statistics_summary.csv": partial(statistics.summary.assign, level=statistics.level),
    }
    if len(statistics.ungauged):
        builders["statistics_ungauged.csv"] = partial(
            statistics.ungauged.assign, level=statistics.level
        )
    return builders


def donor_counts(result: RunResult) -> pd.DataFrame | None:
    """Median leave-one-out skill per model, donor method and donor count; None when fixed."""
    parts = [
        run.donor_counts.assign(model=model)
        for model, run in result.runs.items()
        if run.donor_counts is not None
    ]
    if not parts:
        return None
    table = pd.concat(parts, ignore_index=True)
    first = ["model", "method", "n_donors"]
    return table[first + [c for c in table.columns if c not in first]]


def prediction_tables(prediction: Prediction, region: Region) -> dict[str, pd.DataFrame]:
    """``flows_ungauged.csv``, ``parameters_ungauged.csv`` and ``coverage.csv``."""
    return {name: build() for name, build in _prediction_builders(prediction, region).items()}


def _prediction_builders(prediction: Prediction, region: Region) -> dict[str, Callable]:
    return {
        "flows_ungauged.csv": partial(flow_parts, prediction),
        "parameters_ungauged.csv": partial(_parameters_table, prediction, region),
        "coverage.csv": partial(_given, prediction.coverage),
    }


def _parameters_table(prediction: Prediction, region: Region) -> pd.DataFrame:
    return with_basin_columns(with_level(prediction.table, prediction.level), region).reset_index()


def _loo_scores(result: RunResult) -> pd.DataFrame:
    columns = ["basin_id", "method", *SCORE_NAMES, "model"]
    return result.scores[columns]


def loo_summary(result: RunResult) -> pd.DataFrame:
    """The per-method summary with the leave-one-out coverage of the bounds when known."""
    summary = result.summary.copy()
    coverage = getattr(result.prediction, "coverage", None)
    if coverage is not None and len(coverage):
        summary = summary.merge(
            coverage[["model", "method", "coverage", "level"]], on=["model", "method"], how="left"
        )
    first = ["method", "model"]
    return summary[first + [c for c in summary.columns if c not in first]]


def _coefficients(result: RunResult) -> pd.DataFrame:
    parts = [
        run.regression.coefficients_.assign(
            model=model,
            r2=run.regression.coefficients_["parameter"].map(run.regression.r2_),
            adj_r2=run.regression.coefficients_["parameter"].map(run.regression.adj_r2_),
            rse=run.regression.coefficients_["parameter"].map(run.regression.rse_),
        )
        for model, run in result.runs.items()
    ]
    return pd.concat(parts, ignore_index=True)


def _calibration(result: RunResult) -> pd.DataFrame:
    parts = [run.calibration.assign(model=model) for model, run in result.runs.items()]
    return with_basin_columns(pd.concat(parts), result.region).reset_index()


# --------------------------------------------------------------------------------------------
# Layers


def result_layers(result: RunResult) -> dict[str, gpd.GeoDataFrame]:
    """GeoPackage layers: ``gauged``, and ``ungauged`` / ``screening`` when they exist."""
    return {name: build() for name, build in layer_builders(result).items()}


def layer_builders(result: RunResult) -> dict[str, Callable[[], gpd.GeoDataFrame]]:
    """The calls building each layer of :func:`result_layers`, by name (built in turn)."""
    builders = {"gauged": partial(_gauged_layer, result)}
    if result.prediction is not None:
        builders["ungauged"] = partial(
            prediction_layer, result.prediction, result.region, result.statistics
        )
    if result.screening is not None:
        builders["screening"] = partial(_screening_layer, result)
    return builders


def _screening_layer(result: RunResult) -> gpd.GeoDataFrame:
    screening = with_basin_columns(result.screening.table, result.region)
    return with_geometry(screening, result.region.basins)


def prediction_layer(
    prediction: Prediction, region: Region, statistics: object | None = None
) -> gpd.GeoDataFrame:
    """The ``ungauged`` layer of ``results.gpkg`` (with the statistics' ``stat_`` columns when
    given)."""
    table = with_basin_columns(with_level(prediction.table, prediction.level), region)
    if statistics is not None and len(statistics.ungauged):
        table = table.join(statistics.ungauged_wide().add_prefix("stat_"))
    return with_geometry(table, region.basins)


def _gauged_layer(result: RunResult) -> gpd.GeoDataFrame:
    region = result.region
    gauged = [*region.gauged, *region.donor_only]  # donor-only rows: no scores
    several = len(result.runs) > 1
    table = with_basin_columns(region.attributes.loc[gauged, list(result.attributes)], region)
    for model, run in result.runs.items():
        suffix = f"_{model}" if several else ""
        calibration = run.calibration.drop(columns=["objective"]).add_suffix(suffix)
        table = table.join(calibration)
        scores = run.loo.scores.pivot(index="basin_id", columns="method", values=["nse", "kge"])
        for method in run.loo.methods:
            if method == CALIBRATED:
                continue
            table[f"loo_nse_{method}{suffix}"] = scores[("nse", method)]
            table[f"loo_kge_{method}{suffix}"] = scores[("kge", method)]
    if result.statistics is not None:
        table = table.join(result.statistics.gauged_wide().add_prefix("stat_"))
    return with_geometry(table, region.basins)


# --------------------------------------------------------------------------------------------
# Manifest


def run_manifest(result: RunResult) -> dict[str, Any]:
    """``run.json``: the ownership marker (``tool``, ``format``, added by :mod:`regional.io`),
    input checksums, settings, software versions, timings, when each stage wrote the folder,
    the prediction level in force and the basins treated as ungauged."""
    settings = result.settings
    return {
        "regional": __version__,
        "region": settings.region.name,
        "inputs": io.file_checksums(settings.input_paths()),
        "settings": _plain(settings),
        "chosen": {"model": result.chosen_model, "method": result.chosen_method},
        "counts": {"gauged": len(result.region.gauged), "ungauged": len(result.region.ungauged)},
        "user_parameters": _user_parameters(result),
        "software": software_versions(),
        "timings_s": {stage: round(seconds, 3) for stage, seconds in result.timings.items()},
        **_stage_manifest(result),
        "warnings": list(result.warnings),
    }


def _stage_manifest(result: RunResult) -> dict[str, Any]:
    """The manifest entries a stage update rewrites."""
    prediction = result.prediction
    return {
        "stages": dict(result.stages),
        "prediction": None
        if prediction is None
        else {
            "level": prediction.level,
            "model": prediction.model,
            "method": prediction.method,
        },
        "settings": _plain(result.settings),
        "constant_flow_ungauged": list(result.region.constant_flow),
        "warnings": list(result.warnings),
    }


def _user_parameters(result: RunResult) -> dict[str, Any] | None:
    """The user's parameter table, the gauged basins whose parameters came from it, and the
    basins without flow that serve as donors only."""
    table = result.settings.model.parameters
    if table is None:
        return None
    return {
        "table": str(table),
        "basins": list(result.region.user_parameter_basins),
        "donor_only": list(result.region.donor_only),
    }


def _plain(value: Any) -> Any:
    """Settings dataclasses -> JSON-ready dicts (paths and dates as text)."""
    if is_dataclass(value):
        return {f.name: _plain(getattr(value, f.name)) for f in fields(value)}
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, Path | pd.Timestamp):
        return str(value.date()) if isinstance(value, pd.Timestamp) else str(value)
    if value is None or isinstance(value, bool | int | float | str):
        return value
    return str(value)
