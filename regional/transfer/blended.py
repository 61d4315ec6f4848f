"""Donors ranked by a blend of attribute distance and geographic distance.

Spatial proximity and physical similarity each miss something: a neighbour across a divide may
drain different rock, and a look-alike basin a thousand kilometres away may see a different
climate. Oudin et al. (2008, Water Resources Research 44, W03413) found that combining the two
kinds of donors kept more skill than either alone on 913 French catchments. Here one ranking
serves both: the distance from target t to donor i is

    D_ti = a * d_attr(t, i) / s_attr + (1 - a) * d_geo(t, i) / s_geo

with d_attr the Euclidean distance between standardised attributes (as in similarity), d_geo the
great-circle distance in km (as in proximity), ``a`` the attribute share in [0, 1] and s_attr,
s_geo the spread of each distance over the training donors: the root-mean-square distance between
two distinct donors. For standardised attributes (ddof=1) that is exactly sqrt(2 p) for p
attributes; for locations it is taken from the donors' unit vectors u_i on the sphere,
s_geo = R * sqrt(2 n / (n - 1) * (1 - |mean u|^2)) (the RMS chord, within 2 % of the RMS
great-circle distance for donors within 4000 km of each other), both computed in O(n). Dividing
by the spread makes the two terms unitless and comparable whatever the size of the region.

The k donors with the smallest D are weighted by inverse distance, as in the other donor methods
(Shepard 1968). With a = 1 the ranking and the weights are those of similarity, with a = 0 those
of proximity (a constant scale changes neither). See ``docs/transfer-blended.md``.

:class:`BlendedFit` holds the method without scikit-learn; its estimator
``BlendedTransfer`` is made in :mod:`regional.transfer.estimators`.
"""

from __future__ import annotations

from collections.abc import Sequence
from numbers import Real

import numpy as np
import pandas as pd

from regional.errors import InputError
from regional.transfer.donors import (
    EARTH_RADIUS_KM,
    DonorFit,
    attribute_scaling,
    check_attributes_present,
    euclidean_distance,
    great_circle_km,
    lon_lat,
    standardised,
)


def attribute_spread(n_attributes: int) -> float:
    """Root-mean-square distance between two distinct donors in standardised attribute space.

    With every attribute standardised by the donors' mean and standard deviation (ddof=1), the
    mean squared distance over the n (n - 1) ordered pairs of distinct donors is 2 p exactly
    (sum over pairs of |z_i - z_j|^2 = 2 n sum_i |z_i - mean z|^2 = 2 n (n - 1) p).
    """
    return float(np.sqrt(2.0 * n_attributes))


def geographic_spread_km(lon_lat_deg: np.ndarray) -> float:
    """Root-mean-square chord distance between two distinct donors, km.

    Parameters
    ----------
    lon_lat_deg : ndarray (n, 2)
        Donor longitudes and latitudes, degrees; n >= 2.

    Returns
    -------
    float
        R * sqrt(2 n / (n - 1) * (1 - |mean unit vector|^2)), km, with R the mean Earth radius.
    """
    lon, lat = np.radians(lon_lat_deg[:, 0]), np.radians(lon_lat_deg[:, 1])
    unit = np.column_stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
    n = len(unit)
    centre = unit.mean(axis=0)
    mean_square = 2.0 * n / (n - 1) * max(1.0 - float(centre @ centre), 0.0)
    return EARTH_RADIUS_KM * float(np.sqrt(mean_square))


