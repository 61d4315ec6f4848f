"""``run(settings)``: the chain from a region folder to results, and nothing else.

inputs -> region (checked, attributes) -> calibration per model -> leave-one-out of every
transfer method -> prediction at ungauged basins -> screening of candidate gauge sites. Writing
the outputs is :func:`regional.outputs.write_outputs`; the CLI only calls these two.
"""

from __future__ import annotations

import logging
import time
import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, replace
from pathlib import Path

import pandas as pd

from regional import io
from regional.calibrate import Window, calibrate, scoring_window
from regional.compute import (
    TASKS_PER_WORKER,
    chunk_size,
    make_executor,
    release_freed_memory,
    tapered,
)
from regional.config import Settings, load_settings
from regional.crossval import (
    CALIBRATED,
    FoldContext,
    TransferOptions,
    best_method,
    choose_donor_counts,
    leave_one_out,
    summarise,
    with_donor_counts,
)
from regional.errors import InputError, InputWarning
from regional.fitted import FittedRegion, fit_region
from regional.models import get_model, parameter_transforms
from regional.overlap import excluded_donors, overlap_shares
from regional.predict import PREDICTION_CHUNK, predict_region
from regional.region import Region, load_region, transfer_attribute_names
from regional.result import ModelRun, RunResult
from regional.screen import screen_region
from regional.series import StoreReader, shipped, store_reader
from regional.statroutes import GaugedStatistics, estimate_statistics
from regional.transfer import RegressionTransfer, fit_transfer

logger = logging.getLogger(__name__)

CALIBRATION_CHUNK = 16
"""Basins per calibration task handed to the executor (``[compute] chunk_basins`` overrides)."""
CALIBRATION_TASKS_PER_WORKER = 8
"""Least calibration tasks per worker on a cluster: its tasks are long (GR4J about 0.15 s per
basin), and while one worker runs the stage's last task the other may idle, so they are cut
twice as fine as other stages' (10 basins per task for 150 basins on 2 workers, not 16)."""
LOO_CHUNK = 8
"""Target basins per leave-one-out task (``[compute] chunk_basins`` overrides)."""
KEEP_ON_WORKERS_FROM = 1000
"""Basins (gauged and ungauged) from which a cluster's daily results (leave-one-out flows,
held-out summaries, the prediction's grids) stay on its workers when the caller keeps the
executor open (:mod:`regional.kept`). Below it the client gathers them: about 0.2 MB per basin
over 20 years, 200 MB at this size, while keeping them costs the workers extra work (the
tasks that need a whole grid gather its blocks) and cost the 200-basin GR4J chain of
``benchmarks/cluster_speedup.py`` about a tenth of its speed-up (docs/scale.md)."""

Progress = Callable[[str, int, int], None] | None


WORKER_MODULES = ("regional.pipeline", "regional.outputs")
"""Imported by every worker of a cluster as it starts (the tasks' functions live there), so
the first tasks do not pay the imports."""


def open_executor(settings: Settings, *, scheduler: str | None = None, workers: int | None = None):
    """The executor a run's settings ask for (:func:`regional.compute.make_executor`):
    in-process, or a Dask cluster whose workers import the chain's modules as they start.

    Parameters
    ----------
    settings : Settings
        ``[compute]`` gives the scheduler, the worker count and the connection wait.
    scheduler : str, optional
        Dask scheduler address; overrides ``[compute] scheduler``.
    workers : int, optional
        Start a local Dask cluster of this many worker processes; overrides
        ``[compute] workers``.
    """
    return make_executor(
        scheduler or settings.compute.scheduler,
        workers=workers or settings.compute.workers,
        connect_timeout_s=settings.compute.connect_timeout_s,
        worker_modules=WORKER_MODULES,
    )


