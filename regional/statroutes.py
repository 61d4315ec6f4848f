"""Flow statistics at ungauged basins by two routes, validated in leave-one-out and bounded.

Every statistic of :data:`regional.flowstats.STATISTICS` is estimated by

- ``model``: the statistic of the transferred daily flow of the run's chosen model and method;
- ``direct_regression``: ordinary least squares of the statistic's base-10 logarithm on the
  standardised transfer attributes, the attributes chosen by forward selection on the
  leave-one-out prediction error (PRESS, Allen 1974, with the hat-matrix shortcut), as for the
  parameters;
- ``direct_similarity`` and ``direct_proximity``: the inverse-distance weighted mean of the
  observed statistics of the same donors the parameter transfer picks (when the method is
  configured).

In leave-one-out every route estimates every gauged basin's statistic from the other gauged
basins, with the same donor exclusions (nested or overlapping basins) as the flows; the attribute
selection of the regression is redone in every fold. Errors are taken on log10 of the statistic
floored at :data:`LOG_FLOOR`. Per statistic the route with the smallest median absolute log
error is chosen (or the one the config forces), and its leave-one-out log errors give the
statistic's bounds by split-conformal prediction (Vovk et al. 2005; Lei et al. 2018), with the
measured leave-one-out coverage (each basin's bounds built without its own error) beside them.

All statistics are taken over the evaluation period (the days the leave-one-out flows cover),
at gauged and ungauged basins alike. See ``docs/statistics.md``.

References
----------
Allen, D. M. (1974): The relationship between variable selection and data augmentation and a
method for prediction. Technometrics 16(1), 125-127.
Vovk, V., Gammerman, A., Shafer, G. (2005): Algorithmic Learning in a Random World. Springer.
Lei, J., G'Sell, M., Rinaldo, A., Tibshirani, R. J., Wasserman, L. (2018): Distribution-free
predictive inference for regression. J. Am. Stat. Assoc. 113(523), 1094-1111.
Salinas, J. L., Laaha, G., Rogger, M., Parajka, J., Viglione, A., Sivapalan, M., Bloeschl, G.
(2013): Comparative assessment of predictions in ungauged basins - Part 2: Flood and low flow
studies. Hydrol. Earth Syst. Sci. 17, 2637-2652.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import partial
from typing import TYPE_CHECKING

import numba
import numpy as np
import pandas as pd
from threadpoolctl import threadpool_limits

from regional import flowstats
from regional.config import STATISTICS_ROUTES
from regional.crossval import FoldContext
from regional.errors import InputError
from regional.kept import start_near
from regional.repeatcoverage import HeldOutSummary
from regional.transfer import great_circle_km, inverse_distance_weights, make_transfer
from regional.transfer.folds import k_nearest, row_blocks

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.region import Region
    from regional.result import ModelRun

MODEL = "model"
REGRESSION = "direct_regression"
DONOR_ROUTES = {"direct_similarity": "similarity", "direct_proximity": "proximity"}
ROUTES = (MODEL, REGRESSION, *DONOR_ROUTES)
"""Every route, in report order."""
ROUTE_CHOICES = STATISTICS_ROUTES
"""Values of ``[prediction] statistics_route``."""
LOG_FLOOR = flowstats.ZERO_FLOW_MM_DAY
"""Statistics are floored at this before log10 (mm/day for flows; dimensionless ratios too)."""
MIN_BASINS = 4
"""Fewest gauged basins with a statistic for its leave-one-out and bounds."""
MIN_RESIDUAL_DOF = 2
"""A regression keeps at least this many residual degrees of freedom (as for parameters)."""

FOLD_BLOCK_CELLS = 2_000_000
"""Target x donor distances held at once by the donor routes' folds (16 MB of float64)."""
CONSTANT_SHARE = 1e-12
"""A fold's attribute variance below this share of the largest squared deviation of the pool
is round-off of a constant attribute (skipped, as a zero standard deviation is)."""
LOO_COLUMNS = ("basin_id", "statistic", "route", "observed", "estimated")
SUMMARY_COLUMNS = (
    "statistic",
    "route",
    "n_basins",
    "median_abs_rel_error",
    "median_abs_log_error",
    "r2_log",
    "median_log_bias",
    "coverage",
    "held_out_coverage",
    "chosen",
)
UNGAUGED_COLUMNS = (
    "basin_id",
    "statistic",
    "unit",
    "estimate",
    "low",
    "high",
    "estimate_m3s",
    "low_m3s",
    "high_m3s",
    "route",
    "applicable",
)


@dataclass(frozen=True)
class FlowStatistics:
    """Statistics at gauged and ungauged basins (see :func:`estimate_statistics`).

    Attributes
    ----------
    level : float
        Nominal level of the bounds.
    route_choice : str
        ``auto``, ``model`` or ``direct`` (``[prediction] statistics_route``).
    observed : DataFrame
        Gauged basins x statistics: observed over the evaluation period.
    loo : DataFrame
        Long (:data:`LOO_COLUMNS`): every gauged basin's observed statistic and each route's
        leave-one-out estimate.
    summary : DataFrame
        One row per (statistic, route) (:data:`SUMMARY_COLUMNS`): ``n_basins``,
        ``median_abs_rel_error`` (|est - obs| / obs over basins with obs > 0),
        ``median_abs_log_error`` and ``median_log_bias`` (log10 est - log10 obs),
        ``r2_log`` (1 - SSE / SST of log10 est against log10 obs), ``coverage`` (share of
        gauged basins whose observed statistic lies inside bounds built from the other basins'
        errors), ``held_out_coverage`` (the same at basins held out of the whole fit; NaN when
        not measured; measured for the chosen route only), ``chosen`` (bool).
    bounds : DataFrame
        One row per statistic: ``route`` chosen, ``lower_q``, ``upper_q`` (log10 error
        quantiles; est x 10^q gives the bounds), ``n_basins``, ``coverage``.
    ungauged : DataFrame
        Long (:data:`UNGAUGED_COLUMNS`): chosen estimate and bounds in the statistic's unit and,
        for flows, in m3/s; ``applicable`` from the prediction's applicability check.
    estimates : DataFrame
        Long: ``basin_id``, ``statistic``, ``route``, ``estimate`` at ungauged basins, every
        route (for comparison).
    notes : tuple of str
    """

    level: float
    route_choice: str
    observed: pd.DataFrame
    loo: pd.DataFrame
    summary: pd.DataFrame
    bounds: pd.DataFrame
    ungauged: pd.DataFrame
    estimates: pd.DataFrame
    notes: tuple[str, ...] = ()

    def ungauged_wide(self) -> pd.DataFrame:
        """Ungauged basins x columns ``{statistic}``, ``{statistic}_low``, ``{statistic}_high``
        (and the m3/s names of flows), chosen route."""
        return _wide(self.ungauged)

    def gauged_wide(self) -> pd.DataFrame:
        """Gauged basins x ``{statistic}_observed``, ``{statistic}_loo``, ``{statistic}_loo_low``,
        ``{statistic}_loo_high`` of the chosen route (bounds built without the basin)."""
        return _gauged_wide(self)


