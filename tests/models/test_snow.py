"""Degree-day snow store in front of the linear reservoir."""

import numpy as np
import pytest

import regional


def test_no_flow_from_precipitation_while_every_day_is_below_threshold():
    days = 90
    precip = np.full(days, 5.0)
    result = regional.simulate(
        "linear",
        precip,
        np.zeros(days),
        {"k_per_day": 0.2},
        temp=np.full(days, -5.0),
        initial_storage=0.0,
    )
    assert (result.flow == 0).all()
    assert result.snowpack[-1, 0] == pytest.approx(5.0 * days)


def test_melt_follows_degree_day_factor_and_is_limited_by_the_pack():
    # Degree-day method (Martinec 1960): melt = factor x (T - T_melt), at most the pack.
    temp = np.array([-5.0, -5.0, 2.0, 10.0, 10.0])
    precip = np.array([10.0, 10.0, 0.0, 0.0, 0.0])
    params = {"k_per_day": 0.1, "melt_factor_mm_per_degc_day": 3.0, "melt_threshold_c": 0.0}
    result = regional.simulate("linear", precip, np.zeros(5), params, temp=temp)
    np.testing.assert_allclose(result.melt[:, 0], [0.0, 0.0, 6.0, 14.0, 0.0])
    np.testing.assert_allclose(result.snowpack[:, 0], [10.0, 20.0, 14.0, 0.0, 0.0])


def test_snow_parameters_need_temperature():
    with pytest.raises(ValueError, match="snow parameters need temp"):
        regional.simulate("linear", [1.0], [0.0], {"k_per_day": 0.1, "melt_threshold_c": 0.0})


def test_shared_snow_input_equals_one_column_per_set():
    # Two routes: sets sharing their snow parameters take the snow store once; sets given
    # per-column forcing run it once per column. Both give the same pack and (to round-off:
    # the kernels' shared-column path sums in another order) the same flows.
    rng = np.random.default_rng(3)
    days = 400
    precip, pet = rng.gamma(0.5, 8.0, days), np.full(days, 1.5)
    temp = 8.0 * np.sin(2 * np.pi * np.arange(days) / 365.25) + rng.normal(0, 2, days)
    params = {"k_per_day": np.array([0.05, 0.2, 0.6]), "melt_factor_mm_per_degc_day": 2.0}
    shared = regional.simulate("linear", precip, pet, params, temp=temp)
    tiled = regional.simulate(
        "linear",
        np.tile(precip[:, None], 3),
        np.tile(pet[:, None], 3),
        params,
        temp=np.tile(temp[:, None], 3),
    )
    np.testing.assert_allclose(shared.flow, tiled.flow, rtol=1e-12)
    np.testing.assert_array_equal(shared.snowpack, tiled.snowpack)
    np.testing.assert_array_equal(shared.melt, tiled.melt)
