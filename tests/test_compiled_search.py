"""The compiled GR4J calibration energy and descents equal the Python ones."""

import importlib

import numpy as np
import pytest
from test_calibrate import GR4J_CALIBRATION, _snowy_region

from regional.models import Simulator, get_model
from regional.search import _Counted, _descend_together

calibrate_module = importlib.import_module("regional.calibrate")


def _problem(objective, *, snow, fixed=None, initial_storage=None):
    precip, pet, flow, temp = _snowy_region()
    window = calibrate_module.scoring_window(flow.index, GR4J_CALIBRATION, warmup_days=365)
    part = slice(window.start, window.stop)
    simulator = Simulator(
        "gr4j",
        precip.to_numpy()[part],
        pet.to_numpy()[part],
        temp=temp.to_numpy()[part] if snow else None,
        initial_storage=initial_storage,
        warmup_days=window.warmup_days,
    )
    obs = flow.to_numpy()[part]
    return calibrate_module._Problem(
        get_model("gr4j"), simulator, obs, window, objective, dict(fixed or {})
    )


def _box(problem):
    lower = np.array([p.forward(p.lower) for p in problem.free])
    upper = np.array([p.forward(p.upper) for p in problem.free])
    return lower, upper


CASES = [
    ("nse", {"snow": False}),
    ("kge", {"snow": False, "initial_storage": 150.0}),
    ("log_nse", {"snow": True}),
    ("nse_blend", {"snow": True, "fixed": {"x2_mm_per_day": 0.5, "melt_threshold_c": 1.0}}),
    ("kge", {"snow": True, "fixed": {"snow_threshold_c": -1.0}}),
]


@pytest.mark.parametrize(("objective", "settings"), CASES)
def test_compiled_energy_equals_the_python_energy(objective, settings):
    # Random parameter sets over the whole box (bounds included), several basins per call.
    problem = _problem(objective, **settings)
    lower, upper = _box(problem)
    rng = np.random.default_rng(5)
    units = rng.uniform(-0.05, 1.05, (200, len(lower))).clip(0.0, 1.0)
    points = (lower + units * (upper - lower)).T
    owner = rng.integers(0, 3, 200)
    expected = problem.energy(points, owner)
    np.testing.assert_allclose(problem.column.energy(points, owner), expected, atol=1e-10)


@pytest.mark.parametrize(("objective", "settings"), CASES[::2])
def test_compiled_descents_equal_the_lockstep_descents(objective, settings):
    # The same starts and budgets: one compiled loop per basin, or every basin in lockstep
    # through the Python energy, reach the same points.
    problem = _problem(objective, **settings)
    lower, upper = _box(problem)
    span = upper - lower
    rng = np.random.default_rng(8)
    starts = rng.uniform(0.2, 0.8, (3, len(lower)))
    owners, budgets = np.arange(3), np.array([40, 90, 150])
    energies = problem.energy((lower + starts * span).T, owners)
    counted = _Counted(problem.energy, len(lower), 3)
    _descend_together(counted, starts, energies, owners, lower, span, budgets)
    best, found, runs = problem.column.descend(owners, starts, energies, budgets)
    np.testing.assert_allclose(lower + best * span, counted.best_x, atol=1e-8)
    np.testing.assert_allclose(found, counted.best_energy, atol=1e-10)
    np.testing.assert_array_equal(runs, counted.n_runs)
