"""Flow statistics by two routes in leave-one-out: regression, donors, bounds, demo checks."""

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from regional import flowstats
from regional import statroutes as sr
from regional.errors import InputError
from regional.transfer import ProximityTransfer, SimilarityTransfer

DRY_ARIDITY = 0.9
"""PET / P from which the demo's climate counts as dry (demo_region/README)."""


def test_press_of_every_column_equals_statsmodels():
    # Reference: statsmodels OLSInfluence.resid_press (e_i / (1 - h_ii)), Allen (1974).
    rng = np.random.default_rng(0)
    design = np.column_stack([np.ones(25), rng.normal(size=(25, 2))])
    target = design @ [[1.0, 0.5], [0.3, -0.2], [0.0, 0.7]] + rng.normal(0, 0.2, (25, 2))
    got = sr.press_columns(design, target)
    for j in range(2):
        influence = sm.OLS(target[:, j], design).fit().get_influence()
        assert got[j] == pytest.approx(np.sum(influence.resid_press**2), rel=1e-10)


def test_press_of_a_rank_deficient_design_is_infinite():
    design = np.column_stack([np.ones(6), np.arange(6.0), 2 * np.arange(6.0)])
    assert np.isinf(sr.press_columns(design, np.ones((6, 1)))).all()


def _planted(n=30, seed=1):
    """Invented region: log10 statistic = 0.5 + 0.3 z1 - 0.2 z2 (+ noise); z3 is noise."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, 3))
    logs = np.column_stack(
        [0.5 + 0.3 * z[:, 0] - 0.2 * z[:, 1], -1.0 + 0.4 * z[:, 1]]
    ) + rng.normal(0, 0.02, (n, 2))
    return z, logs


def test_forward_selection_keeps_the_planted_attributes():
    z, logs = _planted()
    design = np.column_stack([np.ones(len(z)), z])
    chosen = sr.forward_selection(design, logs)
    assert chosen[0] == (1, 2)  # both planted attributes, not the noise (column 3)
    assert 2 in chosen[1] and 3 not in chosen[1]


def test_regression_route_recovers_a_planted_relation_out_of_sample():
    z, logs = _planted()
    z_new = np.array([[1.0, -1.0, 3.0], [0.0, 0.5, -2.0]])
    got = sr.regression_log_estimates(z, logs, z_new)
    expected = np.column_stack(
        [0.5 + 0.3 * z_new[:, 0] - 0.2 * z_new[:, 1], -1.0 + 0.4 * z_new[:, 1]]
    )
    assert got == pytest.approx(expected, abs=0.03)


@pytest.mark.parametrize("seed", [5, 6, 7, 8])
def test_fast_leave_one_out_equals_refitting_every_fold(seed):
    # Two routes to the same numbers: the rank-one updates of the full fits against a plain
    # loop that reruns forward selection and the fit without each basin (and without the
    # basins that share area with it), on a region with unknown values.
    rng = np.random.default_rng(seed)
    n, p = 24, 4
    z = rng.normal(size=(n, p))
    logs = z @ (rng.normal(size=(p, 6)) * (rng.random((p, 6)) < 0.5)) * 0.3
    logs += rng.normal(0, 0.1, logs.shape)
    logs[:4, 2] = np.nan
    extra = {3: [9], 10: [11, 12]}
    fast = sr.regression_loo_logs(z, logs, extra_drop=extra)
    slow = np.full(logs.shape, np.nan)
    for i in range(n):
        train = np.setdiff1d(np.arange(n), [i, *extra.get(i, [])])
        slow[i] = sr.regression_log_estimates(z[train], logs[train], z[[i]])[0]
    slow[np.isnan(logs)] = np.nan
    np.testing.assert_allclose(fast, slow, rtol=0, atol=1e-10)
    assert np.isnan(fast).sum() == 4


def _whole_hat_press(design, target):
    """Every fold's PRESS from the whole n x n hat matrix at once (the former route)."""
    q, _ = np.linalg.qr(design)
    hat = q @ q.T
    h = np.diag(hat).copy()
    resid = target - q @ (q.T @ target)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = hat / (1.0 - h)[:, None]
        leverage = h[None, :] + hat * share
        np.fill_diagonal(leverage, 0.0)
        weight = 1.0 / (1.0 - leverage)
        weight *= weight
    np.fill_diagonal(weight, 0.0)
    bad = (~np.isfinite(weight) | (leverage >= 1.0 - 1e-10)).any(axis=1)
    weight = np.where(np.isfinite(weight), weight, 0.0)
    cross = weight * share
    press = weight @ resid**2 + 2.0 * resid * (cross @ resid)
    press += resid**2 * (cross * share).sum(axis=1)[:, None]
    press[bad] = np.inf
    return press


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_compiled_fold_press_equals_the_whole_hat_matrix(seed):
    # Two routes to every fold's PRESS: the compiled pass one fold at a time (no n x n
    # matrix) against the whole hat matrix; the last two basins alone carry the third
    # attribute, so leaving out one of them leaves the other at leverage 1 (infinite PRESS).
    rng = np.random.default_rng(seed)
    n = 30
    design = np.column_stack([np.ones(n), rng.normal(size=(n, 2)), np.zeros(n)])
    design[-2:, 3] = [1.0, 2.0]
    target = rng.normal(size=(n, 5))
    cache = sr._FoldPress(design, target)
    cache.fill({(1, 2, 3): set(range(5)), (2,): {0, 3}})
    expected = _whole_hat_press(design, target)
    got = np.column_stack([cache.press[(1, 2, 3), c] for c in range(5)])
    assert np.isinf(expected[-2:]).all() and np.isfinite(expected[:-2]).all()
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    single = _whole_hat_press(design[:, [0, 2]], target)
    np.testing.assert_allclose(cache.press[(2,), 3], single[:, 3], rtol=1e-12)


