"""BlendedTransfer: donors ranked by attribute and geographic distance, each over its spread."""

from __future__ import annotations

import itertools
from functools import partial

import numpy as np
import pandas as pd
import pytest
from pyproj import Geod
from sklearn.base import clone
from sklearn.exceptions import NotFittedError

from regional.errors import InputError, InputWarning
from regional.transfer import (
    BlendedTransfer,
    ProximityTransfer,
    SimilarityTransfer,
    great_circle_km,
    make_transfer,
)
from regional.transfer.blended import attribute_spread, geographic_spread_km

ATTRS = ["aridity", "slope_pct", "forest_frac"]
LEADING = ["target_id", "donor_id", "rank", "weight", "k_per_day"]


def _pairs(n: int):
    return [(i, j) for i, j in itertools.product(range(n), repeat=2) if i != j]


def test_attribute_spread_is_rms_distance_between_donors(region):
    X, _ = region
    z = ((X[ATTRS] - X[ATTRS].mean()) / X[ATTRS].std(ddof=1)).to_numpy()
    # worked here: the mean over ordered pairs of distinct donors, by brute force
    squares = [np.sum((z[i] - z[j]) ** 2) for i, j in _pairs(len(z))]
    assert attribute_spread(len(ATTRS)) == pytest.approx(np.sqrt(np.mean(squares)), rel=1e-12)


def test_geographic_spread_is_rms_chord_and_close_to_rms_geodesic(region):
    X, _ = region
    points = X[["centroid_lon", "centroid_lat"]].to_numpy()
    lon, lat = np.radians(points[:, 0]), np.radians(points[:, 1])
    unit = np.column_stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
    chords = [np.sum((unit[i] - unit[j]) ** 2) for i, j in _pairs(len(unit))]
    spread = geographic_spread_km(points)
    assert spread == pytest.approx(6371.0088 * np.sqrt(np.mean(chords)), rel=1e-10)
    # reference: pyproj's WGS84 geodesic between every pair (Karney 2013); chord and arc differ
    # by under 0.1 % at these few hundred km, the sphere from the ellipsoid by under 0.5 %
    geod = Geod(ellps="WGS84")
    i, j = np.array(_pairs(len(points))).T
    _, _, metres = geod.inv(points[i, 0], points[i, 1], points[j, 0], points[j, 1])
    assert spread == pytest.approx(np.sqrt(np.mean((metres / 1000.0) ** 2)), rel=6e-3)


def test_blended_distance_by_hand(region):
    X, y = region
    train, targets = X.iloc[:18], X.iloc[18:]
    est = BlendedTransfer(attributes=ATTRS, n_donors=18, attribute_share=0.3).fit(
        train, y.iloc[:18]
    )
    # worked here: the formula of the module docstring, term by term
    mean, std = train[ATTRS].mean(), train[ATTRS].std(ddof=1)
    z_targets, z_train = ((f[ATTRS] - mean) / std for f in (targets, train))
    attr = np.sqrt(((z_targets.to_numpy()[:, None] - z_train.to_numpy()[None]) ** 2).sum(-1))
    geo = great_circle_km(
        targets["centroid_lon"].to_numpy()[:, None],
        targets["centroid_lat"].to_numpy()[:, None],
        train["centroid_lon"].to_numpy()[None],
        train["centroid_lat"].to_numpy()[None],
    )
    spread_km = geographic_spread_km(train[["centroid_lon", "centroid_lat"]].to_numpy())
    expected = 0.3 * attr / np.sqrt(6.0) + 0.7 * geo / spread_km
    sets = est.donate(targets).sets
    got = sets.pivot(index="target_id", columns="donor_id", values="distance")
    np.testing.assert_allclose(got.loc[targets.index, train.index], expected, rtol=1e-12)
    assert est.geographic_spread_km_ == pytest.approx(spread_km)
    assert est.donate(targets).distance_unit == "blended"


@pytest.mark.parametrize(
    ("share", "reference"),
    [
        (1.0, lambda k: SimilarityTransfer(attributes=ATTRS, n_donors=k, power=2.0)),
        (0.0, lambda k: ProximityTransfer(n_donors=k, power=2.0)),
    ],
)
def test_end_shares_give_similarity_and_proximity(region, share, reference):
    X, y = region
    train, targets = X.iloc[:18], X.iloc[18:]
    blended = BlendedTransfer(attributes=ATTRS, n_donors=4, power=2.0, attribute_share=share)
    got = blended.fit(train, y.iloc[:18]).donate(targets)
    want = reference(4).fit(train, y.iloc[:18]).donate(targets)
    # dividing every distance by one spread changes neither the ranking nor the weights
    pd.testing.assert_frame_equal(got.sets[LEADING], want.sets[LEADING], rtol=1e-12)
    pd.testing.assert_frame_equal(got.intervals, want.intervals)
    scaled = want.sets["distance"] / (
        blended.attribute_spread_ if share == 1.0 else blended.geographic_spread_km_
    )
    np.testing.assert_allclose(got.sets["distance"], scaled, rtol=1e-12)


