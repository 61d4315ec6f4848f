"""The registry contract: every registered storage model, checked the same way.

Each model follows the :class:`regional.models.StorageModel` protocol: its registry name, a
parameter table whose names carry their units and whose bounds hold the initial value, the
transforms the transfer reads, and a simulation of many parameter sets in one call that gives
finite, non-negative flow shaped (time, sets) on a tiny invented forcing, with the stores
closing their water balance (common practice, no source: mass conservation).
"""

from __future__ import annotations

import numpy as np
import pytest

from regional.models import StorageModel, get_model, model_names, parameter_transforms, simulate

DAYS = 3 * 365


@pytest.fixture(scope="module")
def forcing() -> tuple[np.ndarray, np.ndarray]:
    """Three invented years: wet and dry days, a seasonal PET (mm/day)."""
    rng = np.random.default_rng(15)
    day = np.arange(DAYS)
    precip = np.where(rng.random(DAYS) < 0.4, rng.gamma(0.8, 9.0, DAYS), 0.0)
    pet = 2.0 + 1.5 * np.sin(2 * np.pi * (day - 100) / 365.25)
    return precip, pet


@pytest.fixture(params=model_names())
def name(request) -> str:
    return request.param


def test_model_follows_the_protocol_under_its_registry_name(name):
    model = get_model(name)
    assert isinstance(model, StorageModel)
    assert model.name == name
    assert model.description and model.references


def test_parameter_table_names_units_bounds_and_transforms(name):
    table = get_model(name).parameters
    names = [p.name for p in table]
    assert len(set(names)) == len(names)
    for parameter in table:
        assert parameter.unit and parameter.lower < parameter.upper
        assert parameter.lower <= parameter.initial <= parameter.upper
    assert parameter_transforms(name) == {p.name: p.transform for p in table}


def test_many_sets_simulate_in_one_call_and_close_the_balance(name, forcing):
    precip, pet = forcing
    table = get_model(name).parameters
    sets = {p.name: np.array([p.lower, p.initial, p.upper]) for p in table}
    result = simulate(name, precip, pet, sets, warmup_days=365)
    assert result.flow.shape == (DAYS, 3)
    assert np.isfinite(result.flow).all() and (result.flow >= 0).all()
    gained = np.zeros(3) if result.exchange is None else result.exchange.sum(axis=0)
    change = result.storage[-1] - result.initial_storage
    balance = precip.sum() + gained - result.aet.sum(axis=0) - result.flow.sum(axis=0) - change
    np.testing.assert_allclose(balance, 0.0, atol=1e-6 * precip.sum())


def test_one_set_alone_gives_the_flow_it_gives_among_others(name, forcing):
    precip, pet = forcing
    table = get_model(name).parameters
    sets = {p.name: np.array([p.lower, p.initial, p.upper]) for p in table}
    together = simulate(name, precip, pet, sets).flow
    alone = simulate(name, precip, pet, {k: v[1:2] for k, v in sets.items()}).flow
    np.testing.assert_array_equal(alone[:, 0], together[:, 1])
