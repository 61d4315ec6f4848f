"""Tests of regional.bounds: the split-conformal error model of transferred daily flows."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from regional.bounds import OFFSET_FRACTION, conformal_bounds
from regional.errors import InputError


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
