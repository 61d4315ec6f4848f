"""Fold donations for all targets at once equal a refit of the method per fold."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from refit_route import refit_every_fold

from regional.transfer.foldpool import FoldPool, FoldSettings, Moments
from regional.transfer.folds import fold_donations, k_nearest, row_blocks

METHODS = ("regression", "similarity", "proximity", "blended", "median")
TRANSFORMS = {"k_per_day": "log", "melt_factor": "log", "threshold_c": "identity"}


def _pool(make_region, n=30, seed=5):
    """Attributes and three parameters (two log, one identity) of an invented pool, plus one
    target outside it."""
    X, y = make_region(n, seed=seed)
    rng = np.random.default_rng(seed)
    y["melt_factor"] = rng.uniform(1.0, 6.0, n)
    y["threshold_c"] = rng.normal(0.0, 1.0, n)
    outside = X.iloc[[3]].rename(index={X.index[3]: "outside"}) * 1.07
    return X, y, pd.concat([X, outside])


def _drops(ids, targets):
    """Drop sets of one, two and four basins (nested neighbours), one with an unknown id."""
    drops = []
    for i, target in enumerate(targets):
        extra = {0: (), 1: (ids[(i + 7) % len(ids)],), 2: tuple(ids[(i + 2) : (i + 5)])}[i % 3]
        drops.append(frozenset({target, *extra, "not_in_pool"}))
    return drops


def _assert_same(got, expected):
    assert list(got.sets["donor_id"]) == list(expected.sets["donor_id"])
    pd.testing.assert_frame_equal(got.sets, expected.sets, check_exact=False, rtol=1e-10)
    pd.testing.assert_frame_equal(got.intervals, expected.intervals, check_exact=False, rtol=1e-10)
    fields = ("method", "parameters", "transforms", "combine", "level", "distance_unit")
    assert [getattr(got, f) for f in fields] == [getattr(expected, f) for f in fields]


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("attributes", [None, ("aridity", "slope_pct", "area_km2")])
def test_every_fold_equals_a_refit_without_its_basins(make_region, method, attributes):
    X, y, target_X = _pool(make_region)
    ids = list(X.index)
    targets = [*ids[:12], "outside"]
    settings = FoldSettings(transforms=TRANSFORMS, attributes=attributes, n_donors=4)
    drops = _drops(ids, targets)
    got = fold_donations(method, X, y, targets, drops, target_X=target_X, settings=settings)
    expected = refit_every_fold(method, X, y, targets, drops, target_X=target_X, settings=settings)
    assert got.refit == ()  # every fold took the batched route
    for target in targets:
        _assert_same(got.donations[target], expected.donations[target])
        assert got.warnings[target] == expected.warnings[target] == ()


@pytest.mark.parametrize("method", ["similarity", "regression"])
def test_a_fold_whose_fit_warns_is_refit_with_its_warning(make_region, method):
    # 'flag' varies over the pool only through one basin: the fold without it finds the
    # attribute constant, warns and drops it; that fold alone is refit, with the refit's warning.
    X, y, target_X = _pool(make_region)
    X["flag"] = 0.0
    X.loc[X.index[5], "flag"] = 1.0
    target_X = pd.concat([X, target_X.loc[["outside"]].assign(flag=0.0)])
    targets = list(X.index[:8])
    settings = FoldSettings(
        transforms=TRANSFORMS, attributes=("aridity", "slope_pct", "flag"), n_donors=3
    )
    drops = [frozenset({t}) for t in targets]
    got = fold_donations(method, X, y, targets, drops, target_X=target_X, settings=settings)
    expected = refit_every_fold(method, X, y, targets, drops, target_X=target_X, settings=settings)
    assert got.refit == (X.index[5],)
    assert any("constant" in message for message in got.warnings[X.index[5]])
    for target in targets:
        _assert_same(got.donations[target], expected.donations[target])
        assert got.warnings[target] == expected.warnings[target]


def test_regression_folds_with_collinear_attributes_warn_as_the_refit(make_region):
    # Two nearly collinear attributes: where a fold's selected model holds both, its VIF is
    # above the limit and the fold is refit (with the refit's VIF warning); the result and
    # the warnings of every fold are those of the refit.
    X, y, target_X = _pool(make_region, n=26, seed=9)
    rng = np.random.default_rng(2)
    X["aridity_copy"] = X["aridity"] + rng.normal(0, 0.02, len(X))
    y["k_per_day"] *= np.exp(2.0 * (X["aridity_copy"] - X["aridity"]) / 0.02 * 0.1)
    target_X = X
    targets = list(X.index[:10])
    settings = FoldSettings(
        transforms=TRANSFORMS, attributes=("aridity", "aridity_copy", "slope_pct")
    )
    drops = [frozenset({t}) for t in targets]
    got = fold_donations("regression", X, y, targets, drops, target_X=target_X, settings=settings)
    expected = refit_every_fold(
        "regression", X, y, targets, drops, target_X=target_X, settings=settings
    )
    assert any(expected.warnings[t] for t in targets)  # the case is exercised
    for target in targets:
        _assert_same(got.donations[target], expected.donations[target])
        assert got.warnings[target] == expected.warnings[target]


def test_fold_moments_from_downdated_sums_match_numpy(make_region):
    X, y, _ = _pool(make_region, n=40)
    X["area_km2"] += 1e6  # far from zero: the shifted sums keep their digits
    pool = FoldPool.of(X, y)
    values = pool.X[["aridity", "area_km2", "slope_pct"]].to_numpy(dtype=float)
    ids = list(X.index)
    drops = _drops(ids, ids[:15])
    mean, std, safe = Moments.of(values).of_folds(pool.rows(drops))
    assert safe.all()
    for t, drop in enumerate(drops):
        kept = values[[b not in drop for b in pool.ids]]
        np.testing.assert_allclose(mean[t], kept.mean(axis=0), rtol=1e-12)  # numpy: reference
        np.testing.assert_allclose(std[t], np.std(kept, axis=0, ddof=1), rtol=1e-12)


def test_k_nearest_orders_ties_by_column_as_a_stable_sort():
    rng = np.random.default_rng(4)
    distance = rng.integers(0, 5, (200, 30)).astype(float)  # many ties
    distance[::7, :] = 1.0  # whole rows tied
    for k in (1, 3, 10, 30):
        expected = np.argsort(distance, axis=1, kind="stable")[:, :k]
        np.testing.assert_array_equal(k_nearest(distance, k), expected)


def test_median_folds_of_even_and_odd_size_equal_the_refit(make_region):
    # Pools of 9 and 10 basins: dropping one or two basins gives folds of both parities.
    for n in (9, 10):
        X, y, target_X = _pool(make_region, n=n, seed=n)
        targets = list(X.index)
        drops = [frozenset({t, *X.index[i : i + (i % 2) + 1]}) for i, t in enumerate(targets)]
        settings = FoldSettings(transforms=TRANSFORMS, level=0.8)
        got = fold_donations("median", X, y, targets, drops, target_X=target_X, settings=settings)
        expected = refit_every_fold(
            "median", X, y, targets, drops, target_X=target_X, settings=settings
        )
        assert got.refit == ()
        for target in targets:
            pd.testing.assert_frame_equal(
                got.donations[target].sets, expected.donations[target].sets
            )
            pd.testing.assert_frame_equal(
                got.donations[target].intervals, expected.donations[target].intervals
            )


@pytest.mark.parametrize(
    ("n_rows", "cells_per_row", "cells"), [(10, 4, 12), (7, 100, 5), (0, 3, 9)]
)
def test_row_blocks_cover_every_row_once_within_the_cells(n_rows, cells_per_row, cells):
    blocks = row_blocks(n_rows, cells_per_row, cells)
    covered = [i for part in blocks for i in range(n_rows)[part]]
    assert covered == list(range(n_rows))
    for part in blocks:
        rows = part.stop - part.start
        assert rows == 1 or rows * cells_per_row <= cells
