"""Fold donations: each target's donation as if its method were refit without some basins.

Leave-one-out (:mod:`regional.crossval`) and the held-out check (:mod:`regional.heldout`) ask,
target by target, what a transfer fit on a pool of gauged basins minus a few of them (the target
itself and the basins sharing its area) would donate. Refitting per target costs one whole fit
per target (O(pool) each, O(pool^2) in all, with the checks and frames of a fit every time).
:func:`fold_donations` prepares the pool once and derives every fold from it, a block of targets
at a time:

- similarity and blended: the fold's attribute mean and standard deviation come from the pool's
  shifted sums (sum and sum of squares about the pool mean) downdated by the dropped rows; the
  distances target x pool are computed for a block of targets, each with its fold's scaling, the
  dropped basins masked, and the k nearest taken with ties broken by basin id, as the estimator
  does (:meth:`regional.transfer.donors._DonorTransfer._nearest`);
- proximity: great-circle distances in blocks, the dropped basins masked;
- median: order statistics of the sorted pool that skip the dropped basins (exact);
- regression: forward selection by PRESS per fold from the pool's fit of each candidate model
  and the deletion identities (:mod:`regional.transfer.regression_folds`).

A fold whose fit would warn or fail (an attribute constant without the dropped basins, missing
target attributes, too few basins, ...) is refit the plain way
(:func:`regional.transfer.fit_transfer`), so that its donation, its warnings and its errors are
those of the refit. The donations equal the refit ones to round-off (tested against the refit on
every method, with nested basins excluded).
"""

from __future__ import annotations

import warnings
from collections.abc import Collection, Sequence
from dataclasses import dataclass
from functools import partial

import numpy as np
import pandas as pd

from regional.errors import InputError, InputWarning
from regional.transfer import fit_transfer
from regional.transfer.base import Donation, forward, inverse
from regional.transfer.blended import BlendedFit
from regional.transfer.donors import (
    EARTH_RADIUS_KM,
    great_circle_km,
    inverse_distance_weights,
    lon_lat,
)
from regional.transfer.foldpool import (
    FoldPool,
    FoldSettings,
    Moments,
    downdated,
    fold_sizes,
    one_set_donation,
    target_values,
)
from regional.transfer.median import DONOR_LABEL as MEDIAN_LABEL
from regional.transfer.median import MedianFit
from regional.transfer.regression_folds import RegressionFolds

BLOCK_CELLS = 2_000_000
"""Target x pool distances held at once (16 MB of float64): the block of targets is cut so."""


@dataclass(frozen=True)
class FoldDonations:
    """Result of :func:`fold_donations`.

    Attributes
    ----------
    donations : dict
        Target -> its :class:`Donation` (that target only), as from the refit.
    warnings : dict
        Target -> messages of the warnings its fit raised (only a fold refit the plain way can
        warn: the others are the folds whose fit raises nothing).
    refit : tuple of str
        Targets whose fold was refit the plain way.
    """

    donations: dict[str, Donation]
    warnings: dict[str, tuple[str, ...]]
    refit: tuple[str, ...]


def fold_donations(
    method: str,
    X: pd.DataFrame,
    y: pd.DataFrame,
    targets: Sequence[str],
    drops: Sequence[Collection[str]],
    *,
    target_X: pd.DataFrame,
    settings: FoldSettings,
) -> FoldDonations:
    """Each target's donation from ``method`` fit on the pool minus that target's drop set.

    Parameters
    ----------
    method : str
        A registered method (``regression``, ``similarity``, ``proximity``, ``blended``,
        ``median``).
    X, y : DataFrame
        The pool: attributes and parameters (parameter units) of the basins a fold may be fit
        on, indexed by basin id.
    targets : sequence of str
        Target basins (in the pool or not).
    drops : sequence of collections of str
        Per target, the basins left out of its fold (the target itself and the basins sharing
        its area); ids not in the pool are ignored.
    target_X : DataFrame
        Attributes of (at least) the targets, indexed by basin id.
    settings : FoldSettings
        Transforms and the shared settings of the method.

    Returns
    -------
    FoldDonations
        Every target's donation equals ``fit_transfer(method, X minus drop, y minus drop,
        ...).donate(target_X.loc[[target]])`` to round-off (1e-12 relative in parameters,
        weights and distances; the same donors in the same order).
    """
    prepared = PreparedPool(method, X, y, settings)
    return prepared.donations(targets, drops, target_X=target_X)


