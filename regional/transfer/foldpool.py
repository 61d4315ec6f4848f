"""The pool of a batch of folds: basins sorted by id, each fold's dropped rows, and what the
batched fold donations (:mod:`regional.transfer.folds`) share between methods."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
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
    """The pool sorted by basin id (as every estimator sorts it), and each fold's dropped rows.

    ``rows`` holds, per target, the positions in the sorted pool of its dropped basins
    (``-1`` pads the rows of targets that drop fewer).
    """

    X: pd.DataFrame
    y: pd.DataFrame
    ids: np.ndarray
    targets: list[str]
    drops: list[frozenset[str]]
    rows: np.ndarray

    @classmethod
    def of(cls, X: pd.DataFrame, y: pd.DataFrame, targets, drops) -> FoldPool:
        X = X.copy()
        X.index = X.index.map(str)
        y = y.loc[X.index] if y.index.equals(X.index) else y.copy()
        y.index = y.index.map(str)
        order = np.argsort(X.index.to_numpy(dtype=str), kind="stable")
        X, y = X.iloc[order], y.loc[X.index[order]]
        ids = X.index.to_numpy(dtype=str)
        where = {b: i for i, b in enumerate(ids)}
        drops = [frozenset(str(b) for b in d) for d in drops]
        positions = [sorted(where[b] for b in d if b in where) for d in drops]
        width = max([len(p) for p in positions] + [1])
        rows = np.full((len(targets), width), -1, dtype=np.int64)
        for t, p in enumerate(positions):
            rows[t, : len(p)] = p
        return cls(X, y, ids, list(targets), drops, rows)

    @property
    def n(self) -> int:
        return len(self.ids)

    def n_dropped(self) -> np.ndarray:
        """Basins left out of each fold's pool, (targets,)."""
        return (self.rows >= 0).sum(axis=1)

    def dropped(self, t: int) -> frozenset[str]:
        return self.drops[t]

    def downdated(self, values: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Per fold, the sum over the pool of ``values`` (n, ...) minus the dropped rows'."""
        total = values.sum(axis=0)
        padded = np.concatenate([values, np.zeros((1, *values.shape[1:]))])
        return total - padded[rows].sum(axis=1)  # row -1 reads the zero pad


def fold_moments(values: np.ndarray, folds: FoldPool, rows: np.ndarray):
    """Mean and standard deviation (ddof=1) of each column of ``values`` over every fold.

    Shifted sums: with c the pool mean, s1 = sum (x - c) and s2 = sum (x - c)^2 over the fold
    (the pool's sums less the dropped rows'), mean = c + s1 / m and var = (s2 - s1^2 / m) /
    (m - 1), m the fold's count. Returns (mean, std, exact) where ``exact`` flags the folds
    whose variance keeps at least 1e-6 of the pool's sum of squares (no cancellation).
    """
    centre = values.mean(axis=0)
    shifted = values - centre
    s1 = folds.downdated(shifted, rows)
    s2 = folds.downdated(shifted**2, rows)
    m = (folds.n - (rows >= 0).sum(axis=1)).astype(float)[:, None]
    mean = centre + s1 / m
    squares = s2 - s1**2 / m
    with np.errstate(divide="ignore", invalid="ignore"):
        std = np.sqrt(np.maximum(squares, 0.0) / (m - 1.0))
    total = (shifted**2).sum(axis=0)
    safe = (squares > 1e-6 * total).all(axis=1) & (m[:, 0] >= 2)
    return mean, std, safe


def never_constant(values: np.ndarray, folds: FoldPool, rows: np.ndarray) -> np.ndarray:
    """Folds where no column of ``values`` is constant once the dropped rows are left out."""
    ok = np.ones(len(rows), dtype=bool)
    width = (rows >= 0).sum(axis=1)
    for column in values.T:
        _, counts = np.unique(column, return_counts=True)
        others = folds.n - counts.max()  # rows off the commonest value
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
    sets = pd.DataFrame(
        {
            "target_id": np.array([target], dtype=object),
            "donor_id": label,
            "rank": 1,
            "distance": np.nan,
            "weight": 1.0,
        }
    )
    intervals = {}
    for name, (estimate, low, high) in values.items():
        sets[name] = [estimate]
        intervals[f"{name}_low"] = [low]
        intervals[f"{name}_high"] = [high]
    return Donation(
        method=method,
        sets=sets,
        intervals=pd.DataFrame(intervals, index=pd.Index([target], name="target_id")),
        parameters=tuple(values),
        transforms=dict(transforms),
        combine="output",
        level=level,
        distance_unit="",
    )