class BlendedFit(DonorFit):
    """Donors nearest by a blend of standardised attribute distance and great-circle distance.

    Parameters
    ----------
    attributes : sequence of str, optional
        Attribute columns for the attribute distance. Default: every numeric column of ``X``
        except the location columns. Constant ones are dropped with an
        :class:`~regional.errors.InputWarning`.
    n_donors : int, default 5
        Number of donors k per target (<= the number of training basins).
    power : float, default 1.0
        Inverse-distance power (0: equal weights).
    combine : {"output", "parameter"}, default "output"
        How the donors' flows are combined downstream (stored in the :class:`Donation`).
    attribute_share : float in [0, 1], default 0.5
        Share ``a`` of the attribute term in the blended distance (1: similarity's ranking,
        0: proximity's).
    location : {"centroid", "outlet"}, default "centroid"
        Points compared: columns ``<location>_lon`` and ``<location>_lat`` in degrees (WGS84).

    Attributes
    ----------
    attributes_ : list of str
        Attributes used (after dropping constant ones).
    mean_, scale_ : pandas.Series
        Training donors' mean and standard deviation (ddof=1) per attribute.
    attribute_spread_ : float
        RMS standardised attribute distance between two donors, sqrt(2 p) (unitless).
    geographic_spread_km_ : float
        RMS distance between two donors' locations, km.
    coordinates_ : ndarray (n_train, n_attributes + 2)
        Standardised attributes, then longitude and latitude (degrees), rows sorted by basin id.
    donor_ids_, donor_parameters_, parameters_, transforms_, n_train_ : as fitted.

    References
    ----------
    Oudin, L., Andreassian, V., Perrin, C., Michel, C., Le Moine, N. (2008): Spatial proximity,
    physical similarity, regression and ungaged catchments: a comparison of regionalization
    approaches based on 913 French catchments. Water Resour. Res. 44, W03413.
    """

    _method = "blended"
    _distance_unit = "blended"
    description = (
        "Blended donors: the k gauged basins nearest by a weighted sum of the standardised "
        "attribute distance and the great-circle distance, each divided by its spread over the "
        "donors, give their parameter sets, weighted by inverse distance."
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
        attribute_share: float = 0.5,
        location: str = "centroid",
    ) -> None:
        self.attributes = attributes
        self.n_donors = n_donors
        self.power = power
        self.combine = combine
        self.attribute_share = attribute_share
        self.location = location

    def _fit_coordinates(self, X: pd.DataFrame) -> np.ndarray:
        self.attribute_share_ = self._check_share()
        role = "the training attributes X"
        points = lon_lat(X, self.location, method=self._method, role=role)
        if len(X) < 2:
            raise InputError(
                f"{self._method} transfer: needs at least 2 training basins to measure the "
                f"spread of distances between donors; got {len(X)}. Add gauged basins."
            )
        self.attributes_, self.dropped_, self.mean_, self.scale_ = attribute_scaling(
            X, self._attribute_columns(X), method=self._method, stacklevel=5
        )
        self.attribute_spread_ = attribute_spread(len(self.attributes_))
        self.geographic_spread_km_ = geographic_spread_km(points)
        if not self.geographic_spread_km_ > 0.0:
            raise InputError(
                f"{self._method} transfer: all {len(X)} training basins sit at the same "
                f"{self.location} ({points[0, 0]:g}, {points[0, 1]:g}), so geographic distance "
                "cannot rank them; use the similarity method or give distinct locations."
            )
        return np.hstack([standardised(X, self.attributes_, self.mean_, self.scale_), points])

    def _target_coordinates(self, X: pd.DataFrame) -> np.ndarray:
        check_attributes_present(X, self.attributes_, method=self._method)
        points = lon_lat(X, self.location, method=self._method, role="the target attributes X")
        return np.hstack([standardised(X, self.attributes_, self.mean_, self.scale_), points])

    def _distance(self, targets: np.ndarray, donors: np.ndarray) -> np.ndarray:
        share = self.attribute_share_
        attribute = euclidean_distance(targets[:, :-2], donors[:, :-2])
        geographic = great_circle_km(
            targets[:, None, -2], targets[:, None, -1], donors[None, :, -2], donors[None, :, -1]
        )
        return (
            share * attribute / self.attribute_spread_
            + (1.0 - share) * geographic / self.geographic_spread_km_
        )

    def _attribute_columns(self, X: pd.DataFrame) -> Sequence[str] | None:
        """The attributes asked for; by default every numeric column except the locations."""
        if self.attributes is not None:
            return self.attributes
        location = {f"{p}_{axis}" for p in ("centroid", "outlet") for axis in ("lon", "lat")}
        numeric = X.select_dtypes("number").columns
        return [str(c) for c in numeric if str(c) not in location and X[c].dtype != bool]

    def _check_share(self) -> float:
        share = self.attribute_share
        if isinstance(share, bool) or not isinstance(share, Real) or not 0.0 <= share <= 1.0:
            raise InputError(
                f"{self._method} transfer: attribute_share must be a number in [0, 1] (1: rank "
                f"by attributes only, 0: by location only), got {share!r}."
            )
        return float(share)
