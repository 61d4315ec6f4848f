"""Figures of a run: each is a pyplot-free Figure with its data drawn, checked against the
run's own tables (two routes to the same numbers)."""

from __future__ import annotations

from dataclasses import replace

import matplotlib
import numpy as np
import pandas as pd
import pytest
from conftest import fake_prediction, fake_screening
from matplotlib.collections import PathCollection, PolyCollection
from matplotlib.figure import Figure

from regional.models import get_model
from regional.report import figures, make_figures

matplotlib.use("Agg")

BASE_NAMES = ["loo_nse_map", "parameters", "nse_cdf", "hydrographs"]


def replace_fields(namespace, **changes):
    """A copy of a fake prediction (a SimpleNamespace) with some fields changed."""
    return type(namespace)(**(vars(namespace) | changes))


def _has_data(fig: Figure) -> bool:
    return any(ax.lines or ax.collections or ax.patches for ax in fig.axes)


def _scores(result, method, model=None):
    scores = result.runs[model or result.chosen_model].loo.scores
    return scores[scores["method"] == method].set_index("basin_id")["nse"]


# ---------------------------------------------------------------------------------------------
# make_figures


def test_make_figures_without_prediction_or_screening_draws_the_base_set(bare_run):
    drawn = make_figures(bare_run)
    assert list(drawn) == [*BASE_NAMES, "model_comparison"]
    for name, fig in drawn.items():
        assert isinstance(fig, Figure), name
        assert fig.axes, name
        assert _has_data(fig), name


def test_make_figures_with_prediction_and_screening_adds_their_figures(full_run):
    drawn = make_figures(full_run)
    assert list(drawn) == [
        *BASE_NAMES,
        "model_comparison",
        "ungauged_mean_flow_map",
        "ungauged_hydrographs",
        "statistics_loo",
        "statistics_fdc",
        "screening",
    ]
    assert all(_has_data(fig) for fig in drawn.values())


def test_statistics_figures_are_drawn_without_a_prediction(tiny_run):
    # Flow statistics are validated in leave-one-out even where no basin is ungauged.
    drawn = make_figures(replace(tiny_run, prediction=None, screening=None))
    assert "statistics_loo" in drawn and _has_data(drawn["statistics_loo"])


def test_make_figures_one_model_leaves_out_the_comparison(bare_run):
    model = bare_run.chosen_model
    one = replace(
        bare_run,
        runs={model: bare_run.runs[model]},
        summary=bare_run.summary[bare_run.summary["model"] == model],
    )
    assert "model_comparison" not in make_figures(one)


def test_figures_leave_no_pyplot_state(full_run):
    import matplotlib.pyplot as plt

    before = plt.get_fignums()
    make_figures(full_run)
    assert plt.get_fignums() == before


def test_every_figure_renders_to_png(full_run):
    import io

    for name, fig in make_figures(full_run).items():
        buffer = io.BytesIO()
        fig.savefig(buffer, format="png", dpi=30)
        assert buffer.getvalue()[:8] == b"\x89PNG\r\n\x1a\n", name


# ---------------------------------------------------------------------------------------------
# Leave-one-out figures


def _drawn_colours(fig, region) -> pd.DataFrame:
    """Face colour of each basin on a map: basins are drawn in one pass, larger first."""
    collection = next(
        c for c in fig.axes[0].collections if len(c.get_facecolors()) == len(region.basins)
    )
    if region.is_point:
        order = list(region.basins.index)
    else:
        area = region.basins.geometry.area.to_numpy()
        order = list(region.basins.index[np.argsort(-area, kind="stable")])
    return pd.DataFrame(collection.get_facecolors(), index=order, columns=list("rgba"))


def test_loo_nse_map_colours_every_gauged_basin_and_leaves_ungauged_white(bare_run):
    fig = figures.loo_nse_map(bare_run)
    region = bare_run.region
    colours = _drawn_colours(fig, region)
    white = (colours == 1.0).all(axis=1)
    assert set(colours.index[white]) == set(region.ungauged)
    assert len(fig.axes) == 2  # map and colour bar
    assert "NSE" in fig.axes[1].get_ylabel()
    assert fig.axes[0].get_xlabel().startswith("Easting")


