"""Tests of regional.bounds: the split-conformal error model of transferred daily flows."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from regional.bounds import ResidualTails, conformal_bounds
from regional.errors import InputError
from regional.residuals import OFFSET_FRACTION


def _series_pair(residuals: dict[str, np.ndarray], sim_mm: float = 2.0):
    """Observed/simulated tables whose log residuals are exactly the given values."""
    offset = OFFSET_FRACTION * sim_mm  # constant simulated flow: c = 1% of it
    n = max(len(r) for r in residuals.values())
    obs = pd.DataFrame(np.nan, index=range(n), columns=list(residuals))
    for basin, values in residuals.items():
        obs.loc[: len(values) - 1, basin] = (sim_mm + offset) * np.exp(values) - offset
    return obs, pd.DataFrame(sim_mm, index=obs.index, columns=obs.columns)


def test_conformal_quantiles_of_normal_residuals():
    rng = np.random.default_rng(11)
    sigma = 0.4
    obs, sim = _series_pair({f"B{i}": rng.normal(0.0, sigma, 4000) for i in range(12)})
    model = conformal_bounds(obs, sim, level=0.9, n_classes=1)
    # reference: scipy.stats.norm.ppf(0.95) = 1.645 sigma for a central 90% range
    expected = stats.norm.ppf(0.95) * sigma
    assert model.upper_q[0] == pytest.approx(expected, rel=0.03)
    assert model.lower_q[0] == pytest.approx(-expected, rel=0.03)


def test_finite_sample_correction_gives_unbounded_bounds_for_tiny_samples():
    # split conformal: the ceil((n+1)(1+L)/2)-th of n residuals; beyond n the bound is
    # infinite (Lei et al. 2018, J. Am. Stat. Assoc. 113, 1094-1111, section 2.2)
    obs, sim = _series_pair({"A": np.array([0.1, -0.2]), "B": np.array([0.3])})
    model = conformal_bounds(obs, sim, level=0.9, n_classes=1)
    assert np.isinf(model.upper_q[0]) and np.isinf(model.lower_q[0])
    low, high = model.bounds(sim)
    assert (low.to_numpy() == 0.0).all() and np.isinf(high.to_numpy()).all()


def test_every_basin_weighs_the_same_whatever_its_record_length():
    # basin A: 1000 days at +1, basin B: 10 days at -1; with equal basin weights the pooled
    # distribution puts mass 1/2 on each value, so the central 50% range spans -1 .. +1
    # (day weights would put 99% of the mass on +1; hand computation)
    obs, sim = _series_pair({"A": np.full(1000, 1.0), "B": np.full(10, -1.0)})
    model = conformal_bounds(obs, sim, level=0.5, n_classes=1)
    assert model.lower_q[0] == pytest.approx(-1.0)
    assert model.upper_q[0] == pytest.approx(1.0)


def test_bounds_contain_the_simulation_and_are_non_negative():
    rng = np.random.default_rng(3)
    sim = pd.DataFrame(rng.gamma(0.7, 1.0, size=(500, 15)))
    obs = sim * np.exp(rng.normal(0.3, 0.2, size=sim.shape))  # biased: every residual > 0
    model = conformal_bounds(obs, sim, level=0.9)
    assert (model.lower_q <= 0).all() and (model.upper_q >= 0).all()
    low, high = model.bounds(sim)
    assert (low.to_numpy() >= 0).all()
    assert (low.to_numpy() <= sim.to_numpy()).all() and (sim.to_numpy() <= high.to_numpy()).all()


def test_level_outside_zero_one_is_refused():
    obs, sim = _series_pair({"A": np.zeros(3)})
    with pytest.raises(InputError, match="strictly between 0 and 1"):
        conformal_bounds(obs, sim, level=90)


@pytest.mark.parametrize("n_basins", [3, 12, 40])
def test_residual_tails_rebuild_the_error_model_exactly_at_wider_levels(n_basins):
    # Two routes to the same model: conformal_bounds on the whole flows, and the tails kept at
    # the nominal level rebuilt at the nominal and at widened levels (bit for bit).
    rng = np.random.default_rng(n_basins)
    days = 400
    sim = pd.DataFrame(rng.gamma(2.0, 1.0, (days, n_basins)))
    obs = sim * np.exp(rng.normal(0.0, 0.4, (days, n_basins)))
    obs = obs.mask(rng.random((days, n_basins)) < 0.2)  # missing days: unequal record lengths
    classes = 5 if n_basins >= 10 else 1
    tails = ResidualTails.of(obs, sim, level=0.9, n_classes=classes)
    for levels in (None, [0.9] * classes, np.linspace(0.9, 0.995, classes)):
        whole = conformal_bounds(obs, sim, level=0.9, n_classes=classes, class_levels=levels)
        kept = tails.error_model(levels)
        np.testing.assert_array_equal(kept.lower_q, whole.lower_q)
        np.testing.assert_array_equal(kept.upper_q, whole.upper_q)
        np.testing.assert_array_equal(kept.levels, whole.levels)
        assert (kept.n_basins, kept.level) == (whole.n_basins, whole.level)
    kept_values = sum(len(v) for v in (*tails.low_values, *tails.high_values))
    assert kept_values < 0.2 * np.isfinite(obs.to_numpy()).sum()
    with pytest.raises(ValueError, match="levels >= 0.9"):
        tails.error_model([0.8] * classes)


def test_residual_tails_read_the_simulated_basins_of_a_wider_observed_table():
    # the held-out check gives the observed flow of every gauged basin and a repeat's training
    # flows: the tails read the training basins' columns a block at a time (blocks of 2 and 3
    # cut here) and equal those of the observed table cut to them first
    from functools import partial

    from regional import bounds

    rng = np.random.default_rng(5)
    days, n_basins = 300, 12
    every = [f"B{i:02d}" for i in range(n_basins)]
    obs = pd.DataFrame(rng.gamma(2.0, 1.0, (days, n_basins)), columns=every).astype("float32")
    obs = obs.mask(rng.random((days, n_basins)) < 0.2)
    training = [every[i] for i in (7, 0, 3, 11, 5, 2, 9)]  # not in the observed table's order
    sim = obs[training].astype(float) * np.exp(rng.normal(0.0, 0.3, (days, len(training))))
    sim = sim.fillna(1.0)
    cut = ResidualTails.of(obs[training], sim, level=0.9, n_classes=2)
    for block in (2, 3):
        with pytest.MonkeyPatch.context() as patch:
            for name in ("class_residuals", "observed_basins"):
                patch.setattr(bounds, name, partial(getattr(bounds, name), block=block))
            wide = ResidualTails.of(obs, sim, level=0.9, n_classes=2)
        assert wide.n_basins == cut.n_basins
        np.testing.assert_array_equal(wide.days, cut.days)
        for name in ("low_values", "low_weights", "high_values", "high_weights"):
            for a, b in zip(getattr(wide, name), getattr(cut, name), strict=True):
                np.testing.assert_array_equal(a, b)
    with pytest.raises(ValueError, match="must hold the days and basins"):
        ResidualTails.of(obs[training[:3]], sim, level=0.9, n_classes=2)
