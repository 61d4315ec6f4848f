"""Estimates at ungauged basins: parameters with intervals, daily flow with bounds, statistics.

:func:`predict_ungauged` is the entry point. For every ungauged basin it gives

- the parameters of every transfer method (and the median benchmark), refit on ALL gauged
  basins, with their intervals (regression: OLS prediction interval; donor methods: the donors'
  range; median: the central range of the gauged parameters);
- the daily flow of the chosen (model, method), simulated exactly as in leave-one-out
  (:mod:`regional.crossval`), in mm/day and m3/s, with bounds at a nominal level from the
  conformal error model of :mod:`regional.bounds`, checked on held-out basins
  (:mod:`regional.heldout`) and measured in leave-one-out (:mod:`regional.coverage`);
- flow statistics (:func:`regional.flowstats.headline_statistics`) and the applicability
  checks of :mod:`regional.applicability`.

See ``docs/prediction.md``.

References
----------
Hyndman, R. J., Fan, Y. (1996): Sample quantiles in statistical packages. Am. Stat. 50(4),
361-365.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional import flowstats
from regional.applicability import (
    FAILED_NSE,
    applicability,
    join_skill,
    local_error_models,
    transfer_skill,
    widened_bounds,
)
from regional.bounds import ConformalErrorModel
from regional.compute import InProcessExecutor, chunk_size, chunked
from regional.crossval import FoldContext
from regional.errors import InputError
from regional.fitted import FittedRegion, fit_result
from regional.kept import KeptBlocks, KeptTable
from regional.predicted import DailyFlows, Prediction
from regional.series import StoreReader, basins_of, shipped
from regional.transfer import Donation
from regional.transfer.step import fit_methods

if TYPE_CHECKING:  # pragma: no cover - annotations only; pipeline sits below this module
    from regional.region import Region
    from regional.result import RunResult

PREDICTION_CHUNK = 64
"""Target basins per prediction task (simulated, bounded and summarised together; fewer on a
cluster so that every worker gets several tasks)."""


def predict_ungauged(result: RunResult, *, level: float | None = None) -> Prediction:
    """Parameters, daily flows with bounds, statistics and applicability at ungauged basins.

    Parameters
    ----------
    result : RunResult
        From :func:`regional.pipeline.run` (calibration and leave-one-out done).
    level : float, optional
        Nominal level of the parameter intervals and flow bounds; default
        ``[prediction] level`` (0.9).

    Returns
    -------
    Prediction

    Raises
    ------
    InputError
        When the region has no ungauged basin, or the level is not in (0, 1).
    """
    return predict_region(fit_result(result, level=level), result.region)


def predict_region(
    fitted: FittedRegion,
    region: Region,
    *,
    executor=None,
    reader: StoreReader | None = None,
    chunk_basins: int | None = None,
    keep: bool = False,
) -> Prediction:
    """Estimates at the region's ungauged basins from a fitted region (no calibration).

    ``executor``, ``reader``, ``chunk_basins`` and ``keep`` are as in :func:`predict_sites`.

    Raises
    ------
    InputError
        When the region has no ungauged basin.
    """
    targets = list(region.ungauged)
    if not targets:
        raise InputError(
            "the region has no ungauged basin to predict: every basin has observed flow in the "
            "calibration period; add basins without flow to the basins layer"
        )
    return predict_sites(
        fitted,
        region.attributes.loc[targets],
        precip_mm=basins_of(region.precip_mm, targets),
        pet_mm=basins_of(region.pet_mm, targets),
        temp_c=None if region.temp_c is None else basins_of(region.temp_c, targets),
        executor=executor,
        reader=reader,
        chunk_basins=chunk_basins,
        keep=keep,
    )


def predict_sites(
    fitted: FittedRegion,
    attributes: pd.DataFrame,
    *,
    precip_mm: pd.DataFrame,
    pet_mm: pd.DataFrame,
    temp_c: pd.DataFrame | None = None,
    executor=None,
    reader: StoreReader | None = None,
    chunk_basins: int | None = None,
    keep: bool = False,
) -> Prediction:
    """Estimates at target sites from a fitted region alone (no calibration, no refit of it).

    The transfers are fit once here; the targets are then simulated, bounded and summarised
    a chunk at a time (:func:`_sites_chunk`), in this process or as tasks of ``executor``.

    Parameters
    ----------
    fitted : FittedRegion
        From :func:`regional.fitted.fit_region`, or read back from a results folder.
    attributes : DataFrame
        Targets x attributes (the transfer attributes, coordinates for proximity, and
        ``area_km2``), indexed by site id.
    precip_mm, pet_mm : DataFrame
        Days x targets, mm/day, covering the fitted window.
    temp_c : DataFrame, optional
        Days x targets, degC; needed when the fitted region runs the snow store.
    executor : optional
        An executor of :mod:`regional.compute` (a Dask cluster: the chunks run as its tasks);
        default this process, chunk after chunk. The results are the same.
    reader : StoreReader, optional
        On a cluster, each task reads its targets' forcing over the fitted window from the
        series store instead of receiving it.
    chunk_basins : int, optional
        Targets per chunk; default :data:`PREDICTION_CHUNK`, fewer on a cluster so that every
        worker gets several tasks.
    keep : bool, default False
        With a Dask executor, leave the daily flows and bounds on the workers, one block per
        task (:attr:`Prediction.daily` then holds :class:`regional.kept.KeptTable` objects,
        fetched a few basins at a time where read): the executor must stay open while the
        prediction is used. Ignored in process.

    Returns
    -------
    Prediction
    """
    level = fitted.level
    targets = list(attributes.index)
    context = fitted.context(_of(precip_mm, targets), _of(pet_mm, targets), temp_c)
    donations, parameters, notes = _parameters_by_method(context, attributes, level)
    if fitted.method not in donations:
        raise InputError(
            f"[prediction] method {fitted.method!r} is not a transfer method; choose one "
            f"of {', '.join(map(repr, donations))}"
        )
    error_model = fitted.error_model
    area = attributes["area_km2"].astype(float)
    usable, local = _usable(fitted, context, attributes)
    job = _SitesJob.of(context, donations[fitted.method], error_model, area, fitted, local)
    flow_mm, low, high, statistics, model_statistics = _sites(
        job, targets, executor=executor, reader=reader, chunk_basins=chunk_basins, keep=keep
    )
    coverage = fitted.coverage
    table = _table(fitted, attributes, parameters, statistics, usable)
    return Prediction(
        model=fitted.model,
        method=fitted.method,
        level=level,
        table=table,
        daily=DailyFlows(flow_mm, low, high, area),
        coverage=coverage,
        error_model=error_model.table,
        notes=tuple(notes + _notes(fitted, error_model, coverage, usable) + list(fitted.notes)),
        held_out=fitted.held_out,
        held_out_draws=fitted.held_out_draws,
        model_statistics=model_statistics,
    )


def _usable(fitted: FittedRegion, context: FoldContext, attributes: pd.DataFrame):
    """The targets' applicability with the transfer skill near them, and the local error
    model of each target where transfer is known to fail (:func:`local_error_models`: its
    bounds are widened by the prediction's tasks)."""
    usable = applicability(context.attributes, attributes, fitted.attributes)
    skill = transfer_skill(
        context.attributes,
        attributes,
        fitted.loo_nse,
        columns=fitted.attributes,
        n_nearest=context.options.n_donors,
    )
    local = local_error_models(
        skill,
        observed=fitted.loo_observed,
        simulated=fitted.loo_simulated,
        error_model=fitted.error_model,
    )
    return join_skill(usable, skill), local


def _of(frame: pd.DataFrame, targets: list[str]) -> pd.DataFrame:
    """The targets' columns of a days x sites table, not copied when it holds just those."""
    return frame if list(frame.columns) == targets else frame[targets]


@dataclass(frozen=True)
class _SitesJob:
    """What a prediction task needs: the fold context of the fitted window (its daily tables
    travel in the four table fields: whole in process, or the task's targets read from the
    store), the chosen donation, the error model, the targets' areas, the evaluation days
    of the model route's statistics and the local error models of the targets where
    transfer is known to fail."""

    context: FoldContext
    donation: Donation
    error_model: ConformalErrorModel
    area_km2: pd.Series
    evaluation: pd.DatetimeIndex
    precip_mm: pd.DataFrame | None
    pet_mm: pd.DataFrame | None
    flow_mm: pd.DataFrame | None
    temp_c: pd.DataFrame | None
    local: Mapping[str, ConformalErrorModel]

    @classmethod
    def of(cls, context, donation, error_model, area_km2, fitted, local) -> _SitesJob:
        bare = replace(context, precip_mm=None, pet_mm=None, temp_c=None)
        return cls(
            bare,
            donation,
            error_model,
            area_km2,
            pd.DatetimeIndex(fitted.loo_observed.index),
            context.precip_mm,
            context.pet_mm,
            None,
            context.temp_c,
            local,
        )


@dataclass(frozen=True)
class _SitesPart:
    """A chunk's results: daily flow and regional bounds (days x targets, mm/day), headline
    statistics and the model route's statistics (targets x statistics)."""

    flow_mm: pd.DataFrame
    low_mm: pd.DataFrame
    high_mm: pd.DataFrame
    statistics: pd.DataFrame
    model_statistics: pd.DataFrame


def _sites_chunk(targets, job: _SitesJob) -> _SitesPart:
    """Simulate, bound and summarise some targets (one task)."""
    targets = list(targets)
    context = replace(job.context, precip_mm=job.precip_mm, pet_mm=job.pet_mm, temp_c=job.temp_c)
    flow = _chosen_flow(context, job.donation, targets)
    low, high = widened_bounds(flow, *job.error_model.bounds(flow), job.local)
    statistics = flowstats.headline_statistics(flow, area_km2=job.area_km2[targets])
    part = flow.loc[flow.index.isin(job.evaluation)]
    model = pd.DataFrame(index=pd.Index(targets, name="basin_id"))  # no evaluation day
    if len(part):
        precip = context.precip_mm.loc[part.index, targets]
        model = flowstats.statistics_frame(part, precip_mm_day=precip)
    return _SitesPart(flow, low, high, statistics, model)


def _sites(job: _SitesJob, targets, *, executor, reader, chunk_basins: int | None, keep: bool):
    """Every target's flow, bounds and statistics, a chunk at a time (a task each on a
    cluster): the grids and tables joined in target order (with ``keep`` on a cluster, the
    grids left on the workers: :func:`_kept_sites`)."""
    executor = executor or InProcessExecutor()
    size = chunk_basins or chunk_size(len(targets), PREDICTION_CHUNK, n_workers=executor.n_workers)
    chunks = _no_lone_basin(chunked(targets, max(2, size)))
    if keep and executor.name == "dask":
        return _kept_sites(job, chunks, executor, reader)
    task, shared = shipped(_sites_chunk, job, reader)
    dates = job.precip_mm.index[job.context.window.warmup_days :]
    grids = {name: np.empty((len(dates), len(targets))) for name in _DAILY}
    statistics, model, first = [], [], 0
    for chunk, part in zip(chunks, executor.imap(task, chunks, shared), strict=True):
        # each chunk's grids copied into the region's as it comes, then dropped: the chunks'
        # grids are never all held beside the joined ones
        for name in _DAILY:
            grids[name][:, first : first + len(chunk)] = getattr(part, name).to_numpy(float)
        statistics.append(part.statistics)
        model.append(part.model_statistics)
        first += len(chunk)
    columns = pd.Index(targets, name="basin_id")
    frames = [pd.DataFrame(grids.pop(n), index=dates, columns=columns, copy=False) for n in _DAILY]
    return (*frames, pd.concat(statistics), pd.concat(model).sort_index())


_DAILY = ("flow_mm", "low_mm", "high_mm")


def _kept_sites(job: _SitesJob, chunks, executor, reader):
    """:func:`_sites` whose daily grids stay on the workers, one block per task; the client
    gathers the statistics and holds a :class:`regional.kept.KeptTable` per grid."""
    task, shared = shipped(_kept_sites_chunk, job, reader)
    tables, futures = executor.map_keeping(task, chunks, shared)
    blocks = KeptBlocks.of(executor, futures, chunks)
    dates = job.precip_mm.index[job.context.window.warmup_days :]
    grids = [KeptTable(blocks, name, dates) for name in _DAILY]
    statistics = pd.concat([t[0] for t in tables])
    return (*grids, statistics, pd.concat([t[1] for t in tables]).sort_index())


def _kept_sites_chunk(targets, job: _SitesJob) -> tuple[tuple, dict]:
    """:func:`_sites_chunk` split into its statistics (for the client) and its daily grids as
    one block (basins x days, left on the worker: :class:`regional.kept.KeptBlocks`)."""
    part = _sites_chunk(targets, job)
    block = {name: getattr(part, name).to_numpy(dtype=float).T for name in _DAILY}
    return (part.statistics, part.model_statistics), {"basins": list(targets), **block}


def _no_lone_basin(chunks: list[list[str]]) -> list[list[str]]:
    """Chunks of at least two basins (unless there is one target in all): numpy sums a
    one-column grid in another order than a wider one, so a lone basin's bounds and
    statistics could differ in the last digit from those it gets beside others."""
    if len(chunks) > 1 and len(chunks[-1]) == 1:
        return [*chunks[:-2], chunks[-2] + chunks[-1]]
    return chunks


def _parameters_by_method(context: FoldContext, target_attributes, level):
    """Every method fit on the gauged basins, its donation to the targets and the targets'
    parameters with their intervals (method -> table)."""
    transforms = context.transforms
    estimators, notes = fit_methods(
        context.attributes,
        context.calibrated[list(transforms)],
        transforms=transforms,
        options=context.options,
        level=level,
    )
    donations, parameters = {}, {}
    for method, estimator in estimators.items():
        donation = estimator.donate(target_attributes)
        estimate = estimator.predict(target_attributes)
        donations[method] = donation
        parameters[method] = estimate.join(donation.intervals)
    return donations, parameters, notes


def _chosen_flow(context: FoldContext, donation: Donation, targets) -> pd.DataFrame:
    flow = context.donation_flows(donation, targets)
    warmup = context.window.warmup_days
    dates = context.precip_mm.index[warmup:]
    return pd.DataFrame(flow[warmup:], index=dates, columns=pd.Index(targets, name="basin_id"))


def _table(fitted, target_attributes, parameters: Mapping[str, pd.DataFrame], statistics, usable):
    names = list(fitted.parameters)
    index = pd.Index(target_attributes.index.astype(str), name="basin_id")
    parts = [target_attributes[list(fitted.attributes)].set_axis(index)]
    for method, frame in parameters.items():
        frame = frame.set_axis(index)
        columns = {}
        for name in names:
            columns[f"{name}_{method}"] = frame[name]
            columns[f"{name}_{method}_low"] = frame[f"{name}_low"]
            columns[f"{name}_{method}_high"] = frame[f"{name}_high"]
        parts.append(pd.DataFrame(columns, index=index))
    chosen = parameters[fitted.method].set_axis(index)
    picked = pd.DataFrame({"method": fitted.method}, index=index)
    for name in names:
        for suffix in ("", "_low", "_high"):
            picked[f"{name}{suffix}"] = chosen[f"{name}{suffix}"]
    parts += [
        picked,
        statistics[list(flowstats.STATISTIC_COLUMNS)],
        usable[
            [
                "applicable",
                "reason",
                "mahalanobis_d2",
                "nearest_donor_distance",
                "nearest_loo_nse",
                "bounds_from",
            ]
        ],
    ]
    return pd.concat(parts, axis=1)


def _notes(fitted, error_model: ConformalErrorModel, coverage, usable) -> list[str]:
    level = fitted.level
    notes = []
    chosen = coverage[(coverage["model"] == fitted.model) & (coverage["method"] == fitted.method)]
    if len(chosen):
        row = chosen.iloc[0]
        notes.append(
            f"daily bounds at nominal {level:.0%} from the leave-one-out errors of "
            f"{fitted.method} ({error_model.n_basins} basins, {error_model.n_classes} "
            f"flow class(es), log offset {error_model.offset_fraction:.0%} of each basin's mean "
            f"flow); measured leave-one-out coverage {row['coverage']:.1%} over "
            f"{int(row['n_basins'])} basins"
        )
    flagged = usable.index[~usable["applicable"]]
    if len(flagged):
        listed = ", ".join(map(str, flagged[:5])) + (" ..." if len(flagged) > 5 else "")
        notes.append(
            f"{len(flagged)} of {len(usable)} ungauged basins lie outside what the gauged basins "
            f"support ({listed}); treat their estimates as extrapolation (see 'reason')"
        )
    failing = usable.index[~usable["skill_applicable"]]
    if len(failing):
        listed = ", ".join(map(str, failing[:5])) + (" ..." if len(failing) > 5 else "")
        notes.append(
            f"transfer is known to fail where {len(failing)} ungauged basin(s) lie ({listed}): "
            "their climate lies outside the range where leave-one-out scored NSE > "
            f"{FAILED_NSE:g}, or transfer failed at their nearest gauged basins; their bounds "
            "carry those basins' leave-one-out errors (column 'bounds_from'); do not use their "
            "estimates without a gauging campaign"
        )
    if (~np.isfinite(error_model.lower_q)).any() or (~np.isfinite(error_model.upper_q)).any():
        notes.append(
            f"too few gauged basins for finite {level:.0%} bounds in some flow classes; add "
            "gauged basins or lower [prediction] level"
        )
    return notes