def run(
    source: str | Path | Settings,
    *,
    scheduler: str | None = None,
    workers: int | None = None,
    progress: Progress = None,
    executor=None,
) -> RunResult:
    """Run the whole chain on a region.

    Parameters
    ----------
    source : str, Path or Settings
        Region folder, its ``region.toml``, or loaded settings.
    scheduler : str, optional
        Dask scheduler address; overrides ``[compute] scheduler``.
    workers : int, optional
        Start a local Dask cluster of this many worker processes; overrides
        ``[compute] workers``.
    progress : callable(stage, done, total), optional
        Called as basins complete in the stages ``calibration <model>`` and
        ``leave-one-out <model>``.
    executor : optional
        An executor opened by the caller (:func:`open_executor`), used instead of
        ``scheduler`` and ``workers`` and left open (e.g. to draw the figures on the same
        cluster with :func:`regional.outputs.write_outputs`); the caller closes it. A Dask
        executor given so keeps the daily results of a region of
        :data:`KEEP_ON_WORKERS_FROM` basins or more on its workers (:mod:`regional.kept`):
        keep it open while the result is used.

    Returns
    -------
    RunResult
    """
    settings = source if isinstance(source, Settings) else load_settings(source)
    timings: dict[str, float] = {}
    own = executor is None
    if own:
        executor = open_executor(settings, scheduler=scheduler, workers=workers)
    try:
        with _timed(timings, "region"):
            # on a cluster the daily tables stay in a series store: the tasks read their own
            region = load_region(settings, series_in_store=executor.name == "dask")
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", InputWarning)
            keep = not own and len(region.basins) >= KEEP_ON_WORKERS_FROM
            if keep and executor.name == "dask":
                executor.hold_little()  # the client runs no kernels; what it frees goes back
            stages = _chain(settings, region, executor, progress, timings, keep=keep)
    finally:
        if own:
            executor.close()
    messages = list(region.warnings) + [
        str(w.message) for w in caught if issubclass(w.category, InputWarning)
    ]
    for run_ in stages["runs"].values():
        messages += list(run_.loo.warnings)
    for stage in ("prediction", "statistics", "screening"):
        messages += list(getattr(stages[stage], "notes", ()))
    messages += _user_parameter_notes(region)
    return RunResult(
        settings=settings,
        region=region,
        **stages,
        warnings=tuple(dict.fromkeys(messages)),
        timings=timings,
    )


def _user_parameter_notes(region: Region) -> list[str]:
    given, donors = region.user_parameter_basins, region.donor_only
    notes = []
    if given:
        notes.append(
            f"parameters of {len(given)} of {len(region.gauged)} gauged basins come from the "
            f"user's table {region.settings.model.parameters} ([model] parameters), not from "
            f"calibration: {_shown(given)}; their own-calibration scores are the scores of "
            "those parameters ('parameters_from' in calibration.csv)"
        )
    if donors:
        notes.append(
            f"{len(donors)} basins have parameters in the user's table "
            f"{region.settings.model.parameters} but no observed flow in the calibration "
            f"period: {_shown(donors)}; they serve as donors of parameter transfer "
            "(regression rows, similarity and proximity donors) in leave-one-out, prediction "
            "and screening, but are not scored, never a leave-one-out target, not in the "
            "error model of the bounds and not estimated ('parameters_from' = user with "
            "empty scores in calibration.csv)"
        )
    return notes


@contextmanager
def _timed(timings: dict[str, float], name: str) -> Iterator[None]:
    """Time the block into ``timings[name]`` (s); then give the heap pages it freed back to
    the system (:func:`regional.compute.release_freed_memory`), so that what one stage freed
    is not resident through the next."""
    clock = time.perf_counter()
    yield
    timings[name] = time.perf_counter() - clock
    release_freed_memory()


def _shown(basins: tuple[str, ...]) -> str:
    more = f" and {len(basins) - 10} more" if len(basins) > 10 else ""
    return ", ".join(basins[:10]) + more


