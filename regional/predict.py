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
from dataclasses import dataclass, replace
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

HELD_OUT_FRACTION = 0.1
"""Share of the gauged basins held out of the whole fit in each repeat of the held-out check."""
HELD_OUT_SEED = 20_241_202
"""Seed of the random draws of held-out basins (the check is reproducible)."""
MIN_HELD_OUT_BASINS = 10
"""Fewer gauged basins than this: no held-out check (a tenth would be no basin at all)."""
WIDEN_TOLERANCE = 0.03
"""A flow class whose held-out coverage falls short of the level by more is widened."""
MAX_CLASS_LEVEL = 0.995
"""Highest level a widened flow class is rebuilt at."""
REPORTED_DECILES = (1, 10)
"""Deciles of each basin's simulated flow whose coverage is reported (lowest and highest)."""
REUSABLE_METHODS = ("similarity", "proximity")
"""Donor methods whose fold may give the same donation without the held-out basins (then the
leave-one-out flow is reused); regression and median refit on other basins always differ."""

FAILED_NSE = 0.0
"""Leave-one-out NSE at or below which transfer counts as failed at a gauged basin (no better
than the mean observed flow)."""
CLIMATE_ATTRIBUTE = "aridity"
"""Attribute whose range of well-scored gauged basins bounds the climate transfer works in."""

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
        basin), ``coverage_decile_1``, ``coverage_decile_10`` (the same on the lowest and
        highest tenth of each basin's simulated flow), ``n_days``, ``n_basins``; and for the
        chosen (model, method) only (NaN elsewhere) the held-out check: ``held_out_coverage``,
        ``held_out_coverage_decile_1``, ``held_out_coverage_decile_10`` (bounds as first
        built, at basins held out of the whole fit), ``held_out_coverage_widened`` (after
        widening, same repeats), ``held_out_repeats``, ``held_out_basins`` (held out per
        repeat), ``widened_classes`` (e.g. ``"1: 0.90 -> 0.95"``; "" when none).
    error_model : DataFrame
        The conformal quantiles of the chosen (model, method), one row per flow class:
        ``class``, ``percentile_low``, ``percentile_high`` (within-basin quantile range of the
        simulated flow), ``lower_q``, ``upper_q`` (log-flow residuals, dimensionless),
        ``n`` (days), ``n_basins``, ``offset_fraction`` (each basin's log offset c is this
        share of its mean simulated flow, mm/day).
    notes : tuple of str
        What the user should read beside the numbers.
    held_out : DataFrame or None
        The held-out check of the chosen (model, method) (:func:`held_out_flows`), one row per
        ``flow_class`` (``all``, ``class 1`` .., ``decile 1``, ``decile 10``):
        ``held_out_coverage`` (bounds as first built), ``n_pairs`` ((repeat, basin) pairs),
        ``level_used`` (the level the class's quantiles were finally taken at; NaN for the
        deciles and ``all``), ``held_out_coverage_widened`` (the same repeats with the widened
        classes; not an independent check). None when the check did not run.
    """

    model: str
    method: str
    level: float
    table: pd.DataFrame
    flows: pd.DataFrame
    coverage: pd.DataFrame
    error_model: pd.DataFrame
    notes: tuple[str, ...]
    held_out: pd.DataFrame | None = None


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
    class_levels : ndarray (n_classes,) or None
        Level each class's quantiles were taken at when it differs from ``level`` (classes
        widened after the held-out check); None: ``level`` everywhere.
    """

    level: float
    offset_fraction: float
    edges: np.ndarray
    lower_q: np.ndarray
    upper_q: np.ndarray
    n_days: np.ndarray
    n_basins: int
    class_levels: np.ndarray | None = None

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
                "level": self.levels,
            }
        )

    @property
    def levels(self) -> np.ndarray:
        """Level of each class's quantiles (the nominal level unless the class was widened)."""
        if self.class_levels is None:
            return np.full(self.n_classes, self.level)
        return np.asarray(self.class_levels, dtype=float)

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
    class_levels: Sequence[float] | None = None,
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
    class_levels : sequence of float, optional
        A level per flow class (each in (0, 1)), to widen the classes whose coverage on held-out
        basins falls short (:func:`held_out_coverage`); default ``level`` in every class.

    Returns
    -------
    ConformalErrorModel
    """
    level = _check_level(level)
    obs, sim = _aligned(observed, simulated)
    k = _n_classes(obs) if n_classes is None else int(n_classes)
    levels = _class_levels(class_levels, level, k)
    residual, basin, cls = _residuals(obs, sim, _flow_classes(sim, k), offset_fraction)
    model = _fit(_Sorted.of(residual, basin, cls, k), levels=levels, fraction=offset_fraction)
    if class_levels is None:
        return model
    return replace(model, level=level, class_levels=levels)


def _class_levels(class_levels, level: float, n_classes: int) -> np.ndarray:
    if class_levels is None:
        return np.full(n_classes, level)
    levels = np.asarray(class_levels, dtype=float).ravel()
    if levels.shape != (n_classes,):
        raise ValueError(
            f"class_levels needs one level per flow class ({n_classes}): got {levels}"
        )
    for value in levels:
        _check_level(float(value))
    return levels


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


def _fit(data: _Sorted, *, levels: np.ndarray, fraction: float):
    """Conformal error model from the sorted residuals of each flow class (a level per class)."""
    n_classes = len(data.values)
    lower, upper, n_days = np.empty(n_classes), np.empty(n_classes), np.zeros(n_classes)
    used = set()
    for k, (values, basins) in enumerate(zip(data.values, data.basins, strict=True)):
        lower[k], upper[k] = _pooled_bounds(values, basins, float(levels[k]))
        n_days[k] = len(values)
        used.update(np.unique(basins).tolist())
    return ConformalErrorModel(
        level=float(levels[0]),
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
    shares = _coverage_shares(obs, sim, low, high, k)
    valid = np.isfinite(obs)
    return {
        "coverage": _mean_share(shares["all"]),
        **{f"coverage_decile_{d}": _mean_share(shares[f"decile {d}"]) for d in REPORTED_DECILES},
        "n_days": int(valid.sum()),
        "n_basins": int(valid.any(axis=0).sum()),
    }


def _coverage_shares(obs, sim, low, high, n_classes: int) -> dict[str, np.ndarray]:
    """Share of each basin's observed days inside its bounds: all days, per class, per decile.

    Classes and deciles are within-basin quantiles of the simulated flow (as in the error
    model), so they exist at an ungauged basin. A basin without an observed day in a group gets
    NaN there.
    """
    valid = np.isfinite(obs)
    inside = (obs >= low) & (obs <= high) & valid
    groups = {"all": np.ones_like(valid)}
    classes = _flow_classes(sim, n_classes)
    for c in range(n_classes):
        groups[f"class {c + 1}"] = classes == c
    deciles = _flow_classes(sim, 10)
    for d in REPORTED_DECILES:
        groups[f"decile {d}"] = deciles == d - 1
    shares = {}
    for name, member in groups.items():
        days = (valid & member).sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            shares[name] = np.where(days > 0, (inside & member).sum(axis=0) / days, np.nan)
    return shares


def _mean_share(shares: np.ndarray) -> float:
    shares = shares[np.isfinite(shares)]
    return float(np.mean(shares)) if len(shares) else np.nan


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
        ``model``, ``method``, ``level``, ``coverage``, ``coverage_decile_1`` and
        ``coverage_decile_10`` (the same on the days in the lowest and highest tenth of each
        basin's simulated flow), ``n_days``, ``n_basins``.
    """
    level = _check_level(level)
    rows = []
    for model, run in result.runs.items():
        loo = run.loo
        for method in loo.methods:
            measured = _held_out_coverage(loo.observed, loo.simulated[method], level)
            rows.append({"model": model, "method": method, "level": level, **measured})
    deciles = [f"coverage_decile_{d}" for d in REPORTED_DECILES]
    return pd.DataFrame(
        rows, columns=["model", "method", "level", "coverage", *deciles, "n_days", "n_basins"]
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


def _distances(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.sqrt(np.maximum(((a[:, None, :] - b[None, :, :]) ** 2).sum(axis=2), 0.0))


def _nearest_donor(z_donors, z_targets) -> tuple[np.ndarray, float]:
    among = _distances(z_donors, z_donors)
    np.fill_diagonal(among, np.inf)
    return _distances(z_targets, z_donors).min(axis=1), float(among.min(axis=1).max())


def transfer_skill(
    attributes_gauged: pd.DataFrame,
    attributes_targets: pd.DataFrame,
    loo_nse: pd.Series,
    *,
    columns: Sequence[str],
    n_nearest: int,
) -> pd.DataFrame:
    """Flag targets where the region's own leave-one-out shows transfer failing.

    Two tests, either flags the target (``skill_applicable`` False, with the reason):

    1. climate: where some gauged basins' leave-one-out NSE is at or below :data:`FAILED_NSE`,
       the target's :data:`CLIMATE_ATTRIBUTE` (aridity, mean PET / mean P) lies outside the
       range of the gauged basins where transfer scored above it (the climate in which the
       region's donors transfer well);
    2. nearest gauged basins: the median leave-one-out NSE of the ``n_nearest`` gauged basins
       nearest to the target (Euclidean distance in attributes standardised with the gauged
       basins' mean and standard deviation) is at or below :data:`FAILED_NSE`.

    Parameters
    ----------
    attributes_gauged, attributes_targets : DataFrame
        Gauged and target basins x attributes, indexed by basin id.
    loo_nse : Series
        Leave-one-out NSE of the chosen (model, method) per gauged basin (NaN = not scored).
    columns : sequence of str
        Attributes of the distance (numeric, complete).
    n_nearest : int
        Gauged basins taken as the target's nearest (>= 1; at most all gauged).

    Returns
    -------
    DataFrame
        Indexed by target ``basin_id``: ``skill_applicable`` (bool), ``skill_reason`` (str),
        ``nearest_gauged`` (ids, comma separated, nearest first), ``nearest_loo_nse`` (their
        median leave-one-out NSE), ``well_scored_low``, ``well_scored_high`` (the climate
        attribute's range among well-scored gauged basins; NaN when no basin failed or the
        attribute is absent).
    """
    columns = list(columns)
    donors, targets = _attribute_arrays(attributes_gauged, attributes_targets, columns)
    nse = loo_nse.reindex(attributes_gauged.index.astype(str)).to_numpy(dtype=float)
    z_donors, z_targets = _standardised(donors, targets)
    k = int(np.clip(n_nearest, 1, len(donors)))
    order = np.argsort(_distances(z_targets, z_donors), axis=1, kind="stable")[:, :k]
    ids = attributes_gauged.index.astype(str).to_numpy()
    nearest_nse = np.array(
        [np.nanmedian(nse[row]) if np.isfinite(nse[row]).any() else np.nan for row in order]
    )
    low, high = _well_scored_range(attributes_gauged, nse)
    reasons: list[list[str]] = [[] for _ in range(len(targets))]
    if np.isfinite(low):
        climate = attributes_targets[CLIMATE_ATTRIBUTE].to_numpy(dtype=float)
        for i in np.flatnonzero((climate < low) | (climate > high)):
            side = "below" if climate[i] < low else "above"
            reasons[i].append(
                f"{CLIMATE_ATTRIBUTE} {climate[i]:.3g} {side} the range {low:.3g} to {high:.3g} "
                f"of the gauged basins where transfer scored leave-one-out NSE > {FAILED_NSE:g} "
                "(outside the climate in which this region's transfer works)"
            )
    for i in np.flatnonzero(nearest_nse <= FAILED_NSE):
        reasons[i].append(
            f"transfer failed at the {k} nearest gauged basins ({', '.join(ids[order[i]])}): "
            f"median leave-one-out NSE {nearest_nse[i]:.2f}"
        )
    return pd.DataFrame(
        {
            "skill_applicable": [not r for r in reasons],
            "skill_reason": ["; ".join(r) for r in reasons],
            "nearest_gauged": [", ".join(ids[row]) for row in order],
            "nearest_loo_nse": nearest_nse,
            "well_scored_low": low,
            "well_scored_high": high,
        },
        index=pd.Index(attributes_targets.index.astype(str), name="basin_id"),
    )


def _well_scored_range(attributes_gauged: pd.DataFrame, nse: np.ndarray) -> tuple[float, float]:
    """Climate attribute's range over well-scored gauged basins; NaN when none failed."""
    scored = np.isfinite(nse)
    failed = scored & (nse <= FAILED_NSE)
    if CLIMATE_ATTRIBUTE not in attributes_gauged.columns or not failed.any():
        return np.nan, np.nan
    climate = attributes_gauged[CLIMATE_ATTRIBUTE].to_numpy(dtype=float)
    good = scored & ~failed & np.isfinite(climate)
    if not good.any():  # failed everywhere: the nearest-basins test flags every target
        return np.nan, np.nan
    return float(climate[good].min()), float(climate[good].max())


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
    held_out, error_model, held_notes = _held_out_check(result, error_model, level)
    low, high = error_model.bounds(flow_mm)
    area = result.region.attributes.loc[targets, "area_km2"].astype(float)
    statistics = flow_statistics(flow_mm, area_km2=area)
    usable = applicability(context.attributes, target_attributes, result.attributes)
    skill = transfer_skill(
        context.attributes,
        target_attributes,
        _loo_nse(run.loo, result.chosen_method),
        columns=result.attributes,
        n_nearest=context.options.n_donors,
    )
    usable = _with_skill(usable, skill)
    low, high = _local_bounds(
        flow_mm, low, high, skill, run.loo, result.chosen_method, error_model
    )
    coverage = _with_held_out(loo_coverage(result, level=level), result, held_out)
    table = _table(result, target_attributes, parameters, statistics, usable)
    return Prediction(
        model=result.chosen_model,
        method=result.chosen_method,
        level=level,
        table=table,
        flows=_long_flows(flow_mm, low, high, area),
        coverage=coverage,
        error_model=error_model.table,
        notes=tuple(notes + _notes(result, error_model, coverage, usable, level) + held_notes),
        held_out=held_out,
    )


def fit_transfers(
    context: FoldContext,
    *,
    level: float,
    train: Sequence[str] | None = None,
    methods: Sequence[str] | None = None,
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
    methods : sequence of str, optional
        Only these methods (default: every configured method and the median).

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
    chosen = method_order(options.methods)[1:] if methods is None else tuple(methods)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputWarning)
        for method in chosen:
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


# --------------------------------------------------------------------------------------------
# Held-out check: bounds at basins held out of the whole fit


@dataclass(frozen=True)
class HeldOutRepeat:
    """One repeat of the held-out check (:func:`held_out_flows`).

    Attributes
    ----------
    held_out : tuple of str
        The gauged basins treated as ungauged in this repeat.
    training_flow : DataFrame
        Evaluation days x the other gauged basins (the training basins): each one's flow
        transferred from the other training basins only (leave-one-out within the training
        basins), mm/day. The error model of the repeat is built from these.
    held_out_flow : DataFrame
        Evaluation days x held-out basins: flow transferred from the training basins, mm/day.
    n_simulated, n_reused : int
        Basins of the repeat whose flow was simulated afresh, and whose donation equalled their
        leave-one-out donation so that the leave-one-out flow was reused.
    """

    held_out: tuple[str, ...]
    training_flow: pd.DataFrame
    held_out_flow: pd.DataFrame
    n_simulated: int
    n_reused: int


def held_out_flows(
    result: RunResult,
    *,
    model: str,
    method: str,
    repeats: int,
    fraction: float = HELD_OUT_FRACTION,
    seed: int = HELD_OUT_SEED,
) -> list[HeldOutRepeat]:
    """Flows of gauged basins held out of the WHOLE fit, in repeated random draws.

    In each repeat a random ``fraction`` of the gauged basins (at least one) is treated as
    ungauged: the transfer ``method`` is fit on the other (training) basins only, and gives the
    held-out basins their flow; the training basins get their flow from the other training
    basins (leave-one-out within them), so that the error model of the repeat never sees a
    held-out basin, not even as a donor. Donors nested in or overlapping a target are left out
    as in leave-one-out. Transfers are refit in every fold (cheap); a basin's flow is simulated
    again only when its donation (donors, weights and parameter sets) differs from its
    leave-one-out donation, else its leave-one-out flow is reused. Statistics of these flows
    give held-out checks of statistic bounds too.

    Parameters
    ----------
    result : RunResult
        A finished run (leave-one-out done).
    model, method : str
        The storage model and transfer method checked (usually the chosen ones).
    repeats : int
        Number of random draws (>= 1).
    fraction : float, default :data:`HELD_OUT_FRACTION`
        Share of the gauged basins held out per draw, in (0, 1).
    seed : int, default :data:`HELD_OUT_SEED`
        Seed of the draws.

    Returns
    -------
    list of HeldOutRepeat
    """
    if int(repeats) != repeats or repeats < 1:
        raise ValueError(f"repeats must be a whole number >= 1: got {repeats!r}")
    if not 0.0 < fraction < 1.0:
        raise ValueError(f"fraction must lie strictly between 0 and 1: got {fraction!r}")
    run = result.runs[model]
    gauged = [str(b) for b in run.loo.observed.columns]
    size = max(1, round(fraction * len(gauged)))
    if size > len(gauged) - 3:
        raise InputError(
            f"the held-out check needs at least {size + 3} gauged basins to hold out {size}; "
            f"found {len(gauged)}"
        )
    folds = _HeldOutFolds(run.context, run.loo, method, level=result.settings.prediction.level)
    draws = []
    for held in _held_out_draws(gauged, size, int(repeats), seed):
        training = [b for b in gauged if b not in held]
        draws.append(folds.repeat(held, training))
    return draws


def _held_out_draws(gauged: list[str], size: int, repeats: int, seed: int) -> list[tuple]:
    """Random groups of ``size`` basins, every basin held out as evenly as the count allows.

    The basins are shuffled and cut into consecutive groups; when too few remain for a group,
    a new shuffle of the others tops it up (no basin twice in one group).
    """
    rng = np.random.default_rng(seed)
    queue: list[str] = []
    draws = []
    for _ in range(repeats):
        if len(queue) < size:
            rest = [b for b in gauged if b not in queue]
            queue += [rest[i] for i in rng.permutation(len(rest))]
        draws.append(tuple(sorted(queue[:size])))
        queue = queue[size:]
    return draws


class _HeldOutFolds:
    """Folds of the held-out check for one (model, method); caches leave-one-out donations."""

    def __init__(self, context: FoldContext, loo, method: str, *, level: float) -> None:
        self.context, self.loo, self.method, self.level = context, loo, method, level
        self._loo_donations: dict[str, Donation] = {}
        self.simulated = self.reused = 0

    def repeat(self, held: tuple[str, ...], training: list[str]) -> HeldOutRepeat:
        start_simulated, start_reused = self.simulated, self.reused
        training_flow = self._flows(training, pool=training)
        held_flow = self._flows(list(held), pool=training)
        return HeldOutRepeat(
            held_out=held,
            training_flow=training_flow,
            held_out_flow=held_flow,
            n_simulated=self.simulated - start_simulated,
            n_reused=self.reused - start_reused,
        )

    def _flows(self, targets: list[str], *, pool: list[str]) -> pd.DataFrame:
        columns = [self._flow(target, pool) for target in targets]
        index = self.loo.observed.index
        return pd.DataFrame(
            np.column_stack(columns), index=index, columns=pd.Index(targets, name="basin_id")
        )

    def _flow(self, target: str, pool: list[str]) -> np.ndarray:
        donation = self._donation(target, pool)
        if self.method in REUSABLE_METHODS and _same_donation(
            donation, self._loo_donation(target)
        ):
            self.reused += 1
            return self.loo.simulated[self.method][target].to_numpy(dtype=float)
        self.simulated += 1
        return method_flows(self.context, donation, [target])[self.context.evaluation, 0]

    def _loo_donation(self, target: str) -> Donation:
        if target not in self._loo_donations:
            everyone = [str(b) for b in self.context.calibrated.index]
            self._loo_donations[target] = self._donation(target, everyone)
        return self._loo_donations[target]

    def _donation(self, target: str, pool: list[str]) -> Donation:
        drop = {target, *self.context.excluded.get(target, ())}
        train = [b for b in pool if b not in drop]
        estimators, _ = fit_transfers(
            self.context, level=self.level, train=train, methods=[self.method]
        )
        return estimators[self.method].donate(self.context.attributes.loc[[target]])


def _same_donation(first: Donation, second: Donation) -> bool:
    """Same donors with the same weights and parameter sets (so the same flow)."""
    columns = ["donor_id", "weight", *first.parameters]
    a, b = first.sets[columns], second.sets[columns]
    if a.shape != b.shape or first.combine != second.combine:
        return False
    if not (a["donor_id"].to_numpy() == b["donor_id"].to_numpy()).all():
        return False
    numbers = columns[1:]
    return bool(
        np.allclose(
            a[numbers].to_numpy(dtype=float), b[numbers].to_numpy(dtype=float), rtol=1e-12, atol=0
        )
    )


def held_out_coverage(
    observed: pd.DataFrame,
    repeats: Sequence[HeldOutRepeat],
    *,
    level: float,
    n_classes: int | None = None,
    class_levels: Sequence[float] | None = None,
) -> pd.DataFrame:
    """Coverage of daily flow bounds at basins held out of the whole fit.

    In every repeat the conformal error model (:func:`conformal_bounds`) is built from the
    training basins' flows only and applied to the held-out basins; the share of each held-out
    basin's observed days inside its bounds is counted, on all days, per flow class of the error
    model and on the lowest and highest deciles of its simulated flow. Each (repeat, basin)
    pair weighs the same in the mean.

    Parameters
    ----------
    observed : DataFrame
        Evaluation days x gauged basins, observed flow, mm/day (NaN = missing).
    repeats : sequence of HeldOutRepeat
        From :func:`held_out_flows`.
    level : float
        Nominal level of the bounds.
    n_classes : int, optional
        Flow classes of the error model (default: chosen from the training basins' records).
    class_levels : sequence of float, optional
        Level per flow class (a widened error model); default ``level`` everywhere.

    Returns
    -------
    DataFrame
        Indexed by ``flow_class`` (``all``, ``class 1`` .., ``decile 1``, ``decile 10``):
        ``coverage``, ``n_pairs`` ((repeat, basin) pairs with observed days in the class).
    """
    level = _check_level(level)
    shares: dict[str, list[float]] = {}
    for draw in repeats:
        training = list(draw.training_flow.columns)
        classes = n_classes or _n_classes(observed[training].to_numpy(dtype=float))
        model = conformal_bounds(
            observed[training],
            draw.training_flow,
            level=level,
            n_classes=classes,
            class_levels=class_levels,
        )
        low, high = model.bounds(draw.held_out_flow)
        held = list(draw.held_out_flow.columns)
        obs = observed[held].to_numpy(dtype=float)
        sim = draw.held_out_flow.to_numpy(dtype=float)
        per_group = _coverage_shares(obs, sim, low.to_numpy(), high.to_numpy(), classes)
        for name, values in per_group.items():
            shares.setdefault(name, []).extend(values[np.isfinite(values)].tolist())
    rows = [
        {
            "flow_class": name,
            "coverage": float(np.mean(values)) if values else np.nan,
            "n_pairs": len(values),
        }
        for name, values in shares.items()
    ]
    return pd.DataFrame(rows, columns=["flow_class", "coverage", "n_pairs"]).set_index(
        "flow_class"
    )


def widened_levels(coverage: Sequence[float], *, level: float) -> np.ndarray:
    """Level per flow class after the held-out check: nominal, or raised by the shortfall.

    A class whose held-out coverage falls short of ``level`` by more than
    :data:`WIDEN_TOLERANCE` gets its quantiles at ``level + shortfall`` (at most
    :data:`MAX_CLASS_LEVEL`); the others, and classes without a measurement (NaN), keep
    ``level``.

    Parameters
    ----------
    coverage : sequence of float
        Held-out coverage of each flow class (0 .. 1).
    level : float
        Nominal level.

    Returns
    -------
    ndarray
        One level per class.
    """
    level = _check_level(level)
    shortfall = np.nan_to_num(level - np.asarray(coverage, dtype=float), nan=0.0)
    widen = shortfall > WIDEN_TOLERANCE
    return np.where(widen, np.minimum(level + shortfall, MAX_CLASS_LEVEL), level)


def _held_out_check(result, error_model: ConformalErrorModel, level: float):
    """Held-out coverage of the chosen bounds; classes short by > tolerance are widened.

    Returns (table or None, the error model to use, notes).
    """
    run = result.runs[result.chosen_model]
    repeats = getattr(result.settings.prediction, "held_out_repeats", 0)
    n_gauged = run.loo.observed.shape[1]
    if repeats == 0:
        return (
            None,
            error_model,
            ["no held-out check of the bounds ([prediction] held_out_repeats = 0)"],
        )
    if n_gauged < MIN_HELD_OUT_BASINS:
        return (
            None,
            error_model,
            [
                f"no held-out check of the bounds: {n_gauged} gauged basins, fewer than "
                f"{MIN_HELD_OUT_BASINS}"
            ],
        )
    method = result.chosen_method
    draws = held_out_flows(result, model=result.chosen_model, method=method, repeats=repeats)
    observed, simulated = run.loo.observed, run.loo.simulated[method]
    k = error_model.n_classes
    table = held_out_coverage(observed, draws, level=level, n_classes=k)
    table = table.rename(columns={"coverage": "held_out_coverage"})
    measured = [table.loc[f"class {c + 1}", "held_out_coverage"] for c in range(k)]
    levels = widened_levels(measured, level=level)
    widen = levels > level
    table["level_used"] = np.nan
    for c in range(k):
        table.loc[f"class {c + 1}", "level_used"] = levels[c]
    if widen.any():
        error_model = conformal_bounds(
            observed, simulated, level=level, n_classes=k, class_levels=levels
        )
        after = held_out_coverage(observed, draws, level=level, n_classes=k, class_levels=levels)
        table["held_out_coverage_widened"] = after["coverage"]
    else:
        table["held_out_coverage_widened"] = table["held_out_coverage"]
    table = table.reset_index()
    table.attrs.update(
        repeats=len(draws),
        basins=len(draws[0].held_out),
        simulated=sum(d.n_simulated for d in draws),
        reused=sum(d.n_reused for d in draws),
        widened={c + 1: (level, float(levels[c])) for c in np.flatnonzero(widen)},
    )
    return table, error_model, _held_out_notes(table, level, n_gauged)


def _held_out_notes(table: pd.DataFrame, level: float, n_gauged: int) -> list[str]:
    info = table.attrs
    rows = table.set_index("flow_class")["held_out_coverage"]
    deciles = ", ".join(
        f"{'lowest' if d == 1 else 'highest'} decile {rows.get(f'decile {d}', np.nan):.1%}"
        for d in REPORTED_DECILES
    )
    notes = [
        f"held-out check of the {level:.0%} bounds: {info['repeats']} repeats, each holding "
        f"{info['basins']} of {n_gauged} gauged basins out of the whole fit (transfer and error "
        f"model; seed {HELD_OUT_SEED}); coverage at the held-out basins {rows['all']:.1%} "
        f"({deciles}); {info['simulated']} basin flows simulated afresh, {info['reused']} "
        "reused from leave-one-out"
    ]
    if info["widened"]:
        widened = ", ".join(f"class {c} to {new:.1%}" for c, (_, new) in info["widened"].items())
        after = table.set_index("flow_class")["held_out_coverage_widened"]["all"]
        notes.append(
            f"bounds widened where the held-out coverage fell short of {level:.0%} by more than "
            f"{WIDEN_TOLERANCE:.2f}: quantiles of {widened} (flow classes of the error model); "
            f"on the same repeats the widened bounds cover {after:.1%} (not an independent check)"
        )
    return notes


def _with_held_out(coverage: pd.DataFrame, result, held_out: pd.DataFrame | None) -> pd.DataFrame:
    """Coverage table with the held-out columns filled on the chosen (model, method) row."""
    coverage = coverage.copy()
    columns = {
        "held_out_coverage": np.nan,
        **{f"held_out_coverage_decile_{d}": np.nan for d in REPORTED_DECILES},
        "held_out_coverage_widened": np.nan,
        "held_out_repeats": 0,
        "held_out_basins": 0,
        "widened_classes": "",
    }
    for name, default in columns.items():
        coverage[name] = default
    if held_out is None:
        return coverage
    chosen = (coverage["model"] == result.chosen_model) & (
        coverage["method"] == result.chosen_method
    )
    rows = held_out.set_index("flow_class")
    coverage.loc[chosen, "held_out_coverage"] = rows.loc["all", "held_out_coverage"]
    for d in REPORTED_DECILES:
        value = rows["held_out_coverage"].get(f"decile {d}", np.nan)
        coverage.loc[chosen, f"held_out_coverage_decile_{d}"] = value
    coverage.loc[chosen, "held_out_coverage_widened"] = rows.loc[
        "all", "held_out_coverage_widened"
    ]
    coverage.loc[chosen, "held_out_repeats"] = held_out.attrs["repeats"]
    coverage.loc[chosen, "held_out_basins"] = held_out.attrs["basins"]
    coverage.loc[chosen, "widened_classes"] = "; ".join(
        f"{c}: {old:.2f} -> {new:.3f}" for c, (old, new) in held_out.attrs["widened"].items()
    )
    return coverage


# --------------------------------------------------------------------------------------------
# Where transfer is known to fail: applicability and the bounds' width


def _loo_nse(loo, method: str) -> pd.Series:
    scores = loo.scores[loo.scores["method"] == method]
    return scores.set_index(scores["basin_id"].astype(str))["nse"].astype(float)


def _with_skill(usable: pd.DataFrame, skill: pd.DataFrame) -> pd.DataFrame:
    """Applicability with the transfer-skill tests: reasons joined, bounds source named."""
    usable = usable.join(skill)
    failing = ~usable["skill_applicable"]
    joined = [
        "; ".join(part for part in (reason, extra) if part)
        for reason, extra in zip(usable["reason"], usable["skill_reason"], strict=True)
    ]
    usable["reason"] = joined
    usable["applicable"] = usable["applicable"] & ~failing
    usable["bounds_from"] = np.where(
        failing, "nearest gauged basins: " + usable["nearest_gauged"], "all gauged basins"
    )
    return usable


def _local_bounds(flow_mm, low, high, skill, loo, method, error_model: ConformalErrorModel):
    """Where transfer is known to fail, widen the bounds to the nearest gauged basins' errors.

    The error model is rebuilt from the leave-one-out residuals of the target's nearest gauged
    basins only (same classes and class levels as the regional one) and the target's bounds
    become the wider of the two on every day, so a target in a climate where transfer failed
    carries the errors transfer made there.
    """
    failing = skill.index[~skill["skill_applicable"]]
    if not len(failing):
        return low, high
    low, high = low.copy(), high.copy()
    for target in failing:
        nearest = skill.loc[target, "nearest_gauged"].split(", ")
        local = conformal_bounds(
            loo.observed[nearest],
            loo.simulated[method][nearest],
            level=error_model.level,
            n_classes=error_model.n_classes,
            class_levels=error_model.levels,
        )
        local_low, local_high = local.bounds(flow_mm[[target]])
        low[target] = np.minimum(low[target], local_low[target])
        high[target] = np.maximum(high[target], local_high[target])
    return low, high
