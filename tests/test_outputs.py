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


def test_daily_flows_written_part_by_part_are_the_whole_table(demo_result, tmp_path):
    # flows_ungauged.csv is streamed from the prediction's grids a few basins at a time: the
    # file is byte for byte the long table written at once, as before.
    from dataclasses import replace

    import pandas as pd

    from regional import io
    from regional.outputs import write_outputs

    prediction = demo_result.prediction
    daily = prediction.daily
    parts = list(daily.parts(basins_per_part=3))
    assert len(parts) == -(-daily.flow_mm.shape[1] // 3)
    pd.testing.assert_frame_equal(pd.concat(parts, ignore_index=True), prediction.flows)
    whole = prediction.flows.assign(level=prediction.level).to_csv(index=False)
    folder = write_outputs(demo_result, tmp_path / "results", figures=False)
    assert (folder / "flows_ungauged.csv").read_text() == whole
    assert isinstance(result_tables(demo_result)["flows_ungauged.csv"], io.TableParts)
    empty = replace(
        daily, flow_mm=daily.flow_mm.iloc[:, :0], low_mm=daily.low_mm.iloc[:, :0]
    ).long([])
    assert list(empty.columns) == list(prediction.flows.columns) and empty.empty


def test_report_written_piece_by_piece_from_the_figure_files_is_the_whole_page(
    demo_result, tmp_path, monkeypatch
):
    # two routes to report.html: written piece by piece, each figure read back from its file
    # as it is embedded (images drawn one at a time and never all held), and the page built
    # whole in memory from the same images: the same text
    from dataclasses import replace

    from regional import io, outputs
    from regional.report.html import render_report

    jobs = outputs.figure_jobs(demo_result)
    kept = [job for job in jobs if job.name in ("nse_cdf", "loo_nse_map")]
    kept += [job for job in jobs if job.site_basins][:2]
    assert len(kept) == 4
    monkeypatch.setattr(outputs, "figure_jobs", lambda result: kept)
    folder = outputs.write_outputs(demo_result, tmp_path / "results")
    images = io.read_figures(folder)
    assert sorted(images) == sorted(job.name for job in kept)
    stages = io.read_manifest(folder)["stages"]
    whole = render_report(
        replace(demo_result, stages=stages), {j.name: images[j.name] for j in kept}
    )
    assert (folder / "report.html").read_text(encoding="utf-8") == whole
    assert whole.count("data:image/png;base64,") == 4