def _chain(settings, region, executor, progress, timings, *, keep: bool) -> dict:
    """Every stage after loading the region: the fields of the :class:`RunResult`. ``keep``:
    the executor outlives the run, so a cluster's leave-one-out flows may stay on its
    workers (:mod:`regional.kept`)."""
    attributes = transfer_attributes(region, settings)
    runs = _model_runs(settings, region, attributes, executor, progress, timings, keep=keep)
    scores = pd.concat([r.loo.scores.assign(model=m) for m, r in runs.items()], ignore_index=True)[
        ["basin_id", "model", *runs[settings.model.names[0]].loo.scores.columns[1:]]
    ]
    summary = summarise(scores)
    model, method = _choose(summary, settings)
    # the flow statistics' gauged part is built while the held-out check runs
    early = _EarlyStatistics(runs[model], method, region, tuple(attributes))
    with _timed(timings, "fitted_region"):
        fitted = fit_region(
            runs,
            model=model,
            method=method,
            attributes=attributes,
            settings=settings,
            basins=region.basins,
            inputs=io.file_checksums(settings.input_paths()),
            meanwhile=early,
            **_held_out_compute(runs[model], region, settings, executor),
        )
    fitted = _without_draws(fitted)  # the statistics were given each repeat as it came back
    prediction = screening = None
    if region.ungauged:
        with _timed(timings, "prediction"):
            prediction = predict_region(
                fitted,
                region,
                executor=executor,
                reader=_prediction_reader(fitted, region, executor),
                chunk_basins=_chunk_basins(
                    settings, PREDICTION_CHUNK, n_basins=len(region.ungauged), executor=executor
                ),
                keep=keep,
            )
    with _timed(timings, "statistics"):
        statistics = _statistics(runs[model], method, region, attributes, prediction, early)
    if region.ungauged:
        with _timed(timings, "screening"):
            screening = screen_region(fitted, region)
    return {
        "attributes": attributes,
        "runs": runs,
        "scores": scores,
        "summary": summary,
        "chosen_model": model,
        "chosen_method": method,
        "prediction": prediction,
        "screening": screening,
        "statistics": statistics,
        "fitted": fitted,
    }


def _without_draws(fitted: FittedRegion) -> FittedRegion:
    """The fitted region without the held-out check's repeats: their flows and error-model
    tails (about 22 bytes per gauged basin and evaluation day) serve the flow statistics
    only, which the run gives each repeat as it comes back (:class:`_EarlyStatistics`), so
    they are dropped as soon as the fitted region is made (the prediction, which copies
    them, then has none either)."""
    return replace(fitted, held_out_draws=())


def _model_runs(settings, region, attributes, executor, progress, timings, *, keep) -> dict:
    """Calibration and leave-one-out of every storage model of ``[model] name``."""
    window = scoring_window(
        region.dates,
        region.calibration,
        settings.model.validation,
        warmup_days=settings.model.warmup_days,
    )
    excluded = _excluded(region, settings)
    runs = {}
    for model in settings.model.names:
        with _timed(timings, f"calibration_{model}"):
            calibration = _calibrate(model, region, settings, window, executor, progress)
        clock = time.perf_counter()
        context = _fold_context(model, region, settings, window, calibration, attributes, excluded)
        chunk = _chunk_basins(settings, LOO_CHUNK, n_basins=len(calibration), executor=executor)
        part = region.dates[window.start : window.stop]
        reader = _store_reader(region, settings, executor, part)
        counts = choose_donor_counts(
            context,
            executor=executor,
            progress=_stage(progress, f"donor count {model}"),
            chunk_basins=chunk,
            reader=reader,
        )
        if counts is not None:
            context = with_donor_counts(context, counts.chosen)
        stage = _stage(progress, f"leave-one-out {model}")
        loo = leave_one_out(
            context,
            executor=executor,
            progress=stage,
            chunk_basins=chunk,
            reader=reader,
            keep=keep,
        )
        regression = _regression_on_all(context, attributes)
        timings[f"leave_one_out_{model}"] = time.perf_counter() - clock
        release_freed_memory()
        runs[model] = ModelRun(
            model,
            calibration,
            loo,
            regression,
            context,
            donor_counts=None if counts is None else counts.table,
        )
    return runs


