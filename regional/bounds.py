"""The error model of transferred daily flows: split-conformal bounds by flow class.

:func:`conformal_bounds` turns leave-one-out residuals of gauged basins into a
:class:`ConformalErrorModel` whose ``bounds`` give lower and upper daily flows around a simulation
at any basin, by split-conformal prediction (Vovk, Gammerman and Shafer 2005; Lei, G'Sell,
Rinaldo, Tibshirani and Wasserman 2018) with the basin as the exchangeable unit (CDF pooling,
Dunn, Wasserman and Ramdas 2023). How well the bounds cover is measured in
:mod:`regional.coverage`. See ``docs/prediction.md``.

References
----------
Vovk, V., Gammerman, A., Shafer, G. (2005): Algorithmic Learning in a Random World. Springer.
Lei, J., G'Sell, M., Rinaldo, A., Tibshirani, R. J., Wasserman, L. (2018): Distribution-free
predictive inference for regression. J. Am. Stat. Assoc. 113(523), 1094-1111.
Dunn, R., Wasserman, L., Ramdas, A. (2023): Distribution-free prediction sets for two-layer
hierarchical models. J. Am. Stat. Assoc. (arXiv:1809.07441).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from regional.errors import InputError

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
BLOCK_BASINS = 256
"""Basins whose ranks, classes and residuals are computed at a time (:func:`class_residuals`)."""


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
        """One row per class (see :attr:`regional.predicted.Prediction.error_model`)."""
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
        classes = flow_classes(values, self.n_classes)
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
    is measured by :func:`regional.coverage.loo_coverage`.

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
        basins falls short (:func:`regional.coverage.held_out_coverage`); default ``level`` in
        every class.

    Returns
    -------
    ConformalErrorModel
    """
    level = check_level(level)
    obs, sim = aligned(observed, simulated)
    k = default_n_classes(obs) if n_classes is None else int(n_classes)
    levels = _class_levels(class_levels, level, k)
    data = class_residuals(obs, sim, k, fraction=offset_fraction)
    model = _fit(data, levels=levels, fraction=offset_fraction)
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
        check_level(float(value))
    return levels


def basin_offsets(simulated: np.ndarray, *, fraction: float = OFFSET_FRACTION) -> np.ndarray:
    """Log offset c per basin (column), mm/day: ``fraction`` x mean simulated flow, floored."""
    return np.maximum(
        fraction * np.mean(np.asarray(simulated), axis=0, dtype=float), MIN_OFFSET_MM
    )


def check_level(level: float) -> float:
    if isinstance(level, bool) or not isinstance(level, int | float) or not 0.0 < level < 1.0:
        raise InputError(
            f"[prediction] level must be a number strictly between 0 and 1 (e.g. 0.9 for 90% "
            f"bounds); got {level!r}"
        )
    return float(level)


