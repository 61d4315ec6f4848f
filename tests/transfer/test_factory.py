"""make_transfer and TRANSFER_METHODS: build estimators (or their plain classes) by method name."""

from __future__ import annotations

import pytest

from regional import config
from regional.errors import InputError
from regional.transfer import (
    TRANSFER_METHODS,
    BlendedFit,
    BlendedTransfer,
    MedianFit,
    MedianTransfer,
    ProximityFit,
    ProximityTransfer,
    RegressionFit,
    RegressionTransfer,
    SimilarityFit,
    SimilarityTransfer,
    estimator_class,
    make_transfer,
)


def test_registry_names_the_five_methods_and_their_estimators():
    assert TRANSFER_METHODS == {
        "regression": RegressionFit,
        "similarity": SimilarityFit,
        "proximity": ProximityFit,
        "blended": BlendedFit,
        "median": MedianFit,
    }
    estimators = {name: estimator_class(name) for name in TRANSFER_METHODS}
    assert estimators == {
        "regression": RegressionTransfer,
        "similarity": SimilarityTransfer,
        "proximity": ProximityTransfer,
        "blended": BlendedTransfer,
        "median": MedianTransfer,
    }
    assert all(issubclass(estimators[name], TRANSFER_METHODS[name]) for name in estimators)


def test_config_allows_every_registered_method():
    assert set(config.TRANSFER_METHODS) == set(TRANSFER_METHODS)


def test_make_transfer_passes_the_settings_that_apply():
    similarity = make_transfer(
        "similarity", attributes=["aridity"], n_donors=3, power=2.0, combine="parameter"
    )
    assert similarity.get_params() == {
        "attributes": ["aridity"],
        "n_donors": 3,
        "power": 2.0,
        "combine": "parameter",
    }
    proximity = make_transfer("proximity", attributes=["aridity"], n_donors=2)
    assert proximity.get_params()["n_donors"] == 2
    regression = make_transfer("regression", attributes=["aridity"], level=0.8)
    assert (regression.attributes, regression.level) == (["aridity"], 0.8)
    median = make_transfer("median", n_donors=9, level=0.5)
    assert isinstance(median, MedianTransfer) and median.level == 0.5


@pytest.mark.parametrize("name", sorted(TRANSFER_METHODS))
def test_every_method_fits_donates_and_predicts(region, name):
    X, y = region
    est = make_transfer(name, attributes=["aridity", "slope_pct"], n_donors=3)
    donation = est.fit(X.iloc[:20], y.iloc[:20]).donate(X.iloc[20:])
    predicted = est.predict(X.iloc[20:])
    assert donation.method == name
    assert list(donation.intervals.index) == list(X.index[20:])
    assert list(predicted.index) == list(X.index[20:])
    low, high = donation.intervals["k_per_day_low"], donation.intervals["k_per_day_high"]
    assert (low <= predicted["k_per_day"]).all() and (predicted["k_per_day"] <= high).all()
    assert donation.sets.groupby("target_id")["weight"].sum().round(12).eq(1.0).all()


def test_unknown_method_suggests_the_closest():
    with pytest.raises(InputError, match="unknown transfer method 'proximty'.*'proximity'"):
        make_transfer("proximty")
