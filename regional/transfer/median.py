"""Median transfer: every target gets the regional median parameter set (the benchmark to beat).

The median is taken per parameter over the training basins, in the parameter's transformed space
and back-transformed (for an odd count this is exactly the median in parameter units; for an even
count and a log parameter it is the geometric mean of the two middle values). The interval is the
central ``level`` range of the training parameters (sample quantiles, linear interpolation:
Hyndman and Fan 1996, The American Statistician 50(4), 361-365, definition 7). See
``docs/transfer-median.md``.

:class:`MedianFit` holds the method without scikit-learn; its estimator
``MedianTransfer`` is made in :mod:`regional.transfer.estimators`.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd

from regional.transfer.base import (
    Donation,
    PlainFit,
    check_level,
    check_parameters,
    check_table,
    forward,
    inverse,
    sort_training,
)

METHOD = "median"
DONOR_LABEL = "<median>"


class MedianFit(PlainFit):
    """Give every target the median of the training basins' parameters.

    Parameters
    ----------
    level : float, default 0.9
        Coverage of the interval given by :meth:`donate`: the central quantile range of the
        training basins' parameters.

    Attributes
    ----------
    median_ : pandas.Series
        Median of each parameter, parameter units.
    low_, high_ : pandas.Series
        The (1 - level)/2 and (1 + level)/2 quantiles of each parameter, parameter units.
    parameters_, transforms_, n_train_ : as fitted.
    """

    description = (
        "Median: every target receives the regional median of each parameter over the gauged "
        "basins, the naive benchmark every transfer method must beat."
    )
    references = (
        "Hyndman, R. J., Fan, Y. (1996): Sample quantiles in statistical packages. Am. Stat. "
        "50(4), 361-365 (interval quantiles).",
        "Oudin, L., Andreassian, V., Perrin, C., Michel, C., Le Moine, N. (2008): Spatial "
        "proximity, physical similarity, regression and ungaged catchments. Water Resour. Res. "
        "44, W03413.",
    )

    def __init__(self, level: float = 0.9) -> None:
        self.level = level

    def fit(
        self,
        X: pd.DataFrame,
        y: pd.DataFrame,
        *,
        transforms: Mapping[str, str] | None = None,
    ) -> MedianFit:
        """Compute the regional median parameters.

        Parameters
        ----------
        X : pandas.DataFrame
            Attributes of the gauged basins, indexed by basin id (only the index is used).
        y : pandas.DataFrame
            Calibrated parameters of the same basins.
        transforms : mapping, optional
            Parameter -> ``"log"`` or ``"identity"``; default ``"log"`` for ``k_per_day``.

        Returns
        -------
        self
        """
        level = check_level(self.level, method=METHOD)
        X = check_table(X, method=METHOD, role="the training attributes X")
        y, transforms_ = check_parameters(y, X.index, transforms, method=METHOD)
        X, y = sort_training(X, y)
        median, low, high = {}, {}, {}
        for name in y.columns:
            values = forward(y[name].to_numpy(dtype=float), transforms_[name])
            median[name] = _median(y[name].to_numpy(dtype=float), transforms_[name])
            low_t, high_t = np.quantile(values, [0.5 - level / 2.0, 0.5 + level / 2.0])
            low[name] = inverse(low_t, transforms_[name])
            high[name] = inverse(high_t, transforms_[name])
        self.parameters_ = tuple(y.columns)
        self.transforms_ = transforms_
        self.n_train_ = len(y)
        self.median_ = pd.Series(median, dtype=float)
        self.low_ = pd.Series(low, dtype=float)
        self.high_ = pd.Series(high, dtype=float)
        return self

    def predict(self, X: pd.DataFrame) -> pd.DataFrame:
        """The median parameters for every target (a DataFrame indexed by ``target_id``)."""
        self._check_fitted()
        X = check_table(X, method=METHOD, role="the target attributes X")
        index = pd.Index(X.index, name="target_id")
        return pd.DataFrame(
            {name: np.full(len(index), self.median_[name]) for name in self.parameters_},
            index=index,
        )

    def donate(self, X: pd.DataFrame) -> Donation:
        """One set per target, ``donor_id`` ``"<median>"``, weight 1, with the regional range."""
        estimate = self.predict(X)
        sets = pd.DataFrame(
            {
                "target_id": estimate.index.to_numpy(dtype=object),
                "donor_id": DONOR_LABEL,
                "rank": 1,
                "distance": np.nan,
                "weight": 1.0,
            }
        )
        intervals = {}
        for name in self.parameters_:
            sets[name] = estimate[name].to_numpy()
            intervals[f"{name}_low"] = np.full(len(estimate), self.low_[name])
            intervals[f"{name}_high"] = np.full(len(estimate), self.high_[name])
        return Donation(
            method=METHOD,
            sets=sets,
            intervals=pd.DataFrame(intervals, index=estimate.index),
            parameters=self.parameters_,
            transforms=dict(self.transforms_),
            combine="output",
            level=float(self.level),
            distance_unit="",
        )


def _median(values: np.ndarray, transform: str) -> float:
    """Median in transformed space, back-transformed; exactly the middle value for odd counts."""
    ordered = np.sort(values)
    middle = len(ordered) // 2
    if len(ordered) % 2:
        return float(ordered[middle])
    pair = ordered[middle - 1 : middle + 1]
    centre = inverse(forward(pair, transform).mean(), transform)
    return float(np.clip(centre, pair[0], pair[1]))  # no round-off outside the middle pair