def aligned(observed: pd.DataFrame, simulated: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    if observed.shape != simulated.shape or not observed.columns.equals(simulated.columns):
        raise ValueError(
            f"observed {observed.shape} and simulated {simulated.shape} flows must share days "
            "and basins"
        )
    return _floats(observed), _floats(simulated)


def _picked(observed: pd.DataFrame, simulated: pd.DataFrame):
    """:func:`aligned`, or where ``observed`` holds more basins, its columns of ``simulated``'s
    basins as :class:`ColumnBlocks` (read a block of basins at a time)."""
    if observed.columns.equals(simulated.columns):
        return aligned(observed, simulated)
    positions = observed.columns.get_indexer(simulated.columns)
    if len(observed) != len(simulated) or (positions < 0).any():
        raise ValueError(
            f"observed {observed.shape} flows must hold the days and basins of the simulated "
            f"{simulated.shape}"
        )
    return ColumnBlocks(_floats(observed), positions), _floats(simulated)


class ColumnBlocks:
    """Some columns of a days x basins array, given a block of them at a time: ``blocks[:,
    a:b]`` is the array's columns ``positions[a:b]`` (a copy of that block only), as the
    block loops of :func:`class_residuals` and :func:`observed_basins` read a grid."""

    def __init__(self, values: np.ndarray, positions: np.ndarray) -> None:
        self.values, self.positions = values, positions

    @property
    def shape(self) -> tuple[int, int]:
        return self.values.shape[0], len(self.positions)

    def __getitem__(self, key: tuple[slice, slice]) -> np.ndarray:
        rows, columns = key
        return self.values[rows, self.positions[columns]]


def _floats(frame: pd.DataFrame) -> np.ndarray:
    """The values of a frame as floats, float32 kept as they are (not copied): every use
    widens each value to float64 exactly where it meets a float64, a block of basins at a
    time."""
    values = frame.to_numpy()
    return values if values.dtype in (np.float32, np.float64) else values.astype(float)


def default_n_classes(obs: np.ndarray) -> int:
    days = np.isfinite(obs).sum(axis=0)
    days = days[days > 0]
    if len(days) < MIN_BASINS_FOR_CLASSES:
        return 1
    return int(np.clip(np.median(days) // MIN_DAYS_PER_CLASS, 1, MAX_CLASSES))


def flow_classes(sim: np.ndarray, n_classes: int) -> np.ndarray:
    """Class 0..n_classes-1 of each day: the within-basin quantile (rank - 0.5) / T of its flow."""
    ranks = average_ranks(sim)
    share = (ranks - 0.5) / sim.shape[0]
    return np.minimum((share * n_classes).astype(int), n_classes - 1)


def average_ranks(values: np.ndarray) -> np.ndarray:
    """Ranks 1..T down each column, ties given their mean rank; a column with NaN all NaN.

    The ranks of ``scipy.stats.rankdata(values, method="average", axis=0)`` (exact half
    integers, so equal to the last bit), computed with numpy alone.
    """
    values = np.asarray(values, dtype=float)
    n = values.shape[0]
    order = np.argsort(values, axis=0, kind="stable")
    ordered = np.take_along_axis(values, order, axis=0)
    position = np.broadcast_to(np.arange(n).reshape((n,) + (1,) * (values.ndim - 1)), values.shape)
    first = np.ones(values.shape, dtype=bool)
    first[1:] = ordered[1:] != ordered[:-1]
    last = np.ones(values.shape, dtype=bool)
    last[:-1] = first[1:]
    start = np.maximum.accumulate(np.where(first, position, 0), axis=0)
    end = np.flip(np.minimum.accumulate(np.flip(np.where(last, position, n - 1), 0), axis=0), 0)
    ranks = np.empty(values.shape, dtype=float)
    np.put_along_axis(ranks, order, (start + end) / 2.0 + 1.0, axis=0)
    return np.where(np.isnan(values).any(axis=0), np.nan, ranks)


def class_residuals(
    obs: np.ndarray,
    sim: np.ndarray,
    n_classes: int,
    *,
    fraction: float = OFFSET_FRACTION,
    block: int = BLOCK_BASINS,
) -> SortedResiduals:
    """:func:`log_residuals` of the whole grid, each flow class's sorted with its basins,
    computed ``block`` basins at a time.

    Classes and offsets are within-basin, so each block's residuals are those of the whole
    grid. Each block's residuals go straight into their class's array at their place in the
    whole grid's day-then-basin order, and each class is then sorted stably: the same arrays
    as :meth:`SortedResiduals.of` on the whole grid's residuals, without holding the pooled
    residuals beside the sorted ones. Held for the region: 12 bytes per observed day (float64
    residual, int32 basin) and the flow class of every day (int8), plus one class's sort.
    """
    n_days, n_columns = obs.shape
    offsets = basin_offsets(sim, fraction=fraction)  # on the whole grid: the same sums
    blocks = [slice(a, min(a + block, n_columns)) for a in range(0, n_columns, block)]
    classes = np.empty(obs.shape, dtype=np.int8 if n_classes < 128 else np.int64)
    # observed days per (class, day, block): where each block's residuals of a day go in
    # their class's day-then-basin order
    counts = np.zeros((n_classes, n_days, len(blocks)), dtype=np.int64)
    for b, part in enumerate(blocks):
        classes[:, part] = flow_classes(sim[:, part], n_classes)
        valid = np.isfinite(obs[:, part])
        for k in range(n_classes):
            counts[k, :, b] = (valid & (classes[:, part] == k)).sum(axis=1)
    flat = counts.reshape(n_classes, -1)
    first = (np.cumsum(flat, axis=1) - flat).reshape(counts.shape)
    totals = flat.sum(axis=1)
    basin_type = np.int32 if n_columns < 2**31 else np.int64
    values = [np.empty(int(total)) for total in totals]
    basins = [np.empty(int(total), dtype=basin_type) for total in totals]
    for b, part in enumerate(blocks):
        residual, columns, klass = log_residuals(
            obs[:, part], sim[:, part], classes[:, part], fraction, offsets=offsets[part]
        )
        day = np.nonzero(np.isfinite(obs[:, part]))[0]
        for k in range(n_classes):
            inside = klass == k
            in_day = day[inside]
            day_start = np.cumsum(counts[k, :, b]) - counts[k, :, b]
            position = first[k, in_day, b] + (np.arange(len(in_day)) - day_start[in_day])
            values[k][position] = residual[inside]
            basins[k][position] = columns[inside] + part.start
    del classes
    for k in range(n_classes):
        order = np.argsort(values[k], kind="stable")
        values[k] = values[k][order]
        basins[k] = basins[k][order]
    return SortedResiduals(tuple(values), tuple(basins))


def observed_basins(obs: np.ndarray, *, block: int = BLOCK_BASINS) -> int:
    """Basins (columns) with at least one observed day."""
    return sum(
        int(np.isfinite(obs[:, a : a + block]).any(axis=0).sum())
        for a in range(0, obs.shape[1], block)
    )


def log_residuals(obs, sim, classes, fraction, *, offsets=None):
    """Flattened residuals of the observed days with their basin (column) and class
    (``offsets``: the basins' log offsets when already known)."""
    if offsets is None:
        offsets = basin_offsets(sim, fraction=fraction)
    day, basin = np.nonzero(np.isfinite(obs))
    c = offsets[basin]
    residual = np.log(obs[day, basin] + c) - np.log(sim[day, basin] + c)
    return residual, basin, classes[day, basin]


@dataclass(frozen=True)
class SortedResiduals:
    """Residuals of each class sorted once, with their basins, for repeated weighted quantiles."""

    values: tuple[np.ndarray, ...]
    basins: tuple[np.ndarray, ...]

    @classmethod
    def of(cls, residual, basin, klass, n_classes) -> SortedResiduals:
        values, basins = [], []
        for k in range(n_classes):
            inside = klass == k
            kept = residual[inside]
            order = np.argsort(kept, kind="stable")
            values.append(kept[order])
            basins.append(basin[inside][order])
        return cls(tuple(values), tuple(basins))


def _fit(data: SortedResiduals, *, levels: np.ndarray, fraction: float):
    """Conformal error model from the sorted residuals of each flow class (a level per class)."""
    n_classes = len(data.values)
    lower, upper, n_days = np.empty(n_classes), np.empty(n_classes), np.zeros(n_classes)
    used = set()
    for k, (values, basins) in enumerate(zip(data.values, data.basins, strict=True)):
        lower[k], upper[k] = pooled_bounds(values, basins, float(levels[k]))
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


def pooled_bounds(values: np.ndarray, basins: np.ndarray, level: float) -> tuple[float, float]:
    """Basin-weighted conformal quantiles (lower, upper) of one class's sorted residuals."""
    days = len(values)
    if days == 0:
        return -np.inf, np.inf
    cumulative = _basin_weights(basins)
    low_level, high_level = _conformal_levels(days, level)
    return (
        _inverse_cdf(values, cumulative, low_level, -np.inf),
        _inverse_cdf(values, cumulative, high_level, np.inf),
    )


def _basin_weights(basins: np.ndarray) -> np.ndarray:
    """Cumulative weight along sorted residuals, each basin weighing the same in total."""
    codes, inverse, counts = np.unique(basins, return_inverse=True, return_counts=True)
    return np.cumsum(1.0 / (len(codes) * counts[inverse]))


def _conformal_levels(days: int, level: float) -> tuple[float, float]:
    """Probabilities of the lower and upper split-conformal quantiles over ``days`` residuals."""
    low_level = np.floor((days + 1) * (1.0 - level) / 2.0) / days
    high_level = np.ceil((days + 1) * (1.0 + level) / 2.0) / days
    return low_level, high_level


@dataclass(frozen=True)
class ResidualTails:
    """The tails of an error model's sorted residuals: its quantiles at any level >= ``level``.

    The lower quantile at a level L >= ``level`` lies at or below the lower quantile at
    ``level``, and the upper one at or above the upper one, so keeping each class's sorted
    residuals (with their cumulative basin weights) up to the first and from the second gives
    exactly the error model of :func:`conformal_bounds` at every such level, in about
    1 - ``level`` of the memory. The held-out check (:mod:`regional.heldout`) keeps these per
    repeat instead of the training basins' daily flows, to rebuild a widened model.

    Attributes
    ----------
    level : float
        The lowest level the tails serve.
    offset_fraction : float
        As in :class:`ConformalErrorModel`.
    days : ndarray (n_classes,)
        Residual days per class.
    n_basins : int
        Basins with a residual.
    low_values, low_weights, high_values, high_weights : tuple of ndarray
        Per class: the kept sorted residuals of each tail and their cumulative weights.
    """

    level: float
    offset_fraction: float
    days: np.ndarray
    n_basins: int
    low_values: tuple[np.ndarray, ...]
    low_weights: tuple[np.ndarray, ...]
    high_values: tuple[np.ndarray, ...]
    high_weights: tuple[np.ndarray, ...]

    @classmethod
    def of(
        cls,
        observed: pd.DataFrame,
        simulated: pd.DataFrame,
        *,
        level: float,
        n_classes: int,
        offset_fraction: float = OFFSET_FRACTION,
    ) -> ResidualTails:
        """Tails of the error model :func:`conformal_bounds` builds from these flows
        (``observed`` may hold more basins than ``simulated``: only the simulated's are read,
        a block at a time, never all copied at once)."""
        level = check_level(level)
        obs, sim = _picked(observed, simulated)
        data = class_residuals(obs, sim, n_classes, fraction=offset_fraction)
        parts: tuple[list, list, list, list] = ([], [], [], [])
        for values, basins in zip(data.values, data.basins, strict=True):
            for part, kept in zip(parts, _tails(values, basins, level), strict=True):
                part.append(kept)
        return cls(
            level=level,
            offset_fraction=offset_fraction,
            days=np.array([len(v) for v in data.values], dtype=float),
            n_basins=observed_basins(obs),
            low_values=tuple(parts[0]),
            low_weights=tuple(parts[1]),
            high_values=tuple(parts[2]),
            high_weights=tuple(parts[3]),
        )

    def error_model(self, class_levels: Sequence[float] | None = None) -> ConformalErrorModel:
        """The error model at ``class_levels`` (each >= :attr:`level`; default :attr:`level`).

        Equal to :func:`conformal_bounds` with the same ``class_levels`` on the flows the tails
        were taken from.
        """
        k = len(self.days)
        levels = _class_levels(class_levels, self.level, k)
        if (levels < self.level).any():
            raise ValueError(
                f"the residual tails serve levels >= {self.level}; got {levels.tolist()}"
            )
        lower, upper = np.empty(k), np.empty(k)
        for c in range(k):
            days = int(self.days[c])
            if days == 0:
                lower[c], upper[c] = -np.inf, np.inf
                continue
            low_level, high_level = _conformal_levels(days, float(levels[c]))
            lower[c] = _inverse_cdf(self.low_values[c], self.low_weights[c], low_level, -np.inf)
            upper[c] = _inverse_cdf(self.high_values[c], self.high_weights[c], high_level, np.inf)
        model = ConformalErrorModel(
            level=float(levels[0]),
            offset_fraction=self.offset_fraction,
            edges=np.linspace(0.0, 1.0, k + 1),
            lower_q=np.minimum(lower, 0.0),
            upper_q=np.maximum(upper, 0.0),
            n_days=self.days.copy(),
            n_basins=self.n_basins,
        )
        if class_levels is None:
            return model
        return replace(model, level=self.level, class_levels=levels)


def _tails(values: np.ndarray, basins: np.ndarray, level: float) -> tuple[np.ndarray, ...]:
    """(low values, low weights, high values, high weights) of one class kept for levels >=
    ``level``: up to the first position the lower probability reaches, from the position the
    upper one reaches (at least the last residual, which :func:`_inverse_cdf` falls back on)."""
    days = len(values)
    if days == 0:
        return values, values.astype(float), values, values.astype(float)
    cumulative = _basin_weights(basins)
    low_level, high_level = _conformal_levels(days, level)
    tolerance = 1e-12
    stop = int(np.searchsorted(cumulative, low_level - tolerance, side="left")) + 1
    start = min(int(np.searchsorted(cumulative, high_level - tolerance, side="left")), days - 1)
    return (
        values[: min(stop, days)].copy(),
        cumulative[: min(stop, days)].copy(),
        values[start:].copy(),
        cumulative[start:].copy(),
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
