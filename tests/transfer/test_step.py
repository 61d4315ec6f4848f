"""Tests of regional.transfer.step: the configured methods fit on training basins, and a
donation simulated at targets from their forcing arrays."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from regional.errors import InputWarning
from regional.models import simulate
from regional.transfer import simulate_donors
from regional.transfer.step import (
    CALIBRATED,
    MEDIAN,
    DonationSimulation,
    TransferOptions,
    donor_simulator,
    fit_methods,
    method_order,
)


def _forcing(n_days: int, n_targets: int, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    precip = rng.gamma(0.6, 6.0, (n_days, n_targets))
    pet = 1.5 + np.sin(np.arange(n_days) / 58.0)[:, None] + 0.1 * rng.random((n_days, n_targets))
    return precip, pet


def test_method_order_puts_the_baselines_first_once():
    assert method_order(["proximity", MEDIAN, "regression"]) == (
        CALIBRATED,
        MEDIAN,
        "proximity",
        "regression",
    )


def test_fit_methods_fits_the_median_and_every_configured_method(region):
    X, y = region
    options = TransferOptions(methods=("regression", "similarity"), n_donors=4)
    estimators, notes = fit_methods(
        X, y, transforms={"k_per_day": "log"}, options=options, level=0.8
    )
    assert list(estimators) == [MEDIAN, "regression", "similarity"]
    assert estimators["similarity"].n_donors_ == 4
    assert estimators["regression"].level == 0.8
    assert notes == []
    only, _ = fit_methods(
        X, y, transforms={"k_per_day": "log"}, options=options, level=0.8, methods=["proximity"]
    )
    assert list(only) == ["proximity"]


def test_fit_methods_returns_fitting_warnings_as_notes(region):
    # an attribute constant over the training basins: similarity warns that it drops it; the
    # step hands the warning back as a note instead of raising it
    X, y = region
    X = X.assign(flat=1.0)
    options = TransferOptions(methods=("similarity",), attributes=("aridity", "flat"))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        _, notes = fit_methods(X, y, transforms={"k_per_day": "log"}, options=options, level=0.9)
    assert any("'flat'" in note for note in notes)
    assert all(note.startswith("prediction: ") for note in notes)
    assert not [w for w in caught if issubclass(w.category, InputWarning)]


@pytest.mark.parametrize("combine", ["output", "parameter"])
def test_flows_of_many_targets_equal_each_target_simulated_alone(region, combine):
    # two routes: the step's days x targets call, and simulate_donors target by target with
    # the clipping simulator
    X, y = region
    options = TransferOptions(methods=("similarity",), n_donors=3, combine=combine)
    estimators, _ = fit_methods(
        X.iloc[:18], y.iloc[:18], transforms={"k_per_day": "log"}, options=options, level=0.9
    )
    targets = list(X.index[18:])
    donation = estimators["similarity"].donate(X.loc[targets])
    precip, pet = _forcing(400, len(targets))
    step = DonationSimulation("linear", 30, initial_storage=5.0)
    flows = step.flows(donation, targets, precip=precip, pet=pet)
    assert flows.shape == (400, len(targets))
    for i, target in enumerate(targets):
        alone = simulate_donors(
            donation,
            target,
            precip=precip[:, i].copy(),
            pet=pet[:, i].copy(),
            model="linear",
            warmup_days=30,
            initial_storage=5.0,
            simulate=donor_simulator("linear", {}),
        ).flow
        np.testing.assert_array_equal(flows[:, i], alone)


def test_a_single_donated_set_is_simulated_by_the_model(region):
    # the regression donates one set per target: its flow is the model's own simulation of it
    X, y = region
    options = TransferOptions(methods=("regression",), attributes=("aridity", "slope_pct"))
    estimators, _ = fit_methods(
        X.iloc[:20], y.iloc[:20], transforms={"k_per_day": "log"}, options=options, level=0.9
    )
    target = str(X.index[21])
    donation = estimators["regression"].donate(X.loc[[target]])
    precip, pet = _forcing(300, 1, seed=5)
    flow = DonationSimulation("linear", 0).flow(
        donation, target, precip=precip[:, 0].copy(), pet=pet[:, 0].copy()
    )
    k = float(donation.sets["k_per_day"].iloc[0])
    expected = simulate("linear", precip[:, 0].copy(), pet[:, 0].copy(), {"k_per_day": [k]})
    np.testing.assert_array_equal(flow, expected.flow[:, 0])


def test_flows_follow_the_leave_one_out_path(demo_result):
    # two routes to one number: the step fit on a fold's training basins gives the
    # leave-one-out flow of a gauged basin (held as float32, crossval.LOO_FLOW_DTYPE: the
    # nearest float32, within 6e-8 relative)
    run = demo_result.runs[demo_result.chosen_model]
    context, loo = run.context, run.loo
    target = str(context.calibrated.index[3])
    drop = {target, *context.excluded.get(target, ())}
    train = [b for b in context.calibrated.index if b not in drop]
    transforms = context.transforms
    estimators, _ = fit_methods(
        context.attributes.loc[train],
        context.calibrated.loc[train, list(transforms)],
        transforms=transforms,
        options=context.options,
        level=0.9,
    )
    for method, estimator in estimators.items():
        donation = estimator.donate(context.attributes.loc[[target]])
        flow = context.donation_flows(donation, [target])[context.evaluation, 0]
        np.testing.assert_allclose(flow, loo.simulated[method][target].to_numpy(), rtol=1e-7)


def test_donor_sets_outside_the_bounds_are_simulated_at_the_bound():
    # bounds of k_per_day in the linear model's parameter table: 0.001 and 1.5 per day
    precip, pet = np.full(50, 3.0), np.full(50, 1.0)
    clipped = donor_simulator("linear", {})(
        "linear", precip, pet, {"k_per_day": np.array([1e-5, 9.0])}, initial_storage=10.0
    )
    at_bounds = simulate(
        "linear", precip, pet, {"k_per_day": np.array([0.001, 1.5])}, initial_storage=10.0
    )
    np.testing.assert_array_equal(clipped.flow, at_bounds.flow)