def test_regression_route_skips_statistics_known_at_too_few_basins():
    z, logs = _planted(n=12)
    logs[3:, 1] = np.nan  # the second statistic known at 3 basins only
    got = sr.regression_log_estimates(z, logs, z[:2])
    assert np.isfinite(got[:, 0]).all() and np.isnan(got[:, 1]).all()


def test_conformal_quantiles_hand_worked():
    # Lei et al. (2018) ranks: n = 19, level 0.9 -> floor(20 x 0.05) = 1st and ceil(20 x 0.95)
    # = 19th smallest; level 0.8 -> 2nd and 18th; n = 5 at 0.9 -> rank 0: no finite lower bound.
    errors = np.arange(1.0, 20.0) - 10.0
    assert sr.conformal_quantiles(errors, 0.9) == (-9.0, 9.0)
    assert sr.conformal_quantiles(errors, 0.8) == (-8.0, 8.0)
    assert sr.conformal_quantiles(np.arange(5.0) - 2, 0.9) == (-np.inf, np.inf)
    # clipped so a bound never excludes the estimate itself
    assert sr.conformal_quantiles(np.arange(1.0, 20.0), 0.8) == (0.0, 18.0)


def test_leave_one_out_coverage_equals_a_plain_loop():
    rng = np.random.default_rng(2)
    errors = rng.normal(size=40)
    expected = []
    for i in range(40):
        lower, upper = sr.conformal_quantiles(np.delete(errors, i), 0.8)
        expected.append(lower <= errors[i] <= upper)
    assert sr.coverage_without_each(errors, 0.8) == pytest.approx(np.mean(expected))


def _donor_region(n=15, seed=3):
    rng = np.random.default_rng(seed)
    ids = [f"G{i:02d}" for i in range(n)]
    table = pd.DataFrame(
        {
            "aridity": rng.uniform(0.3, 1.2, n),
            "slope_mean": rng.uniform(1, 20, n),
            "centroid_lon": rng.uniform(10, 12, n),
            "centroid_lat": rng.uniform(45, 47, n),
        },
        index=pd.Index(ids, name="basin_id"),
    )
    params = pd.DataFrame({"k_per_day": rng.uniform(0.01, 0.5, n)}, index=table.index)
    return table, params


@pytest.mark.parametrize("method", ["similarity", "proximity"])
def test_donor_weights_equal_the_transfer_estimators(method):
    # Two routes to the same donors: the fast numpy folds and the estimator of the parameters.
    table, params = _donor_region()
    train, target = list(table.index[1:]), [table.index[0]]
    if method == "similarity":
        columns = ["aridity", "slope_mean"]
        estimator = SimilarityTransfer(attributes=columns, n_donors=4, power=2.0)
    else:
        columns = ["centroid_lon", "centroid_lat"]
        estimator = ProximityTransfer(n_donors=4, power=2.0)
    sets = estimator.fit(table.loc[train], params.loc[train]).donate(table.loc[target]).sets
    space = sr.DonorSpace(method, table[columns], n_donors=4, power=2.0)
    weights = sr.donor_weights(space, train, target)[0]
    expected = pd.Series(sets["weight"].to_numpy(), index=sets["donor_id"]).reindex(train)
    assert weights == pytest.approx(expected.fillna(0.0).to_numpy(), abs=1e-12)


