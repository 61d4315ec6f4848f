"""Tests of regional.repeats: the held-out check's repeats, their flows and summaries."""

from __future__ import annotations

import numpy as np
import pandas as pd

from regional.repeats import _assembled, _held_out_draws, held_out_flows
from regional.transfer.step import fit_methods


def test_held_out_draws_hold_every_basin_out_evenly():
    basins = [f"B{i:02d}" for i in range(34)]
    draws = _held_out_draws(basins, 3, 22, seed=1)
    assert draws == _held_out_draws(basins, 3, 22, seed=1)  # seeded
    assert draws != _held_out_draws(basins, 3, 22, seed=2)
    assert all(len(set(d)) == 3 for d in draws)
    counts = pd.Series([b for d in draws for b in d]).value_counts()
    assert set(counts.index) == set(basins)
    assert counts.max() - counts.min() <= 1  # 66 places over 34 basins: each once or twice


def test_a_repeat_takes_its_flows_out_of_the_arrays_it_is_assembled_from():
    # the repeat's frames are filled a basin at a time from the tasks' arrays, each taken out
    # (and freed) as it is copied: the flows are never held twice; a None reuses the
    # leave-one-out flow
    days = pd.date_range("2001-01-01", periods=5, name="date")
    loo = pd.DataFrame(np.arange(15.0).reshape(5, 3), index=days, columns=["a", "b", "c"])
    flows = {"a": np.full(5, 1.5), "b": None, "c": np.full(5, 2.5)}
    repeat = _assembled(("c",), ["a", "b"], flows, loo)
    assert flows == {}
    assert repeat.training_flow["a"].tolist() == [1.5] * 5
    assert repeat.training_flow["b"].tolist() == loo["b"].tolist()
    assert repeat.held_out_flow["c"].tolist() == [2.5] * 5
    assert (repeat.n_simulated, repeat.n_reused) == (2, 1)


def test_held_out_basins_never_reach_the_fit(demo_result):
    # Independence: giving the held-out basins absurd calibrated parameters must change
    # nothing in the repeat: not the training basins' flows (the error model's material) and
    # not the held-out basins' own flows (they are transferred from the training basins).
    import dataclasses

    method = "regression"
    run = demo_result.runs[demo_result.chosen_model]
    (first,) = held_out_flows(run, method=method, repeats=1, level=0.9, seed=3)
    calibrated = run.context.calibrated.copy()
    calibrated.loc[list(first.held_out), "k_per_day"] = 1.4  # far from every demo basin
    context = dataclasses.replace(run.context, calibrated=calibrated)
    poisoned = dataclasses.replace(run, context=context)
    (again,) = held_out_flows(poisoned, method=method, repeats=1, level=0.9, seed=3)
    assert again.held_out == first.held_out
    pd.testing.assert_frame_equal(again.training_flow, first.training_flow)
    pd.testing.assert_frame_equal(again.held_out_flow, first.held_out_flow)
    assert first.n_simulated == len(run.loo.observed.columns) and first.n_reused == 0


def test_held_out_flows_reuse_leave_one_out_only_where_the_fold_is_the_same(demo_result):
    # Proximity donors that include no held-out basin give the leave-one-out donation again:
    # those flows are reused; every flow, reused or not, equals a fresh fit on the training
    # basins simulated along the leave-one-out path (a reused one as the nearest float32, the
    # leave-one-out flows' storage type: within 6e-8 relative).
    model = demo_result.chosen_model
    run = demo_result.runs[model]
    context = run.context
    (draw,) = held_out_flows(run, method="proximity", repeats=1, level=0.9, seed=4)
    assert draw.n_reused > 0 and draw.n_simulated > 0
    training = list(draw.training_flow.columns)
    assert set(training).isdisjoint(draw.held_out)
    for target in [*training[:4], *draw.held_out]:
        pool = [b for b in training if b != target and b not in context.excluded.get(target, ())]
        estimators, _ = fit_methods(
            context.attributes.loc[pool],
            context.calibrated.loc[pool, list(context.transforms)],
            transforms=context.transforms,
            options=context.options,
            level=0.9,
            methods=["proximity"],
        )
        donation = estimators["proximity"].donate(context.attributes.loc[[target]])
        assert set(donation.sets["donor_id"]).isdisjoint(draw.held_out)
        expected = context.donation_flows(donation, [target])[context.evaluation, 0]
        frame = draw.held_out_flow if target in draw.held_out else draw.training_flow
        np.testing.assert_allclose(frame[target].to_numpy(), expected, rtol=1e-7)