# --------------------------------------------------------------------------------------------
# Entry point


def estimate_statistics(
    run: ModelRun,
    method: str,
    region: Region,
    ungauged_flow: pd.DataFrame | None,
    *,
    attributes: Sequence[str],
    level: float,
    route: str = "auto",
    applicable: pd.Series | None = None,
    held_out: Sequence | None = None,
    ungauged_model: pd.DataFrame | None = None,
    gauged: GaugedStatistics | None = None,
) -> FlowStatistics:
    """Statistics by every route in leave-one-out, the chosen route and its bounds.

    Parameters
    ----------
    run : ModelRun
        Calibration and leave-one-out of the chosen storage model.
    method : str
        The chosen transfer method (its leave-one-out flow is the model route's).
    region : Region
        The region (attributes and precipitation of the gauged and ungauged basins).
    ungauged_flow : DataFrame or None
        Dates x ungauged basins: the chosen (model, method)'s daily flow, mm/day (the model
        route's input); it is cut to the evaluation period. None: no ungauged basin.
    attributes : sequence of str
        Transfer attributes (the regression route's candidates).
    level : float
        Nominal level of the bounds, in (0, 1).
    route : {"auto", "model", "direct"}
        Route choice: the smallest median absolute log error among all routes, the model route
        only, or the best direct route.
    applicable : Series, optional
        Ungauged basin -> bool, the prediction's applicability check.
    held_out : sequence of HeldOutRepeat, optional
        Repeats of the held-out check of the chosen (model, method)
        (:func:`regional.repeats.held_out_flows`); gives the held-out coverage of each
        statistic's chosen route.
    ungauged_model : DataFrame, optional
        The model route's statistics at the ungauged basins when already computed beside
        their flows (:attr:`regional.predicted.Prediction.model_statistics`: basins x
        statistics over the evaluation days); then ``ungauged_flow`` is not needed.
    gauged : GaugedStatistics, optional
        The routes at the gauged basins already computed (and given the held-out repeats)
        from the same ``run``, ``method``, ``region``, ``attributes``, ``level`` and
        ``route``: then only the bounds and the ungauged basins' estimates are computed here
        (``held_out`` must be None).

    Returns
    -------
    FlowStatistics
    """
    if gauged is None:
        gauged = GaugedStatistics(
            run, method, region, attributes=attributes, level=level, route=route
        )
        for draw in held_out or ():
            gauged.add_held_out(draw)
    elif held_out:
        raise ValueError("give the held-out repeats to the GaugedStatistics, not twice")
    data, estimates, errors = gauged.data, gauged.estimates, gauged.errors
    summary, level, route = gauged.summary, gauged.level, gauged.route
    bounds = _bounds(summary, errors, level)
    loo_table = _loo_table(data.observed, estimates)
    notes = _notes(summary, bounds, level, len(data.gauged))
    if ungauged_model is not None:
        targets = [str(b) for b in ungauged_model.index]
    else:
        targets = [] if ungauged_flow is None else [str(c) for c in ungauged_flow.columns]
    if not targets:
        empty = pd.DataFrame(columns=list(UNGAUGED_COLUMNS))
        return FlowStatistics(
            level, route, data.observed, loo_table, summary, bounds, empty, empty, tuple(notes)
        )
    if ungauged_model is None:
        ungauged_model = _model_route(data, ungauged_flow, targets, region)
    at_targets = _ungauged_estimates(data, ungauged_model, targets, region)
    area = region.attributes.loc[targets, "area_km2"].astype(float)
    table = _ungauged_table(at_targets, bounds, area, applicable)
    return FlowStatistics(
        level=level,
        route_choice=route,
        observed=data.observed,
        loo=loo_table,
        summary=summary,
        bounds=bounds,
        ungauged=table,
        estimates=_long_estimates(at_targets),
        notes=tuple(notes),
    )


# --------------------------------------------------------------------------------------------
# What the gauged basins give


@dataclass(frozen=True)
class _GaugedData:
    context: FoldContext
    gauged: list[str]
    dates: pd.DatetimeIndex
    observed: pd.DataFrame
    model_loo: pd.DataFrame
    attributes: pd.DataFrame
    columns: list[str]
    donors: Mapping[str, DonorSpace]

    @property
    def donor_methods(self) -> tuple[str, ...]:
        return tuple(self.donors)

    @classmethod
    def of(cls, context: FoldContext, loo, method: str, attributes: Sequence[str], everywhere):
        gauged = [str(b) for b in loo.observed.columns]
        dates = loo.observed.index
        precip = context.precip_mm  # each block of basins reads its own columns and days
        # next to the flows where they stayed on the workers (regional.kept), else here
        frame = partial(flowstats.statistics_frame, precip_mm_day=precip)
        waits = [start_near(frame, (flows,)) for flows in (loo.observed, loo.simulated[method])]
        observed, model = (wait() for wait in waits)
        table = context.attributes.loc[gauged]
        columns = _varying([a for a in attributes if a in table.columns], table)
        donors = {
            m: DonorSpace.of(context, m, everywhere)
            for m in DONOR_ROUTES.values()
            if m in context.options.methods and len(gauged) > 1
        }
        return cls(context, gauged, dates, observed, model, table, columns, donors)

    def dropped(self, target: str) -> set[str]:
        """The basins a fold of ``target`` leaves out: itself and those sharing its area."""
        return {target, *self.context.excluded.get(target, ())}

    def training(self, target: str, pool: Sequence[str]) -> list[str]:
        drop = self.dropped(target)
        return [b for b in pool if b not in drop]


def _varying(columns: list[str], table: pd.DataFrame) -> list[str]:
    values = table[columns].astype(float)
    return [c for c in columns if values[c].notna().all() and values[c].std(ddof=1) > 0]


def _logs(values) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.log10(np.maximum(values, LOG_FLOOR))


def _log_error(observed: pd.DataFrame, estimated: pd.DataFrame) -> pd.DataFrame:
    """log10 observed - log10 estimated (floored), gauged x statistics."""
    estimated = estimated.reindex(index=observed.index, columns=observed.columns)
    return pd.DataFrame(
        _logs(observed.to_numpy()) - _logs(estimated.to_numpy()),
        index=observed.index,
        columns=observed.columns,
    )


# --------------------------------------------------------------------------------------------
# Direct routes in leave-one-out


def _direct_loo(data: _GaugedData) -> dict[str, pd.DataFrame]:
    out = {}
    if len(data.gauged) >= MIN_BASINS:
        out[REGRESSION] = _regression_loo(data, data.gauged)
    for route, method in DONOR_ROUTES.items():
        if method in data.donor_methods:
            out[route] = _donor_loo(data, method, data.gauged)
    return out


