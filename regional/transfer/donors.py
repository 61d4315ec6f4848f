"""Donor transfers: the k nearest gauged basins give their parameter sets, weighted by distance.

- :class:`SimilarityFit` (physical similarity): nearest in attribute space, each attribute
  standardised with the mean and standard deviation of the training donors only.
- :class:`ProximityFit` (spatial proximity): nearest by great-circle distance between
  centroids (or outlets), haversine formula on a sphere of the mean Earth radius.

Both are plain classes without scikit-learn; their estimators ``SimilarityTransfer`` and
``ProximityTransfer`` are made in :mod:`regional.transfer.estimators`.

Both weight donor i by w_i = d_i^-power / sum_j d_j^-power (inverse distance weighting, Shepard
1968, Proc. 23rd ACM National Conference, 517-524). Donors at distance 0 share all the weight
equally. Ties in distance are broken by basin id, so the result never depends on row order. The
methods are compared in Oudin et al. (2008, Water Resources Research 44, W03413). See
``docs/transfer-similarity.md`` and ``docs/transfer-proximity.md``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from regional.errors import InputError
from regional.transfer.base import (
    Donation,
    PlainFit,
    check_combine,
    check_complete,
    check_n_donors,
    check_parameters,
    check_power,
    check_table,
    donor_range,
    drop_constant,
    select_attributes,
    sort_training,
    weighted_estimate,
)

EARTH_RADIUS_KM = 6371.0088
"""Mean Earth radius R1 = (2a + b) / 3 of the GRS80/WGS84 ellipsoid, km (Moritz 2000, J. Geodesy
74, 128-133)."""

SEARCH_BLOCK_CELLS = 4_000_000
"""Targets x donors x 4 values held at once by the nearest-donor search (32 MB of float64):
the targets are taken a block at a time, at least one per block. The distances of a block
(its attribute differences, or the great-circle formula's terms) take a few target x donor
arrays at once; 512 targets per block at 7,500 donors took about 185 MB."""


def great_circle_km(
    lon1: np.ndarray, lat1: np.ndarray, lon2: np.ndarray, lat2: np.ndarray
) -> np.ndarray:
    """Great-circle distance in km between points given in degrees (broadcasting).

    Haversine formula (Sinnott 1984, Sky and Telescope 68(2), 159) on a sphere of radius
    :data:`EARTH_RADIUS_KM`; within about 0.5% of the WGS84 ellipsoidal distance.
    """
    lon1, lat1, lon2, lat2 = (
        np.radians(np.asarray(v, dtype=float)) for v in (lon1, lat1, lon2, lat2)
    )
    half = (
        np.sin((lat2 - lat1) / 2.0) ** 2
        + np.cos(lat1) * np.cos(lat2) * np.sin((lon2 - lon1) / 2.0) ** 2
    )
    return 2.0 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(half, 0.0, 1.0)))


def inverse_distance_weights(distance: np.ndarray, power: float) -> np.ndarray:
    """Normalised inverse-distance weights along the last axis.

    w_i = d_i^-power / sum_j d_j^-power; where any distance in a row is 0 (and power > 0), the
    zero-distance donors share the weight equally and the others get 0. power = 0 gives equal
    weights.
    """
    distance = np.asarray(distance, dtype=float)
    if power == 0:
        raw = np.ones_like(distance)
    else:
        zero = distance == 0.0
        nearest = distance.min(axis=-1, keepdims=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            # (d_min / d_i)^power: the same normalised weights, without overflow for tiny d
            scaled = (nearest / distance) ** power
        raw = np.where(zero.any(axis=-1, keepdims=True), zero * 1.0, scaled)
    return raw / raw.sum(axis=-1, keepdims=True)


class DonorFit(PlainFit):
    """Shared fit/donate/predict of the nearest-donor methods (subclasses give coordinates)."""

    _method = "donor"
    _distance_unit = ""

    def _fit_coordinates(self, X: pd.DataFrame) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _target_coordinates(self, X: pd.DataFrame) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def _distance(self, targets: np.ndarray, donors: np.ndarray) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def fit(
        self,
        X: pd.DataFrame,
        y: pd.DataFrame,
        *,
        transforms: Mapping[str, str] | None = None,
    ) -> DonorFit:
        """Store the training donors (cheap: no search happens until :meth:`donate`).

        Parameters
        ----------
        X : pandas.DataFrame
            Attributes of the gauged basins, indexed by basin id (str).
        y : pandas.DataFrame
            Calibrated parameters of the same basins, one column per parameter.
        transforms : mapping, optional
            Parameter -> ``"log"`` or ``"identity"``: the space parameter averages are taken in.
            Default ``"log"`` for ``k_per_day``, ``"identity"`` otherwise.

        Returns
        -------
        self
        """
        method = self._method
        power = check_power(self.power, method=method)
        combine = check_combine(self.combine, method=method)
        X = check_table(X, method=method, role="the training attributes X")
        y, transforms_ = check_parameters(y, X.index, transforms, method=method)
        X, y = sort_training(X, y)
        n_donors = check_n_donors(self.n_donors, len(X), method=method)
        self.coordinates_ = self._fit_coordinates(X)
        self.donor_ids_ = X.index.to_numpy(dtype=str)
        self.donor_parameters_ = y.copy()
        self.parameters_ = tuple(y.columns)
        self.transforms_ = transforms_
        self.n_train_ = len(X)
        self.n_donors_ = n_donors
        self.power_ = power
        self.combine_ = combine
        return self

    def donate(self, X: pd.DataFrame) -> Donation:
        """The k nearest training donors of each target and their inverse-distance weights.

        Parameters
        ----------
        X : pandas.DataFrame
            Attributes of the targets, indexed by basin id; the columns used at fit are needed.

        Returns
        -------
        Donation
            ``sets`` holds k rows per target (``donor_id``, ``rank``, ``distance``, ``weight``,
            the donor's parameters); ``intervals`` the min and max over the donors with
            positive weight.
        """
        self._check_fitted()
        X = check_table(X, method=self._method, role="the target attributes X")
        coordinates = self._target_coordinates(X)
        order, distance = self._nearest(coordinates)
        weights = inverse_distance_weights(distance, self.power_)
        sets = self._sets(X.index, order, distance, weights)
        return Donation(
            method=self._method,
            sets=sets,
            intervals=donor_range(sets, self.parameters_, _target_index(X)),
            parameters=self.parameters_,
            transforms=dict(self.transforms_),
            combine=self.combine_,
            level=None,
            distance_unit=self._distance_unit,
        )

    def predict(self, X: pd.DataFrame) -> pd.DataFrame:
        """Single estimate per target: weighted mean of donor parameters in transformed space.

        For a log parameter this is the weighted geometric mean. With ``combine="output"`` the
        flows are still built from every donor set (see :mod:`regional.transfer.combine`); this
        estimate is the parameter-averaging one.

        Returns
        -------
        pandas.DataFrame
            Indexed by ``target_id``, one column per parameter, in parameter units.
        """
        donation = self.donate(X)
        return weighted_estimate(donation.sets, self.parameters_, self.transforms_).reindex(
            donation.targets
        )

    def _nearest(self, targets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Indices and distances of the k nearest donors per target, ties broken by basin id.

        Training rows are sorted by basin id at fit, so a stable sort on distance breaks ties
        by id.
        """
        k = self.n_donors_
        orders, distances = [], []
        step = max(1, SEARCH_BLOCK_CELLS // (4 * max(1, len(self.coordinates_))))
        for start in range(0, len(targets), step):
            block = self._distance(targets[start : start + step], self.coordinates_)
            order = np.argsort(block, axis=1, kind="stable")[:, :k]
            orders.append(order)
            distances.append(np.take_along_axis(block, order, axis=1))
        return np.vstack(orders), np.vstack(distances)

    def _sets(
        self, targets: pd.Index, order: np.ndarray, distance: np.ndarray, weights: np.ndarray
    ) -> pd.DataFrame:
        n_targets, k = order.shape
        flat = order.ravel()
        sets = pd.DataFrame(
            {
                "target_id": np.repeat(targets.to_numpy(dtype=object), k),
                "donor_id": self.donor_ids_[flat].astype(object),
                "rank": np.tile(np.arange(1, k + 1), n_targets),
                "distance": distance.ravel(),
                "weight": weights.ravel(),
            }
        )
        values = self.donor_parameters_.to_numpy(dtype=float)[flat]
        for j, name in enumerate(self.parameters_):
            sets[name] = values[:, j]
        return sets


def _target_index(X: pd.DataFrame) -> pd.Index:
    return pd.Index(X.index, name="target_id")


class SimilarityFit(DonorFit):
    """Physical similarity: the k nearest gauged basins in standardised attribute space.

    Parameters
    ----------
    attributes : sequence of str, optional
        Attribute columns defining similarity. Default: every numeric column of ``X``. Constant
        ones are dropped with an :class:`~regional.errors.InputWarning`.
    n_donors : int, default 5
        Number of donors k per target (<= the number of training basins).
    power : float, default 1.0
        Inverse-distance power (0: equal weights).
    combine : {"output", "parameter"}, default "output"
        How the donors' flows are combined downstream (stored in the :class:`Donation`).

    Attributes
    ----------
    attributes_ : list of str
        Attributes used (after dropping constant ones).
    mean_, scale_ : pandas.Series
        Training donors' mean and standard deviation (ddof=1) per attribute: every attribute is
        standardised z = (x - mean) / scale, so each counts equally in the Euclidean distance.
    coordinates_ : ndarray (n_train, n_attributes)
        Standardised attributes of the donors, rows sorted by basin id.
    donor_ids_, donor_parameters_, parameters_, transforms_, n_train_ : as fitted.
    """

    _method = "similarity"
    _distance_unit = "standardised"
    description = (
        "Physical similarity: the k gauged basins nearest in attribute space (each attribute "
        "standardised over the donors) give their parameter sets, weighted by inverse distance."
    )
    references = (
        "Oudin, L., Andreassian, V., Perrin, C., Michel, C., Le Moine, N. (2008): Spatial "
        "proximity, physical similarity, regression and ungaged catchments. Water Resour. Res. "
        "44, W03413.",
        "Shepard, D. (1968): A two-dimensional interpolation function for irregularly-spaced "
        "data. Proc. 23rd ACM National Conference, 517-524 (inverse-distance weights).",
    )

    def __init__(
        self,
        attributes: Sequence[str] | None = None,
        n_donors: int = 5,
        power: float = 1.0,
        combine: str = "output",
    ) -> None:
        self.attributes = attributes
        self.n_donors = n_donors
        self.power = power
        self.combine = combine

    def _fit_coordinates(self, X: pd.DataFrame) -> np.ndarray:
        self.attributes_, self.dropped_, self.mean_, self.scale_ = attribute_scaling(
            X, self.attributes, method=self._method, stacklevel=5
        )
        return self.standardise(X)

    def standardise(self, X: pd.DataFrame) -> np.ndarray:
        """Attributes of ``X`` standardised with the training donors' mean and scale."""
        return standardised(X, self.attributes_, self.mean_, self.scale_)

    def _target_coordinates(self, X: pd.DataFrame) -> np.ndarray:
        check_attributes_present(X, self.attributes_, method=self._method)
        return self.standardise(X)

    def _distance(self, targets: np.ndarray, donors: np.ndarray) -> np.ndarray:
        return euclidean_distance(targets, donors)


class ProximityFit(DonorFit):
    """Spatial proximity: the k nearest gauged basins by great-circle distance.

    Parameters
    ----------
    n_donors : int, default 5
        Number of donors k per target (<= the number of training basins).
    power : float, default 1.0
        Inverse-distance power (0: equal weights).
    combine : {"output", "parameter"}, default "output"
        How the donors' flows are combined downstream (stored in the :class:`Donation`).
    location : {"centroid", "outlet"}, default "centroid"
        Points compared: columns ``<location>_lon`` and ``<location>_lat`` in degrees (WGS84).

    Attributes
    ----------
    coordinates_ : ndarray (n_train, 2)
        Donor longitude and latitude, degrees, rows sorted by basin id.
    donor_ids_, donor_parameters_, parameters_, transforms_, n_train_ : as fitted.
    """

    _method = "proximity"
    _distance_unit = "km"
    description = (
        "Spatial proximity: the k gauged basins nearest by great-circle distance between "
        "centroids (or outlets) give their parameter sets, weighted by inverse distance."
    )
    references = (
        "Merz, R., Bloeschl, G. (2004): Regionalisation of catchment model parameters. "
        "J. Hydrol. 287, 95-123.",
        "Oudin, L., Andreassian, V., Perrin, C., Michel, C., Le Moine, N. (2008): Spatial "
        "proximity, physical similarity, regression and ungaged catchments. Water Resour. Res. "
        "44, W03413.",
        "Shepard, D. (1968): A two-dimensional interpolation function for irregularly-spaced "
        "data. Proc. 23rd ACM National Conference, 517-524 (inverse-distance weights).",
    )

    def __init__(
        self,
        n_donors: int = 5,
        power: float = 1.0,
        combine: str = "output",
        location: str = "centroid",
    ) -> None:
        self.n_donors = n_donors
        self.power = power
        self.combine = combine
        self.location = location

    def _fit_coordinates(self, X: pd.DataFrame) -> np.ndarray:
        return lon_lat(X, self.location, method=self._method, role="the training attributes X")

    def _target_coordinates(self, X: pd.DataFrame) -> np.ndarray:
        return lon_lat(X, self.location, method=self._method, role="the target attributes X")

    def _distance(self, targets: np.ndarray, donors: np.ndarray) -> np.ndarray:
        return great_circle_km(
            targets[:, None, 0], targets[:, None, 1], donors[None, :, 0], donors[None, :, 1]
        )


# --------------------------------------------------------------------------------------------
# Coordinates shared by the donor methods


def attribute_scaling(
    X: pd.DataFrame, attributes: Sequence[str] | None, *, method: str, stacklevel: int
) -> tuple[list[str], list[str], pd.Series, pd.Series]:
    """Attributes to compare and the training donors' mean and standard deviation of each.

    Parameters
    ----------
    X : pandas.DataFrame
        Training attributes, indexed by basin id.
    attributes : sequence of str, optional
        Columns to use (default: every numeric column); constant ones are dropped with an
        :class:`~regional.errors.InputWarning`.
    method : str
        Method name for messages.
    stacklevel : int
        Passed to the warning so it points at the user's call.

    Returns
    -------
    (kept, dropped, mean, scale)
        Attribute names kept and dropped; mean and standard deviation (ddof=1) of the kept ones.
    """
    role = "the training attributes X"
    candidates = select_attributes(X, attributes, method=method, role=role)
    check_complete(X, candidates, method=method, role=role)
    kept, dropped = drop_constant(X, candidates, method=method, stacklevel=stacklevel)
    if not kept:
        raise InputError(
            f"{method} transfer: every attribute is constant over the {len(X)} "
            f"training basins ({', '.join(map(repr, dropped))}); {method} needs at least "
            "one attribute that varies."
        )
    values = X[kept].astype(float)
    return kept, dropped, values.mean(), values.std(ddof=1)


def check_attributes_present(X: pd.DataFrame, columns: Sequence[str], *, method: str) -> None:
    """Raise InputError when a target lacks, or has no value for, an attribute used at fit."""
    role = "the target attributes X"
    select_attributes(X, columns, method=method, role=role)
    check_complete(X, columns, method=method, role=role)


def standardised(
    X: pd.DataFrame, columns: Sequence[str], mean: pd.Series, scale: pd.Series
) -> np.ndarray:
    """z = (x - mean) / scale for the given columns of ``X``, shape (n_basins, n_columns)."""
    values = X[list(columns)].to_numpy(dtype=float)
    return (values - mean.to_numpy()) / scale.to_numpy()


def euclidean_distance(targets: np.ndarray, donors: np.ndarray) -> np.ndarray:
    """Euclidean distance between every target row and every donor row, (n_targets, n_donors)."""
    difference = targets[:, None, :] - donors[None, :, :]
    return np.sqrt(np.einsum("tdk,tdk->td", difference, difference))


def lon_lat(X: pd.DataFrame, location: str, *, method: str, role: str) -> np.ndarray:
    """Longitude and latitude in degrees of ``<location>_lon`` / ``<location>_lat``, checked.

    Raises
    ------
    InputError
        For a location other than ``"centroid"`` or ``"outlet"``, missing columns or values, or
        values outside [-180, 360] / [-90, 90] degrees (e.g. projected metres).
    """
    if location not in ("centroid", "outlet"):
        raise InputError(
            f"{method} transfer: location must be 'centroid' or 'outlet', got {location!r}."
        )
    columns = [f"{location}_lon", f"{location}_lat"]
    select_attributes(X, columns, method=method, role=role)
    check_complete(X, columns, method=method, role=role)
    values = X[columns].to_numpy(dtype=float)
    for j, (name, bound) in enumerate(zip(columns, (360.0, 90.0), strict=True)):
        low = -180.0 if j == 0 else -90.0
        bad = (values[:, j] < low) | (values[:, j] > bound)
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"{method} transfer: {name} = {values[row, j]!r} for basin "
                f"{X.index[row]!r} in {role} is outside [{low:g}, {bound:g}] degrees; "
                "give geographic coordinates (degrees, WGS84), not projected ones."
            )
    return values