@pytest.mark.parametrize("method", ["similarity", "proximity"])
def test_fold_donor_weights_equal_one_fit_per_target(method):
    # Two routes to the same folds: every target's weights in one blockwise pass (fold mean and
    # standard deviation by downdated sums) and donor_weights on each fold's own basins. The
    # drop sets hold the target and, for some, a neighbour sharing its area; one attribute is
    # constant once its only differing basin is dropped.
    table, _ = _donor_region()
    table = table.assign(flat=0.0)
    table.loc[table.index[3], "flat"] = 1.0
    columns = (
        ["aridity", "slope_mean", "flat"]
        if method == "similarity"
        else ["centroid_lon", "centroid_lat"]
    )
    space = sr.DonorSpace(method, table[columns], n_donors=4, power=2.0)
    train = sorted(table.index)
    targets = train[:8]
    dropped = np.zeros((len(targets), len(train)), dtype=bool)
    for row in range(len(targets)):
        dropped[row, [row, (row + 3) % len(train)]] = True
    got = sr.fold_donor_weights(space, train, targets, dropped)
    for row, target in enumerate(targets):
        kept = [b for b, out in zip(train, dropped[row], strict=True) if not out]
        expected = np.zeros(len(train))
        expected[~dropped[row]] = sr.donor_weights(space, kept, [target])[0]
        assert got[row] == pytest.approx(expected, rel=1e-10, abs=1e-12)


def _statistics(result, *, route="auto"):
    """Statistics of a run's chosen (model, method), no ungauged flow, at level 0.9."""
    return sr.estimate_statistics(
        result.runs[result.chosen_model],
        result.chosen_method,
        result.region,
        None,
        attributes=result.attributes,
        level=0.9,
        route=route,
    )


def test_unknown_route_is_refused(demo_result):
    with pytest.raises(InputError, match="statistics_route must be one of"):
        _statistics(demo_result, route="both")


# --------------------------------------------------------------------------------------------
# On the demo region (one shared run)


def test_demo_writes_every_statistic_for_every_route(demo_result):
    stats = demo_result.statistics
    summary = stats.summary
    assert set(summary["route"]) == set(sr.ROUTES)
    assert summary.groupby("statistic")["chosen"].sum().eq(1).all()
    assert set(stats.ungauged["statistic"]) == set(flowstats.STATISTIC_NAMES)
    assert set(stats.ungauged["basin_id"]) == set(demo_result.region.ungauged)


def test_demo_chosen_route_coverage_within_080_097(demo_result):
    # Issue 12: the chosen route's leave-one-out coverage at level 0.9 lies in 0.8 .. 0.97 for
    # every statistic known at 20 or more gauged basins.
    stats = demo_result.statistics
    chosen = stats.summary[stats.summary["chosen"] & (stats.summary["n_basins"] >= 20)]
    assert len(chosen) == len(flowstats.STATISTIC_NAMES)
    assert chosen["coverage"].between(0.8, 0.97).all(), chosen[["statistic", "coverage"]]


def test_demo_chosen_route_has_the_smallest_median_log_error(demo_result):
    summary = demo_result.statistics.summary
    best = summary.loc[summary.groupby("statistic")["median_abs_log_error"].idxmin()]
    assert best["chosen"].all()


def test_demo_humid_ungauged_basins_have_q95_above_zero(demo_result):
    stats = demo_result.statistics.ungauged_wide()
    aridity = demo_result.region.attributes.loc[stats.index, "aridity"]
    humid = stats[aridity < DRY_ARIDITY]
    assert len(humid) >= 6
    assert (humid["q95_mm_day"] > 0).all() and (humid["q95_mm_day_low"] > 0).all()


def test_demo_m3s_and_mm_day_agree_through_the_area(demo_result):
    table = demo_result.statistics.ungauged
    area = demo_result.region.attributes["area_km2"].reindex(table["basin_id"]).to_numpy()
    flows = table["unit"].eq("mm/day").to_numpy()
    assert flows.sum() == 29 * len(demo_result.region.ungauged)
    for column in ("estimate", "low", "high"):
        mm = table[column].to_numpy()[flows]
        m3s = table[f"{column}_m3s"].to_numpy()[flows]
        np.testing.assert_allclose(m3s * 86.4 / area[flows], mm, rtol=1e-12)
        assert table.loc[~flows, f"{column}_m3s"].isna().all()
    assert (table["low"] <= table["estimate"]).all() and (table["estimate"] <= table["high"]).all()


