"""What every transfer method shares: the :class:`Donation` result, input checks, transforms.

A transfer estimator is fit on the gauged basins (attributes ``X`` and calibrated parameters
``y``, both DataFrames indexed by basin id) and then *donates* to target basins: for each target,
one or more parameter sets with weights that sum to one. The checks here run at each public
entry point (``fit``, ``donate``, ``predict``) and raise :class:`regional.errors.InputError` with
one message naming the method, the basin, the column and the fix.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from numbers import Integral, Real

import numpy as np
import pandas as pd

from regional.errors import InputError, InputWarning
from regional.models.base import TRANSFORMS, forward, inverse

COMBINE_OPTIONS = ("output", "parameter")
"""How the flows of several donors are combined (see :mod:`regional.transfer.combine`)."""

DEFAULT_TRANSFORMS = {"k_per_day": "log"}
"""Transform used for a parameter column when ``fit`` is not told one; others: identity."""


@dataclass(frozen=True)
class Donation:
    """Parameter sets given to target basins by one fitted transfer method.

    Attributes
    ----------
    method : str
        Name of the method (``"regression"``, ``"similarity"``, ``"proximity"``, ``"blended"``,
        ``"median"``).
    sets : pandas.DataFrame
        Long table, one row per (target, donor), sorted by target then rank, with columns
        ``target_id`` (str), ``donor_id`` (str: the donor's basin id; ``"<regression>"`` or
        ``"<median>"`` for the methods that build one synthetic set), ``rank`` (1 = nearest),
        ``distance`` (to the target, unit in :attr:`distance_unit`; NaN for regression and
        median), ``weight`` (>= 0, sums to 1 per target), then one column per parameter in
        parameter units (e.g. ``k_per_day`` in 1/day).
    intervals : pandas.DataFrame
        Indexed by ``target_id``, columns ``<param>_low`` and ``<param>_high`` in parameter
        units. Regression: the OLS prediction interval at :attr:`level`. Donor methods: the range
        (min, max) of the parameters of the donors with positive weight. Median: the central
        :attr:`level` quantile range of the training basins' parameters.
    parameters : tuple of str
        Parameter column names, in the order of ``y`` at fit.
    transforms : mapping
        Parameter -> ``"log"`` or ``"identity"``: the space weighted means are taken in.
    combine : str
        ``"output"`` (simulate every donor set and average the flows) or ``"parameter"``
        (average the parameters in transformed space, then simulate once).
    level : float or None
        Coverage of the intervals where they are probabilistic (regression, median), else None.
    distance_unit : str
        ``"km"`` (proximity), ``"standardised"`` (similarity: Euclidean distance between
        attributes standardised with the training donors' mean and standard deviation),
        ``"blended"`` (unitless: attribute and geographic distance each divided by its spread
        over the donors, see :mod:`regional.transfer.blended`) or ``""``.
    """

    method: str
    sets: pd.DataFrame
    intervals: pd.DataFrame
    parameters: tuple[str, ...]
    transforms: Mapping[str, str] = field(default_factory=dict)
    combine: str = "output"
    level: float | None = None
    distance_unit: str = ""

    @property
    def targets(self) -> pd.Index:
        """Target basin ids, in the order they were given to ``donate``."""
        return self.intervals.index

    def for_target(self, target_id: str) -> pd.DataFrame:
        """Rows of :attr:`sets` for one target (a copy), sorted by rank.

        Raises
        ------
        InputError
            When ``target_id`` received nothing in this donation.
        """
        if len(self.intervals) == 1 and self.intervals.index[0] == target_id:
            return self.sets.reset_index(drop=True)  # a donation to this target alone
        rows = self.sets[self.sets["target_id"] == target_id]
        if rows.empty:
            raise InputError(
                f"{self.method} donation: no parameter sets for target basin {target_id!r}; "
                f"the donation holds {len(self.targets)} targets "
                f"(e.g. {', '.join(map(repr, list(self.targets)[:3]))}). "
                "Donate to that basin first."
            )
        return rows.reset_index(drop=True)


class PlainFit:
    """Base of a transfer method's fit without scikit-learn (numpy and pandas only).

    A method's module holds its fit, donation and prediction as a plain class deriving from
    this one; :mod:`regional.transfer.estimators` makes the scikit-learn estimator of it
    (``BaseEstimator``: parameters, ``clone``, ``NotFittedError``). Prediction from a fitted
    region fits the plain class, so estimates at new sites need no scikit-learn import; both
    run the same code, so their numbers are the same.
    """

    def _check_fitted(self) -> None:
        """Raise when :meth:`fit` has not run (the estimators raise ``NotFittedError``)."""
        if not hasattr(self, "parameters_"):
            raise InputError(
                f"this {type(self).__name__} is not fitted yet; call fit with the training "
                "basins first."
            )


# --------------------------------------------------------------------------------------------
# Transforms


def resolve_transforms(
    transforms: Mapping[str, str] | None, parameters: Sequence[str], *, method: str
) -> dict[str, str]:
    """Return parameter -> transform for every parameter column.

    Parameters missing from ``transforms`` take :data:`DEFAULT_TRANSFORMS` (``"log"`` for
    ``k_per_day``), else ``"identity"``. Keys for parameters that are not columns are ignored,
    so a model's whole parameter table may be passed.
    """
    given = {} if transforms is None else dict(transforms)
    resolved = {}
    for name in parameters:
        transform = given.get(name, DEFAULT_TRANSFORMS.get(name, "identity"))
        if transform not in TRANSFORMS:
            raise InputError(
                f"{method} transfer: transform {transform!r} for parameter {name!r} is not "
                f"known; use one of {', '.join(map(repr, TRANSFORMS))}."
            )
        resolved[name] = transform
    return resolved


# --------------------------------------------------------------------------------------------
# Input tables


def _string_index(table: pd.DataFrame, *, method: str, role: str) -> pd.DataFrame:
    """Return a copy of ``table`` with its index as str, rejecting duplicate ids."""
    table = table.copy()
    if table.index.inferred_type != "string":
        table.index = table.index.map(str)
    duplicated = table.index[table.index.duplicated()]
    if len(duplicated):
        raise InputError(
            f"{method} transfer: {role} has duplicate basin ids, e.g. {duplicated[0]!r} "
            f"({len(duplicated)} duplicates); each basin must appear once. Remove the repeats."
        )
    return table


def check_table(table: object, *, method: str, role: str) -> pd.DataFrame:
    """Check that ``table`` is a non-empty DataFrame; return a copy indexed by str ids."""
    if not isinstance(table, pd.DataFrame):
        raise InputError(
            f"{method} transfer: {role} must be a pandas DataFrame indexed by basin id, "
            f"got {type(table).__name__}."
        )
    if table.empty:
        raise InputError(
            f"{method} transfer: {role} is empty (shape {table.shape}); give at least one "
            "basin and one column."
        )
    return _string_index(table, method=method, role=role)


def numeric_columns(table: pd.DataFrame) -> list[str]:
    """Names of the numeric (non-boolean) columns of ``table``, in order."""
    return [
        str(name)
        for name, dtype in table.dtypes.items()
        if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_bool_dtype(dtype)
    ]


def select_attributes(
    X: pd.DataFrame, attributes: Sequence[str] | None, *, method: str, role: str
) -> list[str]:
    """Return the attribute columns to use: ``attributes`` or every numeric column of ``X``.

    Raises
    ------
    InputError
        When a named attribute is not a column of ``X``, is not numeric, or no numeric column
        exists.
    """
    if attributes is None:
        chosen = numeric_columns(X)
        if not chosen:
            raise InputError(
                f"{method} transfer: {role} has no numeric attribute columns (columns: "
                f"{', '.join(map(str, X.columns))}); add numeric attributes or name them."
            )
        return chosen
    if isinstance(attributes, str):
        attributes = [attributes]
    chosen = [str(a) for a in attributes]
    if not chosen:
        raise InputError(f"{method} transfer: the attribute list is empty; name at least one.")
    missing = [a for a in chosen if a not in X.columns]
    if missing:
        raise InputError(
            f"{method} transfer: {role} lacks attribute column(s) {', '.join(map(repr, missing))}"
            f"; available columns: {', '.join(map(str, X.columns))}. Fix the attribute list "
            "or compute the attribute."
        )
    numeric = set(numeric_columns(X))
    not_numeric = [a for a in chosen if a not in numeric]
    if not_numeric:
        raise InputError(
            f"{method} transfer: attribute column {not_numeric[0]!r} in {role} is not numeric "
            f"(dtype {X[not_numeric[0]].dtype}); attributes must be numbers."
        )
    return chosen


def check_complete(X: pd.DataFrame, columns: Sequence[str], *, method: str, role: str) -> None:
    """Raise InputError naming the first basin and attribute with a missing or infinite value."""
    values = X.loc[:, list(columns)].to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        row, col = np.argwhere(bad)[0]
        raise InputError(
            f"{method} transfer: attribute {columns[col]!r} is missing or not finite for basin "
            f"{X.index[row]!r} in {role} (value {values[row, col]!r}; {int(bad.sum())} missing "
            "value(s) in all). Fill the attribute for that basin or drop the attribute."
        )


def drop_constant(
    X: pd.DataFrame, columns: Sequence[str], *, method: str, stacklevel: int = 3
) -> tuple[list[str], list[str]]:
    """Split ``columns`` into (varying, constant) over the rows of ``X``; warn about constants.

    ``stacklevel`` is passed to :func:`warnings.warn` so the warning points at the user's call.
    """
    values = X.loc[:, list(columns)].to_numpy(dtype=float)
    spread = np.ptp(values, axis=0) if len(values) else np.zeros(len(columns))
    constant = [c for c, s in zip(columns, spread, strict=True) if not s > 0.0]
    kept = [c for c in columns if c not in constant]
    if constant:
        warnings.warn(
            f"{method} transfer: {len(constant)} attribute(s) are constant over the "
            f"{len(X)} training basins and were dropped: {', '.join(map(repr, constant))}. "
            "Drop them from the attribute list or add basins where they vary.",
            InputWarning,
            stacklevel=stacklevel,
        )
    return kept, constant


def check_parameters(
    y: object, index: pd.Index, transforms: Mapping[str, str] | None, *, method: str
) -> tuple[pd.DataFrame, dict[str, str]]:
    """Check calibrated parameters ``y`` against the training ids; return (aligned y, transforms).

    ``y`` must hold numeric, finite values for exactly the basins of ``index`` (any order); it
    is returned reordered like ``index``. Parameters with a log transform must be > 0.
    """
    y = check_table(y, method=method, role="the parameter table y")
    names = [str(c) for c in y.columns]
    not_numeric = [c for c in y.columns if str(c) not in numeric_columns(y)]
    if not_numeric:
        raise InputError(
            f"{method} transfer: parameter column {not_numeric[0]!r} is not numeric (dtype "
            f"{y[not_numeric[0]].dtype}); pass only the calibrated parameter columns."
        )
    y.columns = names
    missing = index.difference(y.index)
    extra = y.index.difference(index)
    if len(missing) or len(extra):
        raise InputError(
            f"{method} transfer: the attributes X and parameters y must index the same basins; "
            f"{len(missing)} basin(s) have attributes but no parameters"
            f"{' (e.g. ' + repr(missing[0]) + ')' if len(missing) else ''} and {len(extra)} "
            f"have parameters but no attributes"
            f"{' (e.g. ' + repr(extra[0]) + ')' if len(extra) else ''}. Align the two tables."
        )
    y = y.loc[index]
    resolved = resolve_transforms(transforms, names, method=method)
    values = y.to_numpy(dtype=float)
    for j, name in enumerate(names):
        finite = np.isfinite(values[:, j])
        if not finite.all():
            row = int(np.flatnonzero(~finite)[0])
            raise InputError(
                f"{method} transfer: parameter {name!r} is missing or not finite for basin "
                f"{y.index[row]!r} (value {values[row, j]!r}); calibrate that basin or leave "
                "it out of fit."
            )
        if resolved[name] == "log" and not (values[:, j] > 0).all():
            row = int(np.flatnonzero(values[:, j] <= 0)[0])
            raise InputError(
                f"{method} transfer: parameter {name!r} is transformed with log but is "
                f"{values[row, j]!r} (<= 0) for basin {y.index[row]!r}; log needs values > 0. "
                "Check the calibration or pass transforms={" + repr(name) + ": 'identity'}."
            )
    return y, resolved


def sort_training(X: pd.DataFrame, y: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Order training rows by basin id so results never depend on the input row order."""
    if X.index.is_monotonic_increasing:
        return X, y
    order = np.argsort(X.index.to_numpy(dtype=str), kind="stable")
    return X.iloc[order], y.iloc[order]


# --------------------------------------------------------------------------------------------
# Estimator settings


def check_n_donors(n_donors: object, n_train: int, *, method: str) -> int:
    """Check the number of donors requested against the training basins available."""
    if isinstance(n_donors, bool) or not isinstance(n_donors, Integral) or n_donors < 1:
        raise InputError(
            f"{method} transfer: n_donors must be a whole number >= 1, got {n_donors!r}."
        )
    if n_donors > n_train:
        raise InputError(
            f"{method} transfer: {n_donors} donors requested but only {n_train} training "
            f"basin(s) given; lower n_donors to at most {n_train} or add gauged basins."
        )
    return int(n_donors)


def check_power(power: object, *, method: str) -> float:
    """Check the inverse-distance power (>= 0, finite)."""
    if isinstance(power, bool) or not isinstance(power, Real) or not np.isfinite(power):
        raise InputError(f"{method} transfer: power must be a finite number, got {power!r}.")
    if power < 0:
        raise InputError(
            f"{method} transfer: power must be >= 0 (0 gives equal weights), got {power!r}."
        )
    return float(power)


def check_combine(combine: object, *, method: str) -> str:
    """Check the donor combination option."""
    if combine not in COMBINE_OPTIONS:
        raise InputError(
            f"{method} transfer: combine must be one of "
            f"{', '.join(map(repr, COMBINE_OPTIONS))}, got {combine!r}."
        )
    return str(combine)


def check_level(level: object, *, method: str) -> float:
    """Check an interval coverage level in (0, 1)."""
    if isinstance(level, bool) or not isinstance(level, Real) or not 0.0 < level < 1.0:
        raise InputError(
            f"{method} transfer: level must be a number strictly between 0 and 1 (e.g. 0.9 "
            f"for a 90% interval), got {level!r}."
        )
    return float(level)


# --------------------------------------------------------------------------------------------
# Building donations


def weighted_estimate(
    sets: pd.DataFrame, parameters: Sequence[str], transforms: Mapping[str, str]
) -> pd.DataFrame:
    """Weighted mean of each target's donor parameters in transformed space, back-transformed.

    Returns a DataFrame indexed by ``target_id`` (in order of first appearance) with one column
    per parameter in parameter units.
    """
    targets = pd.Index(pd.unique(sets["target_id"]), name="target_id")
    codes = pd.Index(targets).get_indexer(sets["target_id"])
    weights = sets["weight"].to_numpy(dtype=float)
    out = {}
    for name in parameters:
        transformed = forward(sets[name].to_numpy(dtype=float), transforms[name])
        sums = np.bincount(codes, weights=weights * transformed, minlength=len(targets))
        totals = np.bincount(codes, weights=weights, minlength=len(targets))
        out[name] = inverse(sums / totals, transforms[name])
    return pd.DataFrame(out, index=targets)


def donor_range(sets: pd.DataFrame, parameters: Sequence[str], targets: pd.Index) -> pd.DataFrame:
    """Per target, the min and max of the parameters of donors with positive weight."""
    used = sets[sets["weight"] > 0]
    grouped = used.groupby("target_id", sort=False)[list(parameters)]
    low = grouped.min().add_suffix("_low")
    high = grouped.max().add_suffix("_high")
    table = pd.concat([low, high], axis=1).reindex(targets)
    columns = [f"{p}_{side}" for p in parameters for side in ("low", "high")]
    table = table[columns]
    table.index.name = "target_id"
    return table
