"""Tests of regional.fitted: the fitted region, its open files, and when it may be reused."""

from __future__ import annotations

import dataclasses
import json

import pandas as pd
import pytest

from regional import io
from regional.errors import InputError
from regional.fittedfiles import fitted_files, from_files, stale_reason
from regional.predict import predict_sites


@pytest.fixture(scope="module")
def stored(demo_result):
    meta, tables = fitted_files(demo_result.fitted)
    return meta, tables


def _targets(result):
    region = result.region
    targets = list(region.ungauged)
    return region.attributes.loc[targets], region


def test_files_are_open_formats_and_round_trip_exactly(stored, demo_result):
    meta, tables = stored
    info = json.loads(meta)
    assert info["model"] == demo_result.chosen_model
    assert info["method"] == demo_result.chosen_method
    assert all(name.startswith("fitted/") and name.endswith(".parquet") for name in tables)
    back = from_files(meta, tables)
    original = demo_result.fitted
    pd.testing.assert_frame_equal(back.training, original.training, check_exact=True)
    for name in ("edges", "lower_q", "upper_q", "n_days", "levels"):
        assert (getattr(back.error_model, name) == getattr(original.error_model, name)).all()
    assert back.options == original.options
    assert back.held_out.attrs == original.held_out.attrs


def test_prediction_from_the_stored_files_equals_the_run(stored, demo_result):
    # two routes to one number: the run's own prediction, and the prediction rebuilt from the
    # fitted region's files alone (no calibration, no leave-one-out)
    fitted = from_files(*stored)
    attributes, region = _targets(demo_result)
    again = predict_sites(
        fitted,
        attributes,
        precip_mm=region.precip_mm,
        pet_mm=region.pet_mm,
        temp_c=region.temp_c,
    )
    expected = demo_result.prediction
    pd.testing.assert_frame_equal(again.flows, expected.flows, check_exact=True)
    pd.testing.assert_frame_equal(again.table, expected.table, check_exact=True)
    pd.testing.assert_frame_equal(again.coverage, expected.coverage, check_exact=True)
    assert again.notes == expected.notes


def test_changed_input_or_setting_is_named(stored, demo_result):
    meta, _ = stored
    settings = demo_result.settings
    inputs = io.file_checksums(settings.input_paths())
    assert stale_reason(meta, settings, inputs) is None
    series = str(settings.series.path)
    changed = dict(inputs) | {series: "0" * 64}
    assert stale_reason(meta, settings, changed) == (
        f"input changed since the region was fitted: {series}"
    )
    other = dataclasses.replace(
        settings, prediction=dataclasses.replace(settings.prediction, level=0.8)
    )
    assert "[prediction]" in stale_reason(meta, other, inputs)
    assert "no fitted region" in stale_reason(None, settings, inputs)
    assert "format" in stale_reason(
        meta.replace(b'"format": 1', b'"format": 99'), settings, inputs
    )


def test_forcing_short_of_the_fitted_window_is_refused(stored, demo_result):
    fitted = from_files(*stored)
    attributes, region = _targets(demo_result)
    short = region.precip_mm.iloc[400:]
    with pytest.raises(InputError, match="whole window"):
        predict_sites(
            fitted, attributes, precip_mm=short, pet_mm=region.pet_mm, temp_c=region.temp_c
        )
