"""Leave-one-out flows left on a cluster's workers (regional.kept): the client holds no grid."""

from __future__ import annotations

import pickle
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from regional.errors import InputWarning

DEMO_REGION = Path(__file__).resolve().parents[1] / "demo_region"


@pytest.fixture(autouse=True)
def _kept_at_any_size(monkeypatch):
    # these tests' regions are small: keep their daily results on the workers all the same
    monkeypatch.setattr("regional.pipeline.KEEP_ON_WORKERS_FROM", 0)


def _run(folder, executor=None):
    from regional.pipeline import run

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return run(folder, executor=executor)


def test_cluster_keeps_the_daily_flows_on_the_workers(region_folder, tmp_path, monkeypatch):
    # After leave-one-out on a 2-worker cluster the client holds a table per flow, not a
    # whole-region grid; a fetch asks only the blocks of the asked basins and returns those
    # basins only, with the in-process run's values; the error model, the coverage and the
    # gauged flow statistics (built next to the flows, on a worker) equal the in-process ones.
    # The prediction's daily flows and bounds stay on the workers too.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    from regional.compute import DaskExecutor
    from regional.kept import KeptTable, whole

    here = _run(region_folder)
    executor = DaskExecutor(workers=2)
    try:
        there = _run(region_folder, executor=executor)
        loo, expected = there.runs[there.chosen_model].loo, here.runs[here.chosen_model].loo
        tables = [loo.observed, *loo.simulated.values()]
        assert all(isinstance(table, KeptTable) for table in tables)
        held = [v for table in tables for v in vars(table).values()]
        held += list(vars(loo.observed.blocks).values())
        assert not any(isinstance(v, np.ndarray) and v.ndim == 2 for v in held)
        assert loo.observed.columns.equals(expected.observed.columns)
        assert loo.observed.index.equals(expected.observed.index)

        asked = [str(b) for b in expected.observed.columns[[0, -1]]]
        submitted = []
        submit = executor.submit
        executor.submit = lambda *a, **k: submitted.append(a) or submit(*a, **k)
        method = there.chosen_method
        part = loo.simulated[method][asked]
        executor.submit = submit
        blocks = loo.observed.blocks
        assert len(submitted) == len({blocks.block_of[blocks.basins.get_loc(b)] for b in asked})
        assert list(part.columns) == asked
        pd.testing.assert_frame_equal(part, expected.simulated[method][asked])
        days = expected.observed.index[5:40]
        pd.testing.assert_series_equal(
            loo.observed.loc[days, asked[0]], expected.observed.loc[days, asked[0]]
        )
        pd.testing.assert_frame_equal(whole(loo.observed), expected.observed)

        daily = there.prediction.daily
        assert all(isinstance(getattr(daily, n), KeptTable) for n in ("flow_mm", "low_mm"))
        pd.testing.assert_frame_equal(there.prediction.flows, here.prediction.flows)
        pd.testing.assert_frame_equal(there.prediction.table, here.prediction.table)
        assert there.fitted.error_model.table.equals(here.fitted.error_model.table)

        pd.testing.assert_frame_equal(there.fitted.coverage, here.fitted.coverage)
        pd.testing.assert_frame_equal(there.statistics.summary, here.statistics.summary)
        # written a run of days at a time (several row groups: a few days per part here),
        # the fitted region's flows are the in-process files, and read back the whole tables
        import pyarrow.parquet

        from regional.outputs import write_outputs

        n_basins = len(expected.observed.columns)
        monkeypatch.setattr("regional.kept.PART_VALUES", 40 * n_basins)
        write_outputs(here, tmp_path / "here", figures=False)
        write_outputs(there, tmp_path / "there", figures=False, executor=executor)
        for name in ("loo_observed.parquet", "loo_simulated.parquet"):
            first, second = (tmp_path / run / "fitted" / name for run in ("here", "there"))
            assert first.read_bytes() == second.read_bytes(), name
            groups = pyarrow.parquet.ParquetFile(second).num_row_groups
            assert groups == -(-len(expected.observed.index) // 40), name
        back = pd.read_parquet(tmp_path / "there" / "fitted" / "loo_observed.parquet")
        pd.testing.assert_frame_equal(back, here.fitted.loo_observed, check_freq=False)
        with pytest.raises(TypeError, match="cannot be shipped"):
            pickle.dumps(loo.observed)
    finally:
        executor.close()
    with pytest.raises(RuntimeError, match="client is closed"):
        loo.observed[asked]


def test_in_process_runs_keep_plain_frames(region_folder):
    # In process (and on a cluster the run opens and closes itself) nothing is kept elsewhere.
    result = _run(region_folder)
    loo = result.runs[result.chosen_model].loo
    assert isinstance(loo.observed, pd.DataFrame)
    assert all(isinstance(flows, pd.DataFrame) for flows in loo.simulated.values())
    assert isinstance(result.prediction.daily.flow_mm, pd.DataFrame)


def test_a_small_region_on_an_open_cluster_is_gathered(region_folder, monkeypatch):
    # Below KEEP_ON_WORKERS_FROM basins the client gathers the daily results even when the
    # caller keeps the executor open: plain frames, equal to the in-process run's.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    from regional.compute import DaskExecutor
    from regional.pipeline import run

    monkeypatch.setattr("regional.pipeline.KEEP_ON_WORKERS_FROM", 10_000)
    here = _run(region_folder)
    executor = DaskExecutor(workers=2)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InputWarning)
            there = run(region_folder, executor=executor)
    finally:
        executor.close()
    loo, expected = there.runs[there.chosen_model].loo, here.runs[here.chosen_model].loo
    assert isinstance(loo.observed, pd.DataFrame)
    pd.testing.assert_frame_equal(loo.observed, expected.observed)
    for method, flows in expected.simulated.items():
        pd.testing.assert_frame_equal(loo.simulated[method], flows)
    assert isinstance(there.prediction.daily.flow_mm, pd.DataFrame)


