"""Tests of regional.outputs: what each table and layer of the results folder carries."""

from __future__ import annotations

import numpy as np

from regional.outputs import result_layers, result_tables


def test_basins_layer_columns_reach_every_per_basin_table_and_layer(demo_result):
    # The demo's basins layer holds station names, rivers and a forest share of its own
    # (issue 15): each per-basin table and layer carries them beside the basin's results.
    basins = demo_result.region.basins
    own = ["name", "river", "forest_frac"]
    assert set(own) <= set(basins.columns)
    tables = result_tables(demo_result)
    layers = result_layers(demo_result)
    per_basin = {
        "calibration.csv": tables["calibration.csv"],
        "parameters_ungauged.csv": tables["parameters_ungauged.csv"],
        "screening.csv": tables["screening.csv"],
        **{f"layer {name}": layer for name, layer in layers.items()},
    }
    for what, frame in per_basin.items():
        assert list(frame.columns[1:4]) == own, what
        ids = frame["basin_id"].astype(str)
        for column in own:
            expected = basins.loc[ids, column].to_numpy()
            if column == "forest_frac":
                np.testing.assert_allclose(frame[column].to_numpy(dtype=float), expected)
            else:
                assert (frame[column].to_numpy() == expected).all(), (what, column)
    assert set(layers["gauged"]["basin_id"]) == set(demo_result.region.gauged)
    assert set(layers["ungauged"]["basin_id"]) == set(demo_result.region.ungauged)
