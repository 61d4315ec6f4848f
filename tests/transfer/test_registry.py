"""The registry contract: every registered transfer method, checked the same way.

In the manner of scikit-learn's estimator checks (``sklearn.utils.estimator_checks``): the
constructor stores its arguments unchanged, ``clone`` rebuilds it, an unfitted estimator
refuses to predict, ``fit`` returns the estimator and learns only attributes with a trailing
underscore without touching its inputs, and the fitted estimator donates weighted parameter
sets whose intervals hold its point estimate, on a tiny invented region.
"""

from __future__ import annotations

import inspect

import numpy as np
import pandas as pd
import pytest
from sklearn.base import BaseEstimator, clone
from sklearn.exceptions import NotFittedError

from regional.errors import InputError
from regional.transfer import (
    DONOR_METHODS,
    SHARED_SETTINGS,
    TRANSFER_METHODS,
    fit_transfer,
    make_transfer,
    method_settings,
)

SETTINGS = {
    "attributes": ["aridity", "slope_pct"],
    "n_donors": 3,
    "power": 2.0,
    "combine": "parameter",
    "level": 0.8,
}


@pytest.fixture(params=sorted(TRANSFER_METHODS))
def name(request) -> str:
    return request.param


def test_constructor_stores_its_arguments_and_clone_rebuilds_it(name):
    estimator = make_transfer(name, **SETTINGS)
    signature = inspect.signature(TRANSFER_METHODS[name].__init__).parameters
    params = estimator.get_params()
    assert set(params) == set(signature) - {"self"}
    for setting in method_settings(name):
        assert params[setting] == SETTINGS[setting], setting
    assert clone(estimator).get_params() == params
    assert not [attribute for attribute in vars(estimator) if attribute.endswith("_")]


def test_settings_come_from_the_registry(name):
    assert set(method_settings(name)) <= set(SHARED_SETTINGS)
    assert (name in DONOR_METHODS) == ("n_donors" in method_settings(name))


def test_unfitted_estimator_refuses_to_donate(name, region):
    X, _ = region
    with pytest.raises(NotFittedError, match="not fitted"):
        make_transfer(name).donate(X)


def test_fit_learns_underscore_attributes_and_leaves_inputs_alone(name, region):
    X, y = region
    before_X, before_y = X.copy(), y.copy()
    estimator = make_transfer(name, **SETTINGS)
    params = estimator.get_params()
    assert estimator.fit(X.iloc[:18], y.iloc[:18], transforms={"k_per_day": "log"}) is estimator
    learned = [a for a in vars(estimator) if a not in params and not a.startswith("_")]
    assert learned and all(attribute.endswith("_") for attribute in learned)
    assert estimator.get_params() == params
    pd.testing.assert_frame_equal(X, before_X)
    pd.testing.assert_frame_equal(y, before_y)


def test_fit_transfer_donates_weighted_sets_holding_the_estimate(name, region):
    X, y = region
    estimator = fit_transfer(
        name, X.iloc[:18], y.iloc[:18], transforms={"k_per_day": "log"}, **SETTINGS
    )
    targets = X.iloc[18:]
    donation = estimator.donate(targets)
    estimate = estimator.predict(targets)
    assert donation.method == name
    assert list(donation.targets) == list(targets.index)
    assert donation.parameters == ("k_per_day",)
    weights = donation.sets.groupby("target_id")["weight"].sum()
    np.testing.assert_allclose(weights.to_numpy(), 1.0, rtol=1e-12)
    low = donation.intervals["k_per_day_low"]
    high = donation.intervals["k_per_day_high"]
    assert ((low <= estimate["k_per_day"]) & (estimate["k_per_day"] <= high)).all()
    assert (donation.sets["k_per_day"] > 0).all()


def test_plain_class_donates_what_the_estimator_donates(name, region):
    """Prediction fits the plain class (no scikit-learn): its numbers are the estimator's."""
    X, y = region
    fits = [
        fit_transfer(
            name,
            X.iloc[:18],
            y.iloc[:18],
            transforms={"k_per_day": "log"},
            plain=plain,
            **SETTINGS,
        )
        for plain in (False, True)
    ]
    assert isinstance(fits[0], BaseEstimator) and not isinstance(fits[1], BaseEstimator)
    donations = [fit.donate(X.iloc[18:]) for fit in fits]
    pd.testing.assert_frame_equal(donations[0].sets, donations[1].sets, check_exact=True)
    pd.testing.assert_frame_equal(donations[0].intervals, donations[1].intervals, check_exact=True)
    pd.testing.assert_frame_equal(
        fits[0].predict(X.iloc[18:]), fits[1].predict(X.iloc[18:]), check_exact=True
    )


def test_unfitted_plain_class_refuses_to_donate(name, region):
    X, _ = region
    with pytest.raises(InputError, match="not fitted yet"):
        make_transfer(name, plain=True).donate(X)


@pytest.mark.parametrize("method", DONOR_METHODS)
def test_fit_transfer_caps_the_donors_at_the_training_basins(method, region):
    X, y = region
    estimator = fit_transfer(
        method, X.iloc[:2], y.iloc[:2], transforms={"k_per_day": "log"}, n_donors=9
    )
    assert estimator.n_donors == 2
    assert estimator.donate(X.iloc[2:4]).sets.groupby("target_id").size().eq(2).all()