def _regression_loo(
    data: _GaugedData, pool: Sequence[str], columns: Sequence[str] | None = None
) -> pd.DataFrame:
    """Each basin of ``pool`` estimated by the regression fit on the rest of ``pool`` (only the
    statistics ``columns``, default all)."""
    columns = list(data.observed.columns if columns is None else columns)
    z, logs = _standardised(data, pool)
    logs = logs[:, [data.observed.columns.get_loc(c) for c in columns]]
    position = {b: i for i, b in enumerate(pool)}
    extra = {}
    for i, target in enumerate(pool):  # the fold's other dropped basins, in pool order
        dropped = sorted(position[b] for b in data.dropped(target) - {target} if b in position)
        if dropped:
            extra[i] = dropped
    return pd.DataFrame(
        10.0 ** regression_loo_logs(z, logs, extra_drop=extra),
        index=pd.Index(list(pool), name="basin_id"),
        columns=columns,
    )


def regression_loo_logs(z, logs, *, extra_drop: Mapping[int, Sequence[int]] | None = None):
    """Leave-one-out log10 estimates of the regression route for every basin at once.

    Equal to :func:`regression_log_estimates` fit on all rows but one and applied to that row,
    with the attribute selection redone in every fold, but computed from the full fits: for a
    fold dropping row f, the leverages and residuals of the other rows follow from the full
    hat matrix H and residuals e by Sherman and Morrison's rank-one update,
    h_ii' = h_ii + H_if^2 / (1 - h_ff) and e_i' = e_i + H_if e_f / (1 - h_ff), which gives every
    fold's PRESS of every candidate subset in one compiled pass over the folds, a row of H at a
    time (:func:`_fold_press`, O(n^2) flops, O(n) memory); the left-out row's
    estimate is y_f - e_f / (1 - h_ff) (the PRESS residual). Folds that also drop other rows
    (donors sharing area with the target, ``extra_drop``) are refit directly.

    Parameters
    ----------
    z : ndarray (n, n_attributes)
        Standardised attributes.
    logs : ndarray (n, n_statistics)
        log10 statistics (NaN = unknown: that basin is left out of the statistic's fits).
    extra_drop : mapping, optional
        Row -> further rows left out of its fold.

    Returns
    -------
    ndarray (n, n_statistics)
        NaN where the statistic is unknown at the basin or too few basins remain.
    """
    with threadpool_limits(limits=1, user_api="blas"):  # small products: threads only wait
        return _regression_loo_logs(z, logs, dict(extra_drop or {}))


def _regression_loo_logs(z, logs, extra_drop: dict) -> np.ndarray:
    out = np.full(logs.shape, np.nan)
    known = np.isfinite(logs)
    patterns: dict[bytes, list[int]] = {}
    for j in range(logs.shape[1]):
        patterns.setdefault(known[:, j].tobytes(), []).append(j)
    for columns in patterns.values():
        rows = np.flatnonzero(known[:, columns[0]])
        if len(rows) - 1 >= MIN_BASINS:
            simple = np.array([r not in extra_drop for r in rows])
            values = _loo_by_updates(z[rows], logs[np.ix_(rows, columns)])
            out[np.ix_(rows[simple], columns)] = values[simple]
    for row, dropped in extra_drop.items():
        train = np.setdiff1d(np.arange(len(z)), [row, *dropped])
        out[row] = np.where(
            known[row], regression_log_estimates(z[train], logs[train], z[[row]])[0], np.nan
        )
    return out


class _FoldPress:
    """PRESS of every fold (one row left out) per attribute subset and column, cached.

    :meth:`fill` computes each requested subset's QR fit once and every fold's PRESS of the
    columns asked for in one compiled pass over the folds (:func:`_fold_press`: O(n^2) flops,
    O(n) memory; the n x n hat matrix is never held); only the results (n values per subset
    and column) are kept.
    """

    def __init__(self, design: np.ndarray, target: np.ndarray) -> None:
        self.design, self.target = design, target
        self.press: dict[tuple[tuple[int, ...], int], np.ndarray] = {}
        self.estimate: dict[tuple[tuple[int, ...], int], np.ndarray] = {}

    def fill(self, requests: Mapping[tuple[int, ...], set[int]]) -> None:
        for subset, columns in requests.items():
            missing = sorted(c for c in columns if (subset, c) not in self.press)
            if missing:
                self._compute(subset, missing)

    def _compute(self, subset: tuple[int, ...], columns: list[int]) -> None:
        n = len(self.target)
        target = self.target[:, columns]
        q, r = np.linalg.qr(self.design[:, [0, *subset]])
        diagonal = np.abs(np.diag(r))
        if diagonal.min() <= 1e-10 * max(diagonal.max(), 1.0):
            for c in columns:
                self.press[subset, c] = np.full(n, np.inf)
                self.estimate[subset, c] = np.full(n, np.nan)
            return
        h = np.einsum("ik,ik->i", q, q)
        resid = target - q @ (q.T @ target)
        press = np.empty(target.shape)
        _fold_press(np.ascontiguousarray(q), h, np.ascontiguousarray(resid), press)
        with np.errstate(divide="ignore", invalid="ignore"):
            estimate = target - resid / (1.0 - h)[:, None]
        for k, c in enumerate(columns):
            self.press[subset, c] = press[:, k]
            self.estimate[subset, c] = estimate[:, k]

    def values(self, subset, folds: np.ndarray, columns: np.ndarray, table) -> np.ndarray:
        out = np.empty(len(folds))
        for c in np.unique(columns):
            where = columns == c
            out[where] = table[subset, int(c)][folds[where]]
        return out


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _fold_press(q, h, resid, press):  # pragma: no cover - compiled
    """PRESS of each fold f (row f left out) of every column of ``resid``, into ``press``.

    With the full fit's orthonormal basis ``q`` (n x k), leverages ``h`` and residuals ``resid``
    (n x m), the fold's leverage and residual of row i follow by Sherman and Morrison's rank-one
    update, h_i' = h_i + H_fi^2 / (1 - h_f) and e_i' = e_i + H_fi e_f / (1 - h_f), with
    H_fi = q_f . q_i; PRESS_f = sum over i != f of (e_i' / (1 - h_i'))^2. A fold where some row
    reaches leverage 1 (or a non-finite weight) gets an infinite PRESS. Each fold is computed
    alone, one row of H at a time, in a fixed order.
    """
    n, k = q.shape
    m = resid.shape[1]
    squares = np.empty(m)
    crossed = np.empty(m)
    for f in range(n):
        one = 1.0 - h[f]
        bad = False
        squares[:] = 0.0
        crossed[:] = 0.0
        shared = 0.0
        for i in range(n):
            if i == f:
                continue
            hat = 0.0
            for c in range(k):
                hat += q[f, c] * q[i, c]
            share = hat / one  # H_fi / (1 - h_f)
            leverage = h[i] + hat * share
            weight = 1.0 / (1.0 - leverage)
            weight *= weight
            if not np.isfinite(weight) or leverage >= 1.0 - 1e-10:
                bad = True
                break
            cross = weight * share
            shared += cross * share
            for c in range(m):
                value = resid[i, c]
                squares[c] += weight * value * value
                crossed[c] += cross * value
        for c in range(m):
            if bad:
                press[f, c] = np.inf
            else:
                own = resid[f, c]
                press[f, c] = squares[c] + 2.0 * own * crossed[c] + own * own * shared


