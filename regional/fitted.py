"""A fitted region: everything prediction and screening need, without the run that made it.

:func:`fit_region` gathers, from a finished run, the chosen (model, method), the training
table of the transfer (gauged attributes and calibrated parameters), the transfer options, the
simulation window, the conformal error model of the daily bounds (after the held-out check),
the coverage tables and the leave-one-out flows that local bounds need. Prediction and
screening (:mod:`regional.predict`, :mod:`regional.screen`) run on a :class:`FittedRegion`
alone; :mod:`regional.fittedfiles` turns it into open files and back.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import partial
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from regional.applicability import method_nse
from regional.attributes import equal_area_crs
from regional.bounds import ConformalErrorModel, check_level, conformal_bounds
from regional.calibrate import Window
from regional.config import Settings
from regional.coverage import start_loo_coverage
from regional.crossval import FoldContext
from regional.errors import InputError, InputWarning
from regional.heldout import start_held_out_check, with_held_out
from regional.kept import near
from regional.models import parameter_transforms
from regional.transfer import RegressionFit, fit_transfer
from regional.transfer.step import TransferOptions

if TYPE_CHECKING:  # pragma: no cover - annotations only
    import geopandas as gpd

    from regional.result import ModelRun, RunResult


@dataclass(frozen=True)
class FittedRegion:
    """What prediction and screening need from a run (see :func:`fit_region`).

    Attributes
    ----------
    model, method : str
        The chosen storage model and transfer method.
    level : float
        Nominal level of the bounds and parameter intervals.
    attributes : tuple of str
        Transfer attributes (regression, similarity, applicability).
    training : DataFrame
        Gauged basins (sorted ids): the transfer attributes and coordinates the folds saw,
        then the calibrated (or user-given) parameters of the chosen model.
    parameters : tuple of str
        The chosen model's parameter names (the last columns of ``training``).
    options : TransferOptions
        Methods, donor counts (as chosen in leave-one-out), weighting and combination.
    first_day, last_day : Timestamp
        The simulated window (warm-up included) of every target.
    warmup_days : int
        Leading days of the window that only spin up the stores.
    initial_storage : float or None
        Storage at the start, mm (None: the model's own).
    snow : bool
        Whether the snow store runs (then targets need temperature).
    fixed_params : dict
        Snow parameters set for the whole region (empty without snow or when the model's
        defaults are used).
    error_model : ConformalErrorModel
        The bounds of the chosen (model, method), widened where the held-out check said so.
    coverage : DataFrame
        Leave-one-out and held-out coverage (see :attr:`regional.predicted.Prediction.coverage`).
    held_out : DataFrame or None
        The held-out check table (its ``attrs`` kept), None when it did not run.
    notes : tuple of str
        The notes of the held-out check.
    loo_nse : Series
        Leave-one-out NSE of the chosen method per gauged basin.
    loo_observed, loo_simulated : DataFrame
        Evaluation days x gauged basins: observed flow and the chosen method's leave-one-out
        flow, mm/day (local bounds where transfer is known to fail).
    area_crs : str
        The region's equal-area CRS (PROJ text), in which new sites' attributes are computed.
    held_out_draws : tuple of HeldOutRepeat
        The repeats of the held-out check (their flows), for the held-out coverage of the flow
        statistics in the same run; kept in memory only (not among the stored files), and
        dropped by :func:`regional.pipeline.run` once the statistics are computed.
    inputs : dict
        Input file -> SHA-256 when fitted (:func:`regional.fittedfiles.stale_reason`).
    settings : dict
        The settings as plain values when fitted.
    """

    model: str
    method: str
    level: float
    attributes: tuple[str, ...]
    training: pd.DataFrame
    parameters: tuple[str, ...]
    options: TransferOptions
    first_day: pd.Timestamp
    last_day: pd.Timestamp
    warmup_days: int
    initial_storage: float | None
    snow: bool
    fixed_params: dict[str, float]
    error_model: ConformalErrorModel
    coverage: pd.DataFrame
    held_out: pd.DataFrame | None
    notes: tuple[str, ...]
    loo_nse: pd.Series
    loo_observed: pd.DataFrame
    loo_simulated: pd.DataFrame
    area_crs: str = ""
    held_out_draws: tuple = field(default=(), repr=False)
    inputs: dict[str, str] = field(default_factory=dict)
    settings: dict = field(default_factory=dict)

    def context(
        self, precip_mm: pd.DataFrame, pet_mm: pd.DataFrame, temp_c: pd.DataFrame | None
    ) -> FoldContext:
        """A fold context for simulating targets: their forcing over the fitted window.

        Parameters
        ----------
        precip_mm, pet_mm, temp_c : DataFrame
            Days x targets, mm/day and degC (``temp_c`` None without snow); they must cover
            ``first_day`` .. ``last_day``.
        """
        dates = precip_mm.index
        if len(dates) == 0 or dates[0] > self.first_day or dates[-1] < self.last_day:
            found = f"{dates[0]:%Y-%m-%d}..{dates[-1]:%Y-%m-%d}" if len(dates) else "no day"
            raise InputError(
                f"the forcing of the sites covers {found}, but the fitted region simulates "
                f"{self.first_day:%Y-%m-%d}..{self.last_day:%Y-%m-%d} (warm-up included). "
                "Fix: give daily forcing over that whole window."
            )
        part = slice(self.first_day, self.last_day)
        precip = precip_mm.loc[part]
        days = len(precip)
        return FoldContext(
            model=self.model,
            attributes=self.training[self.training_columns],
            calibrated=self.training[list(self.parameters)],
            precip_mm=precip,
            pet_mm=pet_mm.loc[part],
            temp_c=temp_c.loc[part] if self.snow else None,
            flow_mm=pd.DataFrame(index=precip.index),
            window=Window(0, days, self.warmup_days, np.zeros(days, bool), np.zeros(days, bool)),
            evaluation=np.zeros(days, bool),
            options=self.options,
            fixed_params=dict(self.fixed_params),
            initial_storage=self.initial_storage,
        )

    @property
    def transforms(self) -> dict[str, str]:
        """Parameter name -> regression transform of :attr:`parameters` (snow ones included)."""
        return parameter_transforms(self.model, snow=self.snow, fixed=self.fixed_params)

    @property
    def training_columns(self) -> list[str]:
        """The attribute (and coordinate) columns of ``training``."""
        return [c for c in self.training.columns if c not in self.parameters]

    def regression(self) -> RegressionFit:
        """The regression of the chosen model's parameters fit on every gauged basin."""
        transforms = self.transforms
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InputWarning)  # reported when the run fitted it
            return fit_transfer(
                "regression",
                self.training[self.training_columns],
                self.training[list(self.parameters)],
                transforms=transforms,
                attributes=list(self.attributes),
                plain=True,
            )