def test_held_out_summaries_stay_on_the_workers_with_the_same_check(demo_result):
    # The demo region has enough gauged basins for the held-out check of the bounds: on a
    # cluster whose leave-one-out flows stay on the workers, the repeats' summaries stay
    # there too (the client gets them without residual tails and held-out flows), and the
    # check's table, its widened error model and the coverage equal the in-process run's, and
    # so does a prediction at another level (the region fitted again from the kept flows).
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    from regional.compute import DaskExecutor
    from regional.heldout import start_held_out_check

    here = demo_result
    assert here.fitted.held_out is not None
    executor = DaskExecutor(workers=2)
    try:
        there = _run(DEMO_REGION, executor=executor)
        pd.testing.assert_frame_equal(there.fitted.held_out, here.fitted.held_out)
        assert there.fitted.held_out.attrs == here.fitted.held_out.attrs
        assert there.fitted.error_model.table.equals(here.fitted.error_model.table)
        pd.testing.assert_frame_equal(there.fitted.coverage, here.fitted.coverage)
        # a prediction at another level fits the region again from the kept flows
        from regional.predict import predict_ungauged

        other, kept = predict_ungauged(here, level=0.8), predict_ungauged(there, level=0.8)
        pd.testing.assert_frame_equal(kept.coverage, other.coverage)
        pd.testing.assert_frame_equal(kept.table, other.table)
        pd.testing.assert_frame_equal(kept.flows, other.flows)
        run, method = there.runs[there.chosen_model], there.chosen_method
        options = {"level": 0.9, "repeats": 2, "fit_level": 0.9}
        finish = start_held_out_check(run, method, executor=executor, **options)
        *_, draws = finish(there.fitted.error_model)
        assert len(draws) == 2
        assert all(d.tails is None and d.held_out_flow is None for d in draws)
    finally:
        executor.close()


def test_day_parts_cover_a_frame_in_runs_of_days():
    # A table cut into runs of days (every basin in each part) puts back together as the
    # table; an empty table gives one empty part (a Parquet file needs one for its schema).
    from regional.kept import day_parts

    days = pd.date_range("2001-01-01", periods=10, freq="D", name="date")
    columns = pd.Index(["a", "b", "c"], name="basin_id")
    table = pd.DataFrame(np.arange(30, dtype="float32").reshape(10, 3), days, columns)
    parts = list(day_parts(table, values=12))
    assert [len(part) for part in parts] == [4, 4, 2]
    pd.testing.assert_frame_equal(pd.concat(parts), table, check_freq=False)
    [empty] = list(day_parts(table.iloc[:0], values=12))
    assert empty.empty and empty.columns.equals(columns)