def _loo_by_updates(z: np.ndarray, logs: np.ndarray) -> np.ndarray:
    """Leave-one-out estimates (rows, columns) with forward selection in every fold.

    The (fold, column) pairs are grown together: pairs that hold the same subset try the same
    extensions, so each subset's hat matrix is built once for all of them.
    """
    n, m = logs.shape
    design = np.column_stack([np.ones(n), z])
    limit = min(n - 1 - MIN_RESIDUAL_DOF - 1, design.shape[1] - 1)
    cache = _FoldPress(design, logs)
    fold, column = np.divmod(np.arange(n * m), m)
    cache.fill({(): set(range(m))})
    best = cache.values((), fold, column, cache.press)
    final: dict[tuple[int, ...], list[np.ndarray]] = {}
    state = {(): np.arange(n * m)}
    while state:
        trials = {}
        for subset, pairs in state.items():
            candidates = [a for a in range(1, design.shape[1]) if a not in subset]
            if len(subset) >= limit or not candidates:
                final.setdefault(subset, []).append(pairs)
                continue
            trials[subset] = [tuple(sorted((*subset, a))) for a in candidates]
        requests: dict[tuple[int, ...], set[int]] = {}
        for subset, options in trials.items():
            needed = set(np.unique(column[state[subset]]).tolist())
            for trial in options:
                requests.setdefault(trial, set()).update(needed)
        cache.fill(requests)
        grown: dict[tuple[int, ...], list[np.ndarray]] = {}
        for subset, options in trials.items():
            pairs = state[subset]
            scores = np.stack(
                [cache.values(t, fold[pairs], column[pairs], cache.press) for t in options]
            )
            pick = np.argmin(scores, axis=0)
            value = scores[pick, np.arange(len(pairs))]
            better = value < best[pairs]
            final.setdefault(subset, []).append(pairs[~better])
            best[pairs[better]] = value[better]
            for c in np.unique(pick[better]):
                grown.setdefault(options[c], []).append(pairs[better & (pick == c)])
        state = {subset: np.concatenate(parts) for subset, parts in grown.items()}
    out = np.full((n, m), np.nan)
    for subset, parts in final.items():
        pairs = np.concatenate(parts)
        cache.fill({subset: set(np.unique(column[pairs]).tolist())})
        out[fold[pairs], column[pairs]] = cache.values(
            subset, fold[pairs], column[pairs], cache.estimate
        )
    return out


