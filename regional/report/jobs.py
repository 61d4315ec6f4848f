"""A run's figures as independent jobs, each drawn from the small part of the run it reads.

Figures are drawn where an executor runs them (:mod:`regional.compute`): in this process one
after another, or as tasks on the workers of a Dask cluster, which share neither the client's
memory nor its disk. What travels:

- once per worker, the run without its daily series (:func:`without_series`): the region's
  forcing and flow grids, the leave-one-out flows, the estimated daily flows at ungauged
  basins and the held-out check's flows are left out, and so are the fitted region and the
  folds' contexts, which no figure reads;
- with each job, the daily series its own figure draws (:func:`job_series`): the
  leave-one-out flows of the basins of the hydrograph figure, the daily estimates of the
  ungauged basins of one page of site hydrographs.

A task puts the two back together (:func:`with_series`), draws the figure and returns its PNG
bytes (:func:`regional.io.figure_png`); the client writes them. The bytes do not depend on
where a figure was drawn (tested against the in-process run). The in-process executor runs the
very same task function, so both routes share every step.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

import pandas as pd
from matplotlib.figure import Figure

from regional import io
from regional.kept import part_of

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import RunResult


@dataclass(frozen=True)
class FigureJob:
    """One figure of a run: its name, how to draw it and which daily series it reads.

    Attributes
    ----------
    name : str
        The figure's stable name (``figures/<name>.png``).
    draw : callable(RunResult) -> Figure
        A module-level function or a ``functools.partial`` of one (so that it pickles).
    loo_basins : tuple of str
        Gauged basins whose leave-one-out flows (observed and every method, each model) the
        figure draws.
    site_basins : tuple of str
        Ungauged basins whose daily estimates and bounds the figure draws.
    panels : int
        Panels (axes) the figure draws, a rough measure of its drawing time: a cluster starts
        the costliest figures first, so that no worker is left with a long one at the end.
    """

    name: str
    draw: Callable[[RunResult], Figure]
    loo_basins: tuple[str, ...] = ()
    site_basins: tuple[str, ...] = ()
    panels: int = 1


@dataclass(frozen=True, eq=False)
class JobSeries:
    """The daily series of one job, cut from the whole run.

    Attributes
    ----------
    loo : dict
        Model -> (observed flow, method -> simulated flow), leave-one-out, evaluation days x
        the job's ``loo_basins``, mm/day.
    daily : object or None
        The prediction's daily flows (:class:`regional.predict.DailyFlows`) of the job's
        ``site_basins``; None when the job draws none.
    """

    loo: dict[str, tuple[pd.DataFrame, dict[str, pd.DataFrame]]]
    daily: Any = None


def without_series(result: RunResult) -> RunResult:
    """The run without its daily series, fitted region and fold contexts (what every figure
    job shares; a few hundred kB for a few hundred basins)."""
    region = result.region
    grids = {
        name: None if getattr(region, name) is None else _no_columns(region.dates)
        for name in _REGION_GRIDS
    }
    runs = {}
    for model, run in result.runs.items():
        days = run.loo.observed.index
        loo = replace(
            run.loo,
            observed=_no_columns(days),
            simulated={method: _no_columns(days) for method in run.loo.simulated},
        )
        runs[model] = replace(run, context=None, loo=loo)
    prediction = result.prediction
    if prediction is not None:
        prediction = replace(prediction, daily=_daily_of(prediction.daily, []), held_out_draws=())
    return replace(
        result,
        region=replace(region, **grids),
        runs=runs,
        prediction=prediction,
        fitted=None,
        statistics=_compact(result.statistics),
    )


def job_series(job: FigureJob, result: RunResult) -> JobSeries:
    """The daily series ``job`` reads, cut from the whole run ``result``."""
    return series_of(series_parts(job, result, cut=_columns), result)


def series_parts(job: FigureJob, result: RunResult, *, cut: Callable = part_of) -> tuple:
    """The daily series ``job`` reads in plain containers, each frame ``cut(table, basins)``:
    ``(loo, daily)``, ``loo`` model -> (observed, method -> flows), ``daily`` (flow, low,
    high) or None. By default a flow left on the workers (:mod:`regional.kept`) is given as
    the future of its frame, built on a worker: a task given the parts gets the frames, and
    the client never holds them (:func:`series_of` puts them together in the task)."""
    loo = {}
    if job.loo_basins:
        basins = list(job.loo_basins)
        for model, run in result.runs.items():
            simulated = {m: cut(flows, basins) for m, flows in run.loo.simulated.items()}
            loo[model] = (cut(run.loo.observed, basins), simulated)
    daily = None
    if job.site_basins:
        basins, grids = list(job.site_basins), result.prediction.daily
        daily = tuple(cut(getattr(grids, name), basins) for name in _DAILY_GRIDS)
    return loo, daily


def series_of(parts: tuple, result: RunResult) -> JobSeries:
    """:func:`series_parts`' frames as a :class:`JobSeries` (``result``: the run, or the
    run without its series, whose daily flows give the class and areas)."""
    loo, daily = parts
    if daily is not None:
        grids = result.prediction.daily
        basins = list(daily[0].columns)
        frames = dict(zip(_DAILY_GRIDS, daily, strict=True))
        daily = replace(grids, **frames, area_km2=grids.area_km2.reindex(basins))
    return JobSeries(loo=loo, daily=daily)


_DAILY_GRIDS = ("flow_mm", "low_mm", "high_mm")


def _columns(table, basins: list[str]) -> pd.DataFrame:
    return table[basins]


def with_series(shared: RunResult, series: JobSeries) -> RunResult:
    """The shared run with one job's daily series put back."""
    runs = dict(shared.runs)
    for model, (observed, simulated) in series.loo.items():
        loo = replace(runs[model].loo, observed=observed, simulated=simulated)
        runs[model] = replace(runs[model], loo=loo)
    prediction = shared.prediction
    if series.daily is not None:
        prediction = replace(prediction, daily=series.daily)
    return replace(shared, runs=runs, prediction=prediction)


