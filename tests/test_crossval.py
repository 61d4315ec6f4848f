"""Leave-one-out validation on a small synthetic region with a known relation of k."""

import numpy as np
import pandas as pd
import pytest

import regional
from regional.calibrate import calibrate, scoring_window
from regional.crossval import (
    CALIBRATED,
    MEDIAN,
    FoldContext,
    TransferOptions,
    best_method,
    leave_one_out,
    run_folds,
    summarise,
)
from regional.errors import InputError

N_BASINS = 14
DATES = pd.date_range("2000-01-01", periods=5 * 365)


def _region(seed: int = 7):
    """Basins whose log k is linear in one attribute; shared weather with local noise."""
    rng = np.random.default_rng(seed)
    ids = [f"T{i:02d}" for i in range(N_BASINS)]
    slope = rng.uniform(2.0, 20.0, N_BASINS)
    attributes = pd.DataFrame(
        {
            "slope_mean": slope,
            "noise_attr": rng.normal(0, 1, N_BASINS),
            "centroid_lon": rng.uniform(10.0, 11.0, N_BASINS),
            "centroid_lat": rng.uniform(45.0, 46.0, N_BASINS),
        },
        index=pd.Index(ids, name="basin_id"),
    )
    k = np.exp(-4.0 + 0.15 * slope + rng.normal(0, 0.4, N_BASINS))
    days = len(DATES)
    storm = rng.gamma(0.5, 6.0, days)
    precip = pd.DataFrame(storm[:, None] * rng.lognormal(0, 0.2, (days, N_BASINS)), DATES, ids)
    season = 1.8 + 1.2 * np.sin(2 * np.pi * np.arange(days) / 365.25)
    pet = pd.DataFrame(np.tile(season[:, None], N_BASINS), DATES, ids)
    flow = regional.simulate("linear", precip.values, pet.values, {"k_per_day": k}).flow
    flow = pd.DataFrame(flow * rng.lognormal(0, 0.05, flow.shape), DATES, ids)
    return attributes, precip, pet, flow, pd.Series(k, index=ids)


def _context(methods=("regression", "similarity", "proximity"), excluded=None):
    attributes, precip, pet, flow, _ = _region()
    window = scoring_window(
        DATES, ("2001-01-01", "2002-12-31"), ("2003-01-01", "2004-12-30"), warmup_days=365
    )
    calibrated = calibrate(
        precip, pet, flow, calibration=("2001-01-01", "2002-12-31"), warmup_days=365
    )
    part = slice(window.start, window.stop)
    return FoldContext(
        model="linear",
        attributes=attributes.loc[calibrated.index],
        calibrated=calibrated[["k_per_day"]],
        precip_mm=precip.iloc[part],
        pet_mm=pet.iloc[part],
        temp_c=None,
        flow_mm=flow.iloc[part],
        window=window,
        evaluation=window.validation,
        options=TransferOptions(methods=methods, attributes=("slope_mean", "noise_attr")),
        excluded=excluded or {},
    )


def test_scores_every_basin_and_method_and_orders_baselines_first():
    result = leave_one_out(_context())
    assert result.methods == (CALIBRATED, MEDIAN, "regression", "similarity", "proximity")
    assert len(result.scores) == N_BASINS * 5
    assert set(result.scores.columns) >= {
        "basin_id",
        "method",
        "nse",
        "kge",
        "kge_r",
        "kge_alpha",
        "kge_beta",
        "log_nse",
        "pbias",
        "n_days",
    }
    assert (result.scores["n_days"] == result.observed.notna().sum().iloc[0]).all()
    assert result.simulated["regression"].shape == result.observed.shape


def test_regression_beats_median_and_stays_below_calibrated():
    summary = summarise(leave_one_out(_context()).scores).set_index("method")
    assert summary.loc["regression", "median_nse"] > summary.loc[MEDIAN, "median_nse"]
    assert summary.loc[CALIBRATED, "median_nse"] >= summary.loc["regression", "median_nse"]
    assert summary.loc["regression", "gain_vs_median"] > 0
    assert summary.loc[CALIBRATED, "loss_vs_calibrated"] == 0


