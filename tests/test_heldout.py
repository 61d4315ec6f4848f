"""Tests of regional.heldout: gauged basins held out of the whole fit, and widening."""

from __future__ import annotations

import numpy as np
import pandas as pd

from regional import coverage
from regional.bounds import conformal_bounds
from regional.heldout import _assembled, _held_out_draws, held_out_flows
from regional.predict import predict_ungauged
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


def test_classes_short_of_the_level_are_widened_in_the_bounds(demo_result, monkeypatch):
    # With no tolerance every flow class whose held-out coverage is below the level is rebuilt
    # at level + shortfall: its quantiles grow, the others stay, and a note says so.
    monkeypatch.setattr(coverage, "WIDEN_TOLERANCE", 0.0)
    run = demo_result.runs[demo_result.chosen_model]
    plain = conformal_bounds(
        run.loo.observed, run.loo.simulated[demo_result.chosen_method], level=0.8
    )
    prediction = predict_ungauged(demo_result, level=0.8)
    used = prediction.error_model["level"].to_numpy()
    widened = used > 0.8
    assert widened.any()
    shortfall = 0.8 - prediction.held_out.set_index("flow_class")["held_out_coverage"]
    classes = [f"class {c}" for c in range(1, len(used) + 1)]
    np.testing.assert_allclose(used[widened], 0.8 + shortfall[classes].to_numpy()[widened])
    upper, lower = prediction.error_model["upper_q"], prediction.error_model["lower_q"]
    assert (upper.to_numpy()[widened] >= plain.upper_q[widened]).all()
    assert (lower.to_numpy()[widened] <= plain.lower_q[widened]).all()
    np.testing.assert_allclose(upper.to_numpy()[~widened], plain.upper_q[~widened])
    assert any("bounds widened" in note for note in prediction.notes)
    chosen = prediction.coverage[prediction.coverage["method"] == prediction.method].iloc[0]
    assert chosen["widened_classes"].startswith(tuple(str(c) for c in range(1, 6)))


def test_held_out_check_keeps_summaries_with_the_coverage_of_the_whole_repeats(
    demo_result, monkeypatch
):
    # The check keeps per repeat the tails of its error model, the held-out flows and the
    # statistics, not the training basins' daily flows; its table (widened too) equals the one
    # computed from the whole repeats.
    from regional.bounds import conformal_bounds
    from regional.coverage import HeldOutSummary, held_out_coverage
    from regional.heldout import held_out_check

    monkeypatch.setattr(coverage, "WIDEN_TOLERANCE", 0.0)
    run = demo_result.runs[demo_result.chosen_model]
    observed = run.loo.observed
    simulated = run.loo.simulated[demo_result.chosen_method]
    plain = conformal_bounds(observed, simulated, level=0.8)
    level = demo_result.settings.prediction.level
    method = demo_result.chosen_method
    table, model, _, kept = held_out_check(
        run,
        method,
        plain,
        level=0.8,
        repeats=demo_result.settings.prediction.held_out_repeats,
        fit_level=level,
    )
    assert all(isinstance(k, HeldOutSummary) for k in kept)
    whole = held_out_flows(run, method=method, repeats=len(kept), level=level)
    assert [w.held_out for w in whole] == [k.held_out for k in kept]
    k = plain.n_classes
    expected = held_out_coverage(observed, whole, level=0.8, n_classes=k)
    rows = table.set_index("flow_class")
    np.testing.assert_array_equal(rows["held_out_coverage"], expected["coverage"])
    widened = held_out_coverage(observed, whole, level=0.8, n_classes=k, class_levels=model.levels)
    np.testing.assert_array_equal(rows["held_out_coverage_widened"], widened["coverage"])
    for summary, draw in zip(kept, whole, strict=True):
        pd.testing.assert_frame_equal(summary.held_out_flow, draw.held_out_flow)


def test_the_heap_a_repeat_freed_is_returned_as_each_repeat_comes_back(demo_result, monkeypatch):
    # each repeat's freed memory goes back to the system before the next repeat is taken
    # (not at the end of the stage), and the check's table is the same either way
    from regional import heldout

    run = demo_result.runs[demo_result.chosen_model]
    method = demo_result.chosen_method
    error_model = conformal_bounds(run.loo.observed, run.loo.simulated[method], level=0.8)
    settings = {"level": 0.8, "repeats": 3, "fit_level": demo_result.settings.prediction.level}
    before, _, _, _ = heldout.held_out_check(run, method, error_model, **settings)
    taken = []
    original = heldout._finished_check

    def counting(run, method, started, *args, **kwargs):
        def repeats():
            for item in started:
                taken.append(("repeat", len(taken)))
                yield item

        return original(run, method, repeats(), *args, **kwargs)

    monkeypatch.setattr(heldout, "_finished_check", counting)
    monkeypatch.setattr(heldout, "release_freed_memory", lambda: taken.append(("released",)))
    after, _, _, _ = heldout.held_out_check(run, method, error_model, **settings)
    assert [entry[0] for entry in taken] == ["repeat", "released"] * 3
    pd.testing.assert_frame_equal(after, before)