def _standardised(data: _GaugedData, pool: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
    values = data.attributes.loc[list(pool), data.columns].to_numpy(dtype=float)
    mean, scale = values.mean(axis=0), values.std(axis=0, ddof=1)
    scale = np.where(scale > 0, scale, 1.0)
    logs = _logs(data.observed.loc[list(pool)].to_numpy())
    return (values - mean) / scale, logs


def standardise_like(data: _GaugedData, pool: Sequence[str], targets: pd.DataFrame):
    """Attributes of ``targets`` standardised with the mean and deviation over ``pool``."""
    values = data.attributes.loc[list(pool), data.columns].to_numpy(dtype=float)
    mean, scale = values.mean(axis=0), values.std(axis=0, ddof=1)
    scale = np.where(scale > 0, scale, 1.0)
    return (targets[data.columns].to_numpy(dtype=float) - mean) / scale


def regression_log_estimates(z_train, logs_train, z_targets) -> np.ndarray:
    """log10 estimates at targets by the regression route.

    Per statistic (column of ``logs_train``), an OLS of its log10 on the attributes that
    :func:`forward_selection` keeps, fit over the training rows where the statistic is known
    (at least :data:`MIN_BASINS`, else NaN).

    Parameters
    ----------
    z_train : ndarray (n_train, n_attributes)
        Standardised attributes of the training basins.
    logs_train : ndarray (n_train, n_statistics)
        log10 of their statistics (NaN = unknown).
    z_targets : ndarray (n_targets, n_attributes)
        Target attributes standardised the same way.

    Returns
    -------
    ndarray (n_targets, n_statistics)
    """
    out = np.full((len(z_targets), logs_train.shape[1]), np.nan)
    known = np.isfinite(logs_train)
    patterns: dict[bytes, list[int]] = {}
    for j in range(logs_train.shape[1]):
        patterns.setdefault(known[:, j].tobytes(), []).append(j)
    for columns in patterns.values():
        rows = known[:, columns[0]]
        if rows.sum() < MIN_BASINS:
            continue
        design = np.column_stack([np.ones(rows.sum()), z_train[rows]])
        target = logs_train[np.ix_(rows, columns)]
        terms = forward_selection(design, target)
        full = np.column_stack([np.ones(len(z_targets)), z_targets])
        for chosen, members in _group(terms).items():
            used = [0, *chosen]
            beta, *_ = np.linalg.lstsq(design[:, used], target[:, members], rcond=None)
            out[:, [columns[m] for m in members]] = full[:, used] @ beta
    return out


def _group(terms: list[tuple[int, ...]]) -> dict[tuple[int, ...], list[int]]:
    groups: dict[tuple[int, ...], list[int]] = {}
    for j, chosen in enumerate(terms):
        groups.setdefault(chosen, []).append(j)
    return groups


def forward_selection(design: np.ndarray, target: np.ndarray) -> list[tuple[int, ...]]:
    """Per target column, the attribute columns (1-based in ``design``) forward selection keeps.

    Greedy: add the attribute that lowers PRESS most while it does, at most n - 3 attributes
    (two residual degrees of freedom with the intercept), ties broken by attribute order. PRESS
    of every column is computed at once for each subset (one QR per subset).
    """
    n, p = design.shape
    limit = min(n - MIN_RESIDUAL_DOF - 1, p - 1)
    cache: dict[tuple[int, ...], np.ndarray] = {}

    def score(subset: tuple[int, ...]) -> np.ndarray:
        if subset not in cache:
            cache[subset] = press_columns(design[:, [0, *subset]], target)
        return cache[subset]

    chosen: list[tuple[int, ...]] = []
    for j in range(target.shape[1]):
        subset: tuple[int, ...] = ()
        best = score(subset)[j]
        while len(subset) < limit:
            trials = [tuple(sorted((*subset, a))) for a in range(1, p) if a not in subset]
            values = [score(t)[j] for t in trials]
            pick = int(np.argmin(values))
            if not values[pick] < best:
                break
            subset, best = trials[pick], values[pick]
        chosen.append(subset)
    return chosen


def press_columns(design: np.ndarray, target: np.ndarray) -> np.ndarray:
    """PRESS of an OLS fit for every column of ``target`` (Allen 1974, hat-matrix shortcut).

    PRESS = sum_i (e_i / (1 - h_ii))^2; infinite for a rank-deficient design or a basin with
    leverage 1.
    """
    q, r = np.linalg.qr(design)
    diagonal = np.abs(np.diag(r))
    if diagonal.min() <= 1e-10 * max(diagonal.max(), 1.0):
        return np.full(target.shape[1], np.inf)
    leverage = np.sum(q * q, axis=1)
    if np.any(leverage >= 1.0 - 1e-10):
        return np.full(target.shape[1], np.inf)
    residuals = target - q @ (q.T @ target)
    return np.sum((residuals / (1.0 - leverage)[:, None]) ** 2, axis=0)


def _donor_loo(data: _GaugedData, method: str, pool: Sequence[str]) -> pd.DataFrame:
    """Each basin of ``pool`` estimated from its donors among the rest of ``pool`` (less the
    basins sharing its area), a block of targets at a time (:func:`fold_donor_weights`)."""
    pool = [str(b) for b in pool]
    train = sorted(pool)  # ties broken by basin id, as the transfer does
    values = data.observed.loc[train].to_numpy(dtype=float)
    known = np.isfinite(values)
    filled = np.where(known, values, 0.0)
    mean = np.empty((len(pool), values.shape[1]))
    position = {basin: i for i, basin in enumerate(train)}
    for part in row_blocks(len(pool), len(train), FOLD_BLOCK_CELLS):
        targets = pool[part]
        dropped = np.zeros((len(targets), len(train)), dtype=bool)
        for row, target in enumerate(targets):
            dropped[row, [position[b] for b in data.dropped(target) if b in position]] = True
        weights = fold_donor_weights(data.donors[method], train, targets, dropped)
        mean[part] = _weighted_means(weights, filled, known)
    return pd.DataFrame(mean, index=pd.Index(pool, name="basin_id"), columns=data.observed.columns)


def _donor_estimate(
    data: _GaugedData, method: str, train: Sequence[str], targets: Sequence[str]
) -> pd.DataFrame:
    """Inverse-distance weighted mean of the donors' observed statistics (weights renormalised
    over the donors that have the statistic)."""
    train = sorted(str(b) for b in train)  # ties broken by basin id, as the transfer does
    targets = list(targets)
    values = data.observed.loc[train].to_numpy(dtype=float)
    known = np.isfinite(values)
    filled = np.where(known, values, 0.0)
    mean = np.empty((len(targets), values.shape[1]))
    for part in row_blocks(len(targets), len(train), FOLD_BLOCK_CELLS):
        weights = donor_weights(data.donors[method], train, targets[part])
        mean[part] = _weighted_means(weights, filled, known)
    return pd.DataFrame(
        mean, index=pd.Index(targets, name="basin_id"), columns=data.observed.columns
    )


def _weighted_means(weights: np.ndarray, filled: np.ndarray, known: np.ndarray) -> np.ndarray:
    """(rows, statistics) weighted means of the donors' ``filled`` values, the weights
    renormalised over the donors where the statistic is ``known`` (NaN where none is).

    Only each row's donors (its non-zero weights) are summed, one after another in column
    order, so a row's value does not depend on the rows computed beside it.
    """
    rows, donors = np.nonzero(weights)
    weight = weights[rows, donors]
    out = np.empty((len(weights), filled.shape[1]))
    for column in range(filled.shape[1]):
        total = np.bincount(rows, weight * filled[donors, column], minlength=len(weights))
        share = np.bincount(rows, weight * known[donors, column], minlength=len(weights))
        with np.errstate(invalid="ignore", divide="ignore"):
            out[:, column] = total / share
    return out


@dataclass(frozen=True)
class DonorSpace:
    """Where a donor method measures distance, for fast folds (no estimator per fold).

    ``values`` are the attribute values (similarity: standardised per fold with the training
    basins' mean and standard deviation, as :class:`regional.transfer.SimilarityTransfer` does)
    or longitude/latitude (proximity, great-circle km), indexed by basin id.
    """

    method: str
    values: pd.DataFrame
    n_donors: int
    power: float

    @classmethod
    def of(cls, context: FoldContext, method: str, everywhere: pd.DataFrame) -> DonorSpace:
        options = context.options
        estimator = make_transfer(
            method,
            attributes=list(options.attributes)
            if options.attributes and method != "proximity"
            else None,
            n_donors=1,
            power=options.power,
        )
        gauged = context.calibrated.index
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            estimator.fit(context.attributes.loc[gauged], context.calibrated)
        if method == "proximity":
            columns = [f"{estimator.location}_lon", f"{estimator.location}_lat"]
        else:
            columns = list(estimator.attributes_)
        values = everywhere[columns].astype(float)
        values.index = values.index.astype(str)
        return cls(method, values, options.donors_for(method), float(options.power))


def donor_weights(space: DonorSpace, train: Sequence[str], targets: Sequence[str]) -> np.ndarray:
    """(targets, train) inverse-distance weights of each target's k nearest training basins.

    ``train`` must be sorted by basin id (a stable sort on distance then breaks ties by id).
    """
    donors, points = _coordinates(space, train, targets)
    if space.method == "proximity":
        distance = _great_circle(donors, points)
    else:
        mean, scale = donors.mean(axis=0), donors.std(axis=0, ddof=1)
        varying = scale > 0
        z_donors = (donors[:, varying] - mean[varying]) / scale[varying]
        z_points = (points[:, varying] - mean[varying]) / scale[varying]
        difference = z_points[:, None, :] - z_donors[None, :, :]
        distance = np.sqrt(np.einsum("tdk,tdk->td", difference, difference))
    return _nearest_weights(distance, min(space.n_donors, len(train)), space.power)


def _coordinates(space: DonorSpace, train, targets) -> tuple[np.ndarray, np.ndarray]:
    donors = space.values.loc[list(train)].to_numpy(dtype=float)
    return donors, space.values.loc[list(targets)].to_numpy(dtype=float)


def _great_circle(donors: np.ndarray, points: np.ndarray) -> np.ndarray:
    return great_circle_km(
        points[:, None, 0], points[:, None, 1], donors[None, :, 0], donors[None, :, 1]
    )


def _nearest_weights(distance: np.ndarray, k: int, power: float) -> np.ndarray:
    """Inverse-distance weights of the k nearest in each row (ties in column order)."""
    order = k_nearest(distance, k)
    nearest = np.take_along_axis(distance, order, axis=1)
    weights = np.zeros_like(distance)
    np.put_along_axis(weights, order, inverse_distance_weights(nearest, power), axis=1)
    return weights


def fold_donor_weights(
    space: DonorSpace, train: Sequence[str], targets: Sequence[str], dropped: np.ndarray
) -> np.ndarray:
    """(targets, train) weights of :func:`donor_weights` with each target's own training set:
    ``train`` less the basins ``dropped`` in its row (the target and those sharing its area).

    The same weights as ``donor_weights(space, kept, [target])`` row by row, to round-off:
    similarity standardises each row with its fold's mean and standard deviation, obtained by
    downdating the shifted sums of ``train`` (no refit per target); the dropped basins get no
    weight. ``train`` must be sorted by basin id. Rows whose fold keeps fewer basins than the
    donor count are computed the plain way.
    """
    donors, points = _coordinates(space, train, targets)
    if space.method == "proximity":
        distance = _great_circle(donors, points)
    else:
        distance = np.sqrt(_fold_squared_distance(donors, points, dropped))
    k = min(space.n_donors, len(train))
    weights = _nearest_weights(np.where(dropped, np.inf, distance), k, space.power)
    for row in np.flatnonzero(len(train) - dropped.sum(axis=1) < k):
        kept = [b for b, out in zip(train, dropped[row], strict=True) if not out]
        weights[row] = 0.0
        weights[row, ~dropped[row]] = donor_weights(space, kept, [targets[row]])[0]
    return weights


def _fold_squared_distance(donors: np.ndarray, points: np.ndarray, dropped: np.ndarray):
    """Squared distances (targets, donors) in attributes standardised per target with the mean
    and sample standard deviation of the donors it keeps (attributes constant there skipped)."""
    shifted = donors - donors.mean(axis=0)
    count = (dropped.shape[1] - dropped.sum(axis=1, keepdims=True)).astype(float)
    rows, out = np.nonzero(dropped)  # downdated: the sums over all less the dropped rows'
    first = shifted.sum(axis=0) - _row_sums(rows, shifted[out], len(dropped))
    second = (shifted**2).sum(axis=0) - _row_sums(rows, shifted[out] ** 2, len(dropped))
    variance = (second - first**2 / count) / (count - 1.0)
    spread = np.abs(shifted).max(axis=0) ** 2
    varying = variance > CONSTANT_SHARE * np.maximum(spread, np.finfo(float).tiny)
    squared = np.zeros(dropped.shape)
    for column in range(donors.shape[1]):
        scale = np.sqrt(np.where(varying[:, column], variance[:, column], 1.0))[:, None]
        step = (points[:, None, column] - donors[None, :, column]) / scale
        squared += np.where(varying[:, column, None], step**2, 0.0)
    return squared


def _row_sums(rows: np.ndarray, values: np.ndarray, n_rows: int) -> np.ndarray:
    """(n_rows, columns) sums of ``values`` grouped by ``rows``, in their order (a row's sum
    does not depend on the other rows)."""
    return np.column_stack(
        [np.bincount(rows, values[:, c], minlength=n_rows) for c in range(values.shape[1])]
    ).reshape(n_rows, values.shape[1])


# --------------------------------------------------------------------------------------------
# Skill, choice and bounds


def _conformal_ranks(n: int, level: float) -> tuple[int, int]:
    """1-based ranks of the lower and upper split-conformal bounds among n errors (Lei et al.
    2018): floor((n + 1)(1 - L) / 2) and ceil((n + 1)(1 + L) / 2); outside 1 .. n: infinite."""
    low = int(np.floor((n + 1) * (1.0 - level) / 2.0 + 1e-9))
    high = int(np.ceil((n + 1) * (1.0 + level) / 2.0 - 1e-9))
    return low, high


def conformal_quantiles(errors, level: float) -> tuple[float, float]:
    """Lower and upper split-conformal quantiles of a sample of errors (NaN ignored).

    Returns (-inf, inf) sides where too few errors allow a finite bound at ``level``; the
    quantiles are clipped so that lower <= 0 <= upper (a bound never excludes the estimate).
    """
    values = np.sort(np.asarray(errors, dtype=float)[np.isfinite(errors)])
    n = len(values)
    if n == 0:
        return -np.inf, np.inf
    low, high = _conformal_ranks(n, level)
    lower = values[low - 1] if low >= 1 else -np.inf
    upper = values[high - 1] if high <= n else np.inf
    return min(lower, 0.0), max(upper, 0.0)


def _loo_coverage(errors: pd.DataFrame, level: float) -> pd.Series:
    """Per statistic: share of basins whose error lies within the quantiles of the others'."""
    out = {}
    for name in errors.columns:
        values = errors[name].to_numpy(dtype=float)
        values = values[np.isfinite(values)]
        out[name] = coverage_without_each(values, level) if len(values) >= MIN_BASINS else np.nan
    return pd.Series(out)


def coverage_without_each(values: np.ndarray, level: float) -> float:
    """Share of errors inside the conformal quantiles (:func:`conformal_quantiles`) of the
    other errors: the leave-one-out coverage of the bounds."""
    order = np.argsort(values, kind="stable")
    ordered = values[order]
    position = np.empty(len(values), dtype=int)
    position[order] = np.arange(len(values))
    low, high = _conformal_ranks(len(values) - 1, level)

    def kth(rank: int) -> np.ndarray:  # rank-th smallest (1-based) of the others
        if rank < 1:
            return np.full(len(values), -np.inf)
        if rank > len(values) - 1:
            return np.full(len(values), np.inf)
        return np.where(position > rank - 1, ordered[rank - 1], ordered[rank])

    lower, upper = np.minimum(kth(low), 0.0), np.maximum(kth(high), 0.0)
    return float(np.mean((values >= lower) & (values <= upper)))


def _summary(observed, estimates, errors, coverage) -> pd.DataFrame:
    rows = []
    for name in observed.columns:
        for route, estimated in estimates.items():
            rows.append(
                {
                    "statistic": name,
                    "route": route,
                    **_skill(observed[name], estimated[name].reindex(observed.index)),
                    "coverage": coverage[route].get(name, np.nan),
                    "held_out_coverage": np.nan,
                }
            )
    return pd.DataFrame(rows, columns=[c for c in SUMMARY_COLUMNS if c != "chosen"])


def _skill(observed: pd.Series, estimated: pd.Series) -> dict:
    obs, est = observed.to_numpy(dtype=float), estimated.to_numpy(dtype=float)
    both = np.isfinite(obs) & np.isfinite(est)
    n = int(both.sum())
    if n < MIN_BASINS:
        return dict.fromkeys(SUMMARY_COLUMNS[3:7], np.nan) | {"n_basins": n}
    obs, est = obs[both], est[both]
    error = _logs(est) - _logs(obs)
    positive = obs > 0
    relative = np.abs(est[positive] - obs[positive]) / obs[positive]
    spread = np.sum((_logs(obs) - _logs(obs).mean()) ** 2)
    return {
        "n_basins": n,
        "median_abs_rel_error": float(np.median(relative)) if positive.any() else np.nan,
        "median_abs_log_error": float(np.median(np.abs(error))),
        "r2_log": float(1.0 - np.sum(error**2) / spread) if spread > 0 else np.nan,
        "median_log_bias": float(np.median(error)),
    }


def _choose(summary: pd.DataFrame, route: str) -> pd.DataFrame:
    summary = summary.copy()
    allowed = {"auto": ROUTES, "model": (MODEL,), "direct": ROUTES[1:]}[route]
    summary["chosen"] = False
    candidates = summary[summary["route"].isin(allowed) & summary["median_abs_log_error"].notna()]
    for _, rows in candidates.groupby("statistic", sort=False):
        best = rows["median_abs_log_error"].idxmin()
        summary.loc[best, "chosen"] = True
    return summary


def _bounds(summary: pd.DataFrame, errors: Mapping[str, pd.DataFrame], level) -> pd.DataFrame:
    rows = []
    for row in summary[summary["chosen"]].itertuples():
        lower, upper = conformal_quantiles(errors[row.route][row.statistic], level)
        rows.append(
            {
                "statistic": row.statistic,
                "route": row.route,
                "lower_q": lower,
                "upper_q": upper,
                "n_basins": int(row.n_basins),
                "coverage": row.coverage,
                "held_out_coverage": row.held_out_coverage,
            }
        )
    columns = ["statistic", "route", "lower_q", "upper_q", "n_basins", "coverage"]
    return pd.DataFrame(rows, columns=[*columns, "held_out_coverage"]).set_index("statistic")


def _loo_table(observed: pd.DataFrame, estimates: Mapping[str, pd.DataFrame]) -> pd.DataFrame:
    frames = []
    for route, estimated in estimates.items():
        est = estimated.reindex(index=observed.index, columns=observed.columns)
        frames.append(
            pd.DataFrame(
                {
                    "basin_id": np.repeat(
                        observed.index.to_numpy(dtype=object), observed.shape[1]
                    ),
                    "statistic": np.tile(observed.columns.to_numpy(dtype=object), len(observed)),
                    "route": route,
                    "observed": observed.to_numpy(dtype=float).ravel(),
                    "estimated": est.to_numpy(dtype=float).ravel(),
                }
            )
        )
    return pd.concat(frames, ignore_index=True)[list(LOO_COLUMNS)]


class GaugedStatistics:
    """The statistics' routes in leave-one-out at the gauged basins, the chosen route and its
    held-out check: the part of :func:`estimate_statistics` that needs no ungauged basin.

    It is computed when made and given the held-out repeats one at a time
    (:meth:`add_held_out`), so a run can build it while a cluster's workers run the held-out
    check of the bounds and hand it each repeat's summary as it comes back
    (:func:`regional.fitted.fit_region`); :func:`estimate_statistics` then finishes with the
    bounds and the ungauged basins. The same numbers as :func:`estimate_statistics` given
    the repeats at once.

    Parameters
    ----------
    run, method, region, attributes, level, route
        As in :func:`estimate_statistics`.
    """

    def __init__(
        self,
        run: ModelRun,
        method: str,
        region: Region,
        *,
        attributes: Sequence[str],
        level: float,
        route: str = "auto",
    ) -> None:
        if route not in ROUTE_CHOICES:
            raise InputError(
                f"[prediction] statistics_route must be one of {', '.join(ROUTE_CHOICES)}; "
                f"got {route!r}"
            )
        self.level, self.route = level, route
        data = _GaugedData.of(run.context, run.loo, method, attributes, region.attributes)
        estimates = {MODEL: data.model_loo}
        estimates.update(_direct_loo(data))
        errors = {name: _log_error(data.observed, est) for name, est in estimates.items()}
        coverage = {name: _loo_coverage(err, level) for name, err in errors.items()}
        summary = _summary(data.observed, estimates, errors, coverage)
        self.data, self.estimates, self.errors = data, estimates, errors
        self._chosen = _choose(summary, route)
        self._hits: dict[tuple[str, str], list[float]] | None = None

    def add_held_out(self, draw) -> None:
        """Check the chosen routes on one repeat of the held-out check
        (:class:`~regional.repeatcoverage.HeldOutRepeat` or its summary)."""
        if self._hits is None:
            self._hits = {}
        _held_out_hits(self._chosen, self.data, draw, self.level, self._hits)

    @property
    def summary(self) -> pd.DataFrame:
        """The summary table with the chosen routes and, once repeats were given, their
        held-out coverage."""
        if self._hits is None:
            return self._chosen
        return _with_hits(self._chosen, self._hits)


# --------------------------------------------------------------------------------------------
# Held-out check: bounds built without the held-out basins, applied to them


def _held_out_hits(summary, data: _GaugedData, draw, level, hits: dict) -> None:
    """Add one repeat of the daily held-out check to ``hits``: per (statistic, chosen route),
    whether each held-out basin's observed statistic lies inside the route's bounds.

    In the repeat the route is fit on the training basins only, its leave-one-out errors over
    the training basins give the bounds, and the held-out basins' observed statistics are
    checked against them; each (repeat, basin) pair weighs the same.
    """
    chosen = summary[summary["chosen"]]
    needed = {r: list(rows["statistic"]) for r, rows in chosen.groupby("route", sort=False)}
    held = [str(b) for b in draw.held_out]
    training = _training_basins(draw)
    routes = _held_out_routes(data, draw, training, held, needed)
    for route, (train_est, held_est) in routes.items():
        train_err = _log_error(data.observed.loc[training, needed[route]], train_est)
        held_err = _log_error(data.observed.loc[held, needed[route]], held_est)
        for name in needed[route]:
            lower, upper = conformal_quantiles(train_err[name], level)
            values = held_err[name].to_numpy(dtype=float)
            values = values[np.isfinite(values)]
            inside = (values >= lower) & (values <= upper)
            hits.setdefault((name, route), []).extend(inside.astype(float).tolist())


def _with_hits(summary, hits: dict) -> pd.DataFrame:
    """The summary with the held-out coverage of each (statistic, chosen route) of ``hits``."""
    summary = summary.copy()
    for (name, route), values in hits.items():
        rows = (summary["statistic"] == name) & (summary["route"] == route)
        summary.loc[rows, "held_out_coverage"] = np.mean(values) if values else np.nan
    return summary


def _training_basins(draw) -> list[str]:
    """Training basins of a repeat (:class:`~regional.repeatcoverage.HeldOutRepeat` or its
    summary)."""
    if isinstance(draw, HeldOutSummary):
        return list(draw.training)
    return [str(b) for b in draw.training_flow.columns]


def _model_statistics(data: _GaugedData, draw, training, held) -> tuple:
    """Flow statistics of the repeat's training and held-out flows (kept in a summary)."""
    if isinstance(draw, HeldOutSummary) and draw.training_statistics is not None:
        return draw.training_statistics.loc[training], draw.held_out_statistics.loc[held]
    # the flow statistics read each block's precipitation from the whole table (a series store
    # on a cluster: a block of basins at a time, never every basin at once)
    precip_train = precip_held = data.context.precip_mm
    return (
        flowstats.statistics_frame(draw.training_flow[training], precip_mm_day=precip_train),
        flowstats.statistics_frame(draw.held_out_flow[held], precip_mm_day=precip_held),
    )


def _held_out_routes(data: _GaugedData, draw, training, held, needed) -> dict:
    """Route -> (leave-one-out estimates over the training basins, estimates at the held-out
    basins), both fit on the training basins only, for the routes and statistics needed."""
    out = {}
    if MODEL in needed:
        out[MODEL] = _model_statistics(data, draw, training, held)
    if REGRESSION in needed and len(training) >= MIN_BASINS + 1:
        columns = needed[REGRESSION]
        picked = [data.observed.columns.get_loc(c) for c in columns]
        z, logs = _standardised(data, training)
        targets = standardise_like(data, training, data.attributes.loc[held])
        estimate = 10.0 ** regression_log_estimates(z, logs[:, picked], targets)
        out[REGRESSION] = (
            _regression_loo(data, training, columns),
            pd.DataFrame(estimate, index=held, columns=columns),
        )
    for route, method in DONOR_ROUTES.items():
        if route in needed and method in data.donor_methods:
            out[route] = (
                _donor_loo(data, method, training),
                _donor_estimate(data, method, training, held),
            )
    return {route: (a[needed[route]], b[needed[route]]) for route, (a, b) in out.items()}


# --------------------------------------------------------------------------------------------
# Ungauged basins


def _model_route(data: _GaugedData, flow: pd.DataFrame, targets, region) -> pd.DataFrame:
    """Statistics of the ungauged basins' flow over the evaluation days (the model route)."""
    flow = flow.loc[flow.index.isin(data.dates)]
    precip = region.precip_mm.loc[flow.index, targets]
    return flowstats.statistics_frame(flow[targets], precip_mm_day=precip)


def _ungauged_estimates(data: _GaugedData, model: pd.DataFrame, targets, region) -> dict:
    """Route -> DataFrame (targets x statistics) at the ungauged basins."""
    out = {MODEL: model.loc[targets]}
    attributes = region.attributes.loc[targets]
    if len(data.gauged) >= MIN_BASINS:
        z, logs = _standardised(data, data.gauged)
        estimate = 10.0 ** regression_log_estimates(
            z, logs, standardise_like(data, data.gauged, attributes)
        )
        out[REGRESSION] = pd.DataFrame(
            estimate, index=pd.Index(targets, name="basin_id"), columns=data.observed.columns
        )
    for route, method in DONOR_ROUTES.items():
        if method in data.donor_methods:
            out[route] = _donor_estimate(data, method, data.gauged, targets)
    return out


def _ungauged_table(estimates: dict, bounds: pd.DataFrame, area: pd.Series, applicable):
    frames = []
    for name in bounds.index:
        row = bounds.loc[name]
        item = flowstats.statistic(name)
        value = estimates[row["route"]][name].to_numpy(dtype=float)
        low, high = value * 10.0 ** row["lower_q"], value * 10.0 ** row["upper_q"]
        targets = estimates[row["route"]].index.astype(str)
        frame = pd.DataFrame(
            {
                "basin_id": targets,
                "statistic": name,
                "unit": item.unit,
                "estimate": value,
                "low": low,
                "high": high,
            }
        )
        areas = area.reindex(targets).to_numpy(dtype=float)
        for column in ("estimate", "low", "high"):
            frame[f"{column}_m3s"] = (
                flowstats.to_m3s(frame[column], areas) if item.is_flow else np.nan
            )
        frame["route"] = row["route"]
        frame["applicable"] = (
            True if applicable is None else applicable.reindex(targets).fillna(False).to_numpy()
        )
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)[list(UNGAUGED_COLUMNS)]