def test_repeats_run_as_tasks_give_the_same_flows(demo_result, tmp_path):
    # On a cluster each repeat's basins run as tasks of a few basins (each task fits and
    # simulates its own, reading its basins' series from the series store); run through an
    # executor in this process, chunks of 3 basins give the repeats of the direct route
    # exactly, reused flows included.
    from dataclasses import replace

    from regional.compute import InProcessExecutor
    from regional.region import convert_series
    from regional.repeats import HELD_OUT_FRACTION, _repeats
    from regional.series import store_reader

    model = demo_result.chosen_model
    settings = demo_result.settings
    convert_series(settings, tmp_path / "store.parquet")
    settings = replace(settings, series=replace(settings.series, path=tmp_path / "store.parquet"))
    context = demo_result.runs[model].context
    dates = context.precip_mm.index
    reader = store_reader(settings, dates, with_temp=context.temp_c is not None)
    assert reader is not None
    for method, read in (("regression", reader), ("proximity", None)):
        run = demo_result.runs[model]
        direct = held_out_flows(run, method=method, repeats=2, level=0.9, seed=5)
        tasks = list(
            _repeats(
                run,
                method,
                repeats=2,
                level=0.9,
                fraction=HELD_OUT_FRACTION,
                seed=5,
                executor=InProcessExecutor(),
                chunk_basins=3,
                reader=read,
            )
        )
        for one, two in zip(direct, tasks, strict=True):
            assert one.held_out == two.held_out
            pd.testing.assert_frame_equal(one.training_flow, two.training_flow, check_exact=True)
            pd.testing.assert_frame_equal(one.held_out_flow, two.held_out_flow, check_exact=True)
            assert (one.n_simulated, one.n_reused) == (two.n_simulated, two.n_reused)


def test_held_out_tasks_are_few_and_large_with_the_next_repeats_in_flight():
    # 4 repeats in flight (3 ahead of the one summarised) x 2 tasks = 4 tasks per worker on 2
    # workers; more workers, more tasks per repeat; never more than HELD_OUT_CHUNK basins.
    from regional.repeats import HELD_OUT_CHUNK, held_out_chunk

    assert held_out_chunk(74, n_workers=2) == 37
    assert held_out_chunk(150, n_workers=2) == HELD_OUT_CHUNK == 64
    assert held_out_chunk(74, n_workers=16) == 5  # 16 tasks per repeat
    assert held_out_chunk(3, n_workers=1) == 3 and held_out_chunk(1, n_workers=64) == 1


def test_a_repeat_summary_reads_the_precipitation_its_tasks_kept(
    tmp_path, demo_result, monkeypatch
):
    # Where the region's series stay in the store (a cluster run), a repeat's summary reads
    # the precipitation of its flow statistics through the tables its tasks kept on the
    # worker (no row read again); the summaries equal those of the in-process check exactly.
    from dataclasses import replace

    from regional import repeatfolds, repeats
    from regional.compute import InProcessExecutor
    from regional.region import convert_series
    from regional.series import StoreReader, store_reader, store_tables

    settings = demo_result.settings
    convert_series(settings, tmp_path / "store.parquet")
    settings = replace(settings, series=replace(settings.series, path=tmp_path / "store.parquet"))
    run = demo_result.runs[demo_result.chosen_model]
    method = demo_result.chosen_method
    days = run.context.precip_mm.index
    reader = store_reader(settings, days, with_temp=run.context.temp_c is not None)
    basins = [str(b) for b in run.context.precip_mm.columns]
    stored = store_tables(reader, pd.Index(basins))["precip_mm"]
    column = repeatfolds.KeptColumn.of(stored, reader, "a check")
    repeatfolds.KeptReader(reader, "a check").read(basins)  # as the repeat's tasks did
    reads = []
    original = StoreReader.read_grids
    monkeypatch.setattr(StoreReader, "read_grids", lambda s, b: reads.append(b) or original(s, b))
    pd.testing.assert_frame_equal(
        column.reindex(columns=basins[::-1]),
        stored.reindex(columns=basins[::-1]),
        check_exact=True,
    )
    assert reads == [basins[::-1][i : i + 64] for i in range(0, len(basins), 64)]  # the store's
    # with the kept tables full, basins not kept are read as the store's table reads them
    monkeypatch.setattr(repeatfolds, "KEPT_TABLE_BYTES", 0)
    full = repeatfolds.KeptColumn.of(stored, reader, "a full check")
    del reads[:]
    pd.testing.assert_frame_equal(full.reindex(columns=basins), stored[basins], check_exact=True)
    assert len(reads) == 2 * len(range(0, len(basins), 64))  # each read once by each table
    monkeypatch.undo()
    monkeypatch.setattr(StoreReader, "read_grids", lambda s, b: reads.append(b) or original(s, b))
    # over other days, or where no store reader is given: the store's table as it is
    assert repeatfolds.KeptColumn.of(stored.over(np.arange(5)), reader, "a check").shape[0] == 5
    assert not isinstance(
        repeatfolds.KeptColumn.of(stored, None, "a check"), repeatfolds.KeptColumn
    )

    job = repeats.SummaryJob(run.loo.observed, run.loo.simulated[method], stored, 0.8, 3)
    stored_run = replace(run, context=replace(run.context, precip_mm=stored))
    options = {"repeats": 3, "fit_level": 0.9, "job": job, "reader": reader}

    def summaries() -> tuple[list, int]:
        del reads[:]
        found = repeats.repeat_summaries(
            stored_run, method, executor=InProcessExecutor(), **options
        )
        return list(found), len(reads)

    kept, kept_reads = summaries()
    monkeypatch.setattr(repeatfolds.KeptColumn, "of", lambda table, reader, check: table)
    read_again, reads_again = summaries()
    assert kept_reads == 1 < reads_again  # the tasks read the basins once, the summaries never
    for one, two in zip(kept, read_again, strict=True):
        pd.testing.assert_frame_equal(
            one.training_statistics, two.training_statistics, check_exact=True
        )
        pd.testing.assert_frame_equal(
            one.held_out_statistics, two.held_out_statistics, check_exact=True
        )