def test_target_never_sees_its_own_parameters():
    # A fold must give the same answer whatever the target's own calibrated k is.
    context = _context(methods=("regression", "similarity"))
    target = context.calibrated.index[3]
    changed = context.calibrated.copy()
    changed.loc[target, "k_per_day"] = 1.4
    first = run_folds([target], context)[0]
    second = run_folds([target], FoldContext(**{**context.__dict__, "calibrated": changed}))[0]
    for method in ("median", "regression", "similarity"):
        np.testing.assert_allclose(
            first["methods"][method]["flow"], second["methods"][method]["flow"]
        )


def test_excluded_donors_are_left_out_of_the_fold():
    context = _context(methods=("proximity",))
    target = context.calibrated.index[0]
    others = [b for b in context.calibrated.index if b != target]
    near = context.attributes.loc[others, ["centroid_lon", "centroid_lat"]]
    distance = np.hypot(*(near - context.attributes.loc[target, near.columns]).to_numpy().T)
    nearest = near.index[np.argmin(distance)]
    excluded = {target: frozenset({nearest})}
    kept = run_folds([target], context)[0]
    dropped = run_folds([target], FoldContext(**{**context.__dict__, "excluded": excluded}))[0]
    assert not np.allclose(
        kept["methods"]["proximity"]["flow"], dropped["methods"]["proximity"]["flow"]
    )


def test_best_method_skips_the_calibrated_baseline():
    summary = pd.DataFrame(
        {"method": [CALIBRATED, MEDIAN, "regression"], "median_nse": [0.9, 0.3, 0.6]}
    )
    assert best_method(summary)["method"] == "regression"


def test_summary_is_per_model_when_models_are_compared():
    scores = pd.DataFrame(
        {
            "model": ["a", "a", "b", "b"],
            "method": [CALIBRATED, MEDIAN, CALIBRATED, MEDIAN],
            "nse": [0.8, 0.4, 0.6, 0.5],
            "kge": [0.8, 0.4, 0.6, 0.5],
        }
    )
    summary = summarise(scores).set_index(["model", "method"])
    assert summary.loc[("a", MEDIAN), "loss_vs_calibrated"] == pytest.approx(0.4)
    assert summary.loc[("b", MEDIAN), "loss_vs_calibrated"] == pytest.approx(0.1)


def test_too_few_gauged_basins_is_an_input_error():
    context = _context()
    small = FoldContext(
        **{
            **context.__dict__,
            "calibrated": context.calibrated.iloc[:2],
            "attributes": context.attributes.iloc[:2],
        }
    )
    with pytest.raises(InputError, match="at least 3 gauged basins; found 2"):
        leave_one_out(small)


def _loo_both_routes(context, monkeypatch, **kwargs):
    """Leave-one-out by the batched fold donations, then by a refit per fold (the route they
    replace: tests/refit_route.py), the flows held as float64 so that they compare to 1e-10
    (as float32 a difference of 1e-10 may round to the neighbouring float32)."""
    from refit_route import refit_pool

    from regional import crossval

    monkeypatch.setattr(crossval, "LOO_FLOW_DTYPE", np.float64)
    batched = leave_one_out(context, **kwargs)
    with monkeypatch.context() as patch:
        patch.setattr(crossval, "prepared_pool", refit_pool)
        refit = leave_one_out(context, **kwargs)
    return batched, refit


def _assert_same_loo(batched, refit):
    pd.testing.assert_frame_equal(batched.scores, refit.scores, check_exact=False, rtol=1e-10)
    pd.testing.assert_frame_equal(batched.params, refit.params, check_exact=False, rtol=1e-10)
    assert batched.methods == refit.methods
    assert batched.warnings == refit.warnings
    assert batched.excluded == refit.excluded
    for method in batched.methods:
        pd.testing.assert_frame_equal(
            batched.simulated[method], refit.simulated[method], check_exact=False, rtol=1e-10
        )


def test_batched_folds_equal_a_refit_per_fold_with_nested_basins(monkeypatch):
    # Every method, nested basins left out of their neighbours' folds, chunks of 3 targets.
    base = _context(methods=("regression", "similarity", "proximity", "blended"))
    ids = list(base.calibrated.index)
    excluded = {
        ids[0]: frozenset(ids[1:3]),
        ids[1]: frozenset({ids[0]}),
        ids[5]: frozenset(ids[6:9]),
    }
    context = FoldContext(**{**base.__dict__, "excluded": excluded})
    batched, refit = _loo_both_routes(context, monkeypatch, chunk_basins=3)
    _assert_same_loo(batched, refit)


