"""RegressionTransfer: OLS on standardised attributes, PRESS selection, VIF, intervals."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from statsmodels.stats.outliers_influence import OLSInfluence, variance_inflation_factor

from regional.errors import InputError, InputWarning
from regional.transfer import RegressionTransfer, press

ATTRS = ["aridity", "slope_pct", "forest_frac"]


def _standardise(train: pd.DataFrame, other: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    return (other[columns] - train[columns].mean()) / train[columns].std(ddof=1)


def _statsmodels_fit(X: pd.DataFrame, y: np.ndarray, columns: list[str]):
    exog = sm.add_constant(_standardise(X, X, columns), has_constant="add")
    return sm.OLS(y, exog).fit()


def test_ols_matches_statsmodels(region):
    X, y = region
    train = X.iloc[:18]
    est = RegressionTransfer(attributes=ATTRS, select=False).fit(train, y.iloc[:18])
    log_k = np.log(y["k_per_day"].iloc[:18].to_numpy())
    reference = _statsmodels_fit(train, log_k, ATTRS)  # reference: statsmodels OLS
    table = est.coefficients_.set_index("term")
    assert list(table.index) == ["intercept", *ATTRS]
    np.testing.assert_allclose(table["estimate"], reference.params, rtol=0, atol=1e-8)
    np.testing.assert_allclose(table["std_error"], reference.bse, rtol=0, atol=1e-8)
    np.testing.assert_allclose(table["t"], reference.tvalues, rtol=1e-8)
    np.testing.assert_allclose(table["p"], reference.pvalues, rtol=1e-6, atol=1e-12)
    assert est.r2_["k_per_day"] == pytest.approx(reference.rsquared, abs=1e-8)
    assert est.adj_r2_["k_per_day"] == pytest.approx(reference.rsquared_adj, abs=1e-8)
    assert est.rse_["k_per_day"] == pytest.approx(np.sqrt(reference.scale), abs=1e-8)
    assert est.dof_resid_["k_per_day"] == reference.df_resid


@pytest.mark.parametrize("level", [0.9, 0.5])
def test_prediction_intervals_match_statsmodels(region, level):
    X, y = region
    train, targets = X.iloc[:18], X.iloc[18:]
    est = RegressionTransfer(attributes=ATTRS, select=False, level=level).fit(train, y.iloc[:18])
    donation = est.donate(targets)
    log_k = np.log(y["k_per_day"].iloc[:18].to_numpy())
    reference = _statsmodels_fit(train, log_k, ATTRS)  # reference: statsmodels OLS
    exog = sm.add_constant(_standardise(train, targets, ATTRS), has_constant="add")
    frame = reference.get_prediction(exog).summary_frame(alpha=1 - level)
    np.testing.assert_allclose(
        np.log(donation.intervals["k_per_day_low"]), frame["obs_ci_lower"], rtol=0, atol=1e-8
    )
    np.testing.assert_allclose(
        np.log(donation.intervals["k_per_day_high"]), frame["obs_ci_upper"], rtol=0, atol=1e-8
    )
    # predict is the plain back-transform (the median of k in parameter units)
    np.testing.assert_allclose(
        np.log(est.predict(targets)["k_per_day"]), frame["mean"], rtol=0, atol=1e-8
    )
    assert list(donation.intervals.index) == list(targets.index)
    assert (donation.sets["donor_id"] == "<regression>").all()
    assert (donation.sets["weight"] == 1.0).all()


def test_raw_unit_coefficients_match_statsmodels_on_raw_attributes(region):
    X, y = region
    est = RegressionTransfer(attributes=ATTRS, select=False).fit(X, y)
    exog = sm.add_constant(X[ATTRS], has_constant="add")
    reference = sm.OLS(np.log(y["k_per_day"]), exog).fit()  # reference: statsmodels OLS
    table = est.coefficients_.set_index("term")
    np.testing.assert_allclose(table["estimate_raw"], reference.params, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(table["std_error_raw"], reference.bse, rtol=1e-9, atol=1e-10)


def test_vif_matches_statsmodels(region):
    X, y = region
    est = RegressionTransfer(attributes=ATTRS, select=False).fit(X, y)
    exog = sm.add_constant(X[ATTRS], has_constant="add").to_numpy()
    # reference: statsmodels variance_inflation_factor (column regressed on all the others)
    expected = [variance_inflation_factor(exog, j) for j in range(1, exog.shape[1])]
    table = est.coefficients_.set_index("term")
    np.testing.assert_allclose(table.loc[ATTRS, "vif"], expected, rtol=1e-9)
    assert np.isnan(table.loc["intercept", "vif"])
    assert not table["vif_warning"].any()


def test_hat_diagonal_from_design_pieces_matches_statsmodels(region):
    X, y = region
    est = RegressionTransfer(attributes=ATTRS, select=False).fit(X, y)
    rows = est.design_rows(X)["k_per_day"]
    leverage = np.einsum(
        "ij,jk,ik->i", rows.to_numpy(), est.design_inverse_["k_per_day"], rows.to_numpy()
    )
    reference = _statsmodels_fit(X, np.log(y["k_per_day"].to_numpy()), ATTRS)
    # reference: statsmodels OLSInfluence.hat_matrix_diag
    np.testing.assert_allclose(leverage, OLSInfluence(reference).hat_matrix_diag, atol=1e-10)
    assert list(rows.columns) == ["intercept", *ATTRS]


def _brute_force_press(design: np.ndarray, target: np.ndarray) -> float:
    total = 0.0
    for i in range(len(target)):
        keep = np.arange(len(target)) != i
        coef, *_ = np.linalg.lstsq(design[keep], target[keep], rcond=None)
        total += float((target[i] - design[i] @ coef) ** 2)
    return total


def test_press_equals_brute_force_leave_one_out(region):
    X, y = region
    Z = _standardise(X, X, ATTRS).to_numpy()
    design = np.column_stack([np.ones(len(Z)), Z])
    target = np.log(y["k_per_day"].to_numpy())
    # reference: PRESS defined by explicit leave-one-out refits (Allen 1974)
    assert press(design, target) == pytest.approx(_brute_force_press(design, target), rel=1e-10)
    est = RegressionTransfer(attributes=ATTRS, select=False).fit(X, y)
    assert est.press_["k_per_day"] == pytest.approx(_brute_force_press(design, target), rel=1e-10)


def test_forward_selection_steps_minimise_brute_force_press(region):
    X, y = region
    candidates = ["aridity", "area_km2", "slope_pct", "forest_frac"]
    est = RegressionTransfer(attributes=candidates).fit(X, y)
    target = np.log(y["k_per_day"].to_numpy())
    Z = _standardise(X, X, candidates)
    chosen: list[str] = []
    for step in est.selection_path_.itertuples():
        if step.step == 0:
            continue
        scores = {
            a: _brute_force_press(
                np.column_stack([np.ones(len(Z)), Z[[*chosen, a]].to_numpy()]), target
            )
            for a in candidates
            if a not in chosen
        }
        assert step.term == min(scores, key=scores.get)
        assert step.press == pytest.approx(scores[step.term], rel=1e-10)
        chosen.append(step.term)
    assert tuple(chosen) == est.selected_["k_per_day"]
    # the two attributes that drive k (by construction of the test region) are found
    assert {"aridity", "slope_pct"} <= set(chosen)
    assert est.selection_path_["press"].is_monotonic_decreasing


def test_max_terms_limits_selection(region):
    X, y = region
    est = RegressionTransfer(max_terms=1).fit(X, y)
    assert len(est.selected_["k_per_day"]) == 1
    assert len(est.coefficients_) == 2


def test_several_parameters_each_match_statsmodels(region):
    X, y = region
    rng = np.random.default_rng(3)
    params = pd.DataFrame(
        {
            "x1_mm": np.exp(5.0 + 0.3 * X["forest_frac"] + rng.normal(0, 0.1, len(X))),
            "x2_mm_per_day": -0.5 + 0.2 * X["aridity"] + rng.normal(0, 0.1, len(X)),
        },
        index=X.index,
    )
    est = RegressionTransfer(attributes=ATTRS, select=False).fit(
        X, params, transforms={"x1_mm": "log", "x2_mm_per_day": "identity"}
    )
    donation = est.donate(X.iloc[:4])
    for name, values in (
        ("x1_mm", np.log(params["x1_mm"])),
        ("x2_mm_per_day", params["x2_mm_per_day"]),
    ):
        reference = _statsmodels_fit(X, values.to_numpy(), ATTRS)  # reference: statsmodels OLS
        rows = est.coefficients_[est.coefficients_["parameter"] == name]
        np.testing.assert_allclose(rows["estimate"], reference.params, atol=1e-8)
        exog = sm.add_constant(_standardise(X, X.iloc[:4], ATTRS), has_constant="add")
        frame = reference.get_prediction(exog).summary_frame(alpha=0.1)
        low = donation.intervals[f"{name}_low"]
        low = np.log(low) if name == "x1_mm" else low
        np.testing.assert_allclose(low, frame["obs_ci_lower"], atol=1e-8)
    assert set(donation.sets.columns) >= {"x1_mm", "x2_mm_per_day"}


def test_row_order_does_not_change_the_fit(region):
    X, y = region
    order = np.random.default_rng(0).permutation(len(X))
    first = RegressionTransfer().fit(X, y)
    second = RegressionTransfer().fit(X.iloc[order], y.iloc[order[::-1]])
    pd.testing.assert_frame_equal(first.coefficients_, second.coefficients_)
    pd.testing.assert_frame_equal(first.donate(X).sets, second.donate(X).sets)


def test_estimator_contract(region):
    X, y = region
    est = RegressionTransfer(attributes=ATTRS, select=False, level=0.8)
    assert est.get_params() == {
        "attributes": ATTRS,
        "select": False,
        "level": 0.8,
        "max_terms": None,
    }
    assert est.fit(X, y) is est
    assert not hasattr(clone(est), "coefficients_")
    with pytest.raises(NotFittedError, match="not fitted"):
        RegressionTransfer().predict(X)


def test_constant_attribute_dropped_with_warning(region):
    X, y = region
    X = X.assign(elev_band=3.0)
    with pytest.warns(InputWarning, match="constant.*'elev_band'"):
        est = RegressionTransfer(attributes=[*ATTRS, "elev_band"], select=False).fit(X, y)
    assert "elev_band" not in est.attributes_
    assert est.dropped_ == ["elev_band"]


def test_vif_above_ten_warns_and_flags(region):
    X, y = region
    noise = np.random.default_rng(1).normal(0, 0.01, len(X))
    X = X.assign(aridity_copy=X["aridity"] * 2.0 + noise)
    with pytest.warns(InputWarning, match="variance inflation factor above 10.*'aridity_copy'"):
        est = RegressionTransfer(attributes=["aridity", "aridity_copy"], select=False).fit(X, y)
    flagged = est.coefficients_.set_index("term")["vif_warning"]
    assert flagged["aridity"] and flagged["aridity_copy"] and not flagged["intercept"]


def test_exactly_collinear_attributes_rejected(region):
    X, y = region
    X = X.assign(aridity_twice=X["aridity"] * 2.0)
    with pytest.raises(InputError, match="regression.*'aridity', 'aridity_twice'.*collinear"):
        RegressionTransfer(attributes=["aridity", "aridity_twice"], select=False).fit(X, y)


def test_too_few_basins_for_terms(region):
    X, y = region
    with pytest.raises(InputError, match=r"regression transfer: 5 training basin\(s\) for 4"):
        RegressionTransfer(attributes=ATTRS, select=False).fit(X.iloc[:5], y.iloc[:5])
    with pytest.raises(InputError, match=r"regression transfer: 2 training basin\(s\)"):
        RegressionTransfer().fit(X.iloc[:2], y.iloc[:2])


def test_selection_respects_residual_degrees_of_freedom(region):
    X, y = region
    est = RegressionTransfer().fit(X.iloc[:5], y.iloc[:5])
    assert est.dof_resid_["k_per_day"] >= 2


def test_missing_attribute_at_target_names_basin_and_attribute(region):
    X, y = region
    est = RegressionTransfer(attributes=ATTRS, select=False).fit(X.iloc[:20], y.iloc[:20])
    targets = X.iloc[20:].copy()
    targets.loc["basin_022", "slope_pct"] = np.nan
    with pytest.raises(InputError, match="regression.*'slope_pct'.*'basin_022'"):
        est.donate(targets)
    with pytest.raises(InputError, match="regression.*lacks attribute.*'forest_frac'"):
        est.predict(targets.drop(columns="forest_frac"))


def test_missing_attribute_in_training_names_basin_and_attribute(region):
    X, y = region
    X = X.copy()
    X.loc["basin_004", "aridity"] = np.nan
    with pytest.raises(InputError, match="regression.*'aridity'.*'basin_004'"):
        RegressionTransfer(attributes=ATTRS).fit(X, y)


def test_unselected_attribute_may_be_missing_at_target(region):
    X, y = region
    est = RegressionTransfer(attributes=["aridity", "slope_pct"], select=False).fit(X, y)
    targets = X.iloc[:2].assign(forest_frac=np.nan)
    assert est.predict(targets).notna().all().all()


def test_mismatched_ids_and_bad_parameters_rejected(region):
    X, y = region
    with pytest.raises(InputError, match="regression.*same basins.*'basin_023'"):
        RegressionTransfer().fit(X, y.iloc[:-1])
    bad = y.copy()
    bad.iloc[3, 0] = -0.1
    with pytest.raises(InputError, match="regression.*'k_per_day'.*log.*'basin_003'"):
        RegressionTransfer().fit(X, bad)
    with pytest.raises(InputError, match="regression.*level must be"):
        RegressionTransfer(level=1.5).fit(X, y)


def test_inputs_not_modified(region):
    X, y = region
    X_before, y_before = X.copy(), y.copy()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        RegressionTransfer().fit(X, y).donate(X)
    pd.testing.assert_frame_equal(X, X_before)
    pd.testing.assert_frame_equal(y, y_before)


def test_warnings_point_at_the_callers_line(region):
    X, y = region
    X = X.assign(elev_band=3.0, aridity_copy=X["aridity"] * 2.0 + 1e-3 * X["slope_pct"])
    with pytest.warns(InputWarning) as record:
        RegressionTransfer(attributes=["aridity", "aridity_copy", "elev_band"], select=False).fit(
            X, y
        )
    assert len(record) == 2
    assert {w.filename for w in record} == {__file__}
