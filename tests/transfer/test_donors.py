"""SimilarityTransfer and ProximityTransfer: nearest donors, inverse-distance weights."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pyproj import Geod
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.neighbors import KNeighborsRegressor

from regional.errors import InputError, InputWarning
from regional.transfer import (
    ProximityTransfer,
    SimilarityTransfer,
    great_circle_km,
    inverse_distance_weights,
)

ATTRS = ["aridity", "slope_pct", "forest_frac"]


def _standardised(train: pd.DataFrame, other: pd.DataFrame) -> np.ndarray:
    return ((other[ATTRS] - train[ATTRS].mean()) / train[ATTRS].std(ddof=1)).to_numpy()


@pytest.mark.parametrize("n_donors", [1, 3, 5])
def test_similarity_parameter_average_matches_sklearn_knn(region, n_donors):
    X, y = region
    train, targets = X.iloc[:18], X.iloc[18:]
    est = SimilarityTransfer(attributes=ATTRS, n_donors=n_donors, combine="parameter")
    est.fit(train, y.iloc[:18])
    # reference: scikit-learn KNeighborsRegressor(weights="distance"); it averages in the space
    # it is given, so it gets log k (our log transform averages log k too)
    knn = KNeighborsRegressor(n_neighbors=n_donors, weights="distance")
    knn.fit(_standardised(train, train), np.log(y["k_per_day"].iloc[:18]))
    expected = knn.predict(_standardised(train, targets))
    np.testing.assert_allclose(np.log(est.predict(targets)["k_per_day"]), expected, rtol=1e-12)
    distance, index = knn.kneighbors(_standardised(train, targets))
    donation = est.donate(targets)
    np.testing.assert_allclose(
        donation.sets["distance"].to_numpy().reshape(-1, n_donors), distance, rtol=1e-12
    )
    np.testing.assert_array_equal(
        donation.sets["donor_id"].to_numpy().reshape(-1, n_donors),
        train.index.to_numpy()[index],
    )


def test_similarity_identity_transform_matches_sklearn_knn(region):
    X, y = region
    train, targets = X.iloc[:18], X.iloc[18:]
    est = SimilarityTransfer(attributes=ATTRS, n_donors=4, power=1.0)
    est.fit(train, y.iloc[:18], transforms={"k_per_day": "identity"})
    # reference: scikit-learn KNeighborsRegressor(weights="distance") in parameter units
    knn = KNeighborsRegressor(n_neighbors=4, weights="distance")
    knn.fit(_standardised(train, train), y["k_per_day"].iloc[:18])
    np.testing.assert_allclose(
        est.predict(targets)["k_per_day"], knn.predict(_standardised(train, targets)), rtol=1e-12
    )


def test_similarity_standardises_with_training_donors_only(region):
    X, y = region
    est = SimilarityTransfer(attributes=ATTRS).fit(X.iloc[:18], y.iloc[:18])
    np.testing.assert_allclose(est.mean_, X[ATTRS].iloc[:18].mean())
    np.testing.assert_allclose(est.scale_, X[ATTRS].iloc[:18].std(ddof=1))
    # changing a target's attributes cannot move the statistics
    far = X.iloc[18:].assign(aridity=1e6)
    est.donate(far)
    np.testing.assert_allclose(est.mean_, X[ATTRS].iloc[:18].mean())


def test_great_circle_distance_close_to_wgs84_geodesic():
    rng = np.random.default_rng(11)
    n = 5000
    hemisphere = rng.choice([-1.0, 1.0], n)
    lat1 = hemisphere * rng.uniform(20.0, 75.0, n)
    lon1 = rng.uniform(-180.0, 180.0, n)
    lat2 = np.clip(lat1 + rng.uniform(-8.0, 8.0, n), -89.0, 89.0)
    lon2 = lon1 + rng.uniform(-8.0, 8.0, n)
    # reference: pyproj.Geod(ellps="WGS84").inv geodesic distance, metres
    _, _, metres = Geod(ellps="WGS84").inv(lon1, lat1, lon2, lat2)
    relative = great_circle_km(lon1, lat1, lon2, lat2) / (metres / 1000.0) - 1.0
    assert np.abs(relative).max() < 0.005
    # between 20 and 75 degrees of latitude the sphere errs by < 0.5% in every direction;
    # near the equator a north-south line is ~0.56% long on the sphere (meridian radius of
    # curvature 6335 km vs 6371 km; from memory, consistent with the WGS84 axes)
    lat_eq = rng.uniform(-10.0, 10.0, n)
    _, _, metres = Geod(ellps="WGS84").inv(lon1, lat_eq, lon1, lat_eq + 2.0)
    relative = great_circle_km(lon1, lat_eq, lon1, lat_eq + 2.0) / (metres / 1000.0) - 1.0
    assert np.abs(relative).max() < 0.006


def test_proximity_picks_nearest_by_great_circle(region):
    X, y = region
    train, targets = X.iloc[:18], X.iloc[18:]
    est = ProximityTransfer(n_donors=3).fit(train, y.iloc[:18])
    donation = est.donate(targets)
    for target_id, rows in donation.sets.groupby("target_id"):
        distance = pd.Series(
            great_circle_km(
                targets.loc[target_id, "centroid_lon"],
                targets.loc[target_id, "centroid_lat"],
                train["centroid_lon"].to_numpy(),
                train["centroid_lat"].to_numpy(),
            ),
            index=train.index,
        )
        nearest = distance.sort_values(kind="stable").index[:3]
        assert list(rows["donor_id"]) == list(nearest)
        np.testing.assert_allclose(rows["distance"], distance[nearest], rtol=1e-12)
    assert donation.distance_unit == "km"


def test_proximity_outlet_location(region):
    X, y = region
    X = X.assign(outlet_lon=X["centroid_lon"][::-1].to_numpy(), outlet_lat=X["centroid_lat"])
    by_outlet = ProximityTransfer(n_donors=2, location="outlet").fit(X.iloc[:18], y.iloc[:18])
    renamed = X.drop(columns=["centroid_lon"]).rename(columns={"outlet_lon": "centroid_lon"})
    by_centroid = ProximityTransfer(n_donors=2).fit(renamed.iloc[:18], y.iloc[:18])
    pd.testing.assert_frame_equal(
        by_outlet.donate(X.iloc[18:]).sets, by_centroid.donate(renamed.iloc[18:]).sets
    )


@pytest.mark.parametrize(
    "make", [lambda: SimilarityTransfer(attributes=ATTRS, n_donors=4), ProximityTransfer]
)
def test_left_out_basin_never_influences_what_it_gets(region, make):
    X, y = region
    rng = np.random.default_rng(5)
    for i in (0, 7, 23):
        target = X.iloc[[i]]
        train_X, train_y = X.drop(index=X.index[i]), y.drop(index=y.index[i])
        first = make().fit(train_X, train_y).donate(target)
        order = rng.permutation(len(train_X))
        second = make().fit(train_X.iloc[order], train_y.iloc[order[::-1]]).donate(target)
        pd.testing.assert_frame_equal(first.sets, second.sets)
        pd.testing.assert_frame_equal(first.intervals, second.intervals)
        assert X.index[i] not in set(first.sets["donor_id"])


def test_ties_broken_by_basin_id():
    ids = ["d", "b", "c", "a"]
    X = pd.DataFrame({"aridity": [1.0, -1.0, 1.0, -1.0]}, index=ids)
    y = pd.DataFrame({"k_per_day": [0.1, 0.2, 0.3, 0.4]}, index=ids)
    target = pd.DataFrame({"aridity": [0.0]}, index=["t"])
    sets = SimilarityTransfer(n_donors=3).fit(X, y).donate(target).sets
    assert list(sets["donor_id"]) == ["a", "b", "c"]
    np.testing.assert_allclose(sets["weight"], 1.0 / 3.0)


def test_zero_distance_donor_gets_all_weight(region):
    X, y = region
    est = SimilarityTransfer(attributes=ATTRS, n_donors=3).fit(X.iloc[:18], y.iloc[:18])
    twin = X.iloc[[4]].rename(index={"basin_004": "ungauged_twin"})
    donation = est.donate(twin)
    assert list(donation.sets["weight"]) == [1.0, 0.0, 0.0]
    assert donation.sets["donor_id"].iloc[0] == "basin_004"
    assert est.predict(twin)["k_per_day"].iloc[0] == pytest.approx(y["k_per_day"].iloc[4])
    # the interval covers only donors with weight
    assert donation.intervals.iloc[0, 0] == donation.intervals.iloc[0, 1]


def test_power_zero_gives_equal_weights_and_intervals_are_donor_range(region):
    X, y = region
    est = ProximityTransfer(n_donors=4, power=0.0).fit(X.iloc[:18], y.iloc[:18])
    donation = est.donate(X.iloc[18:])
    np.testing.assert_allclose(donation.sets["weight"], 0.25)
    grouped = donation.sets.groupby("target_id", sort=False)["k_per_day"]
    np.testing.assert_allclose(donation.intervals["k_per_day_low"], grouped.min())
    np.testing.assert_allclose(donation.intervals["k_per_day_high"], grouped.max())
    expected = np.exp(grouped.apply(lambda k: np.log(k).mean()))
    np.testing.assert_allclose(est.predict(X.iloc[18:])["k_per_day"], expected)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    n_train=st.integers(2, 15),
    power=st.floats(0.0, 4.0),
    data=st.data(),
)
def test_weights_non_negative_and_sum_to_one(seed, n_train, power, data):
    rng = np.random.default_rng(seed)
    n_donors = data.draw(st.integers(1, n_train))
    ids = [f"g{i}" for i in range(n_train)]
    X = pd.DataFrame(
        {
            "aridity": rng.normal(size=n_train),
            "centroid_lon": rng.uniform(0, 3, n_train),
            "centroid_lat": rng.uniform(40, 42, n_train),
        },
        index=ids,
    )
    # rounding creates ties and zero distances on purpose
    X = X.round(1)
    X["aridity"] += np.arange(n_train) * 1e-3  # never constant
    y = pd.DataFrame({"k_per_day": rng.uniform(0.01, 1.0, n_train)}, index=ids)
    targets = pd.DataFrame(
        {
            "aridity": rng.normal(size=6).round(1),
            "centroid_lon": rng.uniform(0, 3, 6).round(1),
            "centroid_lat": rng.uniform(40, 42, 6).round(1),
        },
        index=[f"t{i}" for i in range(6)],
    )
    for est in (
        SimilarityTransfer(attributes=["aridity"], n_donors=n_donors, power=power),
        ProximityTransfer(n_donors=n_donors, power=power),
    ):
        sets = est.fit(X, y).donate(targets).sets
        assert (sets["weight"] >= 0).all()
        np.testing.assert_allclose(sets.groupby("target_id")["weight"].sum(), 1.0, rtol=1e-12)
        assert (sets.groupby("target_id").size() == n_donors).all()
        assert (
            sets.groupby("target_id")["distance"].apply(lambda d: d.is_monotonic_increasing).all()
        )


def test_inverse_distance_weights_formula():
    weights = inverse_distance_weights(np.array([[1.0, 2.0, 4.0]]), 2.0)
    np.testing.assert_allclose(weights, [[16 / 21, 4 / 21, 1 / 21]])  # 1/d^2 normalised


def test_too_few_training_basins_for_donors(region):
    X, y = region
    with pytest.raises(InputError, match="similarity transfer: 6 donors requested but only 5"):
        SimilarityTransfer(n_donors=6).fit(X.iloc[:5], y.iloc[:5])
    with pytest.raises(InputError, match="proximity transfer: 9 donors requested but only 3"):
        ProximityTransfer(n_donors=9).fit(X.iloc[:3], y.iloc[:3])


def test_missing_attribute_at_target(region):
    X, y = region
    est = SimilarityTransfer(attributes=ATTRS).fit(X.iloc[:18], y.iloc[:18])
    targets = X.iloc[18:].copy()
    targets.loc["basin_019", "forest_frac"] = np.nan
    with pytest.raises(InputError, match="similarity.*'forest_frac'.*'basin_019'"):
        est.donate(targets)
    prox = ProximityTransfer().fit(X.iloc[:18], y.iloc[:18])
    with pytest.raises(InputError, match="proximity.*lacks attribute.*'centroid_lat'"):
        prox.donate(targets.drop(columns="centroid_lat"))


def test_constant_attribute_dropped_with_warning(region):
    X, y = region
    X = X.assign(snow_frac=0.0)
    with pytest.warns(InputWarning, match="similarity.*constant.*'snow_frac'") as record:
        est = SimilarityTransfer(attributes=[*ATTRS, "snow_frac"]).fit(X, y)
    assert record[0].filename == __file__  # the warning points at the caller's line
    assert est.attributes_ == ATTRS
    with pytest.raises(InputError, match="similarity.*every attribute is constant"):
        with pytest.warns(InputWarning, match="snow_frac"):
            SimilarityTransfer(attributes=["snow_frac"]).fit(X, y)


def test_bad_settings_and_coordinates_rejected(region):
    X, y = region
    with pytest.raises(InputError, match="similarity.*combine must be one of"):
        SimilarityTransfer(combine="mean").fit(X, y)
    with pytest.raises(InputError, match="proximity.*power must be >= 0"):
        ProximityTransfer(power=-1.0).fit(X, y)
    with pytest.raises(InputError, match="similarity.*n_donors must be a whole number"):
        SimilarityTransfer(n_donors=2.5).fit(X, y)
    projected = X.assign(centroid_lat=X["centroid_lat"] * 1e5)
    with pytest.raises(InputError, match="proximity.*centroid_lat.*'basin_000'.*degrees"):
        ProximityTransfer().fit(projected, y)


def test_estimator_contract(region):
    X, y = region
    est = SimilarityTransfer(attributes=ATTRS, n_donors=3, power=2.0, combine="parameter")
    assert est.get_params()["power"] == 2.0
    assert est.fit(X, y) is est
    assert not hasattr(clone(est), "coordinates_")
    donation = est.donate(X.iloc[:2])
    assert donation.combine == "parameter" and donation.distance_unit == "standardised"
    assert list(donation.sets.columns) == [
        "target_id",
        "donor_id",
        "rank",
        "distance",
        "weight",
        "k_per_day",
    ]
    with pytest.raises(NotFittedError, match="not fitted"):
        ProximityTransfer().donate(X)


def test_weights_do_not_overflow_for_tiny_distances():
    weights = inverse_distance_weights(np.array([[1e-200, 2e-200, 1.0]]), 4.0)
    np.testing.assert_allclose(weights, [[16 / 17, 1 / 17, 0.0]], atol=1e-300)
    assert np.isfinite(weights).all()


@pytest.mark.parametrize("make", [SimilarityTransfer, ProximityTransfer])
def test_donor_search_by_blocks_of_targets_gives_the_same_donors(region, make, monkeypatch):
    # two routes to one table: the nearest donors of all targets searched in one block, and
    # one or two targets at a time (a large region's way): the same donors, distances and
    # weights to the last digit
    X, y = region
    train, targets = X.iloc[:15], X.iloc[15:]
    estimator = make(n_donors=4).fit(train, y.iloc[:15])
    at_once = estimator.donate(targets).sets
    for targets_per_block in (1, 2):
        cells = 4 * len(train) * targets_per_block
        monkeypatch.setattr("regional.transfer.donors.SEARCH_BLOCK_CELLS", cells)
        pd.testing.assert_frame_equal(estimator.donate(targets).sets, at_once, check_exact=True)
