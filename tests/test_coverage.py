"""Tests of regional.coverage: leave-one-out coverage of the daily bounds."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from regional import bounds, coverage, residuals
from regional.bounds import conformal_bounds
from regional.coverage import loo_coverage


def test_demo_coverage_of_nominal_90_percent_bounds(demo_result):
    # the conformal construction's promise (Vovk et al. 2005; Lei et al. 2018), checked on
    # basins each error model was not built from; the band 0.85-0.95 is set by issue 6
    coverage = loo_coverage(demo_result.runs, level=0.9)
    chosen = coverage[coverage["method"] == demo_result.chosen_method].iloc[0]
    assert 0.85 <= chosen["coverage"] <= 0.95
    transfers = coverage[coverage["method"] != "calibrated"]
    assert transfers["coverage"].between(0.85, 0.95).all()
    assert (coverage["n_basins"] == len(demo_result.region.gauged)).all()


def test_held_out_coverage_equals_rebuilding_without_each_basin(demo_result):
    loo = demo_result.runs[demo_result.chosen_model].loo
    obs, sim = loo.observed, loo.simulated[demo_result.chosen_method]
    shares = []
    for basin in obs.columns:
        model = conformal_bounds(obs.drop(columns=basin), sim.drop(columns=basin), level=0.9)
        low, high = model.bounds(sim[[basin]])
        seen = obs[basin].notna()
        inside = (obs[basin] >= low[basin]) & (obs[basin] <= high[basin])
        shares.append(inside[seen].mean())
    coverage = loo_coverage(demo_result.runs, level=0.9)
    row = coverage[coverage["method"] == demo_result.chosen_method].iloc[0]
    assert row["coverage"] == pytest.approx(np.mean(shares), abs=1e-12)


def test_held_out_coverage_equals_refitting_without_each_basin():
    # The all-basins-at-once quantiles must equal the direct route: rebuild the error model
    # from the residuals of the other basins only, apply it to j, count j's days inside.
    rng = np.random.default_rng(5)
    days, n = 400, 12
    sim = rng.gamma(1.0, 2.0, (days, n))
    obs = sim * rng.lognormal(0.0, 0.5, (days, n))
    obs[rng.random((days, n)) < 0.1] = np.nan
    obs[:150, 3] = np.nan
    index = pd.date_range("2001-01-01", periods=days)
    observed, simulated = pd.DataFrame(obs, index), pd.DataFrame(sim, index)
    fast = coverage._held_out_coverage(observed, simulated, 0.8)

    k = bounds.default_n_classes(obs)
    classes = residuals.flow_classes(sim, k)
    residual, basin, cls = residuals.log_residuals(obs, sim, classes, residuals.OFFSET_FRACTION)
    offsets = residuals.basin_offsets(sim)
    shares = []
    for j in range(n):
        others = basin != j
        data = residuals.SortedResiduals.of(residual[others], basin[others], cls[others], k)
        model = bounds._fit(data, levels=np.full(k, 0.8), fraction=residuals.OFFSET_FRACTION)
        low, high = bounds._apply(sim[:, j], classes[:, j], offsets[j], model)
        valid = np.isfinite(obs[:, j])
        shares.append(((obs[:, j] >= low) & (obs[:, j] <= high))[valid].mean())
    assert k > 1
    assert fast["coverage"] == pytest.approx(np.mean(shares), abs=1e-12)
    assert fast["n_basins"] == n


def test_leave_one_out_coverage_does_not_depend_on_the_block_of_basins():
    # The within-basin work (classes, residuals, bounds, counts) runs a block of basins at a
    # time; any block size gives the same numbers to the bit.
    rng = np.random.default_rng(0)
    ids = [f"S{i:02d}" for i in range(23)]
    sim = pd.DataFrame(rng.gamma(2.0, 1.0, (730, 23)), columns=ids)
    obs = sim * np.exp(rng.normal(0.0, 0.3, sim.shape))
    whole = coverage._held_out_coverage(obs[sim.columns], sim, 0.9, block=23)
    for block in (1, 5):
        assert coverage._held_out_coverage(obs[sim.columns], sim, 0.9, block=block) == whole


def test_leave_one_out_coverage_started_as_tasks_gives_the_same_table(demo_result):
    # start_loo_coverage hands every (model, method) to the executor as a task carrying that
    # method's flows (on a cluster the workers measure while the caller builds the error
    # model); the table it gives equals loo_coverage's.
    from regional.compute import InProcessExecutor
    from regional.coverage import start_loo_coverage

    started: list[list] = []

    class Recording(InProcessExecutor):
        def start_map(self, function, chunks, context, *, priority=0):
            started.append([(model, method) for [(model, method, _)] in chunks])
            assert priority < 0  # behind the held-out check's tasks on a cluster
            return super().start_map(function, chunks, context, priority=priority)

    wait = start_loo_coverage(demo_result.runs, level=0.9, executor=Recording())
    pairs = [(m, method) for m, run in demo_result.runs.items() for method in run.loo.methods]
    assert started == [pairs]  # one task per (model, method), handed over by the call
    pd.testing.assert_frame_equal(
        wait(), loo_coverage(demo_result.runs, level=0.9), check_exact=True
    )