def _held_out_compute(run: ModelRun, region: Region, settings: Settings, executor) -> dict:
    """On a cluster the held-out check's repeats run as tasks (reading the series store when
    the series come from one); in process they run here."""
    if executor.name != "dask":
        return {}
    window = run.context.window
    part = region.dates[window.start : window.stop]
    reader = _store_reader(region, settings, executor, part)
    return {"executor": executor, "reader": reader}


def _prediction_reader(fitted, region: Region, executor) -> StoreReader | None:
    """On a cluster with a series store, prediction tasks read their targets' forcing over the
    fitted window from it."""
    dates = region.dates[(region.dates >= fitted.first_day) & (region.dates <= fitted.last_day)]
    return _store_reader(region, region.settings, executor, dates)


def _chunk_basins(
    settings: Settings,
    default: int,
    *,
    n_basins: int,
    executor,
    tasks_per_worker: int = TASKS_PER_WORKER,
) -> int:
    """Basins per task: ``[compute] chunk_basins`` when set, else the stage's default, made
    smaller on a cluster so that every worker gets ``tasks_per_worker`` tasks or more
    (:func:`chunk_size`)."""
    if settings.compute.chunk_basins:
        return settings.compute.chunk_basins
    workers = getattr(executor, "n_workers", 1)
    return chunk_size(n_basins, default, n_workers=workers, tasks_per_worker=tasks_per_worker)


@dataclass
class _EarlyStatistics:
    """The flow statistics' routes at the gauged basins (:class:`GaugedStatistics`), built
    when :func:`fit_region` calls it (``meanwhile``: while a cluster's workers run the
    held-out check) and given the check's repeats as they come back when the region has
    ungauged basins (without, the statistics have no held-out check, as before)."""

    run: ModelRun
    method: str
    region: Region
    attributes: tuple[str, ...]
    gauged: GaugedStatistics | None = None

    def __call__(self):
        settings = self.region.settings.prediction
        self.gauged = GaugedStatistics(
            self.run,
            self.method,
            self.region,
            attributes=self.attributes,
            level=settings.level,
            route=settings.statistics_route,
        )
        return self.gauged.add_held_out if self.region.ungauged else None


def _statistics(
    run: ModelRun, method: str, region: Region, attributes, prediction, early: _EarlyStatistics
):
    """Flow statistics by every route in leave-one-out, bounded at the ungauged basins (the
    gauged part built early, ``early``)."""
    settings = region.settings.prediction
    model, applicable = None, None
    if prediction is not None:
        model = prediction.model_statistics
        applicable = prediction.table["applicable"]
    return estimate_statistics(
        run,
        method,
        region,
        None,
        ungauged_model=model,
        attributes=attributes,
        level=settings.level,
        route=settings.statistics_route,
        applicable=applicable,
        gauged=early.gauged,
    )


def _stage(progress: Progress, name: str):
    if progress is None:
        return None
    return lambda done, total: progress(name, done, total)


def transfer_attributes(region: Region, settings: Settings) -> tuple[str, ...]:
    """Attribute columns for regression and similarity (checked finite at every basin when the
    region was loaded): the config's ``[transfer] attributes`` when given; else every numeric
    attribute except those that need observed flow (``runoff_ratio``) and the coordinates."""
    return transfer_attribute_names(settings, region.attributes)


def _excluded(region: Region, settings: Settings) -> dict[str, frozenset[str]]:
    if region.is_point:
        return {}
    return excluded_donors(overlap_shares(region.basins), settings.transfer.exclude_overlap)