def fit_region(
    runs: Mapping[str, ModelRun],
    *,
    model: str,
    method: str,
    attributes: Sequence[str],
    settings: Settings,
    basins: gpd.GeoDataFrame,
    level: float | None = None,
    inputs: dict[str, str] | None = None,
    executor=None,
    reader=None,
    meanwhile: Callable[[], Callable | None] | None = None,
) -> FittedRegion:
    """Gather the fitted region from the per-model calibration and leave-one-out runs.

    The error model of the chosen (model, method) is built from the leave-one-out residuals
    (:func:`regional.bounds.conformal_bounds`), checked on basins held out of the whole fit and
    widened where they fall short (:func:`regional.heldout.held_out_check`, whose repeats start
    first, :func:`regional.heldout.start_held_out_check`); the coverage of
    every (model, method) is measured (:func:`regional.coverage.loo_coverage`; on a cluster
    as tasks, :func:`regional.coverage.start_loo_coverage`).

    Parameters
    ----------
    runs : mapping
        Model name -> :class:`~regional.result.ModelRun` (calibration and leave-one-out done).
    model, method : str
        The chosen storage model and transfer method.
    attributes : sequence of str
        Transfer attributes (regression, similarity, applicability).
    settings : Settings
        The settings of the run (level, held-out repeats; stored to tell later whether they
        changed).
    basins : GeoDataFrame
        The region's basins (their equal-area CRS is kept for new sites).
    level : float, optional
        Nominal level; default ``[prediction] level``.
    inputs : dict, optional
        Input file -> SHA-256, stored to tell later whether the inputs changed.
    executor, reader : optional
        A Dask executor and series store reader for the held-out check's repeats
        (:func:`regional.heldout.held_out_check`) and the leave-one-out coverage; default in
        this process.
    meanwhile : callable, optional
        The caller's own work, called once the held-out check and the coverage are started
        (on a cluster it runs while the workers simulate); it may return a call that is then
        given each repeat's summary (:class:`~regional.repeatcoverage.HeldOutSummary`) as it comes
        back (the flow statistics' held-out check, :class:`regional.statroutes.GaugedStatistics`).

    Returns
    -------
    FittedRegion
    """
    level = check_level(settings.prediction.level if level is None else level)
    run = runs[model]
    context, loo = run.context, run.loo
    # the check's first repeats start first, then the leave-one-out coverage of every
    # method: on a cluster the workers simulate, summarise and measure them while this
    # process builds the error model
    finish_check = start_held_out_check(
        run,
        method,
        level=level,
        repeats=settings.prediction.held_out_repeats,
        fit_level=settings.prediction.level,
        executor=executor,
        reader=reader,
    )
    measured = start_loo_coverage(runs, level=level, executor=executor)
    on_repeat = None if meanwhile is None else meanwhile()
    # next to the flows where they stayed on the workers (regional.kept), else here
    flows = (loo.observed, loo.simulated[method])
    error_model = near(partial(conformal_bounds, level=level), flows, priority=1)
    held_out, error_model, notes, draws = finish_check(error_model, on_repeat=on_repeat)
    coverage = with_held_out(measured(), held_out, model=model, method=method)
    dates = context.precip_mm.index
    return FittedRegion(
        model=model,
        method=method,
        level=level,
        attributes=tuple(attributes),
        training=context.attributes.join(context.calibrated),
        parameters=tuple(context.calibrated.columns),
        options=context.options,
        first_day=dates[0],
        last_day=dates[-1],
        warmup_days=context.window.warmup_days,
        initial_storage=context.initial_storage,
        snow=context.temp_c is not None,
        fixed_params=dict(context.fixed_params),
        error_model=error_model,
        coverage=coverage,
        held_out=held_out,
        notes=tuple(notes),
        loo_nse=method_nse(loo, method),
        loo_observed=loo.observed,
        loo_simulated=loo.simulated[method],
        area_crs=equal_area_crs(basins).srs,
        held_out_draws=draws,
        inputs=dict(inputs or {}),
        settings=fit_settings(settings),
    )