def test_loo_nse_map_colours_follow_nse_order(bare_run):
    fig = figures.loo_nse_map(bare_run, label_basins=False)
    gauged = list(bare_run.region.gauged)
    colours = _drawn_colours(fig, bare_run.region).loc[gauged]
    nse = _scores(bare_run, bare_run.chosen_method).reindex(gauged).to_numpy()
    # viridis brightens with value: the best basin is drawn brighter than the worst
    brightness = colours[["r", "g", "b"]].sum(axis=1).to_numpy()
    assert brightness[np.argmax(nse)] > brightness[np.argmin(nse)]


def test_loo_nse_map_draws_points_for_outlet_basins(bare_run):
    region = bare_run.region
    points = region.basins.copy()
    points["geometry"] = points.geometry.centroid
    point_run = replace(bare_run, region=replace(region, basins=points, is_point=True))
    fig = figures.loo_nse_map(point_run)
    scatters = [c for c in fig.axes[0].collections if isinstance(c, PathCollection)]
    assert [len(c.get_offsets()) for c in scatters] == [len(region.basins)]
    colours = _drawn_colours(fig, point_run.region)
    assert set(colours.index[(colours == 1.0).all(axis=1)]) == set(region.ungauged)


def test_parameter_scatter_has_one_panel_per_parameter_and_method(bare_run):
    for model, run in bare_run.runs.items():
        fig = figures.parameter_scatter(bare_run, model=model)
        n_params = len(get_model(model).parameters)
        n_methods = len([m for m in run.loo.methods if m != "calibrated"])
        assert len(fig.axes) == n_params * n_methods


def test_parameter_scatter_points_are_calibrated_vs_transferred(bare_run):
    model = "linear"
    loo = bare_run.runs[model].loo
    fig = figures.parameter_scatter(bare_run, model=model)
    params = loo.params.pivot(index="basin_id", columns="method")["k_per_day"]
    methods = [m for m in loo.methods if m != "calibrated"]
    for ax, method in zip(fig.axes, methods, strict=True):
        offsets = np.asarray(ax.collections[0].get_offsets())
        np.testing.assert_allclose(offsets[:, 0], params["calibrated"].to_numpy())
        np.testing.assert_allclose(offsets[:, 1], params[method].to_numpy())
        assert ax.get_xscale() == "log"  # k_per_day is log-transformed
        assert ax.get_yscale() == "log"
        assert [line.get_label() for line in ax.lines] == ["1:1"]


def test_nse_cdf_one_curve_per_method_with_baselines_marked(bare_run):
    fig = figures.nse_cdf(bare_run)
    ax = fig.axes[0]
    methods = bare_run.runs[bare_run.chosen_model].loo.methods
    assert len(ax.lines) == len(methods) + 2  # plus the guide lines at 0 and 0.5
    labels = [line.get_label() for line in ax.lines[: len(methods)]]
    assert labels[0].startswith("calibrated (upper bound)")
    assert labels[1].startswith("median (benchmark)")
    assert ax.lines[0].get_linestyle() == "--"
    assert ax.lines[1].get_linestyle() == ":"
    for line in ax.lines[: len(methods)]:
        assert line.get_ydata()[-1] == pytest.approx(1.0)
    assert ax.get_xlim() == (-1.0, 1.0)


def test_nse_cdf_counts_values_below_the_axis(bare_run):
    fig = figures.nse_cdf(bare_run)
    note = fig.axes[0].texts[0].get_text()
    methods = bare_run.runs[bare_run.chosen_model].loo.methods
    below = {m: int((_scores(bare_run, m) < -1).sum()) for m in methods}
    for method, count in below.items():
        if count:
            assert f"{method}: {count}" in note
    if not any(below.values()):
        assert note == ""


