"""Donor combination: output averaging and parameter averaging into one flow series."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

import regional
from regional.errors import InputError
from regional.transfer import (
    MedianTransfer,
    RegressionTransfer,
    SimilarityTransfer,
    average_parameters,
    simulate_donors,
)


@dataclass
class _FakeResult:
    flow: np.ndarray


class _FakeSimulate:
    """Stands in for regional.simulate: flow_t = k * precip_t + pet_t^2 * k^2, shaped (T, n)."""

    def __init__(self) -> None:
        self.calls: list[dict] = []

    def __call__(self, model, precip, pet, params, *, temp, initial_storage, warmup_days):
        self.calls.append({"model": model, "params": params, "warmup_days": warmup_days})
        k = np.atleast_1d(params["k_per_day"])
        return _FakeResult(flow=precip[:, None] * k + (pet[:, None] * k) ** 2)


@pytest.fixture
def forcing():
    rng = np.random.default_rng(2)
    days = 400
    precip = rng.gamma(0.6, 6.0, days)
    pet = 2.0 + 1.5 * np.sin(np.arange(days) * 2 * np.pi / 365.25)
    return precip, pet


@pytest.fixture
def donation(region):
    X, y = region
    est = SimilarityTransfer(attributes=["aridity", "slope_pct"], n_donors=4)
    return est.fit(X.iloc[:20], y.iloc[:20]).donate(X.iloc[20:])


def test_output_averaging_is_weighted_mean_of_member_flows(donation, forcing):
    precip, pet = forcing
    fake = _FakeSimulate()
    result = simulate_donors(donation, "basin_021", precip=precip, pet=pet, simulate=fake)
    assert len(fake.calls) == 1  # all donors of the target in one vectorised call
    assert fake.calls[0]["params"]["k_per_day"].shape == (4,)
    rows = donation.for_target("basin_021")
    expected = sum(
        w * (precip * k + (pet * k) ** 2)
        for w, k in zip(rows["weight"], rows["k_per_day"], strict=True)
    )
    np.testing.assert_allclose(result.flow, expected, rtol=1e-12)
    assert result.members.shape == (len(precip), 4)
    assert result.donor_ids == tuple(rows["donor_id"])
    assert result.combine == "output"


def test_parameter_averaging_simulates_once_with_weighted_geometric_mean(donation, forcing):
    precip, pet = forcing
    fake = _FakeSimulate()
    flow = simulate_donors(
        donation, "basin_020", precip=precip, pet=pet, combine="parameter", simulate=fake
    ).flow
    rows = donation.for_target("basin_020")
    k = np.exp(np.sum(rows["weight"] * np.log(rows["k_per_day"])))  # log transform of k_per_day
    np.testing.assert_allclose(fake.calls[0]["params"]["k_per_day"], [k], rtol=1e-12)
    np.testing.assert_allclose(flow, precip * k + (pet * k) ** 2, rtol=1e-12)


def test_average_parameters_identity_transform():
    sets = pd.DataFrame({"weight": [0.25, 0.75], "x3_mm": [10.0, 30.0], "k_per_day": [0.1, 0.4]})
    averaged = average_parameters(
        sets, {"x3_mm": "identity", "k_per_day": "log"}, parameters=("x3_mm", "k_per_day")
    )
    assert averaged["x3_mm"] == pytest.approx(25.0)
    assert averaged["k_per_day"] == pytest.approx(0.1**0.25 * 0.4**0.75)


def test_combine_defaults_to_the_donation_setting(region, forcing):
    X, y = region
    precip, pet = forcing
    est = SimilarityTransfer(attributes=["aridity"], n_donors=3, combine="parameter")
    donation = est.fit(X.iloc[:20], y.iloc[:20]).donate(X.iloc[[20]])
    fake = _FakeSimulate()
    result = simulate_donors(donation, precip=precip, pet=pet, simulate=fake)
    assert result.combine == "parameter" and result.members is None
    assert fake.calls[0]["params"]["k_per_day"].shape == (1,)


def test_target_must_be_named_and_known(donation, forcing):
    precip, pet = forcing
    with pytest.raises(InputError, match="similarity donation holds 4 targets; name the one"):
        simulate_donors(donation, precip=precip, pet=pet, simulate=_FakeSimulate())
    with pytest.raises(InputError, match="similarity donation: no parameter sets.*'nowhere'"):
        simulate_donors(donation, "nowhere", precip=precip, pet=pet, simulate=_FakeSimulate())
    with pytest.raises(InputError, match="similarity transfer: combine must be one of"):
        simulate_donors(
            donation, "basin_020", precip=precip, pet=pet, combine="x", simulate=_FakeSimulate()
        )


def test_with_the_real_linear_model(donation, forcing):
    precip, pet = forcing
    result = simulate_donors(donation, "basin_022", precip=precip, pet=pet, warmup_days=100)
    rows = donation.for_target("basin_022")
    # each member equals a separate one-donor simulation (two routes to the same flows)
    for j, k in enumerate(rows["k_per_day"]):
        single = regional.simulate("linear", precip, pet, {"k_per_day": k}, warmup_days=100)
        np.testing.assert_allclose(result.members[:, j], single.flow[:, 0], rtol=1e-10)
    np.testing.assert_allclose(result.flow, result.members @ rows["weight"].to_numpy())
    averaged = simulate_donors(
        donation, "basin_022", precip=precip, pet=pet, combine="parameter", warmup_days=100
    ).flow
    k_mean = np.exp(np.sum(rows["weight"] * np.log(rows["k_per_day"])))
    single = regional.simulate("linear", precip, pet, {"k_per_day": k_mean}, warmup_days=100)
    np.testing.assert_allclose(averaged, single.flow[:, 0], rtol=1e-10)


@pytest.mark.parametrize("make", [RegressionTransfer, MedianTransfer])
def test_single_set_methods_give_the_same_flow_both_ways(region, forcing, make):
    X, y = region
    precip, pet = forcing
    donation = make().fit(X.iloc[:20], y.iloc[:20]).donate(X.iloc[[21]])
    output = simulate_donors(donation, precip=precip, pet=pet).flow
    parameter = simulate_donors(donation, precip=precip, pet=pet, combine="parameter").flow
    np.testing.assert_allclose(output, parameter, rtol=1e-12)
    assert output.shape == precip.shape


def test_zero_weight_donors_are_not_simulated(region, forcing):
    X, y = region
    precip, pet = forcing
    est = SimilarityTransfer(attributes=["aridity", "slope_pct"], n_donors=3)
    twin = X.iloc[[2]].rename(index={"basin_002": "twin"})
    donation = est.fit(X.iloc[:20], y.iloc[:20]).donate(twin)
    fake = _FakeSimulate()
    result = simulate_donors(donation, precip=precip, pet=pet, simulate=fake)
    assert result.donor_ids == ("basin_002",)
    k = y.loc["basin_002", "k_per_day"]
    np.testing.assert_allclose(result.flow, precip * k + (pet * k) ** 2, rtol=1e-12)
