"""Metrics against reference libraries and a hand-worked example."""

import numpy as np
import pytest
from scipy.stats import pearsonr
from sklearn.metrics import r2_score

from regional import metrics

OBS = np.array([1.0, 2.0, 3.0, 4.0])
SIM = np.array([1.5, 2.0, 2.5, 5.0])


def test_nse_equals_sklearn_r2_score():
    # Nash and Sutcliffe (1970): NSE is the coefficient of determination of sim against obs,
    # reference: sklearn.metrics.r2_score(obs, sim).
    rng = np.random.default_rng(0)
    obs = rng.gamma(1.0, 2.0, 500)
    sim = obs * rng.lognormal(0, 0.3, 500)
    assert metrics.nse(obs, sim) == pytest.approx(r2_score(obs, sim), rel=1e-12)


def test_kge_parts_against_numpy_and_scipy_pearsonr():
    # Gupta et al. (2009): r = Pearson correlation (reference: scipy.stats.pearsonr),
    # alpha = std(sim)/std(obs), beta = mean(sim)/mean(obs) (numpy).
    rng = np.random.default_rng(1)
    obs = rng.gamma(1.0, 2.0, 400)
    sim = 0.8 * obs + rng.normal(0, 0.5, 400) + 0.3
    parts = metrics.kge_parts(obs, sim)
    assert parts.r == pytest.approx(pearsonr(obs, sim).statistic, rel=1e-12)
    assert parts.alpha == pytest.approx(np.std(sim) / np.std(obs), rel=1e-12)
    assert parts.beta == pytest.approx(np.mean(sim) / np.mean(obs), rel=1e-12)
    expected = 1 - np.sqrt((parts.r - 1) ** 2 + (parts.alpha - 1) ** 2 + (parts.beta - 1) ** 2)
    assert parts.kge == pytest.approx(expected, rel=1e-12)


def test_kge_hand_worked_example():
    # Worked by hand with the Gupta et al. (2009) definitions: mean obs 2.5, mean sim 2.75 so
    # beta = 1.1; sum of squared deviations obs 5.0, sim 7.25 so alpha = sqrt(1.45);
    # cross-products 5.5 so r = 5.5 / sqrt(5.0 * 7.25).
    r = 5.5 / np.sqrt(5.0 * 7.25)
    alpha = np.sqrt(1.45)
    expected = 1 - np.sqrt((r - 1) ** 2 + (alpha - 1) ** 2 + 0.1**2)
    parts = metrics.kge_parts(OBS, SIM)
    assert (parts.r, parts.alpha, parts.beta) == pytest.approx((r, alpha, 1.1), rel=1e-12)
    assert parts.kge == pytest.approx(expected, rel=1e-12)


def test_nse_hand_worked_example():
    # Hand-worked: squared errors 0.25 + 0 + 0.25 + 1 = 1.5; variance sum 5.0; NSE = 0.7.
    assert metrics.nse(OBS, SIM) == pytest.approx(0.7)


def test_log_nse_uses_one_hundredth_of_mean_flow():
    # Pushpalatha et al. (2012): log-NSE on log(Q + mean(Qobs)/100).
    c = OBS.mean() / 100
    expected = r2_score(np.log(OBS + c), np.log(SIM + c))  # reference: sklearn r2_score
    assert metrics.log_nse(OBS, SIM) == pytest.approx(expected, rel=1e-12)


def test_pbias_is_percent_of_observed_volume():
    assert metrics.pbias(OBS, SIM) == pytest.approx(100 * (11.0 - 10.0) / 10.0)


def test_missing_observations_are_masked():
    obs = np.array([1.0, np.nan, 2.0, 3.0, 4.0])
    sim = np.array([1.5, 99.0, 2.0, 2.5, 5.0])
    assert metrics.nse(obs, sim) == pytest.approx(0.7)
    assert metrics.kge(obs, sim) == pytest.approx(metrics.kge(OBS, SIM))
    assert metrics.all_scores(obs, sim)["n_days"] == 4


def test_constant_observations_give_nan_with_a_warning():
    with pytest.warns(metrics.DegenerateSeriesWarning, match="constant observed flow"):
        assert np.isnan(metrics.nse(np.ones(10), np.arange(10.0)))
    with pytest.warns(metrics.DegenerateSeriesWarning, match="constant observed flow"):
        assert np.isnan(metrics.kge(np.ones(10), np.arange(10.0)))


def test_columns_are_scored_independently():
    sims = np.column_stack([SIM, OBS, OBS * 2])
    scores = metrics.nse(OBS, sims)
    assert scores.shape == (3,)
    assert scores[0] == pytest.approx(0.7)
    assert scores[1] == pytest.approx(1.0)
    np.testing.assert_allclose(metrics.kge(OBS, sims)[2], 1 - np.sqrt(2.0))


def test_length_mismatch_is_an_error():
    with pytest.raises(ValueError, match="differ in length"):
        metrics.nse(OBS, SIM[:3])


@pytest.mark.parametrize("objective", ["nse", "kge", "log_nse", "nse_blend"])
def test_prepared_objective_equals_the_metric(objective):
    # Two routes to one number: the scorer prepared once for a search, and the metric itself,
    # on series with missing days, one sim per column and several sims per observed series.
    rng = np.random.default_rng(8)
    obs = rng.gamma(0.8, 2.0, (120, 3))
    obs[rng.random(obs.shape) < 0.1] = np.nan
    sim = rng.gamma(0.8, 2.0, (120, 5))
    columns = np.array([0, 2, 1, 2, 0])
    score = metrics.objective_scorer(objective, obs)
    expected = [metrics.OBJECTIVES[objective](obs[:, c], sim[:, i]) for i, c in enumerate(columns)]
    np.testing.assert_allclose(score(sim, columns), expected, rtol=1e-12)
    one = metrics.objective_scorer(objective, obs[:, 1])
    np.testing.assert_allclose(
        one(sim), [metrics.OBJECTIVES[objective](obs[:, 1], sim[:, i]) for i in range(5)]
    )


def test_prepared_objective_is_nan_for_a_constant_series():
    obs = np.column_stack([np.full(10, 2.0), np.arange(10.0)])
    score = metrics.objective_scorer("nse", obs)(np.ones((10, 2)), np.array([0, 1]))
    assert np.isnan(score[0]) and np.isfinite(score[1])


def test_nse_blend_on_a_hand_worked_series():
    # Worked here: obs 1, 4, 9, 16 and sim 1, 4, 9, 9.
    # Flow: mean 7.5, sum of squares about it 129, squared error 49 -> NSE = 80/129.
    # Square roots: obs 1, 2, 3, 4 (mean 2.5, sum of squares 5), sim 1, 2, 3, 3 (error 1)
    # -> NSE = 0.8. Blend: (80/129 + 0.8) / 2 = 0.7100775...
    obs, sim = np.array([1.0, 4.0, 9.0, 16.0]), np.array([1.0, 4.0, 9.0, 9.0])
    assert metrics.nse_blend(obs, sim) == pytest.approx((80 / 129 + 0.8) / 2, rel=1e-12)
    assert metrics.nse_blend(obs, obs) == 1.0
    prepared = metrics.objective_scorer("nse_blend", obs)(sim[:, None])
    assert prepared[0] == pytest.approx(0.71007751938, rel=1e-10)