class PreparedPool:
    """One method's pool prepared once (sorted, checked, its sums and fits made), for the
    folds of any number of targets (:meth:`donations`); see :func:`fold_donations`.

    Building it costs O(pool); each target then costs O(pool) flops in blocks, not a fit.
    Callers that cut their targets into many small chunks keep one per pool and method.
    """

    def __init__(
        self, method: str, X: pd.DataFrame, y: pd.DataFrame, settings: FoldSettings
    ) -> None:
        self.method, self.settings = method, settings
        self.pool = FoldPool.of(X, y)
        self.fast = None
        if method not in _FAST:
            return
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                warnings.simplefilter("error", InputWarning)  # the pool fit warns: refit all
                self.fast = _FAST[method](self.pool, settings)
        except (InputError, InputWarning, ValueError, FloatingPointError):
            self.fast = None

    def donations(
        self, targets: Sequence[str], drops: Sequence[Collection[str]], *, target_X: pd.DataFrame
    ) -> FoldDonations:
        """Each target's donation from a fit on the pool minus its drop set."""
        targets = [str(t) for t in targets]
        if len(drops) != len(targets):
            raise ValueError("give one drop set per target")
        rows = self.pool.rows(drops)
        fast: dict[str, Donation] = {}
        if self.fast is not None and targets:
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    fast = self.fast.donations(targets, rows, target_X)
            except (InputError, ValueError, FloatingPointError):
                fast = {}
        donations, notes, refit = {}, {}, []
        for target, drop in zip(targets, drops, strict=True):
            if target in fast:
                donations[target], notes[target] = fast[target], ()
                continue
            donations[target], notes[target] = refit_donation(
                self.method,
                self.pool.X,
                self.pool.y,
                target,
                drop,
                target_X=target_X,
                settings=self.settings,
            )
            refit.append(target)
        return FoldDonations(donations=donations, warnings=notes, refit=tuple(refit))


def refit_donation(
    method: str,
    X: pd.DataFrame,
    y: pd.DataFrame,
    target: str,
    drop: Collection[str],
    *,
    target_X: pd.DataFrame,
    settings: FoldSettings,
) -> tuple[Donation, tuple[str, ...]]:
    """The plain route: fit ``method`` on the pool minus ``drop`` and donate to ``target``.

    Returns the donation and the messages of the warnings raised (errors propagate).
    """
    train = X.index[~X.index.isin([str(b) for b in drop])]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        estimator = _fit(method, X.loc[train], y.loc[train], settings)
        donation = estimator.donate(target_X.loc[[target]])
    return donation, tuple(str(w.message) for w in caught)


def _fit(method: str, X: pd.DataFrame, y: pd.DataFrame, settings: FoldSettings):
    return fit_transfer(
        method,
        X,
        y,
        transforms=settings.transforms,
        attributes=list(settings.attributes) if settings.attributes else None,
        n_donors=settings.n_donors,
        power=settings.power,
        combine=settings.combine,
        level=settings.level,
    )


# --------------------------------------------------------------------------------------------
# The pool and its folds


