"""Log-flow residuals of transferred daily flows, by flow class, and their pooled quantiles.

The pieces the error model of :mod:`regional.bounds` is built from: each basin's log offset
(:func:`basin_offsets`), each day's flow class (the within-basin quantile of the simulated
flow, :func:`flow_classes`), the residuals e = log(obs + c) - log(sim + c) of every observed
day sorted by class with their basins (:func:`class_residuals`, a block of basins at a time),
and the basin-weighted split-conformal quantiles of one class (:func:`pooled_bounds`: every
basin weighs the same, CDF pooling of Dunn, Wasserman and Ramdas 2023, with the finite-sample
levels of Lei et al. 2018). See ``docs/prediction.md``.

References
----------
Lei, J., G'Sell, M., Rinaldo, A., Tibshirani, R. J., Wasserman, L. (2018): Distribution-free
predictive inference for regression. J. Am. Stat. Assoc. 113(523), 1094-1111.
Dunn, R., Wasserman, L., Ramdas, A. (2023): Distribution-free prediction sets for two-layer
hierarchical models. J. Am. Stat. Assoc. (arXiv:1809.07441).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

OFFSET_FRACTION = 0.01
"""A basin's log offset c is this share of its mean simulated flow (mm/day)."""
MIN_OFFSET_MM = 1e-3
"""Floor of the log offset c, mm/day (for a basin with almost no simulated flow)."""
BLOCK_BASINS = 256
"""Basins whose ranks, classes and residuals are computed at a time (:func:`class_residuals`)."""


def basin_offsets(simulated: np.ndarray, *, fraction: float = OFFSET_FRACTION) -> np.ndarray:
    """Log offset c per basin (column), mm/day: ``fraction`` x mean simulated flow, floored."""
    return np.maximum(
        fraction * np.mean(np.asarray(simulated), axis=0, dtype=float), MIN_OFFSET_MM
    )


def aligned(observed: pd.DataFrame, simulated: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Observed and simulated flows (days x basins) as float arrays, checked to share days and
    basins."""
    if observed.shape != simulated.shape or not observed.columns.equals(simulated.columns):
        raise ValueError(
            f"observed {observed.shape} and simulated {simulated.shape} flows must share days "
            "and basins"
        )
    return _floats(observed), _floats(simulated)


def picked(observed: pd.DataFrame, simulated: pd.DataFrame):
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


def pooled_bounds(values: np.ndarray, basins: np.ndarray, level: float) -> tuple[float, float]:
    """Basin-weighted conformal quantiles (lower, upper) of one class's sorted residuals."""
    days = len(values)
    if days == 0:
        return -np.inf, np.inf
    cumulative = basin_weights(basins)
    low_level, high_level = conformal_levels(days, level)
    return (
        inverse_cdf(values, cumulative, low_level, -np.inf),
        inverse_cdf(values, cumulative, high_level, np.inf),
    )


def basin_weights(basins: np.ndarray) -> np.ndarray:
    """Cumulative weight along sorted residuals, each basin weighing the same in total."""
    codes, inverse, counts = np.unique(basins, return_inverse=True, return_counts=True)
    return np.cumsum(1.0 / (len(codes) * counts[inverse]))


def conformal_levels(days: int, level: float) -> tuple[float, float]:
    """Probabilities of the lower and upper split-conformal quantiles over ``days`` residuals."""
    low_level = np.floor((days + 1) * (1.0 - level) / 2.0) / days
    high_level = np.ceil((days + 1) * (1.0 + level) / 2.0) / days
    return low_level, high_level


def inverse_cdf(values, cumulative, probability, outside) -> float:
    """Smallest value whose cumulative weight reaches ``probability`` (``outside`` beyond 0..1)."""
    tolerance = 1e-12
    if probability <= tolerance or probability > 1.0 + tolerance:
        return float(outside)
    index = np.searchsorted(cumulative, probability - tolerance, side="left")
    return float(values[min(index, len(values) - 1)])
