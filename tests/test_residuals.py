"""Tests of regional.residuals: log-flow residuals by flow class and their pooled quantiles."""

from __future__ import annotations

import numpy as np

from regional.residuals import OFFSET_FRACTION


def test_residuals_block_by_block_are_those_of_the_whole_grid():
    # Two routes: log_residuals on the whole grid with its classes, sorted by class
    # (SortedResiduals.of), and class_residuals a few basins at a time (classes and offsets
    # are within-basin): the same arrays, same order; ties kept in day-then-basin order.
    from regional.residuals import (
        SortedResiduals,
        class_residuals,
        flow_classes,
        log_residuals,
        observed_basins,
    )

    rng = np.random.default_rng(4)
    sim = rng.gamma(2.0, 1.0, (300, 11))
    obs = sim * np.exp(rng.normal(0.0, 0.4, sim.shape))
    obs[rng.random(sim.shape) < 0.2] = np.nan
    obs[::7] = np.round(obs[::7], 1)  # tied residuals
    obs[:, 5] = np.nan  # a basin without an observed day
    whole = SortedResiduals.of(*log_residuals(obs, sim, flow_classes(sim, 3), OFFSET_FRACTION), 3)
    for block in (1, 4, 11):
        got = class_residuals(obs, sim, 3, block=block)
        for ours, theirs in zip(got.values + got.basins, whole.values + whole.basins, strict=True):
            np.testing.assert_array_equal(ours, theirs)
        assert observed_basins(obs, block=block) == 10


def test_average_ranks_are_scipys_rankdata_average_ranks():
    # source: scipy.stats.rankdata(method="average", axis=0), ties and a NaN column included
    from scipy import stats

    from regional.residuals import average_ranks

    rng = np.random.default_rng(3)
    tied = rng.integers(0, 20, (400, 30)).astype(float)
    tied[5, 4] = np.nan
    for values in (tied, rng.normal(size=(250, 7)), np.ones((3, 2))):
        expected = stats.rankdata(values, method="average", axis=0)
        np.testing.assert_array_equal(average_ranks(values), expected)