def row_blocks(n_rows: int, cells_per_row: int, cells: int) -> list[slice]:
    """Consecutive slices of ``n_rows`` rows, each holding at most ``cells`` cells of
    ``cells_per_row`` each (at least one row per slice): the blocks in which a search over
    targets x donors is made, never all of it at once."""
    size = max(1, cells // max(cells_per_row, 1))
    return [slice(start, min(start + size, n_rows)) for start in range(0, n_rows, size)]


def k_nearest(distance: np.ndarray, k: int) -> np.ndarray:
    """Column indices of the k smallest of each row, ordered by (distance, column): the
    estimator's stable sort on distance over rows sorted by basin id."""
    if k >= distance.shape[1]:
        return np.argsort(distance, axis=1, kind="stable")[:, :k]
    part = np.argpartition(distance, k - 1, axis=1)[:, :k]
    part.sort(axis=1)
    values = np.take_along_axis(distance, part, axis=1)
    order = np.take_along_axis(part, np.argsort(values, axis=1, kind="stable"), axis=1)
    kth = values.max(axis=1)
    tied = (distance <= kth[:, None]).sum(axis=1) > k  # a tie across the k-th place
    for row in np.flatnonzero(tied):
        order[row] = np.argsort(distance[row], kind="stable")[:k]
    return order


# --------------------------------------------------------------------------------------------
# Donor methods


class _DonorFolds:
    """Similarity, proximity or blended prepared on the pool: its fit on the whole pool (which
    checks the pool and gives the attributes, power and layout) and the pool's sums."""

    def __init__(self, pool: FoldPool, settings: FoldSettings, method: str) -> None:
        self.pool, self.settings = pool, settings
        self.fit = _fit(method, pool.X, pool.y, settings)
        self.parameters = self.fit.donor_parameters_.to_numpy(dtype=float)
        self.attributes = self.moments = self.points = self.units = None
        if hasattr(self.fit, "attributes_"):
            self.attributes = pool.X[list(self.fit.attributes_)].to_numpy(dtype=float)
            self.moments = Moments.of(self.attributes)
        if not hasattr(self.fit, "attributes_") or self._blended:
            location = self.fit.location
            self.points = lon_lat(pool.X, location, method=self.fit._method, role="the pool")
        if self._blended:
            self.units = _unit_vectors(self.points)
            self.units_sum = self.units.sum(axis=0)

    @property
    def _blended(self) -> bool:
        return isinstance(self.fit, BlendedFit)

    def donations(self, targets: list[str], rows: np.ndarray, target_X: pd.DataFrame):
        out: dict[str, Donation] = {}
        n_f = fold_sizes(self.pool, rows)
        for part in row_blocks(len(targets), self.pool.n, BLOCK_CELLS):
            index = np.arange(part.start, part.stop)
            distance, ok = self._distances(target_X.loc[targets[part]], rows[part])
            if not ok.any():
                continue
            index, distance, block_rows = index[ok], distance[ok], rows[part][ok]
            flat = np.repeat(np.arange(len(index)), block_rows.shape[1])
            keep = block_rows.ravel() >= 0
            distance[flat[keep], block_rows.ravel()[keep]] = np.inf
            ks = np.minimum(self.settings.n_donors, n_f[index])
            order = k_nearest(distance, int(ks.max()))
            for k in np.unique(ks):
                these = np.flatnonzero(ks == k)
                chosen = order[these, :k]
                near = np.take_along_axis(distance[these], chosen, axis=1)
                weights = inverse_distance_weights(near, self.fit.power_)
                for row, position in enumerate(these):
                    target = targets[index[position]]
                    out[target] = _donor_donation(
                        self.fit, target, chosen[row], near[row], weights[row], self.parameters
                    )
        return out

    def _distances(self, targets: pd.DataFrame, rows: np.ndarray):
        """(targets, pool) distances under each target's fold, and the folds the batched route
        gives exactly (the others are refit)."""
        ok = np.ones(len(targets), dtype=bool)
        attribute = geographic = None
        if self.attributes is not None:
            values = target_values(targets, list(self.fit.attributes_))
            mean, std, safe = self.moments.of_folds(rows)
            ok &= safe & self.moments.never_constant(rows) & np.isfinite(values).all(axis=1)
            attribute = _standardised_distance(values, self.attributes, mean, std)
        if self.points is not None:
            location = self.fit.location
            points = target_values(targets, [f"{location}_lon", f"{location}_lat"])
            ok &= _valid_points(points)
            geographic = _geographic(points, self.points)
        if attribute is None:
            return geographic, ok
        if not self._blended:
            return attribute, ok
        spread, fine = self._geographic_spreads(rows)
        share = self.fit.attribute_share_
        with np.errstate(divide="ignore", invalid="ignore"):
            blended = (
                share * attribute / self.fit.attribute_spread_
                + (1.0 - share) * geographic / spread[:, None]
            )
        return blended, ok & fine

    def _geographic_spreads(self, rows: np.ndarray):
        """Each fold's RMS chord distance between donors, km
        (:func:`regional.transfer.blended.geographic_spread_km`), from the pool's summed unit
        vectors less the dropped ones; and the folds where it is positive with >= 2 donors."""
        m = fold_sizes(self.pool, rows).astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            centre = downdated(self.units_sum, self.units, rows) / m[:, None]
            mean_square = 2.0 * m / (m - 1.0) * np.maximum(1.0 - (centre**2).sum(axis=1), 0.0)
            spread = EARTH_RADIUS_KM * np.sqrt(mean_square)
        return spread, (m >= 2) & (spread > 0)


def _unit_vectors(points: np.ndarray) -> np.ndarray:
    lon, lat = np.radians(points[:, 0]), np.radians(points[:, 1])
    return np.column_stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])


