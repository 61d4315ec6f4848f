"""Transfer methods: estimators fit on gauged basins that donate parameter sets to targets.

Every estimator follows the scikit-learn contract: ``fit(X, y, *, transforms=None)`` on the gauged
basins' attributes ``X`` and calibrated parameters ``y`` (DataFrames indexed by basin id),
``donate(X_targets)`` -> :class:`Donation` (parameter sets with weights and intervals) and
``predict(X_targets)`` -> DataFrame of single parameter estimates. :mod:`.combine` turns a
donation into flow by output or parameter averaging.
"""

from __future__ import annotations

import difflib
from collections.abc import Sequence

from regional.errors import InputError
from regional.transfer.base import COMBINE_OPTIONS, Donation
from regional.transfer.blended import BlendedTransfer
from regional.transfer.combine import (
    DonorFlows,
    average_parameters,
    simulate_donors,
)
from regional.transfer.donors import (
    ProximityTransfer,
    SimilarityTransfer,
    great_circle_km,
    inverse_distance_weights,
)
from regional.transfer.median import MedianTransfer
from regional.transfer.regression import RegressionTransfer, press

TRANSFER_METHODS = {
    "regression": RegressionTransfer,
    "similarity": SimilarityTransfer,
    "proximity": ProximityTransfer,
    "blended": BlendedTransfer,
    "median": MedianTransfer,
}
"""Method name -> estimator class."""

DONOR_METHODS = ("similarity", "proximity", "blended")
"""Methods that donate the k nearest gauged basins' sets (their number of donors can be chosen)."""


def make_transfer(
    name: str,
    *,
    attributes: Sequence[str] | None = None,
    n_donors: int = 5,
    power: float = 1.0,
    combine: str = "output",
    level: float = 0.9,
):
    """Build an unfitted transfer estimator by method name from shared settings.

    Settings a method does not have are ignored: ``attributes`` applies to regression,
    similarity and blended; ``n_donors``, ``power`` and ``combine`` to similarity, proximity and
    blended; ``level`` to regression and median.

    Parameters
    ----------
    name : {"regression", "similarity", "proximity", "blended", "median"}
        Method name.
    attributes : sequence of str, optional
        Attribute columns (default: every numeric column).
    n_donors : int, default 5
        Donors per target.
    power : float, default 1.0
        Inverse-distance power.
    combine : {"output", "parameter"}, default "output"
        Donor combination.
    level : float, default 0.9
        Interval coverage of regression and median.

    Raises
    ------
    InputError
        For an unknown method name (with the closest known name).
    """
    if name == "regression":
        return RegressionTransfer(attributes=attributes, level=level)
    if name == "similarity":
        return SimilarityTransfer(
            attributes=attributes, n_donors=n_donors, power=power, combine=combine
        )
    if name == "proximity":
        return ProximityTransfer(n_donors=n_donors, power=power, combine=combine)
    if name == "blended":
        return BlendedTransfer(
            attributes=attributes, n_donors=n_donors, power=power, combine=combine
        )
    if name == "median":
        return MedianTransfer(level=level)
    close = difflib.get_close_matches(str(name), list(TRANSFER_METHODS), n=1)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    raise InputError(
        f"unknown transfer method {name!r}; known methods: "
        f"{', '.join(map(repr, TRANSFER_METHODS))}.{hint}"
    )


__all__ = [
    "COMBINE_OPTIONS",
    "DONOR_METHODS",
    "TRANSFER_METHODS",
    "BlendedTransfer",
    "Donation",
    "DonorFlows",
    "MedianTransfer",
    "ProximityTransfer",
    "RegressionTransfer",
    "SimilarityTransfer",
    "average_parameters",
    "great_circle_km",
    "inverse_distance_weights",
    "make_transfer",
    "press",
    "simulate_donors",
]