def test_batched_folds_equal_a_refit_with_snow_parameters_and_donor_only_basins(
    demo_result, monkeypatch
):
    # The demo region's nested basins, the snow store's parameters transferred with k (none
    # fixed), three basins that only donate (user parameters, no flow), chunks of 3 targets.
    from dataclasses import replace

    from regional.models import parameter_transforms

    context = demo_result.runs["linear"].context
    names = list(parameter_transforms("linear", snow=True, fixed={}))
    rng = np.random.default_rng(8)
    calibrated = context.calibrated.copy()
    n = len(calibrated)
    calibrated["snow_threshold_c"] = rng.uniform(-0.5, 2.0, n)
    calibrated["melt_threshold_c"] = rng.uniform(-1.0, 1.0, n)
    calibrated["melt_factor_mm_per_degc_day"] = rng.uniform(1.5, 5.0, n)
    assert set(names) <= set(calibrated.columns)
    options = replace(
        context.options, methods=("regression", "similarity", "proximity", "blended")
    )
    donor_only = frozenset(calibrated.index[[2, 9, 20]])
    context = replace(
        context, calibrated=calibrated, fixed_params={}, options=options, donor_only=donor_only
    )
    assert list(context.transforms) == names and context.excluded
    batched, refit = _loo_both_routes(context, monkeypatch, chunk_basins=3)
    assert donor_only.isdisjoint(batched.scores["basin_id"])
    _assert_same_loo(batched, refit)


def test_each_method_is_prepared_once_for_all_chunks(monkeypatch):
    # Chunks of 3 targets share one prepared pool per method (not one per chunk), and a new
    # table (another context) gets its own.
    from regional import crossval
    from regional.transfer.folds import PreparedPool

    made = []

    class Counted(PreparedPool):
        def __init__(self, method, *args):
            made.append(method)
            super().__init__(method, *args)

    monkeypatch.setattr(crossval, "PreparedPool", Counted)
    monkeypatch.setattr(crossval, "_PREPARED", type(crossval._PREPARED)())
    context = _context(methods=("regression", "similarity", "proximity"))
    leave_one_out(context, chunk_basins=3)
    assert sorted(made) == ["median", "proximity", "regression", "similarity"]
    changed = FoldContext(**{**context.__dict__, "calibrated": context.calibrated.copy()})
    leave_one_out(changed, chunk_basins=3)
    assert len(made) == 8


def test_leave_one_out_flows_held_as_float32_change_what_they_feed_below_1e_5(
    tmp_path, region_parts, monkeypatch
):
    # Two routes: the leave-one-out flows held as float32 (default) and as float64. The
    # scores come from the float64 flow before it is stored, so they are identical; what the
    # stored flows feed (the error model of the bounds, the bounds at the ungauged basins,
    # the flow statistics of the model route) agrees to 1e-5 relative, the coverage to 1e-3
    # (a day may cross a bound: docs/scale.md gives the largest differences seen).
    from tiny_region import write_region

    from regional import crossval
    from regional.pipeline import run

    folder = write_region(tmp_path / "r", region_parts)
    compact = run(folder)
    monkeypatch.setattr(crossval, "LOO_FLOW_DTYPE", np.float64)
    wide = run(folder)
    model = compact.chosen_model
    assert (compact.runs[model].loo.simulated["median"].dtypes == np.float32).all()
    assert (wide.runs[model].loo.simulated["median"].dtypes == np.float64).all()
    pd.testing.assert_frame_equal(compact.scores, wide.scores)
    for name in ("lower_q", "upper_q"):
        got, expected = (getattr(r.fitted.error_model, name) for r in (compact, wide))
        np.testing.assert_allclose(got, expected, rtol=1e-5)
    for part in ("low_mm", "high_mm"):
        got, expected = (getattr(r.prediction.daily, part) for r in (compact, wide))
        np.testing.assert_allclose(got.to_numpy(), expected.to_numpy(), rtol=1e-5, atol=1e-9)
    shares = ["coverage", "coverage_decile_1", "coverage_decile_10"]
    got, expected = (r.fitted.coverage[shares].to_numpy(dtype=float) for r in (compact, wide))
    np.testing.assert_allclose(got, expected, atol=1e-3)
    numbers = compact.statistics.loo.select_dtypes("number").columns
    np.testing.assert_allclose(
        compact.statistics.loo[numbers].to_numpy(dtype=float),
        wide.statistics.loo[numbers].to_numpy(dtype=float),
        rtol=1e-5,
        atol=1e-9,
    )