def fit_result(result: RunResult, *, level: float | None = None) -> FittedRegion:
    """The fitted region of a finished run: its own when fitted at ``level`` (default
    ``[prediction] level``), else gathered again from its runs at that level."""
    level = check_level(result.settings.prediction.level if level is None else level)
    fitted = result.fitted
    if isinstance(fitted, FittedRegion) and fitted.level == level:
        return fitted
    return fit_region(
        result.runs,
        model=result.chosen_model,
        method=result.chosen_method,
        attributes=result.attributes,
        settings=result.settings,
        basins=result.region.basins,
        level=level,
    )


FIT_SECTIONS = ("basins", "overlays", "raster", "series", "model", "transfer", "prediction")
"""Sections of the settings a fitted region depends on (not compute, output, report)."""


def fit_settings(settings: Settings) -> dict:
    """The settings a fitted region depends on, as plain values."""
    return {name: plain(getattr(settings, name)) for name in FIT_SECTIONS}


def plain(value):
    """Dataclasses, paths, dates, tuples and numpy numbers -> JSON-ready values."""
    if hasattr(value, "__dataclass_fields__"):
        return {name: plain(getattr(value, name)) for name in value.__dataclass_fields__}
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    if isinstance(value, pd.Timestamp):
        return f"{value:%Y-%m-%d}"
    if isinstance(value, np.generic):
        return value.item()
    if value is None or isinstance(value, bool | int | float | str):
        return value
    return str(value)