def test_leave_one_out_never_uses_the_left_out_basins_flow(demo_result):
    # Independence: triple one gauged basin's observed flow; every route's leave-one-out
    # estimate of that basin stays the same, while the basins it serves as a donor change.
    run = demo_result.runs[demo_result.chosen_model]
    basin = str(run.loo.observed.columns[5])
    observed = run.loo.observed.copy()
    observed[basin] = observed[basin] * 3.0
    changed_run = replace(run, loo=replace(run.loo, observed=observed))
    changed = replace(
        demo_result, runs={**demo_result.runs, demo_result.chosen_model: changed_run}
    )
    before = _statistics(demo_result).loo
    after = _statistics(changed).loo
    key = ["basin_id", "statistic", "route"]
    merged = before.merge(after, on=key, suffixes=("_before", "_after"))
    own = merged[merged["basin_id"] == basin]
    np.testing.assert_allclose(own["estimated_after"], own["estimated_before"], rtol=1e-12)
    assert not np.allclose(own["observed_after"], own["observed_before"], equal_nan=True)
    others = merged[(merged["basin_id"] != basin) & (merged["route"] != sr.MODEL)]
    assert not np.allclose(others["estimated_after"], others["estimated_before"], equal_nan=True)


@pytest.mark.parametrize(
    ("route", "allowed"), [("model", {"model"}), ("direct", set(sr.ROUTES[1:]))]
)
def test_a_route_can_be_forced(demo_result, route, allowed):
    stats = _statistics(demo_result, route=route)
    assert set(stats.summary.loc[stats.summary["chosen"], "route"]) <= allowed


@pytest.mark.parametrize("method", ["similarity", "proximity"])
def test_donor_routes_do_not_depend_on_the_block_of_targets(method, monkeypatch):
    # The donor routes take their targets a block at a time (never all targets x all donors):
    # blocks of 1 and 3 targets give the numbers of one block holding them all.
    from types import SimpleNamespace

    table, _ = _donor_region(n=15)
    columns = (
        ["aridity", "slope_mean"] if method == "similarity" else ["centroid_lon", "centroid_lat"]
    )
    space = sr.DonorSpace(method, table[columns], n_donors=4, power=2.0)
    rng = np.random.default_rng(8)
    observed = pd.DataFrame(
        rng.lognormal(size=(15, 3)), index=table.index, columns=["mean_flow", "q95", "bfi"]
    )
    observed.iloc[2, 1] = np.nan  # a statistic unknown at one donor
    data = SimpleNamespace(
        observed=observed.iloc[:10],
        donors={method: space},
        dropped=lambda target: {target},
    )
    train, targets = list(table.index[:10]), list(table.index[10:])
    runs = {}
    for rows in (1, 3, 15):
        monkeypatch.setattr(sr, "FOLD_BLOCK_CELLS", rows * len(train))
        runs[rows] = (
            sr._donor_estimate(data, method, train, targets),
            sr._donor_loo(data, method, train),
        )
    for rows in (1, 3):
        pd.testing.assert_frame_equal(runs[rows][0], runs[15][0], check_exact=True)
        pd.testing.assert_frame_equal(runs[rows][1], runs[15][1], check_exact=True)
    assert np.isfinite(runs[15][0].to_numpy()).all()


def test_gauged_part_given_the_repeats_one_by_one_equals_the_statistics_given_them_at_once(
    demo_result,
):
    # The run builds the gauged part while the held-out check runs and hands it each repeat's
    # summary as it comes back (GaugedStatistics.add_held_out); estimate_statistics finished
    # from it gives the tables of estimate_statistics given all the repeats at once.
    from regional.repeats import held_out_flows

    run = demo_result.runs[demo_result.chosen_model]
    method = demo_result.chosen_method
    repeats = held_out_flows(run, method=method, repeats=3, level=0.9)
    options = {"attributes": demo_result.attributes, "level": 0.9}
    at_once = sr.estimate_statistics(
        run, method, demo_result.region, None, held_out=repeats, **options
    )
    gauged = sr.GaugedStatistics(run, method, demo_result.region, **options)
    assert gauged.summary["held_out_coverage"].isna().all()  # no repeat given yet
    for repeat in repeats:
        gauged.add_held_out(repeat)
    one_by_one = sr.estimate_statistics(
        run, method, demo_result.region, None, gauged=gauged, **options
    )
    assert one_by_one.summary["held_out_coverage"].notna().any()
    for name in ("summary", "bounds", "loo", "observed"):
        pd.testing.assert_frame_equal(
            getattr(one_by_one, name), getattr(at_once, name), check_exact=True
        )
    assert one_by_one.notes == at_once.notes
    with pytest.raises(ValueError, match="not twice"):
        sr.estimate_statistics(
            run, method, demo_result.region, None, held_out=repeats, gauged=gauged, **options
        )
