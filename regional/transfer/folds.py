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

import numpy as np
import pandas as pd

from regional.errors import InputError, InputWarning
from regional.transfer import fit_transfer
from regional.transfer.base import Donation, forward, inverse
from regional.transfer.blended import BlendedTransfer
from regional.transfer.donors import (
    EARTH_RADIUS_KM,
    _DonorTransfer,
    great_circle_km,
    inverse_distance_weights,
    lon_lat,
)
from regional.transfer.foldpool import (
    FoldPool,
    FoldSettings,
    fold_moments,
    never_constant,
    one_set_donation,
    target_values,
)
from regional.transfer.median import DONOR_LABEL as MEDIAN_LABEL
from regional.transfer.median import MedianTransfer
from regional.transfer.regression_folds import regression_folds

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
    targets = [str(t) for t in targets]
    if len(drops) != len(targets):
        raise ValueError("give one drop set per target")
    folds = FoldPool.of(X, y, targets, drops)
    fast: dict[str, Donation] = {}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            warnings.simplefilter("error", InputWarning)  # the pool fit warns: refit them all
            fast = _FAST[method](folds, target_X, settings) if method in _FAST else {}
    except (InputError, InputWarning, ValueError, FloatingPointError):
        fast = {}
    donations, notes, refit = {}, {}, []
    for t, target in enumerate(targets):
        if target in fast:
            donations[target], notes[target] = fast[target], ()
            continue
        donations[target], notes[target] = refit_donation(
            method,
            folds.X,
            folds.y,
            target,
            folds.dropped(t),
            target_X=target_X,
            settings=settings,
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
    train = X.index[~X.index.isin(list(drop))]
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


def _blocks(n_targets: int, n_pool: int):
    size = max(1, BLOCK_CELLS // max(n_pool, 1))
    for start in range(0, n_targets, size):
        yield slice(start, min(start + size, n_targets))


def _k_nearest(distance: np.ndarray, k: int) -> np.ndarray:
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


def _donor_folds(
    folds: FoldPool, target_X: pd.DataFrame, settings: FoldSettings, method: str
) -> dict[str, Donation]:
    pool = _fit(method, folds.X, folds.y, settings)
    geometry = _DonorGeometry.of(pool, folds, target_X)
    parameters = pool.donor_parameters_.to_numpy(dtype=float)
    out: dict[str, Donation] = {}
    n_f = folds.n - folds.n_dropped()
    for part in _blocks(len(folds.targets), folds.n):
        ok = geometry.ok[part]
        if not ok.any():
            continue
        index = np.arange(part.start, part.stop)[ok]
        distance = geometry.distances(index)
        rows = folds.rows[index]
        flat = np.repeat(np.arange(len(index)), rows.shape[1])
        keep = rows.ravel() >= 0
        distance[flat[keep], rows.ravel()[keep]] = np.inf
        ks = np.minimum(settings.n_donors, n_f[index])
        order = _k_nearest(distance, int(ks.max()))
        for k in np.unique(ks):
            these = np.flatnonzero(ks == k)
            chosen = order[these, :k]
            near = np.take_along_axis(distance[these], chosen, axis=1)
            weights = inverse_distance_weights(near, pool.power_)
            for row, position in enumerate(these):
                target = folds.targets[index[position]]
                out[target] = _donor_donation(
                    pool, target, chosen[row], near[row], weights[row], parameters
                )
    return out


@dataclass
class _DonorGeometry:
    """Distances of the folds' targets to the pool under each fold's fit (similarity,
    proximity, blended), and which folds may skip the refit (``ok``)."""

    pool: _DonorTransfer
    attributes: np.ndarray | None  # pool's raw attributes, sorted (similarity, blended)
    target_attributes: np.ndarray | None
    points: np.ndarray | None  # pool lon/lat (proximity, blended)
    target_points: np.ndarray | None
    mean: np.ndarray | None
    std: np.ndarray | None
    geo_spread: np.ndarray | None
    ok: np.ndarray

    @classmethod
    def of(cls, pool, folds: FoldPool, target_X: pd.DataFrame) -> _DonorGeometry:
        targets = target_X.loc[folds.targets]
        rows = folds.rows
        ok = np.ones(len(folds.targets), dtype=bool)
        attributes = target_attributes = points = target_points = None
        mean = std = spread = None
        if hasattr(pool, "attributes_"):
            columns = list(pool.attributes_)
            attributes = folds.X[columns].to_numpy(dtype=float)
            target_attributes = target_values(targets, columns)
            mean, std, safe = fold_moments(attributes, folds, rows)
            ok &= safe & never_constant(attributes, folds, rows)
            ok &= np.isfinite(target_attributes).all(axis=1)
        if not hasattr(pool, "attributes_") or isinstance(pool, BlendedTransfer):
            location = pool.location
            points = lon_lat(folds.X, location, method=pool._method, role="the pool")
            target_points = target_values(targets, [f"{location}_lon", f"{location}_lat"])
            ok &= _valid_points(target_points)
        if isinstance(pool, BlendedTransfer):
            spread, fine = _geographic_spreads(points, folds, rows)
            ok &= fine
        return cls(
            pool, attributes, target_attributes, points, target_points, mean, std, spread, ok
        )

    def distances(self, index: np.ndarray) -> np.ndarray:
        """(len(index), pool) distances under each target's fold."""
        if self.attributes is None:
            return _geographic(self.target_points[index], self.points)
        attribute = _standardised_distance(
            self.target_attributes[index], self.attributes, self.mean[index], self.std[index]
        )
        if not isinstance(self.pool, BlendedTransfer):
            return attribute
        share = self.pool.attribute_share_
        geographic = _geographic(self.target_points[index], self.points)
        return (
            share * attribute / self.pool.attribute_spread_
            + (1.0 - share) * geographic / self.geo_spread[index][:, None]
        )


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


def _geographic_spreads(points: np.ndarray, folds: FoldPool, rows: np.ndarray):
    """Each fold's RMS chord distance between donors, km
    (:func:`regional.transfer.blended.geographic_spread_km`), from the pool's summed unit
    vectors less the dropped ones; and the folds where it is positive with >= 2 donors."""
    lon, lat = np.radians(points[:, 0]), np.radians(points[:, 1])
    unit = np.column_stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
    m = (folds.n - (rows >= 0).sum(axis=1)).astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        centre = folds.downdated(unit, rows) / m[:, None]
        mean_square = 2.0 * m / (m - 1.0) * np.maximum(1.0 - (centre**2).sum(axis=1), 0.0)
        spread = EARTH_RADIUS_KM * np.sqrt(mean_square)
    return spread, (m >= 2) & (spread > 0)


def _donor_donation(
    pool, target: str, chosen: np.ndarray, distance: np.ndarray, weights: np.ndarray, values
) -> Donation:
    """One target's donation, laid out as :meth:`_DonorTransfer.donate` lays it out."""
    k = len(chosen)
    sets = pd.DataFrame(
        {
            "target_id": np.full(k, target, dtype=object),
            "donor_id": pool.donor_ids_[chosen].astype(object),
            "rank": np.arange(1, k + 1),
            "distance": distance,
            "weight": weights,
        }
    )
    params = values[chosen]
    for j, name in enumerate(pool.parameters_):
        sets[name] = params[:, j]
    used = params[weights > 0]
    ranges = {}
    for j, name in enumerate(pool.parameters_):
        ranges[f"{name}_low"] = [used[:, j].min()]
        ranges[f"{name}_high"] = [used[:, j].max()]
    return Donation(
        method=pool._method,
        sets=sets,
        intervals=pd.DataFrame(ranges, index=pd.Index([target], name="target_id")),
        parameters=pool.parameters_,
        transforms=dict(pool.transforms_),
        combine=pool.combine_,
        level=None,
        distance_unit=pool._distance_unit,
    )


# --------------------------------------------------------------------------------------------
# Median


def _median_folds(
    folds: FoldPool, target_X: pd.DataFrame, settings: FoldSettings
) -> dict[str, Donation]:
    pool = MedianTransfer(level=settings.level).fit(
        folds.X, folds.y, transforms=settings.transforms
    )
    m = folds.n - folds.n_dropped()
    ok = m >= 1
    level = float(pool.level)
    columns: dict[str, np.ndarray] = {}
    for name in pool.parameters_:
        values = folds.y[name].to_numpy(dtype=float)
        order = np.argsort(values, kind="stable")
        ranks = np.empty(folds.n, dtype=np.int64)
        ranks[order] = np.arange(folds.n)
        dropped = np.where(folds.rows >= 0, ranks[folds.rows], np.iinfo(np.int64).max)
        dropped.sort(axis=1)
        ordered = values[order]
        transform = pool.transforms_[name]
        columns[name] = _fold_median(ordered, dropped, m, transform)
        low, high = (
            inverse(_fold_quantile(forward(ordered, transform), dropped, m, q), transform)
            for q in (0.5 - level / 2.0, 0.5 + level / 2.0)
        )
        columns[f"{name}_low"], columns[f"{name}_high"] = low, high
    return {
        folds.targets[t]: one_set_donation(
            "median",
            MEDIAN_LABEL,
            folds.targets[t],
            {
                name: (columns[name][t], columns[f"{name}_low"][t], columns[f"{name}_high"][t])
                for name in pool.parameters_
            },
            transforms=pool.transforms_,
            level=level,
        )
        for t in np.flatnonzero(ok)
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


def _similarity(folds, target_X, settings):
    return _donor_folds(folds, target_X, settings, "similarity")


def _proximity(folds, target_X, settings):
    return _donor_folds(folds, target_X, settings, "proximity")


def _blended(folds, target_X, settings):
    return _donor_folds(folds, target_X, settings, "blended")


def _regression(folds, target_X, settings):
    return regression_folds(folds, target_X, settings)


_FAST = {
    "regression": _regression,
    "similarity": _similarity,
    "proximity": _proximity,
    "blended": _blended,
    "median": _median_folds,
}
"""Methods with a batched route; any other method is refit fold by fold."""
