"""Tests of regional.heldout: gauged basins held out of the whole fit, and widening."""

from __future__ import annotations

import numpy as np
import pandas as pd

from regional import repeatcoverage
from regional.bounds import conformal_bounds
from regional.predict import predict_ungauged
from regional.repeats import held_out_flows


def test_classes_short_of_the_level_are_widened_in_the_bounds(demo_result, monkeypatch):
    # With no tolerance every flow class whose held-out coverage is below the level is rebuilt
    # at level + shortfall: its quantiles grow, the others stay, and a note says so.
    monkeypatch.setattr(repeatcoverage, "WIDEN_TOLERANCE", 0.0)
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
    from regional.heldout import held_out_check
    from regional.repeatcoverage import HeldOutSummary, held_out_coverage

    monkeypatch.setattr(repeatcoverage, "WIDEN_TOLERANCE", 0.0)
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