def use_temperature(region: Region, settings: Settings) -> pd.DataFrame | None:
    """The temperature table when the snow store is on, else None."""
    has_temp = region.temp_c is not None
    return region.temp_c if settings.model.use_snow(has_temperature=has_temp) else None


def fixed_parameters(settings: Settings, *, snow: bool) -> dict[str, float]:
    """Snow parameters set in the config (the others keep their defaults); none without snow."""
    if not snow:
        return {}
    names = ("snow_threshold_c", "melt_threshold_c", "melt_factor_mm_per_degc_day")
    values = {name: getattr(settings.model, name) for name in names}
    return {name: float(value) for name, value in values.items() if value is not None}


@dataclass(frozen=True)
class _CalibrationJob:
    model: str
    precip_mm: pd.DataFrame
    pet_mm: pd.DataFrame
    temp_c: pd.DataFrame | None
    flow_mm: pd.DataFrame
    settings: Settings
    fixed: dict


def _calibrate_chunk(basins, job: _CalibrationJob) -> pd.DataFrame:
    model_settings = job.settings.model
    return calibrate(
        job.precip_mm[basins],
        job.pet_mm[basins],
        job.flow_mm[basins],
        model=job.model,
        temp_c=None if job.temp_c is None else job.temp_c[basins],
        objective=model_settings.objective,
        calibration=_period(job.settings, "calibration", job.flow_mm.index),
        validation=model_settings.validation,
        warmup_days=model_settings.warmup_days,
        initial_storage=model_settings.initial_storage_mm,
        fixed_params=job.fixed,
        basins=list(basins),
        search=model_settings.search,
    )


def _period(settings: Settings, name: str, dates: pd.DatetimeIndex):
    period = getattr(settings.model, name)
    return period if period is not None else (dates[0], dates[-1])


def _calibrate(model, region, settings, window: Window, executor, progress) -> pd.DataFrame:
    """Calibration table of ``model``: the user's parameters scored, the other basins searched.

    Basins of the user's parameter table (``[model] parameters``) are not calibrated: their
    given parameters are simulated and scored like a calibration result, so that leave-one-out
    compares like with like; ``parameters_from`` says which basins' parameters came from where.
    """
    get_model(model)
    temp = use_temperature(region, settings)
    job = _CalibrationJob(
        model=model,
        precip_mm=region.precip_mm,
        pet_mm=region.pet_mm,
        temp_c=temp,
        flow_mm=region.flow_mm,
        settings=settings,
        fixed=fixed_parameters(settings, snow=temp is not None),
    )
    given = region.user_parameter_basins
    searched = [basin for basin in region.gauged if basin not in set(given)]
    parts = []
    if searched:
        size = _chunk_basins(
            settings,
            CALIBRATION_CHUNK,
            n_basins=len(searched),
            executor=executor,
            tasks_per_worker=CALIBRATION_TASKS_PER_WORKER,
        )
        # the last tasks shorter on a cluster: GR4J basins differ in cost, and a long last
        # task would keep one worker busy while the other waits
        chunks = tapered(searched, size, n_workers=getattr(executor, "n_workers", 1))
        stage = _stage(progress, f"calibration {model}")
        reader = _store_reader(region, settings, executor, region.dates)
        task, shared = shipped(_calibrate_chunk, job, reader)
        found = executor.map(task, chunks, shared, progress=stage)
        parts = [part.assign(parameters_from="calibration") for part in found]
    names = [p.name for p in get_model(model).parameters]
    for basin in given:
        own = region.parameters.loc[basin, names].to_dict()
        scored = _calibrate_chunk([basin], replace(job, fixed={**job.fixed, **own}))
        parts.append(scored.assign(parameters_from="user"))
    table = pd.concat(parts).loc[list(region.gauged)]
    if not region.donor_only:
        return table
    return pd.concat([table, _donor_rows(region, names, job.fixed)])