def _long_estimates(estimates: dict) -> pd.DataFrame:
    frames = []
    for route, table in estimates.items():
        long = (
            table.rename_axis("basin_id")
            .reset_index()
            .melt(id_vars="basin_id", var_name="statistic", value_name="estimate")
        )
        frames.append(long.assign(route=route))
    return pd.concat(frames, ignore_index=True)[["basin_id", "statistic", "route", "estimate"]]


def _wide(long: pd.DataFrame) -> pd.DataFrame:
    columns = {}
    order = list(dict.fromkeys(long["statistic"]))
    table = long.set_index(["basin_id", "statistic"])
    for name in order:
        item = flowstats.statistic(name)
        part = table.xs(name, level="statistic")
        columns[name] = part["estimate"]
        columns[f"{name}_low"] = part["low"]
        columns[f"{name}_high"] = part["high"]
        if item.is_flow:
            columns[item.m3s_name] = part["estimate_m3s"]
            columns[f"{item.m3s_name}_low"] = part["low_m3s"]
            columns[f"{item.m3s_name}_high"] = part["high_m3s"]
    wide = pd.DataFrame(columns)
    wide.index.name = "basin_id"
    return wide


def _gauged_wide(stats: FlowStatistics) -> pd.DataFrame:
    columns = {}
    loo = stats.loo.set_index(["basin_id", "statistic", "route"])["estimated"]
    for name, row in stats.bounds.iterrows():
        observed = stats.observed[name]
        estimate = loo.xs((name, row["route"]), level=("statistic", "route"))
        estimate = estimate.reindex(observed.index)
        columns[f"{name}_observed"] = observed
        columns[f"{name}_loo"] = estimate
        columns[f"{name}_loo_low"] = estimate * 10.0 ** row["lower_q"]
        columns[f"{name}_loo_high"] = estimate * 10.0 ** row["upper_q"]
    wide = pd.DataFrame(columns)
    wide.index.name = "basin_id"
    return wide


def _notes(summary: pd.DataFrame, bounds: pd.DataFrame, level: float, n_gauged: int) -> list:
    chosen = summary[summary["chosen"]]
    routes = chosen["route"].value_counts()
    listed = ", ".join(f"{route} for {count}" for route, count in routes.items())
    notes = [
        f"flow statistics: route chosen per statistic by the smaller median absolute log10 "
        f"error in leave-one-out over {n_gauged} gauged basins ({listed} statistics); "
        f"{level:.0%} bounds from the chosen route's leave-one-out errors"
    ]
    short = chosen[(chosen["coverage"] < level - 0.1)]
    if len(short):
        notes.append(
            "flow statistics whose bounds covered fewer gauged basins than nominal minus 0.1 in "
            f"leave-one-out: {', '.join(short['statistic'])}"
        )
    if not np.isfinite(bounds[["lower_q", "upper_q"]].to_numpy()).all():
        notes.append(
            f"too few gauged basins for finite {level:.0%} bounds of some statistics; lower "
            "[prediction] level or add gauged basins"
        )
    return notes
