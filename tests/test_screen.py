"""Tests of regional.screen: the rank-one update, variance reduction, ranking and reasons."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from regional.errors import InputError, InputWarning
from regional.screen import (
    TABLE_COLUMNS,
    rank_one_update,
    screen_candidates,
    variance_reduction,
)


@pytest.fixture(scope="module")
def screening(demo_result):
    return screen_candidates(demo_result)


def test_rank_one_update_equals_the_inverse_of_the_augmented_matrix():
    rng = np.random.default_rng(5)
    design = np.column_stack([np.ones(30), rng.normal(size=(30, 4))])
    x_new = np.concatenate([[1.0], rng.normal(size=4) * 3])
    updated = rank_one_update(np.linalg.inv(design.T @ design), x_new)
    # exact algebra (Sherman and Morrison 1950), reference: numpy np.linalg.inv of X'X + x x'
    expected = np.linalg.inv(design.T @ design + np.outer(x_new, x_new))
    np.testing.assert_allclose(updated, expected, rtol=0, atol=1e-10)


def test_rank_one_update_refuses_a_mismatched_row():
    with pytest.raises(ValueError, match="does not match a row of 3"):
        rank_one_update(np.eye(2), np.ones(3))


def test_variance_reduction_equals_refitting_with_the_candidate(demo_result):
    run = demo_result.runs[demo_result.chosen_model]
    regression = run.regression
    attributes = demo_result.region.attributes
    targets = attributes.loc[list(demo_result.region.ungauged)]
    candidates = targets.iloc[:4]
    table = variance_reduction(regression, candidates, targets)
    for name in regression.parameters_:
        train = regression.design_rows(run.context.attributes)[name].to_numpy()
        xtx = train.T @ train
        np.testing.assert_allclose(
            np.linalg.inv(xtx), regression.design_inverse_[name], atol=1e-10
        )
        rows_t = regression.design_rows(targets)[name].to_numpy()
        before = 1.0 + np.einsum("ij,jk,ik->i", rows_t, np.linalg.inv(xtx), rows_t)
        for basin, row in regression.design_rows(candidates)[name].iterrows():
            x_c = row.to_numpy()
            # refit: the inverse of the augmented X'X computed directly (numpy), not updated
            after_inverse = np.linalg.inv(xtx + np.outer(x_c, x_c))
            after = 1.0 + np.einsum("ij,jk,ik->i", rows_t, after_inverse, rows_t)
            expected = (before - after).mean() / before.mean()
            assert table.loc[basin, f"variance_reduction_{name}"] == pytest.approx(
                expected, abs=1e-10
            )
            assert table.loc[basin, "estimation_reduction"] == pytest.approx(
                (before - after).mean() / (before.mean() - 1.0), abs=1e-10
            )


def test_screening_table_is_ranked_with_parts_and_reasons(screening, demo_result):
    table = screening.table
    assert list(table.columns[: len(TABLE_COLUMNS)]) == list(TABLE_COLUMNS)
    assert table.index.name == "basin_id"
    assert set(table.index) == set(demo_result.region.ungauged)
    assert list(table["rank"]) == list(range(1, len(table) + 1))
    assert table["score"].is_monotonic_decreasing
    assert table["score"].between(0, 1).all() and table["score"].iloc[0] > 0
    assert (table["variance_reduction"] > 0).all() and (table["variance_reduction"] < 1).all()
    assert (table["donor_spread"] >= 0).all()
    n = len(demo_result.region.ungauged)
    for reason in table["reason"]:
        assert f"over the {n} ungauged basins by" in reason
        assert "nearest donors disagree on k_per_day by a factor of" in reason
    assert (table["donor_ratio_k_per_day"] >= 1).all()


def test_score_is_the_mean_of_the_parts_scaled_to_their_maximum(screening):
    table = screening.table
    expected = 0.5 * (
        table["variance_reduction"] / table["variance_reduction"].max()
        + table["donor_spread"] / table["donor_spread"].max()
    )
    np.testing.assert_allclose(table["score"], expected, rtol=1e-12)


def test_donor_spread_matches_the_similarity_donors(screening, demo_result):
    from regional.transfer import SimilarityTransfer

    context = demo_result.runs[demo_result.chosen_model].context
    basin = screening.table.index[0]
    model = SimilarityTransfer(attributes=list(demo_result.attributes), n_donors=5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        model.fit(context.attributes, context.calibrated[["k_per_day"]])
    donors = model.donate(demo_result.region.attributes.loc[[basin]]).sets["k_per_day"]
    regional = np.log(context.calibrated["k_per_day"]).std(ddof=1)
    expected = np.log(donors).std(ddof=0) / regional
    assert screening.table.loc[basin, "donor_spread"] == pytest.approx(expected)
    assert screening.table.loc[basin, "donor_ratio_k_per_day"] == pytest.approx(
        donors.max() / donors.min()
    )


def test_named_candidates_are_screened_alone(demo_result):
    chosen = list(demo_result.region.ungauged[:3])
    table = screen_candidates(demo_result, candidates=chosen).table
    assert sorted(table.index) == sorted(chosen)


def test_unknown_or_gauged_candidates_are_refused(demo_result):
    with pytest.raises(InputError, match="is not in the basins layer"):
        screen_candidates(demo_result, candidates=["NOPE"])
    gauged = demo_result.region.gauged[0]
    with pytest.raises(InputError, match="is already gauged"):
        screen_candidates(demo_result, candidates=[gauged])


def test_variance_drop_by_blocks_of_candidates_equals_all_at_once():
    # two routes to one number: the mean drop over targets computed a few candidates at a
    # time (the region's way: never a lone candidate in a block, even when asked for one
    # per block or when one is left at the end) and from the whole matrix at once
    from regional.screen import _mean_drop

    rng = np.random.default_rng(5)
    left, rows_c = rng.normal(size=(300, 5)), rng.normal(size=(257, 5))
    leverage = rng.uniform(0.0, 2.0, 257)
    whole = ((left @ rows_c.T) ** 2 / (1.0 + leverage)).mean(axis=0)
    for cells in (300, 300 * 16, 300 * 257):
        np.testing.assert_array_equal(_mean_drop(left, rows_c, leverage, cells=cells), whole)
