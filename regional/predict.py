"""Estimates at ungauged basins: parameters with intervals, daily flow with bounds, statistics.

:func:`predict_ungauged` is the entry point. For every ungauged basin it gives

- the parameters of every transfer method (and the median benchmark), refit on ALL gauged
  basins, with their intervals (regression: OLS prediction interval; donor methods: the donors'
  range; median: the central range of the gauged parameters);
- the daily flow of the chosen (model, method), simulated exactly as in leave-one-out
  (:mod:`regional.crossval`), in mm/day and m3/s, with bounds at a nominal level built from the
  leave-one-out errors by split-conformal prediction (Vovk, Gammerman and Shafer 2005; Lei,
  G'Sell, Rinaldo, Tibshirani and Wasserman 2018) with the basin as the exchangeable unit
  (CDF pooling, Dunn, Wasserman and Ramdas 2023);
- flow statistics (:func:`flow_statistics`) and an applicability check (:func:`applicability`).

The honest coverage of the bounds is measured by :func:`loo_coverage`: for each gauged basin the
error model is rebuilt without that basin and the share of its observed days inside its bounds
is counted. See ``docs/prediction.md``.

References
----------
Vovk, V., Gammerman, A., Shafer, G. (2005): Algorithmic Learning in a Random World. Springer.
Lei, J., G'Sell, M., Rinaldo, A., Tibshirani, R. J., Wasserman, L. (2018): Distribution-free
predictive inference for regression. J. Am. Stat. Assoc. 113(523), 1094-1111.
Dunn, R., Wasserman, L., Ramdas, A. (2023): Distribution-free prediction sets for two-layer
hierarchical models. J. Am. Stat. Assoc. (arXiv:1809.07441).
Mahalanobis, P. C. (1936): On the generalized distance in statistics. Proc. Natl. Inst. Sci.
India 2(1), 49-55.
Hyndman, R. J., Fan, Y. (1996): Sample quantiles in statistical packages. Am. Stat. 50(4),
361-365.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import stats

from regional.crossval import FoldContext, donor_simulator, method_order
from regional.errors import InputError, InputWarning
from regional.models import get_model, parameter_transforms
from regional.region import MM_PER_DAY_PER_M3S_KM2
from regional.transfer import Donation, make_transfer, simulate_donors

if TYPE_CHECKING:  # pragma: no cover - annotations only; pipeline sits below this module
    from regional.result import RunResult

OFFSET_FRACTION = 0.01
"""A basin's log offset c is this share of its mean simulated flow (mm/day)."""
MIN_OFFSET_MM = 1e-3
"""Floor of the log offset c, mm/day (for a basin with almost no simulated flow)."""
MAX_CLASSES = 5
"""Most flow classes of the error model (within-basin quantiles of the simulated flow)."""
MIN_DAYS_PER_CLASS = 30
"""A basin needs this many observed days per class for classes to be used."""
MIN_BASINS_FOR_CLASSES = 10
"""Fewer calibration basins than this: one class (no split by flow)."""
APPLICABILITY_LEVEL = 0.95
"""Chi-square quantile the Mahalanobis distance squared is compared with."""
EIGEN_FLOOR = 1e-6
"""Eigenvalues of the donors' correlation matrix are floored at this share of the largest."""

SUMMARY_STATISTICS = ("mean_flow_mm", "mean_flow_m3s", "q5_mm", "q50_mm", "q95_mm", "min7_mean_mm")
"""The headline statistics (mean flow, flow-duration points, 7-day minimum)."""
STATISTIC_COLUMNS = (
    *SUMMARY_STATISTICS,
    *(f"flow_m{month:02d}_mm" for month in range(1, 13)),
)
"""Statistic columns of :attr:`Prediction.table` (``mean_flow_m3s`` needs the area)."""
FLOW_COLUMNS = ("basin_id", "date", "flow_mm", "flow_m3s", "flow_low_mm", "flow_high_mm")
"""Columns of :attr:`Prediction.flows`."""


@dataclass(frozen=True)
class Prediction:
    """Estimates at the ungauged basins of a region (see :func:`predict_ungauged`).

    Attributes
    ----------
    model, method : str
        The chosen storage model and transfer method.
    level : float
        Nominal level of the daily flow bounds, e.g. 0.9.
    table : DataFrame
        Indexed by ``basin_id`` (ungauged): the transfer attributes; for every method m and
        parameter p ``{p}_{m}``, ``{p}_{m}_low``, ``{p}_{m}_high`` (parameter units); ``method``
        (chosen), the chosen ``p``, ``p_low``, ``p_high``; the statistics of
        :data:`STATISTIC_COLUMNS` (mm/day, ``mean_flow_m3s`` in m3/s); ``applicable`` (bool),
        ``reason`` (str, "" when applicable), ``mahalanobis_d2``, ``nearest_donor_distance``.
    flows : DataFrame
        Long: ``basin_id``, ``date``, ``flow_mm``, ``flow_m3s``, ``flow_low_mm``,
        ``flow_high_mm``, every simulated day after the warm-up.
    coverage : DataFrame
        Per (model, method) of leave-one-out: ``model``, ``method``, ``level``, ``coverage``
        (mean over basins of the share of observed days inside the bounds built without the
        basin), ``n_days``, ``n_basins``.
    error_model : DataFrame
        The conformal quantiles of the chosen (model, method), one row per flow class:
        ``class``, ``percentile_low``, ``percentile_high`` (within-basin quantile range of the
        simulated flow), ``lower_q``, ``upper_q`` (log-flow residuals, dimensionless),
        ``n`` (days), ``n_basins``, ``offset_fraction`` (each basin's log offset c is this
        share of its mean simulated flow, mm/day).
    notes : tuple of str
        What the user should read beside the numbers.
    """

    model: str
    method: str
    level: float
    table: pd.DataFrame
    flows: pd.DataFrame
    coverage: pd.DataFrame
    error_model: pd.DataFrame
    notes: tuple[str, ...]


