"""Tests of regional.repeatfolds: the folds of the held-out check's repeats, and what a worker
keeps across their tasks."""

from __future__ import annotations

import pandas as pd

from regional.repeats import held_out_flows


def test_held_out_folds_equal_a_refit_per_fold(demo_result, monkeypatch):
    # Training basins (leave-one-out within the pool, nested basins left out) and held-out
    # basins (the pool's fit) get the flows of a refit per basin, reused flows included.
    from refit_route import refit_pool

    from regional import repeatfolds

    run = demo_result.runs[demo_result.chosen_model]
    for method in ("regression", "similarity", "proximity", "median"):
        batched = held_out_flows(run, method=method, repeats=2, level=0.9, seed=5)
        with monkeypatch.context() as patch:
            patch.setattr(repeatfolds, "prepared_pool", refit_pool)
            refit = held_out_flows(run, method=method, repeats=2, level=0.9, seed=5)
        for new, old in zip(batched, refit, strict=True):
            assert (new.held_out, new.n_reused, new.n_simulated) == (
                old.held_out,
                old.n_reused,
                old.n_simulated,
            )
            for frame in ("training_flow", "held_out_flow"):
                pd.testing.assert_frame_equal(
                    getattr(new, frame), getattr(old, frame), check_exact=False, rtol=1e-10
                )


def test_a_worker_keeps_the_tables_it_read_for_the_next_repeats(
    tmp_path, demo_result, monkeypatch
):
    # The kept reader gives the tables of the store reader exactly (values, dtype, layout);
    # basins read once are not read again within the same check, up to the byte budget.
    from dataclasses import replace

    from regional import repeatfolds
    from regional.region import convert_series
    from regional.series import store_reader

    settings = demo_result.settings
    convert_series(settings, tmp_path / "store.parquet")
    settings = replace(settings, series=replace(settings.series, path=tmp_path / "store.parquet"))
    context = demo_result.runs[demo_result.chosen_model].context
    reader = store_reader(settings, context.precip_mm.index, with_temp=context.temp_c is not None)
    basins = [str(b) for b in context.calibrated.index]
    first, second = basins[:5], [basins[4], basins[2], basins[0]]
    kept = repeatfolds.KeptReader(reader, check="one check")
    assert kept.read(first).rows_read > 0
    again = kept.read(second)
    assert again.rows_read == 0  # all three were read before
    for name, table in reader.read(second).tables.items():
        pd.testing.assert_frame_equal(again.tables[name], table, check_exact=True)
        assert (
            again.tables[name].to_numpy().flags.f_contiguous == table.to_numpy().flags.f_contiguous
        )
    assert repeatfolds.KeptReader(reader, check="another").read(second).rows_read > 0
    monkeypatch.setattr(repeatfolds, "KEPT_TABLE_BYTES", 0)
    none_kept = repeatfolds.KeptReader(reader, check="a third")
    none_kept.read(first)
    assert none_kept.read(first).rows_read > 0  # nothing kept within a budget of 0 bytes
