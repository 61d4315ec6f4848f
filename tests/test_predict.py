"""Tests of regional.predict: the prediction at the ungauged basins."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from regional.errors import InputError
from regional.flowstats import STATISTIC_COLUMNS, headline_statistics
from regional.predict import predict_ungauged
from regional.predicted import FLOW_COLUMNS


@pytest.fixture(scope="module")
def prediction(demo_result):
    return predict_ungauged(demo_result)


def test_prediction_table_has_every_column(prediction, demo_result):
    table = prediction.table
    assert list(table.index) == list(demo_result.region.ungauged)
    assert table.index.name == "basin_id"
    methods = ["median", "regression", "similarity", "proximity"]
    expected = list(demo_result.attributes)
    for method in methods:
        expected += [f"k_per_day_{method}", f"k_per_day_{method}_low", f"k_per_day_{method}_high"]
    expected += ["method", "k_per_day", "k_per_day_low", "k_per_day_high"]
    expected += [*STATISTIC_COLUMNS, "applicable", "reason", "nearest_loo_nse", "bounds_from"]
    assert expected == [c for c in table.columns if c in expected]
    assert set(expected) <= set(table.columns)
    assert table["applicable"].dtype == bool
    assert (table.loc[table["applicable"], "reason"] == "").all()
    assert (table.loc[~table["applicable"], "reason"].str.len() > 0).all()
    chosen = prediction.method
    assert (table["method"] == chosen).all()
    np.testing.assert_array_equal(table["k_per_day"], table[f"k_per_day_{chosen}"])
    for method in methods:
        low, mid, high = (table[f"k_per_day_{method}{s}"] for s in ("_low", "", "_high"))
        assert ((low <= mid) & (mid <= high)).all()


def test_prediction_flows_table(prediction, demo_result):
    flows = prediction.flows
    assert list(flows.columns) == list(FLOW_COLUMNS)
    context = demo_result.runs[prediction.model].context
    reported = context.precip_mm.index[context.window.warmup_days :]
    assert len(flows) == len(reported) * len(demo_result.region.ungauged)
    assert flows["date"].min() == reported[0] and flows["date"].max() == reported[-1]
    assert (flows["flow_low_mm"] >= 0).all()
    assert (flows["flow_low_mm"] <= flows["flow_mm"]).all()
    assert (flows["flow_mm"] <= flows["flow_high_mm"]).all()
    assert flows[["flow_mm", "flow_low_mm", "flow_high_mm"]].notna().all().all()


def test_mm_and_m3s_agree_through_the_area(prediction, demo_result):
    area = demo_result.region.attributes["area_km2"]
    flows = prediction.flows
    # Q_m3s = Q_mm x area_km2 / 86.4 (unit arithmetic, common practice, no source)
    for suffix in ("", "_low", "_high"):
        np.testing.assert_allclose(
            flows[f"flow{suffix}_m3s"] * 86.4 / flows["basin_id"].map(area),
            flows[f"flow{suffix}_mm"],
            rtol=1e-12,
        )
    table = prediction.table
    np.testing.assert_allclose(
        table["mean_flow_m3s"] * 86.4 / area.loc[table.index], table["mean_flow_mm"], rtol=1e-12
    )


def test_statistics_are_those_of_the_reported_flows(prediction):
    wide = prediction.flows.pivot(index="date", columns="basin_id", values="flow_mm")
    expected = headline_statistics(wide)
    table = prediction.table
    for column in ("mean_flow_mm", "q5_mm", "q95_mm", "min7_mean_mm", "flow_m07_mm"):
        np.testing.assert_allclose(table[column], expected.loc[table.index, column], rtol=1e-12)


def test_prediction_error_model_and_notes(prediction):
    model = prediction.error_model
    assert list(model.columns[:6]) == [
        "class",
        "percentile_low",
        "percentile_high",
        "lower_q",
        "upper_q",
        "n",
    ]
    assert (model["lower_q"] <= 0).all() and (model["upper_q"] >= 0).all()
    assert prediction.level == 0.9
    assert any("coverage" in note for note in prediction.notes)
    assert set(prediction.coverage.columns) >= {"model", "method", "level", "coverage", "n_days"}


def test_wider_level_gives_wider_bounds(demo_result, prediction):
    wider = predict_ungauged(demo_result, level=0.95)
    assert (wider.error_model["upper_q"] >= prediction.error_model["upper_q"]).all()
    assert (wider.error_model["lower_q"] <= prediction.error_model["lower_q"]).all()
    with pytest.raises(InputError, match="strictly between 0 and 1"):
        predict_ungauged(demo_result, level=1.5)


def test_demo_prediction_reports_the_held_out_check(prediction, demo_result):
    row = prediction.coverage.set_index(["model", "method"]).loc[
        (demo_result.chosen_model, demo_result.chosen_method)
    ]
    assert row["held_out_repeats"] == 10 and row["held_out_basins"] == 3  # a tenth of 34
    for column in (
        "held_out_coverage",
        "held_out_coverage_decile_1",
        "held_out_coverage_decile_10",
    ):
        assert 0.8 <= row[column] <= 0.97, (column, row[column])
    table = prediction.held_out.set_index("flow_class")
    assert {"all", "decile 1", "decile 10", "class 1"} <= set(table.index)
    classes = [c for c in table.index if c.startswith("class")]
    np.testing.assert_allclose(
        table.loc[classes, "level_used"], prediction.error_model["level"].to_numpy()
    )
    assert any("held-out check" in note and "10 repeats" in note for note in prediction.notes)
    others = prediction.coverage[prediction.coverage["method"] != demo_result.chosen_method]
    assert others["held_out_coverage"].isna().all()


def test_prediction_in_chunks_equals_the_prediction_in_one_chunk(demo_result):
    # The ungauged basins are simulated, bounded and summarised a chunk at a time (a task each
    # on a cluster): chunks of 2 (and a last chunk of 3, never a lone basin) give the very
    # flows, bounds, table and model-route statistics of one chunk holding every basin.
    from regional.predict import _no_lone_basin, predict_region

    fitted, region = demo_result.fitted, demo_result.region
    assert len(region.ungauged) >= 5
    whole = predict_region(fitted, region, chunk_basins=1000)
    for size in (2, 3):
        chunked = predict_region(fitted, region, chunk_basins=size)
        for name in ("flow_mm", "low_mm", "high_mm"):
            pd.testing.assert_frame_equal(
                getattr(chunked.daily, name), getattr(whole.daily, name), check_exact=True
            )
        pd.testing.assert_frame_equal(chunked.table, whole.table, check_exact=True)
        pd.testing.assert_frame_equal(
            chunked.model_statistics, whole.model_statistics, check_exact=True
        )
    assert _no_lone_basin([["a", "b"], ["c", "d"], ["e"]]) == [["a", "b"], ["c", "d", "e"]]
    assert _no_lone_basin([["a"]]) == [["a"]]


def test_sites_whose_flows_share_no_evaluation_day_get_no_model_route_statistics(demo_result):
    # The model route's statistics are taken over the fitted region's evaluation days; a
    # fitted region whose evaluation days lie elsewhere still predicts (same flows), with no
    # model-route column instead of an error.
    from dataclasses import replace

    from regional.predict import predict_region

    fitted, region = demo_result.fitted, demo_result.region
    observed = fitted.loo_observed
    elsewhere = replace(
        fitted, loo_observed=observed.set_axis(observed.index + pd.DateOffset(years=200))
    )
    shifted = predict_region(elsewhere, region)
    assert shifted.model_statistics.shape == (len(region.ungauged), 0)
    pd.testing.assert_frame_equal(
        shifted.daily.flow_mm, demo_result.prediction.daily.flow_mm, check_exact=True
    )