def test_half_share_mixes_both_rankings(region):
    X, y = region
    train, targets = X.iloc[:18], X.iloc[18:]
    kwargs = {"n_donors": 3}
    mixed = BlendedTransfer(attributes=ATTRS, **kwargs).fit(train, y.iloc[:18]).donate(targets)
    similar = SimilarityTransfer(attributes=ATTRS, **kwargs).fit(train, y.iloc[:18])
    near = ProximityTransfer(**kwargs).fit(train, y.iloc[:18])
    donors = set(mixed.sets["donor_id"])
    assert donors != set(similar.donate(targets).sets["donor_id"])
    assert donors != set(near.donate(targets).sets["donor_id"])


@pytest.mark.parametrize("share", [0.0, 0.5, 1.0])
def test_left_out_basin_never_influences_what_it_gets(region, share):
    X, y = region
    rng = np.random.default_rng(5)
    make = partial(BlendedTransfer, attributes=ATTRS, n_donors=4, attribute_share=share)
    for i in (0, 7, 23):
        target = X.iloc[[i]]
        train_X, train_y = X.drop(index=X.index[i]), y.drop(index=y.index[i])
        first = make().fit(train_X, train_y).donate(target)
        order = rng.permutation(len(train_X))
        second = make().fit(train_X.iloc[order], train_y.iloc[order[::-1]]).donate(target)
        pd.testing.assert_frame_equal(first.sets, second.sets)
        pd.testing.assert_frame_equal(first.intervals, second.intervals)
        assert X.index[i] not in set(first.sets["donor_id"])
        # moving the left-out basin cannot change what the others were fitted on
        moved = target.assign(centroid_lon=target["centroid_lon"] + 1.0, aridity=9.0)
        third = make().fit(train_X, train_y)
        third.donate(moved)
        assert third.geographic_spread_km_ == make().fit(train_X, train_y).geographic_spread_km_


def test_default_attributes_leave_out_the_locations(region):
    X, y = region
    est = BlendedTransfer().fit(X, y)
    assert est.attributes_ == ["aridity", "area_km2", "slope_pct", "forest_frac"]
    assert est.coordinates_.shape == (len(X), 6)


def test_estimator_contract(region):
    X, y = region
    est = BlendedTransfer(attributes=ATTRS, n_donors=3, combine="parameter", attribute_share=0.2)
    assert est.get_params()["attribute_share"] == 0.2
    assert est.fit(X, y) is est
    assert not hasattr(clone(est), "coordinates_")
    donation = est.donate(X.iloc[:2])
    assert donation.method == "blended" and donation.combine == "parameter"
    columns = ["target_id", "donor_id", "rank", "distance", "weight", "k_per_day"]
    assert list(donation.sets.columns) == columns
    predicted = est.predict(X.iloc[:2])
    low, high = donation.intervals["k_per_day_low"], donation.intervals["k_per_day_high"]
    assert ((low <= predicted["k_per_day"]) & (predicted["k_per_day"] <= high)).all()
    with pytest.raises(NotFittedError, match="not fitted"):
        BlendedTransfer().donate(X)


def test_make_transfer_builds_it_with_the_shared_settings():
    est = make_transfer(
        "blended", attributes=["aridity"], n_donors=3, power=2.0, combine="parameter"
    )
    assert isinstance(est, BlendedTransfer)
    assert (est.attributes, est.n_donors, est.power, est.combine) == (
        ["aridity"],
        3,
        2.0,
        "parameter",
    )


def test_bad_input_named(region):
    X, y = region
    with pytest.raises(InputError, match=r"blended transfer: attribute_share must be .*\[0, 1\]"):
        BlendedTransfer(attribute_share=1.5).fit(X, y)
    with pytest.raises(InputError, match="blended transfer: 30 donors requested but only 24"):
        BlendedTransfer(n_donors=30).fit(X, y)
    with pytest.raises(InputError, match="blended.*centroid_lat.*'basin_000'.*degrees"):
        BlendedTransfer().fit(X.assign(centroid_lat=X["centroid_lat"] * 1e5), y)
    with pytest.raises(InputError, match="blended.*lacks attribute.*'centroid_lon'"):
        BlendedTransfer().fit(X.drop(columns="centroid_lon"), y)
    with pytest.raises(InputError, match="blended.*same centroid.*distinct locations"):
        BlendedTransfer().fit(X.assign(centroid_lon=7.0, centroid_lat=46.0), y)
    with pytest.raises(InputError, match="blended.*at least 2 training basins"):
        BlendedTransfer(n_donors=1).fit(X.iloc[:1], y.iloc[:1])
    est = BlendedTransfer(attributes=ATTRS).fit(X.iloc[:18], y.iloc[:18])
    targets = X.iloc[18:].copy()
    targets.loc["basin_020", "slope_pct"] = np.nan
    with pytest.raises(InputError, match="blended.*'slope_pct'.*'basin_020'"):
        est.donate(targets)
    with pytest.warns(InputWarning, match="blended.*constant.*'snow_frac'"):
        BlendedTransfer(attributes=[*ATTRS, "snow_frac"]).fit(X.assign(snow_frac=0.0), y)
