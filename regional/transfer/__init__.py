"""Transfer methods: estimators fit on gauged basins that donate parameter sets to targets.

Every estimator follows the scikit-learn contract: ``fit(X, y, *, transforms=None)`` on the gauged
basins' attributes ``X`` and calibrated parameters ``y`` (DataFrames indexed by basin id),
``donate(X_targets)`` -> :class:`Donation` (parameter sets with weights and intervals) and
``predict(X_targets)`` -> DataFrame of single parameter estimates. :mod:`.combine` turns a
donation into flow by output or parameter averaging.
"""

from __future__ import annotations

import difflib
import importlib
import inspect
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

from regional.errors import InputError
from regional.transfer.base import COMBINE_OPTIONS, Donation
from regional.transfer.blended import BlendedFit
from regional.transfer.combine import (
    DonorFlows,
    average_parameters,
    simulate_donors,
)
from regional.transfer.donors import (
    ProximityFit,
    SimilarityFit,
    great_circle_km,
    inverse_distance_weights,
)
from regional.transfer.median import MedianFit
from regional.transfer.regression import RegressionFit, press

if TYPE_CHECKING:  # pragma: no cover - annotations only
    import pandas as pd

TRANSFER_METHODS = {
    "regression": RegressionFit,
    "similarity": SimilarityFit,
    "proximity": ProximityFit,
    "blended": BlendedFit,
    "median": MedianFit,
}
"""The registry: method name -> its plain class (fit, donate and predict with numpy and pandas,
no scikit-learn; :class:`regional.transfer.base.PlainFit`). A new method is one module (its
plain class following the contract above, its options in ``__init__``) and one line here;
:mod:`regional.transfer.estimators` makes its scikit-learn estimator (loaded on first use, so
that reading the config or predicting from a stored fitted region imports no scikit-learn); the
config reads the allowed names from this registry, and :func:`make_transfer` passes each method
the shared settings its ``__init__`` takes."""


def estimator_name(plain: type) -> str:
    """Name of the scikit-learn estimator of a plain class (``RegressionFit`` ->
    ``RegressionTransfer``), made by :mod:`regional.transfer.estimators`."""
    return plain.__name__.removesuffix("Fit") + "Transfer"


ESTIMATORS = tuple(estimator_name(plain) for plain in TRANSFER_METHODS.values())
"""Names of the scikit-learn estimators, importable from this package (loaded on first use)."""


def estimator_class(name: str) -> type:
    """The scikit-learn estimator of method ``name`` (loaded, with scikit-learn, on first use).

    Raises
    ------
    InputError
        For an unknown method name (with the closest known name).
    """
    estimators = importlib.import_module("regional.transfer.estimators")
    return estimators.BY_NAME[estimator_name(_registered(name))]


def __getattr__(name: str):
    """The estimators (:data:`ESTIMATORS`), imported with scikit-learn only when asked for."""
    if name in ESTIMATORS:
        return getattr(importlib.import_module("regional.transfer.estimators"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


SHARED_SETTINGS = ("attributes", "n_donors", "power", "combine", "level")
"""Settings of ``[transfer]`` and ``[prediction]`` a method receives when its ``__init__`` has
the parameter of that name."""


def method_settings(name: str) -> tuple[str, ...]:
    """The shared settings method ``name`` takes (read from its plain
    class's ``__init__``, which its estimator inherits)."""
    parameters = inspect.signature(_registered(name).__init__).parameters
    return tuple(setting for setting in SHARED_SETTINGS if setting in parameters)


def _registered(name: str) -> type:
    if name in TRANSFER_METHODS:
        return TRANSFER_METHODS[name]
    close = difflib.get_close_matches(str(name), list(TRANSFER_METHODS), n=1)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    raise InputError(
        f"unknown transfer method {name!r}; known methods: "
        f"{', '.join(map(repr, TRANSFER_METHODS))}.{hint}"
    )


DONOR_METHODS = tuple(name for name in TRANSFER_METHODS if "n_donors" in method_settings(name))
"""Methods that donate the k nearest gauged basins' sets (their number of donors can be chosen)."""


def make_transfer(
    name: str,
    *,
    attributes: Sequence[str] | None = None,
    n_donors: int = 5,
    power: float = 1.0,
    combine: str = "output",
    level: float = 0.9,
    plain: bool = False,
):
    """Build an unfitted transfer estimator by method name from shared settings.

    Settings a method does not have are ignored (:func:`method_settings`): ``attributes``
    applies to regression, similarity and blended; ``n_donors``, ``power`` and ``combine`` to
    similarity, proximity and blended; ``level`` to regression and median.

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
    plain : bool, default False
        Build the method's plain class (no scikit-learn, :data:`TRANSFER_METHODS`) instead of
        its scikit-learn estimator; both give the same numbers.

    Raises
    ------
    InputError
        For an unknown method name (with the closest known name).
    """
    given = {
        "attributes": attributes,
        "n_donors": n_donors,
        "power": power,
        "combine": combine,
        "level": level,
    }
    estimator = _registered(name) if plain else estimator_class(name)
    return estimator(**{setting: given[setting] for setting in method_settings(name)})


def fit_transfer(
    name: str,
    X: pd.DataFrame,
    y: pd.DataFrame,
    *,
    transforms: Mapping[str, str],
    attributes: Sequence[str] | None = None,
    n_donors: int = 5,
    power: float = 1.0,
    combine: str = "output",
    level: float = 0.9,
    plain: bool = False,
):
    """Fit method ``name`` on these basins (the shared step of leave-one-out, the held-out
    check, prediction and screening, :mod:`regional.transfer.step`, fits each method with it).

    Parameters
    ----------
    name : str
        A registered method (:data:`TRANSFER_METHODS`).
    X, y : DataFrame
        Training basins' attributes and parameters (parameter units), indexed by basin id.
    transforms : mapping
        Parameter -> ``"log"`` / ``"identity"``.
    attributes, n_donors, power, combine, level
        The shared settings (see :func:`make_transfer`); ``n_donors`` is capped at the number
        of training basins.
    plain : bool, default False
        Fit the method's plain class instead of its scikit-learn estimator (see
        :func:`make_transfer`).

    Returns
    -------
    The fitted estimator.
    """
    estimator = make_transfer(
        name,
        attributes=attributes,
        n_donors=min(n_donors, len(X)),
        power=power,
        combine=combine,
        level=level,
        plain=plain,
    )
    return estimator.fit(X, y, transforms=transforms)


__all__ = [
    "COMBINE_OPTIONS",
    "DONOR_METHODS",
    "SHARED_SETTINGS",
    "TRANSFER_METHODS",
    "BlendedFit",
    "BlendedTransfer",
    "Donation",
    "DonorFlows",
    "ESTIMATORS",
    "MedianFit",
    "MedianTransfer",
    "ProximityFit",
    "ProximityTransfer",
    "RegressionFit",
    "RegressionTransfer",
    "SimilarityFit",
    "SimilarityTransfer",
    "average_parameters",
    "estimator_class",
    "estimator_name",
    "fit_transfer",
    "great_circle_km",
    "inverse_distance_weights",
    "make_transfer",
    "method_settings",
    "press",
    "simulate_donors",
]