def test_repeats_run_as_tasks_give_the_same_flows(demo_result, tmp_path):
    # On a cluster each repeat's basins run as tasks of a few basins (each task fits and
    # simulates its own, reading its basins' series from the series store); run through an
    # executor in this process, chunks of 3 basins give the repeats of the direct route
    # exactly, reused flows included.
    from dataclasses import replace

    from regional.compute import InProcessExecutor
    from regional.heldout import HELD_OUT_FRACTION, _repeats
    from regional.region import convert_series
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


def test_held_out_folds_equal_a_refit_per_fold(demo_result, monkeypatch):
    # Training basins (leave-one-out within the pool, nested basins left out) and held-out
    # basins (the pool's fit) get the flows of a refit per basin, reused flows included.
    from refit_route import refit_pool

    from regional import heldout

    run = demo_result.runs[demo_result.chosen_model]
    for method in ("regression", "similarity", "proximity", "median"):
        batched = held_out_flows(run, method=method, repeats=2, level=0.9, seed=5)
        with monkeypatch.context() as patch:
            patch.setattr(heldout, "prepared_pool", refit_pool)
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


def test_held_out_check_on_a_cluster_without_a_barrier_equals_the_in_process_check(demo_result):
    # On a 2-worker local cluster (distributed.LocalCluster) the tasks of the next repeats are
    # submitted while the client summarises one (DaskExecutor.map_batches, no barrier per
    # repeat); the table, the error model and every repeat's summary equal the in-process ones.
    import pytest

    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    from regional.compute import DaskExecutor
    from regional.heldout import held_out_check

    run = demo_result.runs[demo_result.chosen_model]
    method = demo_result.chosen_method
    plain = conformal_bounds(run.loo.observed, run.loo.simulated[method], level=0.8)
    options = {"level": 0.8, "repeats": 4, "fit_level": demo_result.settings.prediction.level}
    here = held_out_check(run, method, plain, **options)
    executor = DaskExecutor(workers=2)
    try:
        there = held_out_check(run, method, plain, executor=executor, **options)
    finally:
        executor.close()
    pd.testing.assert_frame_equal(here[0], there[0], check_exact=True)
    assert here[0].attrs == there[0].attrs and here[2] == there[2]
    pd.testing.assert_frame_equal(here[1].table, there[1].table, check_exact=True)
    assert len(here[3]) == len(there[3]) == 4
    for one, two in zip(here[3], there[3], strict=True):
        assert (one.held_out, one.training) == (two.held_out, two.training)
        pd.testing.assert_frame_equal(one.held_out_flow, two.held_out_flow, check_exact=True)
        pd.testing.assert_frame_equal(
            one.training_statistics, two.training_statistics, check_exact=True
        )
        assert (one.n_simulated, one.n_reused) == (two.n_simulated, two.n_reused)


def test_held_out_tasks_are_few_and_large_with_the_next_repeats_in_flight():
    # 4 repeats in flight (3 ahead of the one summarised) x 2 tasks = 4 tasks per worker on 2
    # workers; more workers, more tasks per repeat; never more than HELD_OUT_CHUNK basins.
    from regional.heldout import HELD_OUT_CHUNK, held_out_chunk

    assert held_out_chunk(74, n_workers=2) == 37
    assert held_out_chunk(150, n_workers=2) == HELD_OUT_CHUNK == 64
    assert held_out_chunk(74, n_workers=16) == 5  # 16 tasks per repeat
    assert held_out_chunk(3, n_workers=1) == 3 and held_out_chunk(1, n_workers=64) == 1


def test_the_check_starts_its_repeats_before_it_is_given_the_error_model(demo_result):
    # start_held_out_check hands the repeats to the executor at once (on a cluster the workers
    # simulate them while the caller builds the error model); finished with the error model
    # it gives what held_out_check gives in process.
    from regional.compute import InProcessExecutor
    from regional.heldout import held_out_check, start_held_out_check

    calls: list[str] = []

    class Recording(InProcessExecutor):
        def map_batches(self, batches, *, ahead=3, shared=None, keep=False):
            calls.append("repeats handed over")
            return super().map_batches(batches, ahead=ahead, shared=shared, keep=keep)

    run = demo_result.runs[demo_result.chosen_model]
    method = demo_result.chosen_method
    options = {"level": 0.8, "repeats": 3, "fit_level": demo_result.settings.prediction.level}
    finish = start_held_out_check(run, method, executor=Recording(), **options)
    assert calls == ["repeats handed over"]
    plain = conformal_bounds(run.loo.observed, run.loo.simulated[method], level=0.8)
    started, here = finish(plain), held_out_check(run, method, plain, **options)
    pd.testing.assert_frame_equal(started[0], here[0], check_exact=True)
    assert started[0].attrs == here[0].attrs and started[2] == here[2]
    pd.testing.assert_frame_equal(started[1].table, here[1].table, check_exact=True)
    assert [s.held_out for s in started[3]] == [s.held_out for s in here[3]]


