"""Number of donors chosen in leave-one-out: one simulation of the largest set per fold."""

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from test_crossval import N_BASINS, _context

from regional.crossval import (
    _held_out_choice,
    _target_forcing,
    choose_donor_counts,
    count_flows,
    leave_one_out,
    with_donor_counts,
)
from regional.models import parameter_transforms
from regional.transfer import make_transfer, simulate_donors
from regional.transfer.step import donor_simulator

COUNTS = (1, 2, 4, 7)
METHODS = ("regression", "similarity", "proximity", "blended")


def _with_choices(context, *, combine="output", counts=COUNTS):
    options = replace(context.options, donor_choices=counts, combine=combine)
    return replace(context, options=options)


@pytest.fixture(scope="module")
def context():
    return _with_choices(_context(methods=METHODS))


@pytest.fixture(scope="module")
def choice(context):
    return choose_donor_counts(context)


@pytest.mark.parametrize("combine", ["output", "parameter"])
@pytest.mark.parametrize("method", ["similarity", "blended"])
def test_first_n_donors_match_a_donation_of_n(context, method, combine):
    context = _with_choices(context, combine=combine)
    target = "T03"
    train = context.calibrated.index.drop([target, *context.excluded.get(target, ())])
    forcing = _target_forcing(target, context)
    transforms = parameter_transforms(context.model)
    attributes = list(context.options.attributes)

    def donation(n):
        estimator = make_transfer(method, attributes=attributes, n_donors=n, combine=combine)
        estimator.fit(context.attributes.loc[train], context.calibrated.loc[train])
        return estimator.donate(context.attributes.loc[[target]])

    largest = donation(max(COUNTS)).for_target(target)
    flows = count_flows(largest, COUNTS, transforms=transforms, context=context, forcing=forcing)
    # second route: a fresh donation of n donors combined by simulate_donors
    for j, n in enumerate(COUNTS):
        expected = simulate_donors(
            donation(n),
            target,
            **forcing,
            model=context.model,
            warmup_days=context.window.warmup_days,
            simulate=donor_simulator(context.model, context.fixed_params),
        ).flow
        np.testing.assert_allclose(flows[:, j], expected, rtol=1e-12, atol=1e-12)


def test_table_has_every_method_and_count_and_marks_the_best(choice):
    table = choice.table
    assert list(table["method"].unique()) == ["similarity", "proximity", "blended"]
    assert (table.groupby("method")["n_donors"].apply(tuple) == COUNTS).all()
    for method, rows in table.groupby("method"):
        best = rows.loc[rows["median_nse"].idxmax()]
        assert choice.chosen[method] == best["n_donors"]
        assert (
            rows["chosen"].sum() == 1
            and rows.loc[rows["chosen"], "n_donors"].item() == (best["n_donors"])
        )
        assert rows["median_nse_choice_held_out"].notna().sum() == 1
    assert len(choice.scores) == N_BASINS * 3 * len(COUNTS)
    # the medians are those of the per-basin scores
    medians = choice.scores.groupby(["method", "n_donors"])["nse"].median()
    np.testing.assert_allclose(
        table.set_index(["method", "n_donors"])["median_nse"],
        medians.loc[table.set_index(["method", "n_donors"]).index],
    )


def test_leave_one_out_with_the_chosen_counts_reproduces_their_scores(context, choice):
    result = leave_one_out(with_donor_counts(context, choice.chosen))
    scores = result.scores.set_index(["method", "basin_id"])["nse"]
    for method, n in choice.chosen.items():
        picked = choice.scores[
            (choice.scores["method"] == method) & (choice.scores["n_donors"] == n)
        ].set_index("basin_id")["nse"]
        np.testing.assert_allclose(scores.loc[method].loc[picked.index], picked, rtol=1e-10)
    # methods without donors are untouched
    plain = leave_one_out(_context(methods=("regression",))).scores
    np.testing.assert_allclose(
        scores.loc["regression"].to_numpy(),
        plain[plain["method"] == "regression"]["nse"].to_numpy(),
    )


def test_chosen_counts_reach_later_estimators(context):
    chosen = with_donor_counts(context, {"similarity": 2})
    assert chosen.options.donors_for("similarity") == 2
    assert chosen.options.donors_for("proximity") == context.options.n_donors


def test_held_out_choice_worked_by_hand():
    # worked here: three basins, counts 1 and 3. Without basin a, the medians are 0.5 (n=1)
    # and 0.45 (n=3): a gets n=1 -> 0.9. Without b: 0.65 vs 0.7 -> n=3 -> 0.3. Without c:
    # 0.75 vs 0.55 -> n=1 -> 0.4. Median of (0.9, 0.3, 0.4) = 0.4, while choosing on all
    # three (0.6 vs 0.6, tie -> n=1) would report 0.6.
    scores = pd.DataFrame(
        {
            "basin_id": ["a", "b", "c"] * 2,
            "n_donors": [1, 1, 1, 3, 3, 3],
            "nse": [0.9, 0.6, 0.4, 0.8, 0.3, 0.6],
        }
    )
    assert _held_out_choice(scores) == pytest.approx(0.4)


def test_no_choice_without_candidates_or_donor_methods():
    assert choose_donor_counts(_context()) is None
    only_regression = _with_choices(_context(methods=("regression",)))
    assert choose_donor_counts(only_regression) is None


def test_counts_above_the_training_basins_are_capped():
    context = _with_choices(_context(methods=("proximity",)), counts=(2, 50))
    choice = choose_donor_counts(context)
    assert set(choice.scores["n_donors"]) == {2, N_BASINS - 1}


def test_count_folds_equal_a_refit_per_fold(context, monkeypatch):
    # The donor-count folds take the batched donations (the largest count, nested basins
    # left out); a refit per fold gives the same scores.
    from refit_route import refit_pool

    from regional import crossval

    ids = list(context.calibrated.index)
    nested = replace(context, excluded={ids[0]: frozenset(ids[1:3]), ids[4]: frozenset({ids[5]})})
    batched = choose_donor_counts(nested, chunk_basins=3)
    with monkeypatch.context() as patch:
        patch.setattr(crossval, "prepared_pool", refit_pool)
        refit = choose_donor_counts(nested, chunk_basins=3)
    assert batched.chosen == refit.chosen
    pd.testing.assert_frame_equal(batched.scores, refit.scores, check_exact=False, rtol=1e-10)
