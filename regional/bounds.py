"""The error model of transferred daily flows: split-conformal bounds by flow class.

:func:`conformal_bounds` turns leave-one-out residuals of gauged basins into a
:class:`ConformalErrorModel` whose ``bounds`` give lower and upper daily flows around a simulation
at any basin, by split-conformal prediction (Vovk, Gammerman and Shafer 2005; Lei, G'Sell,
Rinaldo, Tibshirani and Wasserman 2018) with the basin as the exchangeable unit (CDF pooling,
Dunn, Wasserman and Ramdas 2023), from the residuals and pooled quantiles of
:mod:`regional.residuals`. :class:`ResidualTails` keeps just the tails of those residuals, to
rebuild the model at wider levels. How well the bounds cover is measured in
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
from regional.residuals import (
    OFFSET_FRACTION,
    SortedResiduals,
    aligned,
    basin_offsets,
    basin_weights,
    class_residuals,
    conformal_levels,
    flow_classes,
    inverse_cdf,
    observed_basins,
    picked,
    pooled_bounds,
)

MAX_CLASSES = 5
"""Most flow classes of the error model (within-basin quantiles of the simulated flow)."""
MIN_DAYS_PER_CLASS = 30
"""A basin needs this many observed days per class for classes to be used."""
MIN_BASINS_FOR_CLASSES = 10
"""Fewer calibration basins than this: one class (no split by flow)."""


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
        A level per flow class (each in (0, 1)), to widen the classes whose coverage on
        held-out basins falls short (:func:`regional.repeatcoverage.held_out_coverage`);
        default ``level`` in every class.

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


def check_level(level: float) -> float:
    if isinstance(level, bool) or not isinstance(level, int | float) or not 0.0 < level < 1.0:
        raise InputError(
            f"[prediction] level must be a number strictly between 0 and 1 (e.g. 0.9 for 90% "
            f"bounds); got {level!r}"
        )
    return float(level)


def default_n_classes(obs: np.ndarray) -> int:
    days = np.isfinite(obs).sum(axis=0)
    days = days[days > 0]
    if len(days) < MIN_BASINS_FOR_CLASSES:
        return 1
    return int(np.clip(np.median(days) // MIN_DAYS_PER_CLASS, 1, MAX_CLASSES))


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
        obs, sim = picked(observed, simulated)
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
            low_level, high_level = conformal_levels(days, float(levels[c]))
            lower[c] = inverse_cdf(self.low_values[c], self.low_weights[c], low_level, -np.inf)
            upper[c] = inverse_cdf(self.high_values[c], self.high_weights[c], high_level, np.inf)
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
    upper one reaches (at least the last residual, which :func:`inverse_cdf` falls back on)."""
    days = len(values)
    if days == 0:
        return values, values.astype(float), values, values.astype(float)
    cumulative = basin_weights(basins)
    low_level, high_level = conformal_levels(days, level)
    tolerance = 1e-12
    stop = int(np.searchsorted(cumulative, low_level - tolerance, side="left")) + 1
    start = min(int(np.searchsorted(cumulative, high_level - tolerance, side="left")), days - 1)
    return (
        values[: min(stop, days)].copy(),
        cumulative[: min(stop, days)].copy(),
        values[start:].copy(),
        cumulative[start:].copy(),
    )


def _apply(sim: np.ndarray, classes: np.ndarray, offsets: np.ndarray, model: ConformalErrorModel):
    with np.errstate(over="ignore"):
        low = (sim + offsets) * np.exp(model.lower_q[classes]) - offsets
        high = (sim + offsets) * np.exp(model.upper_q[classes]) - offsets
    return np.clip(np.minimum(low, sim), 0.0, None), np.maximum(high, sim)