def test_a_worker_keeps_the_tables_it_read_for_the_next_repeats(
    tmp_path, demo_result, monkeypatch
):
    # The kept reader gives the tables of the store reader exactly (values, dtype, layout);
    # basins read once are not read again within the same check, up to the byte budget.
    from dataclasses import replace

    from regional import heldout
    from regional.region import convert_series
    from regional.series import store_reader

    settings = demo_result.settings
    convert_series(settings, tmp_path / "store.parquet")
    settings = replace(settings, series=replace(settings.series, path=tmp_path / "store.parquet"))
    context = demo_result.runs[demo_result.chosen_model].context
    reader = store_reader(settings, context.precip_mm.index, with_temp=context.temp_c is not None)
    basins = [str(b) for b in context.calibrated.index]
    first, second = basins[:5], [basins[4], basins[2], basins[0]]
    kept = heldout._KeptReader(reader, check="one check")
    assert kept.read(first).rows_read > 0
    again = kept.read(second)
    assert again.rows_read == 0  # all three were read before
    for name, table in reader.read(second).tables.items():
        pd.testing.assert_frame_equal(again.tables[name], table, check_exact=True)
        assert (
            again.tables[name].to_numpy().flags.f_contiguous == table.to_numpy().flags.f_contiguous
        )
    assert heldout._KeptReader(reader, check="another").read(second).rows_read > 0
    monkeypatch.setattr(heldout, "KEPT_TABLE_BYTES", 0)
    none_kept = heldout._KeptReader(reader, check="a third")
    none_kept.read(first)
    assert none_kept.read(first).rows_read > 0  # nothing kept within a budget of 0 bytes


def test_a_repeat_summary_reads_the_precipitation_its_tasks_kept(
    tmp_path, demo_result, monkeypatch
):
    # Where the region's series stay in the store (a cluster run), a repeat's summary reads
    # the precipitation of its flow statistics through the tables its tasks kept on the
    # worker (no row read again); the summaries equal those of the in-process check exactly.
    from dataclasses import replace

    from regional import heldout
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
    column = heldout._KeptColumn.of(stored, reader, "a check")
    heldout._KeptReader(reader, "a check").read(basins)  # as the repeat's tasks did
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
    monkeypatch.setattr(heldout, "KEPT_TABLE_BYTES", 0)
    full = heldout._KeptColumn.of(stored, reader, "a full check")
    del reads[:]
    pd.testing.assert_frame_equal(full.reindex(columns=basins), stored[basins], check_exact=True)
    assert len(reads) == 2 * len(range(0, len(basins), 64))  # each read once by each table
    monkeypatch.undo()
    monkeypatch.setattr(StoreReader, "read_grids", lambda s, b: reads.append(b) or original(s, b))
    # over other days, or where no store reader is given: the store's table as it is
    assert heldout._KeptColumn.of(stored.over(np.arange(5)), reader, "a check").shape[0] == 5
    assert not isinstance(heldout._KeptColumn.of(stored, None, "a check"), heldout._KeptColumn)

    job = heldout._SummaryJob(run.loo.observed, run.loo.simulated[method], stored, 0.8, 3)
    stored_run = replace(run, context=replace(run.context, precip_mm=stored))
    options = {"repeats": 3, "fit_level": 0.9, "job": job, "reader": reader}

    def summaries() -> tuple[list, int]:
        del reads[:]
        found = heldout._summaries(stored_run, method, executor=InProcessExecutor(), **options)
        return list(found), len(reads)

    kept, kept_reads = summaries()
    monkeypatch.setattr(heldout._KeptColumn, "of", lambda table, reader, check: table)
    read_again, reads_again = summaries()
    assert kept_reads == 1 < reads_again  # the tasks read the basins once, the summaries never
    for one, two in zip(kept, read_again, strict=True):
        pd.testing.assert_frame_equal(
            one.training_statistics, two.training_statistics, check_exact=True
        )
        pd.testing.assert_frame_equal(
            one.held_out_statistics, two.held_out_statistics, check_exact=True
        )
