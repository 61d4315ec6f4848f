"""Tests of regional.applicability: attribute applicability and transfer skill."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.spatial import distance

from regional import applicability as applicability_module
from regional.applicability import applicability, transfer_skill
from regional.errors import InputError
from regional.predict import predict_ungauged


@pytest.fixture
def cloud() -> pd.DataFrame:
    rng = np.random.default_rng(21)
    values = rng.normal(size=(40, 3)) * [0.2, 5.0, 30.0] + [0.8, 10.0, 400.0]
    index = [f"G{i:02d}" for i in range(40)]
    return pd.DataFrame(values, index=index, columns=["aridity", "slope_mean", "elevation_mean"])


def test_target_far_outside_is_flagged_with_the_attribute_named(cloud):
    columns = list(cloud.columns)
    targets = pd.DataFrame(
        [cloud.mean().to_numpy(), cloud.mean().to_numpy()],
        index=["inside", "far"],
        columns=columns,
    )
    targets.loc["far", "aridity"] = cloud["aridity"].max() + 10 * cloud["aridity"].std()
    table = applicability(cloud, targets, columns)
    assert bool(table.loc["inside", "applicable"]) and table.loc["inside", "reason"] == ""
    assert not bool(table.loc["far", "applicable"])
    assert "aridity" in table.loc["far", "reason"]
    assert "above the donors' range" in table.loc["far", "reason"]
    assert table.loc["far", "outside_range"] == "aridity"


def test_off_correlation_target_is_caught_by_mahalanobis_only(cloud):
    columns = list(cloud.columns)
    cloud = cloud.copy()
    cloud["slope_mean"] = 10.0 + 20.0 * (cloud["aridity"] - 0.8) + 0.1 * cloud["slope_mean"] / 5
    # high aridity with low slope, though the donors' slope rises with aridity
    target = pd.DataFrame(
        {
            "aridity": [cloud["aridity"].quantile(0.8)],
            "slope_mean": [cloud["slope_mean"].quantile(0.2)],
            "elevation_mean": [cloud["elevation_mean"].median()],
        },
        index=["twisted"],
    )
    inside_ranges = (target.iloc[0] >= cloud.min()) & (target.iloc[0] <= cloud.max())
    assert inside_ranges.all()  # the range test cannot see it
    table = applicability(cloud, target, columns)
    assert not bool(table.loc["twisted", "applicable"])
    assert "Mahalanobis" in table.loc["twisted", "reason"]
    assert table.loc["twisted", "outside_range"] == ""


def test_distances_match_scipy(cloud):
    columns = list(cloud.columns)
    targets = cloud.iloc[:5] * 1.3
    table = applicability(cloud, targets, columns)
    z = (cloud - cloud.mean()) / cloud.std(ddof=1)
    zt = (targets - cloud.mean()) / cloud.std(ddof=1)
    inverse = np.linalg.inv(np.cov(z.to_numpy(), rowvar=False))
    for i, basin in enumerate(targets.index):
        # reference: scipy.spatial.distance.mahalanobis (Mahalanobis 1936)
        expected = distance.mahalanobis(zt.iloc[i], z.mean(), inverse) ** 2
        assert table.loc[basin, "mahalanobis_d2"] == pytest.approx(expected, rel=1e-9)
    # reference: scipy.spatial.distance.cdist for the nearest-donor distances
    nearest = distance.cdist(zt, z).min(axis=1)
    np.testing.assert_allclose(table["nearest_donor_distance"], nearest, rtol=1e-9)
    among = distance.cdist(z, z)
    np.fill_diagonal(among, np.inf)
    assert table["nearest_donor_limit"].iloc[0] == pytest.approx(among.min(axis=1).max())
    # reference: scipy.stats.chi2.ppf, 3 degrees of freedom at 95%
    assert table["mahalanobis_limit"].iloc[0] == pytest.approx(stats.chi2.ppf(0.95, 3))


def test_collinear_donors_still_give_finite_distances(cloud):
    cloud = cloud.assign(twice=2.0 * cloud["aridity"])  # singular covariance
    columns = list(cloud.columns)
    table = applicability(cloud, cloud.iloc[:3], columns)
    assert np.isfinite(table["mahalanobis_d2"]).all()


def test_missing_target_attribute_is_named(cloud):
    targets = cloud.iloc[:2].copy()
    targets.iloc[1, 0] = np.nan
    with pytest.raises(InputError, match="'aridity' is missing or not finite at target basin"):
        applicability(cloud, targets, list(cloud.columns))


@pytest.fixture
def dry_failing_region():
    """An invented region: 40 gauged basins; transfer fails (NSE < 0) where aridity > 1.1."""
    rng = np.random.default_rng(21)
    ids = [f"G{i:02d}" for i in range(40)]
    gauged = pd.DataFrame(
        {"aridity": np.linspace(0.3, 1.5, 40), "slope_mean": rng.uniform(1.0, 12.0, 40)},
        index=ids,
    )
    nse = pd.Series(np.where(gauged["aridity"] > 1.1, -0.6, 0.75), index=ids)
    targets = pd.DataFrame(
        {"aridity": [0.5, 0.9, 1.3, 1.45], "slope_mean": [6.0, 5.0, 6.0, 7.0]},
        index=["humid", "subhumid", "dry", "driest"],
    )
    return gauged, targets, nse


def test_targets_in_the_climate_where_transfer_failed_are_flagged(dry_failing_region):
    gauged, targets, nse = dry_failing_region
    skill = transfer_skill(gauged, targets, nse, columns=["aridity", "slope_mean"], n_nearest=5)
    # the well-scored range is that of the basins with NSE > 0: aridity 0.3 .. <= 1.1
    well = gauged.loc[nse > 0, "aridity"]
    assert skill["well_scored_low"].iloc[0] == pytest.approx(well.min())
    assert skill["well_scored_high"].iloc[0] == pytest.approx(well.max())
    assert skill.loc[["humid", "subhumid"], "skill_applicable"].all()
    assert not skill.loc[["dry", "driest"], "skill_applicable"].any()
    assert skill.loc["dry", "skill_reason"].startswith("aridity 1.3 above the range 0.3 to")
    assert "transfer failed at the 5 nearest gauged basins" in skill.loc["driest", "skill_reason"]
    assert (skill.loc[["dry", "driest"], "nearest_loo_nse"] < 0).all()
    # every target lies inside the donors' attribute range: the plain range test misses them
    plain = applicability(gauged, targets, ["aridity", "slope_mean"])
    assert plain["outside_range"].eq("").all()


def test_no_failure_no_flag(dry_failing_region):
    gauged, targets, nse = dry_failing_region
    skill = transfer_skill(
        gauged, targets, nse.abs(), columns=["aridity", "slope_mean"], n_nearest=5
    )
    assert skill["skill_applicable"].all() and (skill["skill_reason"] == "").all()
    assert skill["well_scored_low"].isna().all()


def test_nearest_gauged_basins_that_failed_flag_a_target_inside_the_climate_range():
    # Failing basins clustered on steep slopes in mid climate: the climate range stays whole,
    # the nearest-basins test catches a steep target.
    ids = [f"G{i:02d}" for i in range(30)]
    slope = np.r_[np.linspace(1.0, 8.0, 24), np.linspace(14.0, 16.0, 6)]
    gauged = pd.DataFrame({"aridity": np.linspace(0.4, 1.0, 30)[::-1], "slope_mean": slope}, ids)
    gauged.loc[ids[24:], "aridity"] = 0.7
    nse = pd.Series(np.where(slope > 10, -1.0, 0.7), index=ids)
    targets = pd.DataFrame({"aridity": [0.7, 0.7], "slope_mean": [15.0, 3.0]}, ["steep", "gentle"])
    skill = transfer_skill(gauged, targets, nse, columns=["aridity", "slope_mean"], n_nearest=3)
    assert not skill.loc["steep", "skill_applicable"]
    assert skill.loc["steep", "skill_reason"].startswith("transfer failed at the 3 nearest")
    assert skill.loc["gentle", "skill_applicable"]


def test_failing_targets_get_the_nearest_basins_errors_in_their_bounds(demo_result, monkeypatch):
    # With the failure threshold raised to NSE 0.9, the demo's weaker gauged basins count as
    # failed: targets near them are flagged, their reason and 'bounds_from' say so, and their
    # bounds are at least as wide as the regional ones on every day.
    regional_bounds = predict_ungauged(demo_result)
    monkeypatch.setattr(applicability_module, "FAILED_NSE", 0.9)
    strict = predict_ungauged(demo_result)
    table = strict.table
    failing = table.index[table["bounds_from"].str.startswith("nearest gauged basins")]
    assert len(failing) >= 1
    assert (~table.loc[failing, "applicable"]).all()
    assert table.loc[failing, "reason"].str.contains("leave-one-out NSE").all()
    assert any("transfer is known to fail" in note for note in strict.notes)
    width = {}
    for name, pred in (("regional", regional_bounds), ("strict", strict)):
        flows = pred.flows.set_index(["basin_id", "date"])
        width[name] = flows["flow_high_mm"] - flows["flow_low_mm"]
    wider = width["strict"].loc[list(failing)] >= width["regional"].loc[list(failing)] - 1e-12
    assert wider.all()
    assert (width["strict"].loc[list(failing)] > width["regional"].loc[list(failing)]).any()
    others = table.index.difference(failing)
    pd.testing.assert_series_equal(
        width["strict"].loc[list(others)], width["regional"].loc[list(others)]
    )


@pytest.mark.parametrize("rows", [1, 3, 40])
def test_distance_searches_do_not_depend_on_the_block_of_rows(cloud, rows):
    z = ((cloud - cloud.mean()) / cloud.std(ddof=1)).to_numpy()
    targets = z[:7] * 1.3 + 0.05
    cells = rows * len(z) * z.shape[1]  # blocks of `rows` rows
    whole = applicability_module._distances(targets, z)  # every target x donor at once
    among = applicability_module._distances(z, z)
    np.fill_diagonal(among, np.inf)
    nearest, limit = applicability_module._nearest_donor(z, targets, cells=cells)
    np.testing.assert_array_equal(nearest, whole.min(axis=1))
    assert limit == among.min(axis=1).max()
    order = applicability_module._nearest_order(targets, z, 5, cells=cells)
    np.testing.assert_array_equal(order, np.argsort(whole, axis=1, kind="stable")[:, :5])


def test_chi2_quantile_is_scipys_chi2_quantile():
    # source: scipy.stats.chi2.ppf, written with scipy.special.gammaincinv here
    from scipy import stats

    from regional.applicability import chi2_quantile

    for dof in range(1, 25):
        for probability in (0.5, 0.9, 0.99):
            assert chi2_quantile(probability, dof) == stats.chi2.ppf(probability, dof)