def _valid_points(points: np.ndarray) -> np.ndarray:
    lon, lat = points[:, 0], points[:, 1]
    return (
        np.isfinite(points).all(axis=1)
        & (lon >= -180.0)
        & (lon <= 360.0)
        & (lat >= -90.0)
        & (lat <= 90.0)
    )


def _geographic(targets: np.ndarray, points: np.ndarray) -> np.ndarray:
    return great_circle_km(
        targets[:, None, 0], targets[:, None, 1], points[None, :, 0], points[None, :, 1]
    )


def _standardised_distance(
    targets: np.ndarray, pool: np.ndarray, mean: np.ndarray, std: np.ndarray
) -> np.ndarray:
    """Euclidean distance between standardised attributes, each target with its own fold's
    mean and scale: (targets, pool)."""
    squares = np.zeros((len(targets), len(pool)))
    for j in range(pool.shape[1]):
        z_target = (targets[:, j] - mean[:, j]) / std[:, j]
        z_pool = (pool[None, :, j] - mean[:, j, None]) / std[:, j, None]
        squares += (z_target[:, None] - z_pool) ** 2
    return np.sqrt(squares)


def _donor_donation(
    pool, target: str, chosen: np.ndarray, distance: np.ndarray, weights: np.ndarray, values
) -> Donation:
    """One target's donation, laid out as :meth:`_DonorTransfer.donate` lays it out."""
    k = len(chosen)
    params = values[chosen]
    columns = {
        "target_id": np.full(k, target, dtype=object),
        "donor_id": pool.donor_ids_[chosen].astype(object),
        "rank": np.arange(1, k + 1),
        "distance": distance,
        "weight": weights,
    }
    used = params[weights > 0]
    ranges = {}
    for j, name in enumerate(pool.parameters_):
        columns[name] = params[:, j]
        ranges[f"{name}_low"] = used[:, j].min(keepdims=True)
        ranges[f"{name}_high"] = used[:, j].max(keepdims=True)
    return Donation(
        method=pool._method,
        sets=pd.DataFrame(columns),
        intervals=pd.DataFrame(ranges, index=pd.Index([target], name="target_id")),
        parameters=pool.parameters_,
        transforms=dict(pool.transforms_),
        combine=pool.combine_,
        level=None,
        distance_unit=pool._distance_unit,
    )


# --------------------------------------------------------------------------------------------
# Median