def _donor_rows(region: Region, names: list[str], fixed: dict[str, float]) -> pd.DataFrame:
    """Calibration rows of the donor-only basins: the user's parameters (and the snow values
    held in the config), no score (no observed flow), ``parameters_from`` = user."""
    rows = region.parameters.loc[list(region.donor_only), names].assign(**fixed)
    rows.index.name = "basin_id"
    return rows.assign(parameters_from="user")


def _store_reader(region: Region, settings: Settings, executor, dates) -> StoreReader | None:
    """On a cluster, when the series file is a series store, tasks read their own basins."""
    if executor.name != "dask":
        return None
    area = region.attributes["area_km2"] if settings.series.flow_m3s is not None else None
    with_temp = use_temperature(region, settings) is not None
    return store_reader(settings, dates, with_temp=with_temp, area_km2=area)


def _fold_context(model, region, settings, window, calibration, attributes, excluded):
    part = slice(window.start, window.stop)
    temp = use_temperature(region, settings)
    fixed = fixed_parameters(settings, snow=temp is not None)
    names = list(parameter_transforms(model, snow=temp is not None, fixed=fixed))
    gauged = sorted(calibration.index)  # sorted once: every fold's training rows stay sorted
    calibration = calibration.loc[gauged]
    evaluation = window.validation if window.validation.any() else window.calibration
    return FoldContext(
        model=model,
        attributes=region.attributes.loc[gauged, _fold_columns(region, attributes)],
        calibrated=calibration[names],
        precip_mm=region.precip_mm.iloc[part],
        pet_mm=region.pet_mm.iloc[part],
        temp_c=None if temp is None else temp.iloc[part],
        flow_mm=region.flow_mm.iloc[part],
        window=window,
        evaluation=evaluation,
        options=_transfer_options(settings, attributes),
        excluded={b: d for b, d in excluded.items() if b in set(gauged)},
        fixed_params=fixed,
        initial_storage=settings.model.initial_storage_mm,
        donor_only=frozenset(region.donor_only),
    )


def _transfer_options(settings: Settings, attributes) -> TransferOptions:
    """One donor count, or candidate counts for leave-one-out to choose from."""
    donors = settings.transfer.donors
    choices = tuple(donors) if isinstance(donors, tuple) else ()
    return TransferOptions(
        methods=settings.transfer.methods,
        attributes=attributes,
        n_donors=max(choices) if choices else donors,
        power=settings.transfer.power,
        combine=settings.transfer.combine,
        donor_choices=choices,
    )


def _fold_columns(region: Region, attributes) -> list[str]:
    """Transfer attributes plus the coordinates proximity needs (nothing else travels)."""
    coordinates = [
        c
        for c in ("centroid_lon", "centroid_lat", "outlet_lon", "outlet_lat")
        if c in region.attributes.columns and c not in attributes
    ]
    return [*attributes, *coordinates]


def _regression_on_all(context: FoldContext, attributes) -> RegressionTransfer:
    transforms = context.transforms
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return fit_transfer(
            "regression",
            context.attributes,
            context.calibrated,
            transforms=transforms,
            attributes=list(attributes),
        )


def _choose(summary: pd.DataFrame, settings: Settings) -> tuple[str, str]:
    wanted_model, wanted_method = settings.prediction.model, settings.prediction.method
    rows = summary
    if wanted_model is not None:
        rows = rows[rows["model"] == wanted_model]
    if wanted_method is not None:
        picked = rows[rows["method"] == wanted_method]
        picked = picked.sort_values("median_nse", ascending=False)
        if picked.empty:
            raise InputError(
                f"[prediction] method '{wanted_method}' was not validated; add it to "
                "[transfer] methods"
            )
        return str(picked.iloc[0]["model"]), wanted_method
    best = best_method(rows[rows["method"] != CALIBRATED])
    return str(best["model"]), str(best["method"])