# --------------------------------------------------------------------------------------------
# Conformal error model


@dataclass(frozen=True)
class ConformalErrorModel:
    """Quantiles of log-flow residuals by flow class, from leave-one-out transfers.

    Attributes
    ----------
    level : float
        Nominal level of the bounds.
    offset_fraction : float
        The log offset of a basin is c = offset_fraction x its mean simulated flow (mm/day,
        floored at :data:`MIN_OFFSET_MM`), in e = log(obs + c) - log(sim + c).
    edges : ndarray (n_classes + 1,)
        Class edges in within-basin non-exceedance probability of the simulated flow (0 .. 1).
    lower_q, upper_q : ndarray (n_classes,)
        Residual quantiles (dimensionless, natural log); -inf / +inf when too few residuals
        allow a finite bound at the level.
    n_days : ndarray (n_classes,)
        Residual days per class.
    n_basins : int
        Basins the model was built from.
    """

    level: float
    offset_fraction: float
    edges: np.ndarray
    lower_q: np.ndarray
    upper_q: np.ndarray
    n_days: np.ndarray
    n_basins: int

    @property
    def n_classes(self) -> int:
        """Number of flow classes."""
        return len(self.lower_q)

    @property
    def table(self) -> pd.DataFrame:
        """One row per class (see :attr:`Prediction.error_model`)."""
        return pd.DataFrame(
            {
                "class": np.arange(1, self.n_classes + 1),
                "percentile_low": 100.0 * self.edges[:-1],
                "percentile_high": 100.0 * self.edges[1:],
                "lower_q": self.lower_q,
                "upper_q": self.upper_q,
                "n": self.n_days.astype(int),
                "n_basins": self.n_basins,
                "offset_fraction": self.offset_fraction,
            }
        )

    def bounds(self, simulated: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Lower and upper daily bounds around simulated flows.

        Parameters
        ----------
        simulated : DataFrame
            Days x basins, simulated flow, mm/day (>= 0). Each day's class is the within-basin
            quantile of its flow among the rows given, and each basin's offset c comes from its
            mean over those rows.

        Returns
        -------
        (low, high) : tuple of DataFrame
            Like ``simulated``, mm/day: (sim + c) exp(q) - c with the class's quantiles, the
            lower bound floored at 0; always low <= sim <= high.
        """
        values = simulated.to_numpy(dtype=float)
        classes = _flow_classes(values, self.n_classes)
        offsets = basin_offsets(values, fraction=self.offset_fraction)
        low, high = _apply(values, classes, offsets, self)
        return (
            pd.DataFrame(low, index=simulated.index, columns=simulated.columns),
            pd.DataFrame(high, index=simulated.index, columns=simulated.columns),
        )


def conformal_bounds(
    observed: pd.DataFrame,
    simulated: pd.DataFrame,
    *,
    level: float,
    offset_fraction: float = OFFSET_FRACTION,
    n_classes: int | None = None,
) -> ConformalErrorModel:
    """Calibrate the split-conformal error model of transferred daily flows.

    Residuals e = log(obs + c) - log(sim + c) of every gauged basin's leave-one-out flow are
    pooled per flow class (the within-basin quantile of the simulated flow) so that every basin
    weighs the same: each day of basin b in class k has weight 1 / (n_k n_{b,k}), n_k the
    basins in the class (CDF pooling, Dunn, Wasserman and Ramdas 2023). The bounds are the
    (1 - L)/2 and (1 + L)/2 quantiles of that pooled distribution with the finite-sample
    correction of split-conformal prediction (Lei et al. 2018) over the class's N residual days:
    levels floor((N+1)(1-L)/2)/N and ceil((N+1)(1+L)/2)/N (-inf / +inf outside 1/N .. 1).
    Quantiles are clipped so that lower_q <= 0 <= upper_q (bounds never exclude the simulation
    itself; this only widens them). Coverage is not guaranteed in finite samples of basins; it
    is measured by :func:`loo_coverage`.

    Parameters
    ----------
    observed, simulated : DataFrame
        Evaluation days x gauged basins (same shape and labels), mm/day; NaN in ``observed``
        = missing day.
    level : float
        Nominal level L in (0, 1).
    offset_fraction : float, default :data:`OFFSET_FRACTION`
        Each basin's log offset c is this share of its mean simulated flow (mm/day), floored at
        :data:`MIN_OFFSET_MM`: computable at an ungauged basin, and it never uses the
        observations.
    n_classes : int, optional
        Flow classes. Default: up to :data:`MAX_CLASSES` while the basins keep a median of
        :data:`MIN_DAYS_PER_CLASS` observed days per class; 1 below
        :data:`MIN_BASINS_FOR_CLASSES` basins.

    Returns
    -------
    ConformalErrorModel
    """
    level = _check_level(level)
    obs, sim = _aligned(observed, simulated)
    k = _n_classes(obs) if n_classes is None else int(n_classes)
    residual, basin, cls = _residuals(obs, sim, _flow_classes(sim, k), offset_fraction)
    return _fit(_Sorted.of(residual, basin, cls, k), level=level, fraction=offset_fraction)


def basin_offsets(simulated: np.ndarray, *, fraction: float = OFFSET_FRACTION) -> np.ndarray:
    """Log offset c per basin (column), mm/day: ``fraction`` x mean simulated flow, floored."""
    return np.maximum(
        fraction * np.mean(np.asarray(simulated, dtype=float), axis=0), MIN_OFFSET_MM
    )


def _check_level(level: float) -> float:
    if isinstance(level, bool) or not isinstance(level, int | float) or not 0.0 < level < 1.0:
        raise InputError(
            f"[prediction] level must be a number strictly between 0 and 1 (e.g. 0.9 for 90% "
            f"bounds); got {level!r}"
        )
    return float(level)


def _aligned(observed: pd.DataFrame, simulated: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    if observed.shape != simulated.shape or not observed.columns.equals(simulated.columns):
        raise ValueError(
            f"observed {observed.shape} and simulated {simulated.shape} flows must share days "
            "and basins"
        )
    return observed.to_numpy(dtype=float), simulated.to_numpy(dtype=float)


def _n_classes(obs: np.ndarray) -> int:
    days = np.isfinite(obs).sum(axis=0)
    days = days[days > 0]
    if len(days) < MIN_BASINS_FOR_CLASSES:
        return 1
    return int(np.clip(np.median(days) // MIN_DAYS_PER_CLASS, 1, MAX_CLASSES))


def _flow_classes(sim: np.ndarray, n_classes: int) -> np.ndarray:
    """Class 0..n_classes-1 of each day: the within-basin quantile (rank - 0.5) / T of its flow."""
    ranks = stats.rankdata(sim, method="average", axis=0)
    share = (ranks - 0.5) / sim.shape[0]
    return np.minimum((share * n_classes).astype(int), n_classes - 1)


def _residuals(obs, sim, classes, fraction):
    """Flattened residuals of the observed days with their basin (column) and class."""
    offsets = basin_offsets(sim, fraction=fraction)
    day, basin = np.nonzero(np.isfinite(obs))
    c = offsets[basin]
    residual = np.log(obs[day, basin] + c) - np.log(sim[day, basin] + c)
    return residual, basin, classes[day, basin]


@dataclass(frozen=True)
class _Sorted:
    """Residuals of each class sorted once, with their basins, for repeated weighted quantiles."""

    values: tuple[np.ndarray, ...]
    basins: tuple[np.ndarray, ...]

    @classmethod
    def of(cls, residual, basin, klass, n_classes) -> _Sorted:
        values, basins = [], []
        for k in range(n_classes):
            inside = klass == k
            order = np.argsort(residual[inside], kind="stable")
            values.append(residual[inside][order])
            basins.append(basin[inside][order])
        return cls(tuple(values), tuple(basins))


def _fit(data: _Sorted, *, level: float, fraction: float):
    """Conformal error model from the sorted residuals of each flow class."""
    n_classes = len(data.values)
    lower, upper, n_days = np.empty(n_classes), np.empty(n_classes), np.zeros(n_classes)
    used = set()
    for k, (values, basins) in enumerate(zip(data.values, data.basins, strict=True)):
        lower[k], upper[k] = _pooled_bounds(values, basins, level)
        n_days[k] = len(values)
        used.update(np.unique(basins).tolist())
    return ConformalErrorModel(
        level=level,
        offset_fraction=fraction,
        edges=np.linspace(0.0, 1.0, n_classes + 1),
        lower_q=np.minimum(lower, 0.0),
        upper_q=np.maximum(upper, 0.0),
        n_days=n_days,
        n_basins=len(used),
    )


def _pooled_bounds(values: np.ndarray, basins: np.ndarray, level: float) -> tuple[float, float]:
    """Basin-weighted conformal quantiles (lower, upper) of one class's sorted residuals."""
    days = len(values)
    if days == 0:
        return -np.inf, np.inf
    codes, inverse, counts = np.unique(basins, return_inverse=True, return_counts=True)
    cumulative = np.cumsum(1.0 / (len(codes) * counts[inverse]))
    low_level = np.floor((days + 1) * (1.0 - level) / 2.0) / days
    high_level = np.ceil((days + 1) * (1.0 + level) / 2.0) / days
    return (
        _inverse_cdf(values, cumulative, low_level, -np.inf),
        _inverse_cdf(values, cumulative, high_level, np.inf),
    )


def _inverse_cdf(values, cumulative, probability, outside) -> float:
    """Smallest value whose cumulative weight reaches ``probability`` (``outside`` beyond 0..1)."""
    tolerance = 1e-12
    if probability <= tolerance or probability > 1.0 + tolerance:
        return float(outside)
    index = np.searchsorted(cumulative, probability - tolerance, side="left")
    return float(values[min(index, len(values) - 1)])


def _apply(sim: np.ndarray, classes: np.ndarray, offsets: np.ndarray, model: ConformalErrorModel):
    with np.errstate(over="ignore"):
        low = (sim + offsets) * np.exp(model.lower_q[classes]) - offsets
        high = (sim + offsets) * np.exp(model.upper_q[classes]) - offsets
    return np.clip(np.minimum(low, sim), 0.0, None), np.maximum(high, sim)


def _held_out_coverage(observed: pd.DataFrame, simulated: pd.DataFrame, level: float) -> dict:
    """Coverage of each basin's observed days by bounds built from the OTHER basins only.

    Classes and offsets are within-basin functions of the simulated flow, so each residual is
    computed once; the quantiles without each basin come from :func:`_held_out_quantiles`, all
    basins at once. The number of classes depends on record lengths only and is set once.
    """
    obs, sim = _aligned(observed, simulated)
    k = _n_classes(obs)
    classes = _flow_classes(sim, k)
    residual, basin, cls = _residuals(obs, sim, classes, OFFSET_FRACTION)
    data = _Sorted.of(residual, basin, cls, k)
    n_columns = obs.shape[1]
    lower = np.empty((k, n_columns))
    upper = np.empty((k, n_columns))
    for c, (values, basins) in enumerate(zip(data.values, data.basins, strict=True)):
        lower[c], upper[c] = _held_out_quantiles(values, basins, level, n_columns)
    columns = np.broadcast_to(np.arange(n_columns), obs.shape)
    offsets = basin_offsets(sim)
    with np.errstate(over="ignore"):
        low = (sim + offsets) * np.exp(np.minimum(lower, 0.0)[classes, columns]) - offsets
        high = (sim + offsets) * np.exp(np.maximum(upper, 0.0)[classes, columns]) - offsets
    low, high = np.clip(np.minimum(low, sim), 0.0, None), np.maximum(high, sim)
    valid = np.isfinite(obs)
    inside = (obs >= low) & (obs <= high) & valid
    scored = valid.any(axis=0)
    shares = inside[:, scored].sum(axis=0) / valid[:, scored].sum(axis=0)
    return {
        "coverage": float(np.mean(shares)) if len(shares) else np.nan,
        "n_days": int(valid.sum()),
        "n_basins": int(scored.sum()),
    }


def _held_out_quantiles(
    values: np.ndarray, basins: np.ndarray, level: float, n_columns: int
) -> tuple[np.ndarray, np.ndarray]:
    """Basin-weighted conformal quantiles of one class with each basin left out in turn.

    Equal to :func:`_pooled_bounds` on the class's residuals without basin j, for every j at
    once: with B basins in the class and n_b days of basin b, the cumulative weight without j at
    sorted position i is B / (B - 1) x (C(i) - m_j(i) / (B n_j)), C the full cumulative weight
    and m_j(i) the days of basin j at or before i; a vectorised bisection over i finds each
    quantile in O(B log D) instead of refitting B times.

    Returns
    -------
    lower, upper : ndarray (n_columns,)
        Quantiles without each basin (column); basins absent from the class get the full ones.
    """
    full_low, full_high = _pooled_bounds(values, basins, level)
    lower, upper = np.full(n_columns, full_low), np.full(n_columns, full_high)
    days = len(values)
    if days == 0:
        return lower, upper
    codes, inverse, counts = np.unique(basins, return_inverse=True, return_counts=True)
    n_basins = len(codes)
    if n_basins == 1:
        lower[codes], upper[codes] = -np.inf, np.inf
        return lower, upper
    cumulative = np.cumsum(1.0 / (n_basins * counts[inverse]))
    order = np.argsort(inverse, kind="stable")
    keys = inverse[order] * (days + 1) + order
    base = np.arange(n_basins) * (days + 1)
    starts = np.searchsorted(keys, base)
    scale = n_basins / (n_basins - 1)

    def without(position: np.ndarray) -> np.ndarray:
        own = np.searchsorted(keys, base + position, side="right") - starts
        return scale * (cumulative[position] - own / (n_basins * counts))

    remaining = days - counts
    probabilities = (
        np.floor((remaining + 1) * (1.0 - level) / 2.0) / remaining,
        np.ceil((remaining + 1) * (1.0 + level) / 2.0) / remaining,
    )
    for out, probability, outside in zip(
        (lower, upper), probabilities, (-np.inf, np.inf), strict=True
    ):
        out[codes] = _bisect_quantiles(values, without, probability, outside, days)
        unreached = np.flatnonzero(np.isnan(out[codes]))
        for j in unreached:  # rounding left the last weight short of 1: refit that basin
            keep = basins != codes[j]
            bounds = _pooled_bounds(values[keep], basins[keep], level)
            out[codes[j]] = bounds[0] if outside < 0 else bounds[1]
    return lower, upper


def _bisect_quantiles(values, without, probability, outside, days) -> np.ndarray:
    """Smallest sorted position whose held-out cumulative weight reaches ``probability``."""
    tolerance = 1e-12
    target = probability - tolerance
    lo = np.zeros(len(probability), dtype=np.int64)
    hi = np.full(len(probability), days, dtype=np.int64)
    while (lo < hi).any():
        mid = (lo + hi) // 2
        reached = without(np.minimum(mid, days - 1)) >= target
        active = lo < hi
        hi = np.where(active & reached, mid, hi)
        lo = np.where(active & ~reached, mid + 1, lo)
    result = np.where(lo < days, values[np.minimum(lo, days - 1)], np.nan)
    invalid = (probability <= tolerance) | (probability > 1.0 + tolerance)
    return np.where(invalid, outside, result)


def loo_coverage(result: RunResult, *, level: float) -> pd.DataFrame:
    """Honest coverage of the conformal bounds of every (model, method) in leave-one-out.

    For each gauged basin the error model is built from the other basins' leave-one-out
    residuals and the share of the basin's observed evaluation days inside its bounds is
    counted; ``coverage`` is the mean of those shares over basins (each basin weighs the same).

    Parameters
    ----------
    result : RunResult
        From :func:`regional.pipeline.run`.
    level : float
        Nominal level of the bounds, in (0, 1).

    Returns
    -------
    DataFrame
        ``model``, ``method``, ``level``, ``coverage``, ``n_days``, ``n_basins``.
    """
    level = _check_level(level)
    rows = []
    for model, run in result.runs.items():
        loo = run.loo
        for method in loo.methods:
            measured = _held_out_coverage(loo.observed, loo.simulated[method], level)
            rows.append({"model": model, "method": method, "level": level, **measured})
    return pd.DataFrame(
        rows, columns=["model", "method", "level", "coverage", "n_days", "n_basins"]
    )


# --------------------------------------------------------------------------------------------
# Flow statistics


def flow_statistics(flow_mm: pd.DataFrame, *, area_km2: pd.Series | None = None) -> pd.DataFrame:
    """Flow statistics of daily series, one row per basin.

    Parameters
    ----------
    flow_mm : DataFrame
        Daily flow, mm/day: a DatetimeIndex (daily) x basins; NaN = missing.
    area_km2 : Series, optional
        Basin areas, km2, indexed by basin id; adds ``mean_flow_m3s`` = mean_flow_mm x area /
        86.4.

    Returns
    -------
    DataFrame
        Indexed by ``basin_id``: ``mean_flow_mm``; ``q5_mm``, ``q50_mm``, ``q95_mm``:
        flow-duration (exceedance) percentiles, Qx the flow exceeded x% of the time, i.e. the
        (100 - x)th sample percentile with linear interpolation (Hyndman and Fan 1996 type 7,
        numpy's default); ``min7_mean_mm``: mean over complete calendar years (every day has a
        value) of the annual minimum of the trailing 7-day mean (window ending on the day, all 7
        days present); ``flow_m01_mm`` .. ``flow_m12_mm``: mean of all days of each calendar
        month; with ``area_km2``, ``mean_flow_m3s``.
    """
    _check_daily(flow_mm)
    values = flow_mm.to_numpy(dtype=float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN basins give NaN
        table = pd.DataFrame(
            {
                "mean_flow_mm": np.nanmean(values, axis=0),
                "q5_mm": np.nanpercentile(values, 95.0, axis=0),
                "q50_mm": np.nanpercentile(values, 50.0, axis=0),
                "q95_mm": np.nanpercentile(values, 5.0, axis=0),
            },
            index=pd.Index(flow_mm.columns.astype(str), name="basin_id"),
        )
    table["min7_mean_mm"] = _mean_annual_min7(flow_mm).to_numpy()
    monthly = _monthly_means(flow_mm)
    for month in range(1, 13):
        table[f"flow_m{month:02d}_mm"] = monthly.loc[month].to_numpy()
    if area_km2 is not None:
        area = pd.Series(area_km2).rename(index=str).reindex(table.index).to_numpy(dtype=float)
        table.insert(1, "mean_flow_m3s", to_m3s(table["mean_flow_mm"].to_numpy(), area))
    return table


def to_m3s(flow_mm: np.ndarray, area_km2: np.ndarray) -> np.ndarray:
    """mm/day -> m3/s through the area: Q_m3s = Q_mm x area_km2 / 86.4."""
    return (
        np.asarray(flow_mm, dtype=float)
        * np.asarray(area_km2, dtype=float)
        / (MM_PER_DAY_PER_M3S_KM2)
    )


def _check_daily(flow_mm: pd.DataFrame) -> None:
    if not isinstance(flow_mm, pd.DataFrame) or not isinstance(flow_mm.index, pd.DatetimeIndex):
        raise InputError(
            "flow statistics need a DataFrame of daily flow indexed by date (DatetimeIndex) with "
            f"one column per basin; got {type(flow_mm).__name__}"
            + (f" indexed by {type(flow_mm.index).__name__}" if hasattr(flow_mm, "index") else "")
        )
    if not flow_mm.index.is_monotonic_increasing or flow_mm.index.has_duplicates:
        raise InputError(
            "flow statistics: the dates must be increasing with no repeats; sort the series and "
            "drop duplicate days"
        )


def _mean_annual_min7(flow_mm: pd.DataFrame) -> pd.Series:
    """Mean over complete calendar years of the annual minimum trailing 7-day mean."""
    rolling = flow_mm.astype(float).rolling("7D", min_periods=7).mean()
    years = flow_mm.index.year
    present = flow_mm.notna().groupby(years).sum()
    length = pd.Series(
        np.where(pd.to_datetime([f"{y}-12-31" for y in present.index]).is_leap_year, 366, 365),
        index=present.index,
    )
    complete = present.eq(length, axis=0)
    annual = rolling.groupby(years).min().where(complete)
    return annual.mean(axis=0)


def _monthly_means(flow_mm: pd.DataFrame) -> pd.DataFrame:
    return flow_mm.astype(float).groupby(flow_mm.index.month).mean().reindex(range(1, 13))


# --------------------------------------------------------------------------------------------
# Applicability


def applicability(
    attributes_gauged: pd.DataFrame,
    attributes_targets: pd.DataFrame,
    columns: Sequence[str],
) -> pd.DataFrame:
    """Flag targets whose attributes the gauged donors do not support.

    Three tests, any one flags the target:

    1. range: an attribute below the donors' minimum or above their maximum;
    2. Mahalanobis (1936) distance squared to the donors' mean, with the donors' covariance
       (correlation of the standardised attributes; eigenvalues floored at
       :data:`EIGEN_FLOOR` x the largest when singular), above the chi-square
       :data:`APPLICABILITY_LEVEL` quantile with p (attributes) degrees of freedom;
    3. nearest donor: the Euclidean distance to the nearest donor in attributes standardised
       with the donors' mean and standard deviation, above the largest nearest-neighbour
       distance among the donors themselves.

    Parameters
    ----------
    attributes_gauged : DataFrame
        Donor (gauged) basins x attributes, indexed by basin id.
    attributes_targets : DataFrame
        Target basins x attributes, indexed by basin id.
    columns : sequence of str
        Attributes compared (numeric, complete).

    Returns
    -------
    DataFrame
        Indexed by target ``basin_id``: ``applicable`` (bool), ``reason`` (str, "" when
        applicable: names the attribute with its value and the range, or the test with its value
        and limit), ``outside_range`` (attribute names, comma separated), ``mahalanobis_d2``,
        ``mahalanobis_limit``, ``nearest_donor_distance``, ``nearest_donor_limit``.
    """
    columns = list(columns)
    donors, targets = _attribute_arrays(attributes_gauged, attributes_targets, columns)
    reasons, outside = _range_reasons(donors, targets, columns)
    z_donors, z_targets = _standardised(donors, targets)
    d2, d2_limit = _mahalanobis(z_donors, z_targets)
    nearest, nearest_limit = _nearest_donor(z_donors, z_targets)
    for i in range(len(targets)):
        if d2[i] > d2_limit:
            reasons[i].append(
                f"Mahalanobis distance squared {d2[i]:.1f} to the donors exceeds the chi-square "
                f"{APPLICABILITY_LEVEL:.0%} quantile {d2_limit:.1f} ({len(columns)} attributes)"
            )
        if nearest[i] > nearest_limit:
            reasons[i].append(
                f"nearest donor in standardised attributes at {nearest[i]:.2f}, farther than the "
                f"largest nearest-donor distance among the donors ({nearest_limit:.2f})"
            )
    return pd.DataFrame(
        {
            "applicable": [not r for r in reasons],
            "reason": ["; ".join(r) for r in reasons],
            "outside_range": [", ".join(o) for o in outside],
            "mahalanobis_d2": d2,
            "mahalanobis_limit": d2_limit,
            "nearest_donor_distance": nearest,
            "nearest_donor_limit": nearest_limit,
        },
        index=pd.Index(attributes_targets.index.astype(str), name="basin_id"),
    )


def _attribute_arrays(gauged, targets, columns):
    for role, table in (("gauged", gauged), ("target", targets)):
        missing = [c for c in columns if c not in table.columns]
        if missing:
            raise InputError(
                f"applicability: the {role} attribute table lacks column(s) {missing}; every "
                "transfer attribute is needed at every basin"
            )
        values = table[columns].to_numpy(dtype=float)
        if not np.isfinite(values).all():
            row, col = np.argwhere(~np.isfinite(values))[0]
            raise InputError(
                f"applicability: attribute {columns[col]!r} is missing or not finite at {role} "
                f"basin {table.index[row]!r}; fill it in the basins layer"
            )
    if len(gauged) < 2:
        raise InputError(
            f"applicability needs at least 2 gauged basins to compare with; found {len(gauged)}"
        )
    return gauged[columns].to_numpy(dtype=float), targets[columns].to_numpy(dtype=float)


def _range_reasons(donors, targets, columns):
    low, high = donors.min(axis=0), donors.max(axis=0)
    reasons: list[list[str]] = [[] for _ in range(len(targets))]
    outside: list[list[str]] = [[] for _ in range(len(targets))]
    for i, j in np.argwhere((targets < low) | (targets > high)):
        side = "below" if targets[i, j] < low[j] else "above"
        reasons[i].append(
            f"{columns[j]} {targets[i, j]:.4g} {side} the donors' range "
            f"{low[j]:.4g} to {high[j]:.4g}"
        )
        outside[i].append(columns[j])
    return reasons, outside


def _standardised(donors, targets):
    mean = donors.mean(axis=0)
    scale = donors.std(axis=0, ddof=1)
    scale = np.where(scale > 0, scale, 1.0)  # a constant attribute: only the range test sees it
    return (donors - mean) / scale, (targets - mean) / scale


def _mahalanobis(z_donors, z_targets) -> tuple[np.ndarray, float]:
    p = z_donors.shape[1]
    covariance = np.atleast_2d(np.cov(z_donors, rowvar=False))
    eigenvalues, vectors = np.linalg.eigh(covariance)
    floor = EIGEN_FLOOR * max(float(eigenvalues.max()), 1e-12)
    eigenvalues = np.maximum(eigenvalues, floor)
    projected = (z_targets - z_donors.mean(axis=0)) @ vectors
    d2 = np.sum(projected**2 / eigenvalues, axis=1)
    return d2, float(stats.chi2.ppf(APPLICABILITY_LEVEL, p))


def _nearest_donor(z_donors, z_targets) -> tuple[np.ndarray, float]:
    def distances(a, b):
        return np.sqrt(np.maximum(((a[:, None, :] - b[None, :, :]) ** 2).sum(axis=2), 0.0))

    among = distances(z_donors, z_donors)
    np.fill_diagonal(among, np.inf)
    return distances(z_targets, z_donors).min(axis=1), float(among.min(axis=1).max())


# --------------------------------------------------------------------------------------------
# Prediction at ungauged basins


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
    level = _check_level(result.settings.prediction.level if level is None else level)
    targets = list(result.region.ungauged)
    if not targets:
        raise InputError(
            "the region has no ungauged basin to predict: every basin has observed flow in the "
            "calibration period; add basins without flow to the basins layer"
        )
    run = result.runs[result.chosen_model]
    context = run.context
    target_attributes = result.region.attributes.loc[targets]
    donations, parameters, notes = _parameters_by_method(context, target_attributes, level)
    if result.chosen_method not in donations:
        raise InputError(
            f"[prediction] method {result.chosen_method!r} is not a transfer method; choose one "
            f"of {', '.join(map(repr, donations))}"
        )
    flow_mm = _chosen_flow(context, donations[result.chosen_method], targets)
    error_model = conformal_bounds(
        run.loo.observed, run.loo.simulated[result.chosen_method], level=level
    )
    low, high = error_model.bounds(flow_mm)
    area = result.region.attributes.loc[targets, "area_km2"].astype(float)
    statistics = flow_statistics(flow_mm, area_km2=area)
    usable = applicability(context.attributes, target_attributes, result.attributes)
    coverage = loo_coverage(result, level=level)
    table = _table(result, target_attributes, parameters, statistics, usable)
    return Prediction(
        model=result.chosen_model,
        method=result.chosen_method,
        level=level,
        table=table,
        flows=_long_flows(flow_mm, low, high, area),
        coverage=coverage,
        error_model=error_model.table,
        notes=tuple(notes + _notes(result, error_model, coverage, usable, level)),
    )


def fit_transfers(
    context: FoldContext, *, level: float, train: Sequence[str] | None = None
) -> tuple[dict[str, object], list[str]]:
    """Every configured method and the median, fit on the gauged basins of ``context``.

    Parameters
    ----------
    context : FoldContext
        Attributes and calibrated parameters of the gauged basins, transfer options.
    level : float
        Interval level of regression and median.
    train : sequence of str, optional
        Gauged basins to fit on (default: all).

    Returns
    -------
    (estimators, notes)
        Method -> fitted estimator; distinct warnings raised while fitting.
    """
    options = context.options
    transforms = parameter_transforms(context.model)
    train = list(context.calibrated.index if train is None else train)
    attributes = list(options.attributes) if options.attributes else None
    estimators = {}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputWarning)
        for method in method_order(options.methods)[1:]:
            estimator = make_transfer(
                method,
                attributes=attributes if method != "proximity" else None,
                n_donors=min(options.donors_for(method), len(train)),
                power=options.power,
                combine=options.combine,
                level=level,
            )
            estimators[method] = estimator.fit(
                context.attributes.loc[train],
                context.calibrated.loc[train, list(transforms)],
                transforms=transforms,
            )
    notes = sorted({f"prediction: {w.message}" for w in caught})
    return estimators, notes


def _parameters_by_method(context, target_attributes, level):
    estimators, notes = fit_transfers(context, level=level)
    donations, parameters = {}, {}
    for method, estimator in estimators.items():
        donation = estimator.donate(target_attributes)
        estimate = estimator.predict(target_attributes)
        donations[method] = donation
        parameters[method] = estimate.join(donation.intervals)
    return donations, parameters, notes


def method_flows(context: FoldContext, donation: Donation, targets: Sequence[str]) -> np.ndarray:
    """Flow of each target from its donated sets, simulated as in leave-one-out.

    Each target's own forcing over the folds' window (``context``), the fixed snow parameters
    when temperature drives the snow store, the same warm-up and initial storage, combined by
    :func:`regional.transfer.simulate_donors`.

    Returns
    -------
    ndarray (window days, n_targets)
        mm/day, warm-up days included.
    """
    temp = context.temp_c
    simulator = donor_simulator(context.model, context.fixed_params)
    columns = []
    for target in targets:
        flows = simulate_donors(
            donation,
            target,
            precip=context.precip_mm[target].to_numpy(dtype=float),
            pet=context.pet_mm[target].to_numpy(dtype=float),
            temp=None if temp is None else temp[target].to_numpy(dtype=float),
            model=context.model,
            warmup_days=context.window.warmup_days,
            initial_storage=context.initial_storage,
            simulate=simulator,
        )
        columns.append(flows.flow)
    return np.column_stack(columns)


def _chosen_flow(context: FoldContext, donation: Donation, targets) -> pd.DataFrame:
    flow = method_flows(context, donation, targets)
    warmup = context.window.warmup_days
    dates = context.precip_mm.index[warmup:]
    return pd.DataFrame(flow[warmup:], index=dates, columns=pd.Index(targets, name="basin_id"))


def _table(result, target_attributes, parameters: Mapping[str, pd.DataFrame], statistics, usable):
    names = [p.name for p in get_model(result.chosen_model).parameters]
    index = pd.Index(target_attributes.index.astype(str), name="basin_id")
    parts = [target_attributes[list(result.attributes)].set_axis(index)]
    for method, frame in parameters.items():
        frame = frame.set_axis(index)
        columns = {}
        for name in names:
            columns[f"{name}_{method}"] = frame[name]
            columns[f"{name}_{method}_low"] = frame[f"{name}_low"]
            columns[f"{name}_{method}_high"] = frame[f"{name}_high"]
        parts.append(pd.DataFrame(columns, index=index))
    chosen = parameters[result.chosen_method].set_axis(index)
    picked = pd.DataFrame({"method": result.chosen_method}, index=index)
    for name in names:
        for suffix in ("", "_low", "_high"):
            picked[f"{name}{suffix}"] = chosen[f"{name}{suffix}"]
    parts += [
        picked,
        statistics[list(STATISTIC_COLUMNS)],
        usable[["applicable", "reason", "mahalanobis_d2", "nearest_donor_distance"]],
    ]
    return pd.concat(parts, axis=1)


def _long_flows(flow_mm: pd.DataFrame, low, high, area: pd.Series) -> pd.DataFrame:
    n_days, n_basins = flow_mm.shape
    values = flow_mm.to_numpy(dtype=float)
    return pd.DataFrame(
        {
            "basin_id": np.repeat(flow_mm.columns.to_numpy(dtype=object), n_days),
            "date": np.tile(flow_mm.index.to_numpy(), n_basins),
            "flow_mm": values.T.ravel(),
            "flow_m3s": to_m3s(values, area.to_numpy()[None, :]).T.ravel(),
            "flow_low_mm": low.to_numpy().T.ravel(),
            "flow_high_mm": high.to_numpy().T.ravel(),
        },
        columns=list(FLOW_COLUMNS),
    )


def _notes(result, error_model: ConformalErrorModel, coverage, usable, level) -> list[str]:
    notes = []
    chosen = coverage[
        (coverage["model"] == result.chosen_model) & (coverage["method"] == result.chosen_method)
    ]
    if len(chosen):
        row = chosen.iloc[0]
        notes.append(
            f"daily bounds at nominal {level:.0%} from the leave-one-out errors of "
            f"{result.chosen_method} ({error_model.n_basins} basins, {error_model.n_classes} "
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
    if (~np.isfinite(error_model.lower_q)).any() or (~np.isfinite(error_model.upper_q)).any():
        notes.append(
            f"too few gauged basins for finite {level:.0%} bounds in some flow classes; add "
            "gauged basins or lower [prediction] level"
        )
    return notes
