"""MedianTransfer: the regional median parameter set, the benchmark every method must beat."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.exceptions import NotFittedError

from regional.errors import InputError
from regional.transfer import MedianTransfer


def test_median_of_an_odd_count_is_the_plain_median(region):
    X, y = region
    train_X, train_y = X.iloc[:15], y.iloc[:15]
    est = MedianTransfer().fit(train_X, train_y)
    predicted = est.predict(X.iloc[15:])
    # reference: numpy.median (odd count: the middle value, in any monotone transform)
    np.testing.assert_allclose(predicted["k_per_day"], np.median(train_y["k_per_day"]))
    assert list(predicted.index) == list(X.index[15:])


def test_median_of_an_even_count_is_taken_in_log_space(region):
    X, y = region
    est = MedianTransfer().fit(X.iloc[:4], y.iloc[:4])
    middle = np.sort(y["k_per_day"].iloc[:4].to_numpy())[1:3]
    # two middle values averaged in log space: their geometric mean (documented choice)
    assert est.median_["k_per_day"] == pytest.approx(np.sqrt(middle[0] * middle[1]), rel=1e-12)
    identity = MedianTransfer().fit(X.iloc[:4], y.iloc[:4], transforms={"k_per_day": "identity"})
    assert identity.median_["k_per_day"] == pytest.approx(middle.mean(), rel=1e-12)


def test_donation_and_interval(region):
    X, y = region
    est = MedianTransfer(level=0.8).fit(X, y)
    donation = est.donate(X.iloc[:3])
    assert (donation.sets["donor_id"] == "<median>").all()
    assert (donation.sets["weight"] == 1.0).all()
    # reference: numpy.quantile, linear interpolation (Hyndman and Fan 1996, definition 7);
    # quantiles commute with the monotone log transform up to the interpolation
    low, high = np.exp(np.quantile(np.log(y["k_per_day"]), [0.1, 0.9]))
    np.testing.assert_allclose(donation.intervals["k_per_day_low"], low)
    np.testing.assert_allclose(donation.intervals["k_per_day_high"], high)
    assert donation.level == 0.8


def test_several_parameters(region):
    X, y = region
    params = y.assign(x2_mm_per_day=np.linspace(-1.0, 1.0, len(y)))
    est = MedianTransfer().fit(X, params, transforms={"x2_mm_per_day": "identity"})
    assert est.predict(X.iloc[:1])["x2_mm_per_day"].iloc[0] == pytest.approx(0.0, abs=1e-12)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.floats(1e-3, 2.0), min_size=1, max_size=30), st.randoms(use_true_random=False))
def test_row_order_never_matters(values, random):
    ids = [f"g{i}" for i in range(len(values))]
    X = pd.DataFrame({"aridity": np.arange(len(values), dtype=float)}, index=ids)
    y = pd.DataFrame({"k_per_day": values}, index=ids)
    order = list(range(len(values)))
    random.shuffle(order)
    first = MedianTransfer().fit(X, y).predict(X.iloc[:1])
    second = MedianTransfer().fit(X.iloc[order], y.iloc[order]).predict(X.iloc[:1])
    pd.testing.assert_frame_equal(first, second)
    assert min(values) <= first["k_per_day"].iloc[0] <= max(values)


def test_bad_inputs(region):
    X, y = region
    with pytest.raises(InputError, match="median.*same basins"):
        MedianTransfer().fit(X.iloc[:3], y)
    with pytest.raises(InputError, match="median.*level must be"):
        MedianTransfer(level=0.0).fit(X, y)
    with pytest.raises(InputError, match="median.*must be a pandas DataFrame"):
        MedianTransfer().fit(X.to_numpy(), y)
    with pytest.raises(NotFittedError, match="not fitted"):
        MedianTransfer().predict(X)