def test_hydrographs_show_best_median_and_worst_basin(bare_run):
    method = bare_run.chosen_method
    fig = figures.hydrographs(bare_run)
    nse = _scores(bare_run, method).dropna().sort_values(ascending=False)
    expected = [nse.index[0], nse.index[(len(nse) - 1) // 2], nse.index[-1]]
    expected = list(dict.fromkeys(expected))
    assert len(fig.axes) == len(expected)
    for ax, basin, label in zip(fig.axes, expected, ["best", "median", "worst"], strict=False):
        assert ax.get_title(loc="left").startswith(f"{label}: {basin}")
        assert len(ax.lines) == 4  # observed, calibrated, transferred and the floor
        assert ax.get_ylabel() == "Flow (m3/s)"  # the report's default unit
    observed = bare_run.runs[bare_run.chosen_model].loo.observed[expected[0]]
    area = bare_run.region.attributes.loc[expected[0], "area_km2"]
    drawn = fig.axes[0].lines[0].get_ydata()
    floor = fig.axes[0].lines[3].get_ydata()[0]
    # m3/s = mm/day x km2 / 86.4 (1 mm over 1 km2 is 1,000 m3; 86,400 s a day)
    expected_m3s = np.maximum(observed.to_numpy()[-len(drawn) :] * area / 86.4, floor)
    np.testing.assert_allclose(drawn, expected_m3s)


def test_hydrographs_window_and_linear_axis(bare_run):
    fig = figures.hydrographs(bare_run, years=0.5, log=False)
    dates = fig.axes[0].lines[0].get_xdata()
    assert 180 <= len(dates) <= 184
    assert fig.axes[0].get_yscale() == "linear"


def test_model_comparison_one_bar_per_model_and_method(bare_run):
    fig = figures.model_comparison(bare_run)
    ax = fig.axes[0]
    n_methods = bare_run.summary["method"].nunique()
    assert len(ax.patches) == len(bare_run.runs) * n_methods
    heights = sorted(p.get_height() for p in ax.patches)
    np.testing.assert_allclose(heights, sorted(bare_run.summary["median_nse"]))


# ---------------------------------------------------------------------------------------------
# Prediction and screening figures


def test_ungauged_mean_flow_map_hatches_non_applicable_basins(full_run):
    fig = figures.ungauged_mean_flow_map(full_run)
    table = full_run.prediction.table
    flagged = int((~table["applicable"]).sum())
    hatched = [c for c in fig.axes[0].collections if c.get_hatch()]
    assert [len(c.get_paths()) for c in hatched] == [flagged]
    assert fig.axes[1].get_ylabel() == "Estimated mean flow (m3/s)"


def _site_titles(pages) -> list[str]:
    return [
        ax.get_title(loc="left")
        for fig in pages.values()
        for ax in fig.axes
        if ax.get_title("left")
    ]


def test_every_ungauged_basin_is_in_some_hydrograph_figure(full_run):
    ungauged = list(full_run.region.ungauged)
    pages = figures.ungauged_hydrograph_pages(full_run, per_figure=1)
    assert list(pages) == ["ungauged_hydrographs"] + [
        f"ungauged_hydrographs_{n}" for n in range(2, len(ungauged) + 1)
    ]
    hydrograph_titles = [t for t in _site_titles(pages) if not t.startswith("flow duration")]
    assert sorted(t.split()[0] for t in hydrograph_titles) == sorted(ungauged)
    assert f"figure 2 of {len(ungauged)}" in pages["ungauged_hydrographs_2"].get_suptitle()


def test_make_figures_draws_every_page(full_run):
    settings = replace(
        full_run.settings, report=replace(full_run.settings.report, sites_per_figure=1)
    )
    drawn = make_figures(replace(full_run, settings=settings))
    pages = [name for name in drawn if name.startswith("ungauged_hydrographs")]
    assert len(pages) == len(full_run.region.ungauged)


def test_site_pages_build_only_their_own_basins_series(full_run, monkeypatch):
    # The drawers of the site pages hold no daily series; drawing a page builds its own
    # basins' series alone, so the series of every ungauged basin are never held at once.
    built = []
    site_series = figures._site_series

    def spy(result, basins):
        built.append(list(basins))
        return site_series(result, basins)

    monkeypatch.setattr(figures, "_site_series", spy)
    settings = replace(
        full_run.settings, report=replace(full_run.settings.report, sites_per_figure=1)
    )
    result = replace(full_run, settings=settings)
    drawers = figures.figure_drawers(result)
    pages = [name for name in drawers if name.startswith("ungauged_hydrographs")]
    assert built == [] and len(pages) == len(full_run.region.ungauged) > 1
    for name in pages:
        drawers[name]()
    assert sorted(b for page in built for b in page) == sorted(full_run.region.ungauged)
    assert all(len(page) == 1 for page in built)


@pytest.mark.parametrize(
    ("count", "per_page", "sizes"), [(14, 6, [5, 5, 4]), (6, 6, [6]), (7, 6, [4, 3]), (1, 6, [1])]
)
def test_pages_are_filled_evenly(count, per_page, sizes):
    items = [f"B{i:02d}" for i in range(count)]
    pages = figures._pages(items, per_page)
    assert [len(page) for page in pages] == sizes
    assert sum(pages, []) == items


def test_site_panels_draw_the_window_and_the_whole_period_duration_curve(full_run):
    fig = figures.ungauged_hydrographs(full_run)
    ungauged = list(full_run.region.ungauged)
    assert len(fig.axes) == 2 * len(ungauged)
    left, right = fig.axes[0], fig.axes[1]
    assert any(isinstance(c, PolyCollection) for c in left.collections)  # the band
    assert any(isinstance(c, PolyCollection) for c in right.collections)
    dates = left.lines[0].get_xdata()
    assert len(dates) == 365  # default window: the last 365 days
    assert right.get_xlim() == (0.0, 100.0)
    assert right.get_title(loc="left").startswith("flow duration")
    assert left.get_ylabel() == "Flow (m3/s)"


def test_duration_curve_is_the_weibull_quantile():
    # reference: numpy.quantile(method="weibull"), plotting position i / (n + 1)
    # (Hyndman and Fan 1996, definition 6); exceedance p is non-exceedance 1 - p
    values = np.random.default_rng(3).lognormal(0.0, 1.0, 500)
    exceedance = np.array([1.0, 5.0, 50.0, 95.0, 99.0])
    expected = np.quantile(values, 1.0 - exceedance / 100.0, method="weibull")
    np.testing.assert_allclose(figures._duration(values, exceedance), expected)


def test_zero_flows_are_drawn_on_a_stated_floor(full_run):
    prediction = full_run.prediction
    daily = prediction.daily
    basin = full_run.region.ungauged[0]
    flow, low = daily.flow_mm.copy(), daily.low_mm.copy()
    flow.iloc[-40:, flow.columns.get_loc(basin)] = 0.0
    low.iloc[-40:, low.columns.get_loc(basin)] = 0.0
    daily = replace(daily, flow_mm=flow, low_mm=low)
    run = replace(full_run, prediction=replace_fields(prediction, daily=daily))
    fig = figures.ungauged_hydrographs(run, basins=[basin])
    left = fig.axes[0]
    floor = left.lines[1].get_ydata()[0]
    drawn = left.lines[0].get_ydata()
    assert drawn.min() == pytest.approx(floor)  # never a gap or a comb down to zero
    assert left.get_ylim()[0] < floor
    note = " ".join(t.get_text() for t in left.texts)
    assert "40 days below" in note and "zero flows included" in note
    legend = " ".join(t.get_text() for t in fig.legends[0].get_texts())
    assert "zero flows drawn on it" in legend


def test_flows_in_mm_per_day_when_asked(full_run):
    settings = replace(
        full_run.settings, report=replace(full_run.settings.report, flow_unit="mm/day")
    )
    run = replace(full_run, settings=settings)
    basin = run.region.ungauged[0]
    fig = figures.ungauged_hydrographs(run, basins=[basin], log=False)
    assert fig.axes[0].get_ylabel() == "Flow (mm/day)"
    flows = run.prediction.flows
    expected = flows.loc[flows["basin_id"] == basin, "flow_mm"].to_numpy()[-365:]
    np.testing.assert_allclose(fig.axes[0].lines[0].get_ydata(), expected)


def test_window_from_the_report_settings(full_run):
    dates = full_run.region.dates
    window = (dates[400], dates[499])
    settings = replace(full_run.settings, report=replace(full_run.settings.report, window=window))
    fig = figures.ungauged_hydrographs(replace(full_run, settings=settings))
    drawn = pd.to_datetime(fig.axes[0].lines[0].get_xdata())
    assert (drawn[0], drawn[-1], len(drawn)) == (window[0], window[1], 100)


# ---------------------------------------------------------------------------------------------
# Maps: labels, legend, scale bar, north arrow


def test_map_labels_have_a_halo_and_readable_size(full_run):
    fig = figures.ungauged_mean_flow_map(full_run, label_basins=True)
    labels = [t for t in fig.axes[0].texts if t.get_text() in set(full_run.region.ungauged)]
    assert len(labels) == len(full_run.region.ungauged)
    assert all(t.get_fontsize() >= 8 for t in labels)
    assert all(t.get_path_effects() for t in labels)


def test_point_labels_sit_beside_their_markers(bare_run):
    region = bare_run.region
    points = region.basins.copy()
    points["geometry"] = points.geometry.centroid
    point_run = replace(bare_run, region=replace(region, basins=points, is_point=True))
    fig = figures.loo_nse_map(point_run, label_basins=True)
    labels = [t for t in fig.axes[0].texts if t.get_text() in set(region.basins.index)]
    assert labels and all(t.get_position() != (0, 0) for t in labels)  # offset in points
    assert all(t.get_ha() == "left" and t.get_va() == "bottom" for t in labels)


def test_map_legend_outside_the_frame(full_run):
    for fig in (figures.loo_nse_map(full_run), figures.ungauged_mean_flow_map(full_run)):
        fig.canvas.draw()
        ax = fig.axes[0]
        legend = ax.get_legend().get_window_extent()
        frame = ax.get_window_extent()
        assert legend.y1 < frame.y0  # below the map, hiding no basin


def test_maps_carry_a_scale_bar_and_north_arrow(full_run):
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    fig = figures.loo_nse_map(full_run)
    ax = fig.axes[0]
    bars = [a for a in ax.artists if isinstance(a, AnchoredSizeBar)]
    assert len(bars) == 1
    label = bars[0].txt_label.get_text()
    length_m = bars[0].size_bar.get_children()[0].get_width()
    value, unit = label.split()
    assert length_m == pytest.approx(float(value) * (1000.0 if unit == "km" else 1.0))
    x0, x1 = ax.get_xlim()
    assert 0.1 <= length_m / (x1 - x0) <= 0.2 + 1e-9  # a fifth of the width, rounded down
    assert any(t.get_text() == "N" for t in ax.texts)


@pytest.mark.parametrize(("target", "length"), [(7.4, 5.0), (0.31, 0.2), (20.0, 20.0), (1.9, 1.0)])
def test_scale_bar_lengths_are_round(target, length):
    assert figures._round_length(target) == pytest.approx(length)


def test_screening_bars_ranked_top_down(full_run):
    fig = figures.screening_bars(full_run)
    left = fig.axes[0]
    table = full_run.screening.table
    bars = sorted(left.patches, key=lambda p: -p.get_y())  # top bar first
    np.testing.assert_allclose([b.get_width() for b in bars], table["score"].to_numpy())
    assert len(fig.axes[1].patches) == 2 * len(table)


def test_prediction_figures_need_a_prediction(bare_run):
    with pytest.raises(ValueError, match="needs the run's prediction"):
        figures.ungauged_mean_flow_map(bare_run)
    with pytest.raises(ValueError, match="needs the run's screening"):
        figures.screening_bars(bare_run)


def test_fake_prediction_has_the_fields_of_the_real_one(tiny_run):
    # the report's tests draw from a fake prediction; it must keep the real one's fields
    from dataclasses import fields

    from regional.predicted import Prediction

    names = {f.name for f in fields(Prediction)}
    assert isinstance(Prediction.flows, property)  # the long table, built when read
    assert names | {"flows"} == set(vars(fake_prediction(tiny_run)))


def test_fake_screening_has_the_fields_of_the_real_one(tiny_run):
    screen = pytest.importorskip("regional.screen", reason="regional.screen not present yet")
    from dataclasses import fields

    names = {f.name for f in fields(screen.Screening)}
    assert names == set(vars(fake_screening(tiny_run)))


def test_site_pages_keep_their_fixed_size_as_png(full_run):
    # pages are laid out by hand (no layout engine): saved as drawn, not trimmed
    from io import BytesIO

    from PIL import Image

    from regional import io as regional_io

    fig = figures.ungauged_hydrographs(full_run)
    assert fig.get_layout_engine() is None
    png = regional_io.figure_png(fig, dpi=50)
    width, height = Image.open(BytesIO(png)).size
    assert (width, height) == (round(fig.get_figwidth() * 50), round(fig.get_figheight() * 50))
