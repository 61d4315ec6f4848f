"""Calibration recovers known storage constants from synthetic flow."""

import numpy as np
import pandas as pd
import pytest

import regional
from regional.calibrate import calibrate, scoring_window
from regional.errors import InputError

DATES = pd.date_range("2000-01-01", periods=6 * 365)
TRUE_K = np.array([0.015, 0.07, 0.3, 1.1])
IDS = ["b1", "b2", "b3", "b4"]


def _synthetic(noise: float = 0.0, seed: int = 0):
    rng = np.random.default_rng(seed)
    days = len(DATES)
    season = 1.5 + 1.2 * np.sin(2 * np.pi * np.arange(days) / 365.25)
    precip = pd.DataFrame(rng.gamma(0.5, 6.0, (days, 4)), DATES, IDS)
    pet = pd.DataFrame(np.tile(season[:, None], 4), DATES, IDS)
    flow = regional.simulate("linear", precip.values, pet.values, {"k_per_day": TRUE_K}).flow
    if noise:
        flow = flow * rng.lognormal(-0.5 * noise**2, noise, flow.shape)
    return precip, pet, pd.DataFrame(flow, DATES, IDS)


@pytest.mark.parametrize("objective", ["kge", "nse", "log_nse"])
def test_recovers_known_k_from_noise_free_flow(objective):
    precip, pet, flow = _synthetic()
    table = calibrate(
        precip,
        pet,
        flow,
        objective=objective,
        calibration=("2001-01-01", "2003-12-31"),
        validation=("2004-01-01", "2005-12-31"),
    )
    np.testing.assert_allclose(table["k_per_day"].to_numpy(), TRUE_K, rtol=1e-3)
    assert (table["score_calibration"] > 0.999).all()
    assert (table["score_validation"] > 0.999).all()
    assert (table["objective"] == objective).all()


def test_recovers_known_k_within_five_percent_with_ten_percent_noise():
    # NSE (least squares) is the objective here: KGE's alpha term matches the variance that the
    # independent noise adds to the observations and so drifts towards flashier stores.
    precip, pet, flow = _synthetic(noise=0.1, seed=4)
    table = calibrate(precip, pet, flow, objective="nse", calibration=("2001-01-01", "2005-12-31"))
    np.testing.assert_allclose(table["k_per_day"].to_numpy(), TRUE_K, rtol=0.05)


def test_table_columns_and_day_counts():
    precip, pet, flow = _synthetic()
    flow.iloc[400:410, 0] = np.nan
    table = calibrate(
        precip,
        pet,
        flow,
        calibration=("2001-01-01", "2003-12-31"),
        validation=("2004-01-01", "2005-12-31"),
    )
    assert table.index.name == "basin_id"
    assert list(table.index) == IDS
    expected = {
        "k_per_day",
        "objective",
        "score_calibration",
        "score_validation",
        "n_days_calibration",
        "n_days_validation",
    }
    assert expected <= set(table.columns)
    calibration_days = ((DATES >= "2001-01-01") & (DATES <= "2003-12-31")).sum()
    assert table.loc["b2", "n_days_calibration"] == calibration_days
    assert table.loc["b1", "n_days_calibration"] == calibration_days - 10


def test_warmup_is_never_scored_even_when_record_is_short():
    window = scoring_window(DATES, ("2000-01-01", "2001-12-31"), warmup_days=365)
    assert window.start == 0
    assert window.warmup_days == 365
    assert not window.calibration[:365].any()
    assert window.calibration[365:].all()


def test_basins_without_calibration_flow_are_left_out():
    precip, pet, flow = _synthetic()
    flow["b4"] = np.nan
    table = calibrate(precip, pet, flow, calibration=("2001-01-01", "2003-12-31"))
    assert list(table.index) == IDS[:3]


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"objective": "rmse"}, "unknown objective 'rmse'"),
        ({"calibration": ("2030-01-01", "2031-01-01")}, "lies outside the record"),
        ({"calibration": ("2003-01-01", "2001-01-01")}, "starts after it ends"),
    ],
)
def test_bad_settings_raise_input_error(kwargs, match):
    precip, pet, flow = _synthetic()
    with pytest.raises(InputError, match=match):
        calibrate(precip, pet, flow, **kwargs)