class _MedianFolds:
    """The median prepared on the pool: its fit (checks, parameters, transforms) and each
    parameter's sorted values with their ranks."""

    def __init__(self, pool: FoldPool, settings: FoldSettings) -> None:
        self.pool = pool
        self.fit = MedianFit(level=settings.level).fit(
            pool.X, pool.y, transforms=settings.transforms
        )
        self.sorted, self.ranks = {}, {}
        for name in self.fit.parameters_:
            values = pool.y[name].to_numpy(dtype=float)
            order = np.argsort(values, kind="stable")
            ranks = np.empty(pool.n, dtype=np.int64)
            ranks[order] = np.arange(pool.n)
            self.sorted[name], self.ranks[name] = values[order], ranks

    def donations(self, targets: list[str], rows: np.ndarray, target_X: pd.DataFrame):
        m = fold_sizes(self.pool, rows)
        level = float(self.fit.level)
        columns: dict[str, tuple[np.ndarray, ...]] = {}
        for name in self.fit.parameters_:
            ranks = self.ranks[name]
            dropped = np.where(rows >= 0, ranks[rows], np.iinfo(np.int64).max)
            dropped.sort(axis=1)
            ordered, transform = self.sorted[name], self.fit.transforms_[name]
            low, high = (
                inverse(_fold_quantile(forward(ordered, transform), dropped, m, q), transform)
                for q in (0.5 - level / 2.0, 0.5 + level / 2.0)
            )
            columns[name] = (_fold_median(ordered, dropped, m, transform), low, high)
        return {
            targets[t]: one_set_donation(
                "median",
                MEDIAN_LABEL,
                targets[t],
                {name: tuple(v[t] for v in values) for name, values in columns.items()},
                transforms=self.fit.transforms_,
                level=level,
            )
            for t in np.flatnonzero(m >= 1)
        }


def _kept(dropped: np.ndarray, position: np.ndarray) -> np.ndarray:
    """Index in the sorted pool of the fold's ``position``-th value (0-based), its dropped
    ranks (sorted, padded with a large number) skipped."""
    index = position.astype(np.int64)
    for j in range(dropped.shape[1]):
        index = index + (index >= dropped[:, j])
    return index


def _fold_median(ordered: np.ndarray, dropped: np.ndarray, m: np.ndarray, transform: str):
    """:func:`regional.transfer.median._median` of every fold."""
    middle = m // 2
    odd = ordered[_kept(dropped, np.minimum(middle, m - 1))]
    lower = ordered[_kept(dropped, np.maximum(middle - 1, 0))]
    centre = inverse((forward(lower, transform) + forward(odd, transform)) / 2.0, transform)
    even = np.clip(centre, lower, odd)
    return np.where(m % 2 == 1, odd, even)


def _fold_quantile(ordered: np.ndarray, dropped: np.ndarray, m: np.ndarray, q: float):
    """``np.quantile(fold values, q)`` (linear interpolation, Hyndman and Fan definition 7)
    of every fold, with numpy's own arithmetic (virtual index and interpolation)."""
    virtual = m * q + (1 + q * (1 - 1 - 1)) - 1
    previous = np.floor(virtual)
    below, above = virtual < 0, virtual >= m - 1
    previous = np.where(below, 0, np.where(above, m - 1, previous)).astype(np.int64)
    following = np.where(above, m - 1, np.where(below, 0, previous + 1)).astype(np.int64)
    gamma = virtual - np.floor(virtual)
    a = ordered[_kept(dropped, previous)]
    b = ordered[_kept(dropped, following)]
    diff = b - a
    lerp = a + diff * gamma
    return np.where(gamma >= 0.5, b - diff * (1 - gamma), lerp)


_FAST = {
    "regression": RegressionFolds,
    "similarity": partial(_DonorFolds, method="similarity"),
    "proximity": partial(_DonorFolds, method="proximity"),
    "blended": partial(_DonorFolds, method="blended"),
    "median": _MedianFolds,
}
"""Methods with a batched route; any other method is refit fold by fold."""