def draw_jobs(
    chunk: Sequence[tuple[FigureJob, JobSeries | tuple | None]], shared: RunResult
) -> list[bytes]:
    """The executor's task: each job's figure drawn and rendered to PNG bytes, in order.

    ``shared`` is the whole run when a job comes without its series (in this process), else
    the run without its daily series (:func:`without_series`), to which each job's own
    series (a :class:`JobSeries`, or its :func:`series_parts`) are put back.
    """
    return [io.figure_png(job.draw(_for_job(shared, series))) for job, series in chunk]


def _for_job(shared: RunResult, series: JobSeries | tuple | None) -> RunResult:
    shared = _expanded(shared)
    if isinstance(series, tuple):  # series_parts, their frames built on the workers
        series = series_of(series, shared)
    return shared if series is None else with_series(shared, series)


_REGION_GRIDS = ("precip_mm", "pet_mm", "temp_c", "flow_mm")

_LONG_STATISTICS = ("loo", "estimates", "ungauged")
"""The flow statistics' long tables, a row per basin, statistic and route: most of the shared
run's bytes (at 500 basins 4.7 of 5.6 MB pickled, three quarters of it their text columns)."""


@dataclass(frozen=True, eq=False)
class _CompactTable:
    """A long table shipped with its text columns as categories (basin, statistic and route
    names repeat on every row), and the dtypes that give it back as it was."""

    frame: pd.DataFrame
    dtypes: dict[str, Any]

    @classmethod
    def of(cls, table: pd.DataFrame) -> _CompactTable:
        text = {c: table[c].dtype for c in table.columns if pd.api.types.is_string_dtype(table[c])}
        return cls(table.astype(dict.fromkeys(text, "category")), text)

    def table(self) -> pd.DataFrame:
        return self.frame.astype(self.dtypes)


def _compact(statistics):
    """The run's flow statistics with their long tables as :class:`_CompactTable` (None as is)."""
    if statistics is None:
        return None
    tables = {name: _CompactTable.of(getattr(statistics, name)) for name in _LONG_STATISTICS}
    return replace(statistics, **tables)


_EXPANDED: list = []
"""The last shared run expanded on this worker: a weak reference to it and the expanded run
(every job of a stage receives the same shared object: its tables are given back once)."""


def _expanded(shared: RunResult) -> RunResult:
    """``shared`` with the flow statistics' long tables given back as they were (the
    values and dtypes of the run's own; :func:`without_series` compacted them)."""
    statistics = shared.statistics
    if statistics is None or not isinstance(statistics.loo, _CompactTable):
        return shared
    if _EXPANDED and _EXPANDED[0]() is shared:
        return _EXPANDED[1]
    tables = {name: getattr(statistics, name).table() for name in _LONG_STATISTICS}
    expanded = replace(shared, statistics=replace(statistics, **tables))
    _EXPANDED[:] = [weakref.ref(shared), expanded]
    return expanded


def _no_columns(days: pd.Index) -> pd.DataFrame:
    """A frame of ``days`` without columns (the index object shared, so pickled once)."""
    return pd.DataFrame(index=days)


def _daily_of(daily, basins: list[str]):
    """The daily flows and bounds of ``basins`` only (same class, same dates)."""
    return replace(
        daily,
        flow_mm=daily.flow_mm[basins],
        low_mm=daily.low_mm[basins],
        high_mm=daily.high_mm[basins],
        area_km2=daily.area_km2.reindex(basins),
    )
