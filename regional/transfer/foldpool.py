"""The pool of the batched fold donations (:mod:`regional.transfer.folds`): basins sorted by
id, each fold's dropped rows, the shifted sums every fold's moments come from, and the layout
of a one-set donation."""

from __future__ import annotations

from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regional.transfer.base import Donation


@dataclass(frozen=True)
class FoldSettings:
    """The settings a fold's method is fit with (see :func:`regional.transfer.make_transfer`)."""

    transforms: Mapping[str, str]
    attributes: Sequence[str] | None = None
    n_donors: int = 5
    power: float = 1.0
    combine: str = "output"
    level: float = 0.9


@dataclass(frozen=True)
class FoldPool:
    """The pool sorted by basin id (as every estimator sorts it), prepared once for any number
    of folds (:meth:`rows` places each fold's dropped basins in it)."""

    X: pd.DataFrame
    y: pd.DataFrame
    ids: np.ndarray
    where: Mapping[str, int]

    @classmethod
    def of(cls, X: pd.DataFrame, y: pd.DataFrame) -> FoldPool:
        X = X.copy()
        X.index = X.index.map(str)
        y = y.copy()
        y.index = y.index.map(str)
        order = np.argsort(X.index.to_numpy(dtype=str), kind="stable")
        X = X.iloc[order]
        if set(y.index) == set(X.index) and y.index.is_unique:
            y = y.loc[X.index]  # else left as given: every fit then raises the refit's error
        ids = X.index.to_numpy(dtype=str)
        return cls(X, y, ids, {b: i for i, b in enumerate(ids)})

    @property
    def n(self) -> int:
        return len(self.ids)

    def rows(self, drops: Sequence[Collection[str]]) -> np.ndarray:
        """Per fold, the positions in the sorted pool of its dropped basins, ascending, ``-1``
        padding the folds that drop fewer (ids not in the pool are ignored)."""
        positions = [sorted(self.where[str(b)] for b in d if str(b) in self.where) for d in drops]
        width = max([len(p) for p in positions] + [1])
        rows = np.full((len(positions), width), -1, dtype=np.int64)
        for t, p in enumerate(positions):
            rows[t, : len(p)] = p
        return rows


def fold_sizes(pool: FoldPool, rows: np.ndarray) -> np.ndarray:
    """Basins left in each fold, (folds,)."""
    return pool.n - (rows >= 0).sum(axis=1)


def downdated(total: np.ndarray, values: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Per fold, ``total`` (the pool's sum of ``values`` (n, ...)) less the dropped rows'."""
    padded = np.concatenate([values, np.zeros((1, *values.shape[1:]))])
    return total - padded[rows].sum(axis=1)  # row -1 reads the zero pad


@dataclass(frozen=True)
class Moments:
    """Shifted sums of the columns of ``values`` (n, k) over the pool, for every fold's mean and
    standard deviation (:meth:`of_folds`) and its constant columns (:meth:`never_constant`)."""

    values: np.ndarray
    centre: np.ndarray
    shifted: np.ndarray
    s1: np.ndarray
    s2: np.ndarray
    commonest: np.ndarray

    @classmethod
    def of(cls, values: np.ndarray) -> Moments:
        centre = values.mean(axis=0)
        shifted = values - centre
        commonest = np.array(
            [np.unique(column, return_counts=True)[1].max() for column in values.T], dtype=int
        )
        return cls(
            values, centre, shifted, shifted.sum(axis=0), (shifted**2).sum(axis=0), commonest
        )

    def of_folds(self, rows: np.ndarray):
        """Mean and standard deviation (ddof=1) of each column over every fold.

        With c the pool mean, s1 = sum (x - c) and s2 = sum (x - c)^2 over the fold (the pool's
        sums less the dropped rows'), mean = c + s1 / m and var = (s2 - s1^2 / m) / (m - 1), m
        the fold's count. Returns (mean, std, safe): ``safe`` flags the folds whose sum of
        squares keeps at least 1e-6 of the pool's (no cancellation) and have 2 basins or more.
        """
        s1 = downdated(self.s1, self.shifted, rows)
        s2 = downdated(self.s2, self.shifted**2, rows)
        m = (len(self.values) - (rows >= 0).sum(axis=1)).astype(float)[:, None]
        mean = self.centre + s1 / m
        squares = s2 - s1**2 / m
        with np.errstate(divide="ignore", invalid="ignore"):
            std = np.sqrt(np.maximum(squares, 0.0) / (m - 1.0))
        safe = (squares > 1e-6 * self.s2).all(axis=1) & (m[:, 0] >= 2)
        return mean, std, safe

    def never_constant(self, rows: np.ndarray) -> np.ndarray:
        """Folds where no column is constant once the dropped rows are left out."""
        ok = np.ones(len(rows), dtype=bool)
        width = (rows >= 0).sum(axis=1)
        for j, column in enumerate(self.values.T):
            others = len(column) - self.commonest[j]  # rows off the commonest value
            for t in np.flatnonzero(others <= width):
                kept = np.delete(column, rows[t][rows[t] >= 0])
                ok[t] &= bool(np.ptp(kept) > 0) if len(kept) else False
        return ok


def target_values(targets: pd.DataFrame, columns: Sequence[str]) -> np.ndarray:
    """The targets' values of ``columns`` as floats (NaN where missing or not numeric)."""
    frame = targets.reindex(columns=list(columns))
    return frame.apply(pd.to_numeric, errors="coerce").to_numpy(dtype=float)


def one_set_donation(
    method: str,
    label: str,
    target: str,
    values: Mapping[str, tuple[float, float, float]],
    *,
    transforms: Mapping[str, str],
    level: float,
) -> Donation:
    """A donation of one synthetic set (regression, median) to one target, laid out as the
    estimators lay it out: ``values`` maps each parameter to (estimate, low, high)."""
    columns = {
        "target_id": np.array([target], dtype=object),
        "donor_id": np.array([label], dtype=object),
        "rank": np.ones(1, dtype=np.int64),
        "distance": np.full(1, np.nan),
        "weight": np.ones(1),
    }
    intervals = {}
    for name, (estimate, low, high) in values.items():
        columns[name] = np.array([estimate], dtype=float)
        intervals[f"{name}_low"] = np.array([low], dtype=float)
        intervals[f"{name}_high"] = np.array([high], dtype=float)
    return Donation(
        method=method,
        sets=pd.DataFrame(columns),
        intervals=pd.DataFrame(intervals, index=pd.Index([target], name="target_id")),
        parameters=tuple(values),
        transforms=dict(transforms),
        combine="output",
        level=level,
        distance_unit="",
    )
