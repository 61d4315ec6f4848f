"""Figures as jobs: drawn from the run without its daily series plus each job's own series,
every figure's PNG bytes equal those drawn from the whole run (what a cluster's worker draws is
what this process draws)."""

from __future__ import annotations

import pickle

import matplotlib
import pandas as pd

from regional.report import figure_jobs, make_figures
from regional.report.jobs import draw_jobs, job_series, with_series, without_series

matplotlib.use("Agg")


def test_every_figure_has_a_job_in_report_order(tiny_run):
    assert tiny_run.prediction is not None and tiny_run.screening is not None
    jobs = figure_jobs(tiny_run)
    assert [job.name for job in jobs] == list(make_figures(tiny_run))
    pages = [job for job in jobs if job.name.startswith("ungauged_hydrographs")]
    assert sorted(b for job in pages for b in job.site_basins) == sorted(tiny_run.region.ungauged)
    (hydrographs,) = [job for job in jobs if job.name == "hydrographs"]
    assert 1 <= len(hydrographs.loo_basins) <= 3
    assert set(hydrographs.loo_basins) <= set(tiny_run.region.gauged)


def test_the_shared_run_holds_no_daily_series(tiny_run):
    shared = without_series(tiny_run)
    region = shared.region
    for name in ("precip_mm", "pet_mm", "flow_mm"):
        grid = getattr(region, name)
        assert grid.shape == (len(region.dates), 0)
    for run in shared.runs.values():
        assert run.context is None and run.loo.observed.shape[1] == 0
        assert all(flows.shape[1] == 0 for flows in run.loo.simulated.values())
        assert run.loo.observed.index.equals(tiny_run.runs[run.model].loo.observed.index)
    assert shared.fitted is None and shared.prediction.held_out_draws == ()
    assert shared.prediction.daily.flow_mm.shape[1] == 0
    # what every worker receives once is a small part of the run
    assert len(pickle.dumps(shared)) < len(pickle.dumps(tiny_run)) / 3


def test_the_statistics_tables_travel_compact_and_come_back_as_they_were(tiny_run):
    # the flow statistics' long tables travel with their text columns as categories (their
    # names repeat on every row) and are given back equal, dtypes included, on the worker
    from regional.report.jobs import _LONG_STATISTICS, _expanded

    shared = without_series(tiny_run)
    statistics = tiny_run.statistics
    sizes = {
        name: (len(pickle.dumps(getattr(shared.statistics, name))), len(pickle.dumps(table)))
        for name in _LONG_STATISTICS
        if len(table := getattr(statistics, name))
    }
    assert all(compact < whole for compact, whole in sizes.values())
    assert sizes["loo"][0] < sizes["loo"][1] / 2  # the longest: a row per basin, statistic, route
    back = _expanded(pickle.loads(pickle.dumps(shared)))
    for name in _LONG_STATISTICS:
        pd.testing.assert_frame_equal(getattr(back.statistics, name), getattr(statistics, name))
    assert _expanded(tiny_run) is tiny_run  # a run not compacted is used as it is


def test_a_job_series_puts_back_only_its_own_basins(tiny_run):
    shared = without_series(tiny_run)
    for job in figure_jobs(tiny_run):
        series = job_series(job, tiny_run)
        rebuilt = with_series(shared, series)
        if job.site_basins:
            assert list(rebuilt.prediction.daily.flow_mm.columns) == list(job.site_basins)
            whole = tiny_run.prediction.daily
            for part in ("flow_mm", "low_mm", "high_mm"):
                got = getattr(rebuilt.prediction.daily, part)
                assert got.equals(getattr(whole, part)[list(job.site_basins)])
        for model, run in rebuilt.runs.items():
            assert list(run.loo.observed.columns) == list(job.loo_basins)
            whole = tiny_run.runs[model].loo
            for method, flows in run.loo.simulated.items():
                assert flows.equals(whole.simulated[method][list(job.loo_basins)])


def test_png_bytes_from_the_shipped_parts_equal_those_of_the_whole_run(tiny_run):
    # the in-process route draws from the whole run; a cluster's task from the shared run and
    # its own series: every figure's PNG must be the same bytes (same data, same metadata)
    jobs = figure_jobs(tiny_run)
    here = draw_jobs([(job, None) for job in jobs], tiny_run)
    shared = pickle.loads(pickle.dumps(without_series(tiny_run)))
    shipped = [pickle.loads(pickle.dumps((job, job_series(job, tiny_run)))) for job in jobs]
    there = draw_jobs(shipped, shared)
    assert len(here) == len(jobs) and all(png.startswith(b"\x89PNG") for png in here)
    for job, first, second in zip(jobs, here, there, strict=True):
        assert first == second, job.name
