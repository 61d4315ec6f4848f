"""Figures of a run, drawn as :class:`matplotlib.figure.Figure` objects (never written here).

Every function takes a run result (:class:`regional.result.RunResult`) and returns one Figure
built without pyplot, so no global figure state is created or leaked; :mod:`regional.io` turns
them into PNG files. Drawing needs no display (a Figure carries its own Agg canvas).

:func:`make_figures` draws every figure that applies to a run under a stable name:

==========================  ======================================================================
name                        content
==========================  ======================================================================
``loo_nse_map``             leave-one-out NSE per gauged basin for the chosen method (map)
``parameters``              calibrated vs transferred parameter, one panel per method
``nse_cdf``                 cumulative distribution of leave-one-out NSE per method
``hydrographs``             observed, calibrated and transferred flow at the best, median, worst
``ungauged_mean_flow_map``  mean flow at ungauged basins, non-applicable ones hatched
``ungauged_hydrographs``    estimated flow with its bounds at every ungauged basin: a window of
                            daily flow and the whole-period flow-duration curve per basin, paged
                            as ``ungauged_hydrographs_2``, ``_3``, ... when there are many
``screening``               candidate gauge sites ranked by score, with the score's parts
``model_comparison``        median leave-one-out NSE per method and model (several models only)
``statistics_loo``          flow statistics: observed vs leave-one-out estimate, both routes
``statistics_fdc``          flow-duration curve with its bounds at each ungauged basin
==========================  ======================================================================
"""

from __future__ import annotations

import math
from collections.abc import Callable
from functools import partial
from typing import TYPE_CHECKING

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.patheffects import withStroke
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullLocator
from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

from regional.crossval import CALIBRATED, MEDIAN
from regional.models import parameter_table
from regional.report.jobs import FigureJob
from regional.report.labels import flow_in_unit
from regional.report.statistics import statistics_figures, statistics_jobs

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import RunResult

NSE_RANGE = (-1.0, 1.0)
"""Axis range of NSE figures; values below are counted in a note, not hidden silently."""
MAX_LABELLED_BASINS = 60
"""Basin ids are written on maps of at most this many basins (unless asked otherwise)."""
MAP_MARGIN = 0.1
"""Share of the map's height added below and above the basins (scale bar, north arrow)."""
LABEL_POINTS = 8.0
"""Font size of basin labels on maps, points."""
HALO = [withStroke(linewidth=2.5, foreground="white")]
"""White outline that keeps map text readable over any fill."""
MAX_BARS = 25
"""Most candidate sites in the screening figure."""

OBSERVED_STYLE = {"color": "black", "linewidth": 1.0, "label": "observed"}
CALIBRATED_STYLE = {"color": "#1f77b4", "linewidth": 0.9, "label": "calibrated (own parameters)"}
TRANSFER_COLOUR = "#d95f02"
BASELINE_STYLES = {
    CALIBRATED: {"color": "black", "linestyle": "--", "linewidth": 1.6},
    MEDIAN: {"color": "0.45", "linestyle": ":", "linewidth": 1.8},
}
METHOD_COLOURS = ("#d95f02", "#1b9e77", "#7570b3", "#e7298a", "#66a61e", "#e6ab02")
LOG_DECADES = 3.0
"""Decades of flow shown below the peak on log flow axes; lower flows are drawn on that floor."""
DURATION_POINTS = 300
"""Points on a drawn flow-duration curve (exceedance 0.1 % to 99.9 %)."""
BAND_COLOUR = "#9ecae1"
ESTIMATE_COLOUR = "#08519c"


# --------------------------------------------------------------------------------------------
# Public figures
# --------------------------------------------------------------------------------------------


def make_figures(result: RunResult) -> dict[str, Figure]:
    """Every figure that applies to a run, by stable name (see the module docstring).

    Prediction figures are drawn only when ``result.prediction`` exists, the screening figure
    only when ``result.screening`` exists, and the model comparison only when several models
    were run.

    Parameters
    ----------
    result : RunResult
        From :func:`regional.pipeline.run`.

    Returns
    -------
    dict of str -> Figure
        In report order.
    """
    return {name: draw() for name, draw in figure_drawers(result).items()}


def figure_drawers(result: RunResult) -> dict[str, Callable[[], Figure]]:
    """What :func:`make_figures` draws, as one call per figure (name -> draw it).

    Drawing, rendering and dropping one figure at a time keeps one figure in memory instead of
    every page of site hydrographs at once.
    """
    return {job.name: partial(job.draw, result) for job in figure_jobs(result)}


def figure_jobs(result: RunResult) -> list[FigureJob]:
    """Every figure of :func:`make_figures` as a job that names the daily series it reads, in
    report order (:mod:`regional.report.jobs`: drawn in this process or on a cluster's workers
    by :func:`regional.outputs.write_outputs`)."""
    picks = hydrograph_basins(result)
    jobs = [
        FigureJob("loo_nse_map", loo_nse_map),
        FigureJob("parameters", parameter_scatter, panels=_parameter_panels(result)),
        FigureJob("nse_cdf", nse_cdf),
        FigureJob("hydrographs", hydrographs, loo_basins=picks, panels=len(picks)),
    ]
    if len(result.runs) > 1:
        jobs.append(FigureJob("model_comparison", model_comparison))
    if result.prediction is not None:
        jobs.append(FigureJob("ungauged_mean_flow_map", ungauged_mean_flow_map))
        jobs += _hydrograph_page_jobs(result)
    jobs += statistics_jobs(result)
    if result.screening is not None:
        jobs.append(FigureJob("screening", screening_bars))
    return jobs


def prediction_figures(result: RunResult) -> dict[str, Figure]:
    """The figures of the estimates at ungauged basins: the mean-flow map, every page of
    site hydrographs (``ungauged_hydrographs``, ``ungauged_hydrographs_2``, ...) and the flow
    statistics figures (:mod:`regional.report.statistics`).

    Parameters
    ----------
    result : RunResult
        With a prediction.

    Returns
    -------
    dict of str -> Figure
    """
    figures = {"ungauged_mean_flow_map": ungauged_mean_flow_map(result)}
    return figures | ungauged_hydrograph_pages(result) | statistics_figures(result)


def loo_nse_map(
    result: RunResult,
    *,
    model: str | None = None,
    method: str | None = None,
    label_basins: bool | None = None,
) -> Figure:
    """Map of the leave-one-out NSE of each gauged basin for one method.

    Gauged basins are coloured by NSE (polygons, or points when the basins are outlets);
    ungauged basins are outlined in grey. NSE below the colour range's lower end (-1) takes the
    end colour (the colour bar is extended).

    Parameters
    ----------
    result : RunResult
    model, method : str, optional
        Default: the chosen model and method of the run.
    label_basins : bool, optional
        Write basin ids; default when the region has at most 60 basins.

    Returns
    -------
    Figure
    """
    model, method = _model_method(result, model, method)
    region = result.region
    nse = _scores(result, model, method)["nse"]
    lower = max(NSE_RANGE[0], min(0.9, math.floor(float(nse.min()) * 10) / 10))
    norm = Normalize(vmin=lower, vmax=1.0)
    fig, ax = _figure(7.0, 6.0)
    _draw_basins(
        ax,
        region,
        list(region.basins.index),
        values=nse,
        norm=norm,
        cmap="viridis",
        missing="white",
    )
    extend = "min" if float(nse.min()) < lower else "neither"
    bar = fig.colorbar(ScalarMappable(norm=norm, cmap="viridis"), ax=ax, extend=extend, shrink=0.8)
    bar.set_label("Leave-one-out NSE (-)")
    if _want_labels(label_basins, region):
        _label_basins(ax, region, list(region.basins.index))
    _map_legend(
        ax, [Patch(facecolor="white", edgecolor="0.25", label="ungauged basin (no score)")]
    )
    _map_axes(ax, region)
    ax.set_title(
        f"Leave-one-out NSE per gauged basin: {method} ({model})\n"
        f"median {nse.median():.2f} over {nse.count()} basins"
    )
    return fig


def parameter_scatter(result: RunResult, *, model: str | None = None) -> Figure:
    """Calibrated vs transferred parameter values in leave-one-out, one panel per method.

    Rows are parameters, columns the methods other than ``calibrated``. Each point is a gauged
    basin: x its own calibrated value, y the value the method transferred to it when it was
    left out. Log-transformed parameters get log axes. The 1:1 line is the perfect transfer.

    Parameters
    ----------
    result : RunResult
    model : str, optional
        Default: the chosen model.

    Returns
    -------
    Figure
    """
    model = model or result.chosen_model
    loo = result.runs[model].loo
    params = [p for p in parameter_table(model, snow=True) if p.name in loo.params.columns]
    methods = [m for m in loo.methods if m != CALIBRATED]
    wide = loo.params.pivot(index="basin_id", columns="method")
    fig = Figure(figsize=(3.2 * len(methods) + 0.6, 3.2 * len(params) + 0.8), layout="constrained")
    axes = fig.subplots(len(params), len(methods), squeeze=False)
    for row, parameter in enumerate(params):
        own = wide[(parameter.name, CALIBRATED)]
        for col, method in enumerate(methods):
            _parameter_panel(
                axes[row, col], own, wide[(parameter.name, method)], parameter, method
            )
    fig.suptitle(f"Calibrated vs transferred parameters in leave-one-out ({model})")
    return fig


def nse_cdf(result: RunResult, *, model: str | None = None) -> Figure:
    """Cumulative distribution of the leave-one-out NSE of every method.

    The ``calibrated`` (upper bound) and ``median`` (benchmark) baselines are drawn dashed
    and dotted; transfer methods solid. The x axis is limited to [-1, 1]; basins below -1 are
    counted in a note per method (the curves start above zero there).

    Parameters
    ----------
    result : RunResult
    model : str, optional
        Default: the chosen model.

    Returns
    -------
    Figure
    """
    model = model or result.chosen_model
    loo = result.runs[model].loo
    fig, ax = _figure(7.0, 4.8)
    clipped = []
    for number, method in enumerate(loo.methods):
        nse = np.sort(_scores(result, model, method)["nse"].dropna().to_numpy())
        share = np.arange(1, len(nse) + 1) / len(nse)
        style = BASELINE_STYLES.get(method, {"color": _method_colour(number), "linewidth": 1.6})
        label = _method_label(method, nse)
        ax.step(np.r_[NSE_RANGE[0], nse], np.r_[0.0, share], where="post", label=label, **style)
        below = int((nse < NSE_RANGE[0]).sum())
        if below:
            clipped.append(f"{method}: {below}")
    ax.set_xlim(*NSE_RANGE)
    ax.set_ylim(0.0, 1.0)
    ax.axvline(0.0, color="0.8", linewidth=0.8, zorder=0)
    ax.axvline(0.5, color="0.8", linewidth=0.8, zorder=0)
    ax.set_xlabel("Leave-one-out NSE (-)")
    ax.set_ylabel("Share of gauged basins with NSE at or below x (-)")
    ax.set_title(f"Distribution of leave-one-out NSE per method ({model})")
    ax.legend(loc="upper left", fontsize=8)
    note = "NSE below -1 (left of the axis): " + ", ".join(clipped) if clipped else ""
    ax.text(0.99, 0.02, note, transform=ax.transAxes, ha="right", va="bottom", fontsize=8)
    ax.grid(True, color="0.92")
    return fig


def hydrographs(
    result: RunResult,
    *,
    model: str | None = None,
    method: str | None = None,
    years: float = 2.0,
    log: bool = True,
) -> Figure:
    """Observed, calibrated and transferred daily flow at the best, median and worst basin.

    Basins are ranked by the leave-one-out NSE of ``method``; the window is the last ``years``
    of the evaluation period. Flows are in the report's unit (``[report] flow_unit``); on a log
    axis, flows below a floor ``LOG_DECADES`` under the highest are drawn on the marked floor.

    Parameters
    ----------
    result : RunResult
    model, method : str, optional
        Default: the chosen model and method.
    years : float, default 2.0
        Length of the window shown, years.
    log : bool, default True
        Log flow axis (low flows readable); False for linear.

    Returns
    -------
    Figure
    """
    model, method = _model_method(result, model, method)
    loo = result.runs[model].loo
    nse = _ranked_nse(result, model, method)
    picks = _best_median_worst(nse)
    window = _last_years(loo.observed.index, years)
    fig = Figure(figsize=(10.0, 2.6 * len(picks) + 0.6), layout="constrained")
    axes = fig.subplots(len(picks), 1, squeeze=False, sharex=True)[:, 0]
    own_nse = _scores(result, model, CALIBRATED)["nse"]
    unit = _report_settings(result).flow_unit
    area = result.region.attributes["area_km2"].astype(float)
    for ax, (rank, basin) in zip(axes, picks, strict=True):
        lines = {
            "observed": loo.observed.loc[window, basin],
            "calibrated": loo.simulated[CALIBRATED].loc[window, basin],
            "transferred": loo.simulated[method].loc[window, basin],
        }
        lines = {k: flow_in_unit(v, float(area[basin]), unit) for k, v in lines.items()}
        floor = _floor(pd.concat(lines.values()), log)
        ax.plot(window, _on_floor(lines["observed"], floor), **OBSERVED_STYLE)
        ax.plot(window, _on_floor(lines["calibrated"], floor), **CALIBRATED_STYLE)
        ax.plot(
            window,
            _on_floor(lines["transferred"], floor),
            color=TRANSFER_COLOUR,
            linewidth=0.9,
            label=f"transferred ({method})",
        )
        _flow_axis(ax, log, *lines.values(), floor=floor)
        _mark_floor(ax, floor, int((lines["observed"] < floor).sum()) if floor else 0)
        ax.set_ylabel(f"Flow ({unit})")
        ax.set_title(
            f"{rank}: {_basin_label(result.region, basin)}: NSE {method} {nse[basin]:.2f}, "
            f"calibrated {own_nse.get(basin, np.nan):.2f}",
            fontsize=10,
            loc="left",
        )
        ax.grid(True, color="0.92")
    handles, _ = axes[0].get_legend_handles_labels()
    handles += [_floor_handle()] if log else []
    fig.legend(handles=handles, loc="outside lower center", fontsize=8, ncols=len(handles))
    axes[-1].set_xlabel("Date")
    fig.suptitle(f"Daily flow in the evaluation period, leave-one-out ({model})")
    return fig


def hydrograph_basins(
    result: RunResult, *, model: str | None = None, method: str | None = None
) -> tuple[str, ...]:
    """The basins :func:`hydrographs` draws: best, median and worst leave-one-out NSE."""
    model, method = _model_method(result, model, method)
    return tuple(basin for _, basin in _best_median_worst(_ranked_nse(result, model, method)))


def _parameter_panels(result: RunResult) -> int:
    """Panels of :func:`parameter_scatter`: parameters x methods other than calibrated."""
    loo = result.runs[result.chosen_model].loo
    names = [p for p in parameter_table(result.chosen_model, snow=True) if p.name in loo.params]
    return len(names) * sum(method != CALIBRATED for method in loo.methods)


def _ranked_nse(result: RunResult, model: str, method: str) -> pd.Series:
    return _scores(result, model, method)["nse"].dropna().sort_values(ascending=False)


def model_comparison(result: RunResult) -> Figure:
    """Median leave-one-out NSE per method, one bar per model, with the quartiles as whiskers.

    Parameters
    ----------
    result : RunResult

    Returns
    -------
    Figure
    """
    summary = result.summary
    models = list(result.runs)
    methods = list(dict.fromkeys(summary["method"]))
    fig, ax = _figure(max(6.0, 1.3 * len(methods) + 2.0), 4.5)
    width = 0.8 / len(models)
    positions = np.arange(len(methods))
    for number, name in enumerate(models):
        rows = summary[summary["model"] == name].set_index("method").reindex(methods)
        median = rows["median_nse"].to_numpy(dtype=float)
        spread = np.vstack(
            [median - rows["q25_nse"].to_numpy(float), rows["q75_nse"].to_numpy(float) - median]
        )
        ax.bar(
            positions + (number - (len(models) - 1) / 2) * width,
            median,
            width=width,
            yerr=spread,
            capsize=3,
            color=_method_colour(number),
            label=name,
        )
    ax.set_xticks(positions, methods)
    ax.axhline(0.0, color="0.5", linewidth=0.8)
    ax.set_ylim(max(NSE_RANGE[0], min(0.0, float(summary["q25_nse"].min()) - 0.05)), 1.0)
    ax.set_ylabel("Median leave-one-out NSE (-)\nwhiskers: quartiles")
    ax.set_xlabel("Method (calibrated and median are baselines)")
    ax.set_title("Models compared by leave-one-out NSE")
    ax.legend(title="model", fontsize=8)
    ax.grid(True, axis="y", color="0.92")
    return fig


def ungauged_mean_flow_map(result: RunResult, *, label_basins: bool | None = None) -> Figure:
    """Map of the estimated mean flow at ungauged basins; non-applicable estimates hatched.

    Gauged basins are drawn in light grey for orientation. Basins whose estimate failed the
    applicability check are hatched (polygons) or crossed (points). Mean flow is in the report's
    unit (``[report] flow_unit``).

    Parameters
    ----------
    result : RunResult
        With a prediction (``result.prediction`` not None).
    label_basins : bool, optional
        Write basin ids; default when the region has at most 60 basins.

    Returns
    -------
    Figure
    """
    prediction = _require(result.prediction, "prediction")
    region = result.region
    table = prediction.table
    unit = _report_settings(result).flow_unit
    area = region.attributes["area_km2"].astype(float)
    flow = flow_in_unit(table["mean_flow_mm"].astype(float), area, unit)
    norm = Normalize(vmin=float(flow.min()), vmax=max(float(flow.max()), float(flow.min()) + 1e-9))
    fig, ax = _figure(7.0, 6.0)
    _draw_basins(
        ax,
        region,
        list(region.basins.index),
        values=flow,
        norm=norm,
        cmap="Blues",
        missing="0.9",
    )
    flagged = [b for b in table.index if not bool(table.loc[b, "applicable"])]
    _draw_flags(ax, region, flagged)
    bar = fig.colorbar(ScalarMappable(norm=norm, cmap="Blues"), ax=ax, shrink=0.8)
    bar.set_label(f"Estimated mean flow ({unit})")
    if _want_labels(label_basins, region):
        _label_basins(ax, region, list(table.index))
    handles = [
        Patch(facecolor="0.9", edgecolor="0.7", label="gauged basin"),
        _flag_handle(region, len(flagged)),
    ]
    _map_legend(ax, handles)
    _map_axes(ax, region)
    ax.set_title(
        f"Mean flow at ungauged basins: {prediction.method} ({prediction.model})\n"
        f"{len(flagged)} of {len(table)} outside what the gauges support"
    )
    return fig


def ungauged_hydrograph_pages(
    result: RunResult, *, per_figure: int | None = None, log: bool = True
) -> dict[str, Figure]:
    """Site hydrographs of every ungauged basin, paged over as many figures as needed.

    Flagged basins come first, then by id; pages hold at most ``per_figure`` basins and are
    filled evenly (14 basins at 6 per figure: 5, 5 and 4).

    Parameters
    ----------
    result : RunResult
        With a prediction.
    per_figure : int, optional
        Most basins per figure; default ``[report] sites_per_figure`` (6).
    log : bool, default True
        Log flow axes (with a stated floor for zero and very low flows).

    Returns
    -------
    dict of str -> Figure
        ``ungauged_hydrographs``, then ``ungauged_hydrographs_2``, ``_3``, ...
    """
    jobs = _hydrograph_page_jobs(result, per_figure=per_figure, log=log)
    return {job.name: job.draw(result) for job in jobs}


def _hydrograph_page_jobs(
    result: RunResult, *, per_figure: int | None = None, log: bool = True
) -> list[FigureJob]:
    table = _require(result.prediction, "prediction").table
    basins = sorted(table.index, key=lambda b: (bool(table.loc[b, "applicable"]), str(b)))
    per_figure = per_figure or _report_settings(result).sites_per_figure
    pages = _pages(basins, per_figure)
    return [
        FigureJob(
            _page_name("ungauged_hydrographs", number),
            partial(_page_of_sites, basins=page, log=log, page=(number, len(pages))),
            site_basins=tuple(page),
            panels=2 * len(page),
        )
        for number, page in enumerate(pages, start=1)
    ]


def _page_of_sites(result: RunResult, *, basins: list[str], log: bool, page) -> Figure:
    """One page of site hydrographs, its basins' daily series built for it alone (the series
    of every ungauged basin are never held at once)."""
    series = _site_series(result, basins)
    return _hydrograph_page(result, series, basins, window=None, log=log, page=page)


def ungauged_hydrographs(
    result: RunResult,
    *,
    basins: list[str] | None = None,
    window: tuple[pd.Timestamp, pd.Timestamp] | None = None,
    log: bool = True,
    page: tuple[int, int] = (1, 1),
) -> Figure:
    """Estimated flow with its bounds at ungauged basins, one row per basin.

    Left: daily flow over a window (``[report] window``, default the last 365 days) with the
    lower and upper bounds. Right: the flow-duration curve of the whole period (Weibull plotting
    position i / (n + 1)) of the estimate and of each bound. Flows are in the report's unit
    (``[report] flow_unit``). On log axes, flows below a floor three decades under the panel's
    highest bound (zero flows among them) are drawn on the floor, which is marked and stated.

    Parameters
    ----------
    result : RunResult
        With a prediction.
    basins : list of str, optional
        Basins drawn, in order; default every ungauged basin (use
        :func:`ungauged_hydrograph_pages` for many).
    window : (Timestamp, Timestamp), optional
        Dates of the left panels; default ``[report] window`` or the last 365 days.
    log : bool, default True
        Log flow axes.
    page : (int, int), default (1, 1)
        This figure's page number and the page count, for the title.

    Returns
    -------
    Figure
    """
    prediction = _require(result.prediction, "prediction")
    basins = list(prediction.table.index) if basins is None else list(basins)
    series = _site_series(result, basins)
    return _hydrograph_page(result, series, basins, window=window, log=log, page=page)


def _hydrograph_page(result, series, basins, *, window, log: bool, page) -> Figure:
    prediction = result.prediction
    unit = _report_settings(result).flow_unit
    height = 2.2 * len(basins) + 1.3
    # fixed margins (inches), not a layout engine: pages of many sites stay cheap to draw
    fig = Figure(figsize=(11.0, height))
    axes = fig.subplots(
        len(basins),
        2,
        squeeze=False,
        sharex="col",
        gridspec_kw={
            "width_ratios": (2.4, 1.0),
            "left": 0.8 / 11.0,
            "right": 1.0 - 0.35 / 11.0,
            "top": 1.0 - 0.65 / height,
            "bottom": 1.05 / height,
            "hspace": 0.36,
            "wspace": 0.14,
        },
    )
    chosen = window or _report_settings(result).window
    for (left, right), basin in zip(axes, basins, strict=True):
        _site_hydrograph(left, _window(series[basin], chosen), log=log)
        _site_duration(right, series[basin], log=log)
        left.set_title(_site_title(result, basin), fontsize=9, loc="left")
        left.set_ylabel(f"Flow ({unit})", fontsize=8)
    axes[-1, 0].set_xlabel("Date")
    axes[-1, 1].set_xlabel("Share of days the flow is exceeded (%)")
    fig.legend(
        handles=_site_handles(prediction.level, log),
        loc="lower center",
        bbox_to_anchor=(0.5, 0.0),
        ncols=3,
        frameon=False,
    )
    numbering = f", figure {page[0]} of {page[1]}" if page[1] > 1 else ""
    fig.suptitle(
        f"Estimated daily flow at ungauged basins ({unit}) with {prediction.level:.0%} bounds: "
        f"{prediction.method} ({prediction.model}){numbering}",
        y=1.0 - 0.2 / height,
        va="top",
    )
    return fig


def screening_bars(result: RunResult, *, max_bars: int = MAX_BARS) -> Figure:
    """Candidate gauge sites ranked by screening score, beside the score's two parts.

    Left: the score (top-ranked site at the top). Right: the reduction of the average
    prediction variance over the ungauged basins that a gauge at the site would bring, and the
    donors' spread at the site, each divided by its largest value over the candidates so the
    two read on one axis.

    Parameters
    ----------
    result : RunResult
        With a screening (``result.screening`` not None).
    max_bars : int, default 25
        Most sites drawn (the best ranked).

    Returns
    -------
    Figure
    """
    screening = _require(result.screening, "screening")
    table = screening.table.sort_values("rank").head(max_bars)
    labels = [f"{int(r)}. {b}" for b, r in zip(table.index, table["rank"], strict=True)]
    positions = np.arange(len(table))[::-1]
    fig = Figure(figsize=(10.0, 0.32 * len(table) + 1.8), layout="constrained")
    left, right = fig.subplots(1, 2, sharey=True)
    bars = left.barh(positions, table["score"].astype(float), color="#3182bd")
    if "applicable" in table.columns:
        outside = ~table["applicable"].astype(bool).to_numpy()
        for bar, flagged in zip(bars, outside, strict=True):
            if flagged:
                bar.set_hatch("///")
                bar.set_edgecolor("#b2182b")
        if outside.any():
            left.legend(
                handles=[
                    Patch(
                        facecolor="#3182bd",
                        edgecolor="#b2182b",
                        hatch="///",
                        label=f"not applicable ({int(outside.sum())})",
                    )
                ],
                loc="lower right",
                fontsize=8,
            )
    left.set_yticks(positions, labels, fontsize=8)
    left.set_xlabel("Screening score (-)")
    left.set_title("Score (higher: gauge first)", fontsize=10)
    height = 0.38
    right.barh(
        positions + height / 2,
        _relative(table["variance_reduction"]),
        height=height,
        color="#31a354",
        label="variance reduction",
    )
    right.barh(
        positions - height / 2,
        _relative(table["donor_spread"]),
        height=height,
        color="#fd8d3c",
        label="donor spread",
    )
    right.set_xlabel("Part, relative to its largest value over the candidates (-)")
    right.set_title("Its parts", fontsize=10)
    right.legend(loc="lower right", fontsize=8)
    for ax in (left, right):
        ax.grid(True, axis="x", color="0.92")
    fig.suptitle(f"Candidate gauge sites ranked ({len(screening.table)} screened)")
    return fig


# --------------------------------------------------------------------------------------------
# Private steps
# --------------------------------------------------------------------------------------------


def _report_settings(result: RunResult):
    return result.settings.report


def _pages(items: list[str], per_page: int) -> list[list[str]]:
    """Split ``items`` into the fewest pages of at most ``per_page``, filled evenly."""
    if not items:
        return []
    count = math.ceil(len(items) / per_page)
    size = math.ceil(len(items) / count)
    return [items[start : start + size] for start in range(0, len(items), size)]


def _page_name(name: str, number: int) -> str:
    return name if number == 1 else f"{name}_{number}"


def _site_series(result: RunResult, basins: list[str]) -> dict[str, pd.DataFrame]:
    """Per basin: daily ``flow``, ``low``, ``high`` (date index) in the report's unit."""
    daily = result.prediction.daily
    unit = _report_settings(result).flow_unit
    area = result.region.attributes["area_km2"].astype(float)
    out = {}
    for basin in basins:
        frame = pd.DataFrame(
            {
                "flow": daily.flow_mm[basin].to_numpy(float),
                "low": daily.low_mm[basin].to_numpy(float),
                "high": daily.high_mm[basin].to_numpy(float),
            },
            index=pd.DatetimeIndex(pd.to_datetime(daily.flow_mm.index.to_numpy())),
        ).sort_index()
        out[basin] = flow_in_unit(frame, float(area[basin]), unit)
    return out


def _window(series: pd.DataFrame, window) -> pd.DataFrame:
    """The rows inside ``window``; the last 365 days when it is None or holds no day."""
    if window is not None:
        inside = series.loc[(series.index >= window[0]) & (series.index <= window[1])]
        if len(inside):
            return inside
    return series.loc[_last_years(series.index, 1.0)]


def _site_title(result: RunResult, basin: str) -> str:
    flag = "" if bool(result.prediction.table.loc[basin, "applicable"]) else " (flagged)"
    return f"{_basin_label(result.region, basin)}{flag}"


def _site_hydrograph(ax, series: pd.DataFrame, *, log: bool) -> None:
    floor = _floor(series["high"], log)
    low, flow, high = (_on_floor(series[c], floor) for c in ("low", "flow", "high"))
    ax.fill_between(series.index, low, high, color=BAND_COLOUR, linewidth=0)
    ax.plot(series.index, flow, color=ESTIMATE_COLOUR, linewidth=0.8)
    _flow_axis(ax, log, series["high"], floor=floor)
    _mark_floor(ax, floor, int((series["flow"] < floor).sum()) if floor else 0)
    ax.tick_params(labelsize=7)
    ax.grid(True, color="0.92")


def _site_duration(ax, series: pd.DataFrame, *, log: bool) -> None:
    """Flow-duration curves (Weibull plotting position) of the estimate and its bounds."""
    exceedance = np.linspace(0.1, 99.9, DURATION_POINTS)
    curves = {c: _duration(series[c].to_numpy(float), exceedance) for c in ("flow", "low", "high")}
    floor = _floor(pd.Series(curves["high"]), log)
    ax.fill_between(
        exceedance,
        _on_floor(curves["low"], floor),
        _on_floor(curves["high"], floor),
        color=BAND_COLOUR,
        linewidth=0,
    )
    ax.plot(exceedance, _on_floor(curves["flow"], floor), color=ESTIMATE_COLOUR, linewidth=1.0)
    _flow_axis(ax, log, pd.Series(curves["high"]), floor=floor)
    below = float((series["flow"].to_numpy(float) < floor).mean() * 100) if floor else 0.0
    _mark_floor(ax, floor, None, share=below)
    ax.set_xlim(0.0, 100.0)
    period = f"{series.index[0]:%Y}-{series.index[-1]:%Y}"
    ax.set_title(f"flow duration, whole period {period}", fontsize=8, loc="left")
    ax.tick_params(labelsize=7)
    ax.grid(True, color="0.92")


def _duration(values: np.ndarray, exceedance_pct: np.ndarray) -> np.ndarray:
    """Flow exceeded on ``exceedance_pct`` % of days: Weibull plotting position i / (n + 1) of
    the values sorted from high to low, interpolated linearly."""
    ordered = np.sort(values[np.isfinite(values)])[::-1]
    positions = np.arange(1, len(ordered) + 1) / (len(ordered) + 1) * 100.0
    return np.interp(exceedance_pct, positions, ordered)


def _floor(high: pd.Series, log: bool) -> float | None:
    """Lowest flow drawn on a log axis (``LOG_DECADES`` below the highest); None on linear."""
    top = float(np.nanmax(high.to_numpy(dtype=float))) if len(high) else float("nan")
    if not log or not np.isfinite(top) or top <= 0:
        return None
    return top * 10.0**-LOG_DECADES


def _on_floor(values, floor: float | None) -> np.ndarray:
    array = np.asarray(values, dtype=float)
    return array if floor is None else np.maximum(array, floor)


def _mark_floor(ax, floor: float | None, days: int | None, *, share: float = 0.0) -> None:
    """A dashed line at the floor and, when flows fall below it, how many."""
    if floor is None:
        return
    ax.axhline(floor, color="0.45", linewidth=0.7, linestyle=(0, (4, 3)))
    if days:
        text = f"{days} days below {floor:.2g}, zero flows included, drawn on the floor"
    elif share > 0:
        text = f"{share:.0f} % of days below {floor:.2g}, drawn on the floor"
    else:
        return
    ax.text(
        0.01,
        0.05,
        text,
        transform=ax.transAxes,
        fontsize=6.5,
        color="0.25",
        va="bottom",
        bbox={"facecolor": "white", "alpha": 0.85, "edgecolor": "none", "pad": 1.0},
    )


def _site_handles(level: float, log: bool) -> list:
    handles = [
        Line2D([], [], color=ESTIMATE_COLOUR, linewidth=1.0, label="estimate"),
        Patch(facecolor=BAND_COLOUR, label=f"{level:.0%} bounds"),
    ]
    return handles + [_floor_handle()] if log else handles


def _floor_handle() -> Line2D:
    return Line2D(
        [],
        [],
        color="0.45",
        linewidth=0.7,
        linestyle=(0, (4, 3)),
        label=f"floor: {LOG_DECADES:g} decades below the highest flow drawn; lower and zero flows "
        "drawn on it",
    )


def _relative(values: pd.Series) -> np.ndarray:
    """Values divided by their largest absolute value (zeros stay zeros)."""
    array = values.to_numpy(dtype=float)
    top = np.nanmax(np.abs(array)) if array.size else 0.0
    return array / top if top > 0 else array


def _figure(width: float, height: float):
    fig = Figure(figsize=(width, height), layout="constrained")
    return fig, fig.subplots()


def _require(part, name: str):
    if part is None:
        raise ValueError(f"this figure needs the run's {name}, which is None")
    return part


def _model_method(result: RunResult, model: str | None, method: str | None) -> tuple[str, str]:
    model = model or result.chosen_model
    method = method or (result.chosen_method if model == result.chosen_model else None)
    if method is None:
        rows = result.summary[
            (result.summary["model"] == model) & (result.summary["method"] != CALIBRATED)
        ]
        method = str(rows.sort_values("median_nse", ascending=False).iloc[0]["method"])
    return model, method


def _scores(result: RunResult, model: str, method: str) -> pd.DataFrame:
    scores = result.runs[model].loo.scores
    return scores[scores["method"] == method].set_index("basin_id")


def _method_colour(number: int) -> str:
    return METHOD_COLOURS[number % len(METHOD_COLOURS)]


def _method_label(method: str, nse: np.ndarray) -> str:
    role = {CALIBRATED: " (upper bound)", MEDIAN: " (benchmark)"}.get(method, "")
    median = float(np.median(nse)) if len(nse) else float("nan")
    return f"{method}{role}: median {median:.2f}"


def _basin_label(region, basin: str) -> str:
    names = region.basins.get("name")
    if names is not None and isinstance(names.get(basin), str) and names.get(basin):
        return f"{basin} {names[basin]}"
    return str(basin)


def _best_median_worst(nse: pd.Series) -> list[tuple[str, str]]:
    """(label, basin) for the best, median and worst basin of a descending NSE series."""
    order = list(nse.index)
    picks = [("best", order[0]), ("median", order[(len(order) - 1) // 2]), ("worst", order[-1])]
    seen: set[str] = set()
    unique = []
    for label, basin in picks:
        if basin not in seen:
            seen.add(basin)
            unique.append((label, basin))
    return unique


def _last_years(index: pd.DatetimeIndex, years: float) -> pd.DatetimeIndex:
    start = index[-1] - pd.Timedelta(days=round(365.25 * years) - 1)
    return index[index >= start]


def _draw_basins(
    ax,
    region,
    basins: list[str],
    *,
    values: pd.Series | None = None,
    norm: Normalize | None = None,
    cmap: str | None = None,
    facecolor: str = "none",
    edgecolor: str = "0.3",
    zorder: int = 1,
    missing: str = "none",
) -> None:
    """Draw basins, larger first so nested basins stay visible on top of those they lie in.

    With ``values``, basins without a value (NaN or absent) are filled with ``missing``.
    """
    if not basins:
        return
    frame = region.basins.loc[basins]
    if not region.is_point:
        frame = frame.iloc[np.argsort(-frame.geometry.area.to_numpy(), kind="stable")]
        basins = list(frame.index)
    colours = None
    if values is not None:
        mapper = ScalarMappable(
            norm=norm, cmap=matplotlib.colormaps[cmap].with_extremes(bad=missing)
        )
        colours = mapper.to_rgba(np.ma.masked_invalid(values.reindex(basins).to_numpy(float)))
    if region.is_point:
        ax.scatter(
            frame.geometry.x,
            frame.geometry.y,
            s=60,
            c=colours if colours is not None else facecolor,
            edgecolors=edgecolor,
            linewidths=1.0,
            zorder=zorder,
        )
        return
    frame.plot(
        ax=ax,
        color=colours if colours is not None else facecolor,
        edgecolor=edgecolor if colours is None else "0.25",
        linewidth=0.6 if colours is not None else 1.0,
        zorder=zorder,
    )


def _draw_flags(ax, region, flagged: list[str]) -> None:
    if not flagged:
        return
    frame = region.basins.loc[flagged]
    if region.is_point:
        ax.scatter(frame.geometry.x, frame.geometry.y, marker="x", s=80, color="#b2182b", zorder=4)
        return
    frame.plot(ax=ax, facecolor="none", edgecolor="#b2182b", hatch="///", linewidth=1.2, zorder=3)


def _flag_handle(region, count: int):
    label = f"not applicable ({count})"
    if region.is_point:
        return Line2D([], [], marker="x", color="#b2182b", linestyle="none", label=label)
    return Patch(facecolor="none", edgecolor="#b2182b", hatch="///", label=label)


def _want_labels(label_basins: bool | None, region) -> bool:
    if label_basins is None:
        return len(region.basins) <= MAX_LABELLED_BASINS
    return label_basins


def _label_basins(ax, region, basins: list[str]) -> None:
    """Basin ids in a white halo: beside outlet points (offset up and right), on polygons at a
    point inside each."""
    frame = region.basins.loc[basins]
    points = frame.geometry if region.is_point else frame.geometry.representative_point()
    offset = (5, 4) if region.is_point else (0, 0)
    align = ("left", "bottom") if region.is_point else ("center", "center")
    for basin, point in zip(frame.index, points, strict=True):
        ax.annotate(
            str(basin),
            (point.x, point.y),
            xytext=offset,
            textcoords="offset points",
            fontsize=LABEL_POINTS,
            ha=align[0],
            va=align[1],
            color="0.05",
            zorder=6,
            path_effects=HALO,
        )


def _map_legend(ax, handles: list) -> None:
    """The legend below the map's axis label, outside its frame, so it never hides a basin."""
    ax.legend(
        handles=handles,
        loc="upper center",
        bbox_to_anchor=(0.5, -0.11),
        ncols=len(handles),
        fontsize=8,
        frameon=False,
    )


def _scale_bar(ax, region) -> None:
    """A scale bar of a round length (1, 2 or 5 x 10^n km) near a fifth of the map's width."""
    crs = region.basins.crs
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    km_per_unit = _km_per_map_unit(crs, (y0 + y1) / 2.0)
    if km_per_unit is None:
        return
    length_km = _round_length(abs(x1 - x0) * km_per_unit / 5.0)
    label = f"{length_km:g} km" if length_km >= 1 else f"{length_km * 1000:g} m"
    bar = AnchoredSizeBar(
        ax.transData,
        length_km / km_per_unit,
        label,
        loc="lower left",
        pad=0.4,
        borderpad=0.6,
        sep=3,
        frameon=True,
        size_vertical=abs(y1 - y0) / 150.0,
        fontproperties=FontProperties(size=8),
    )
    bar.patch.set_alpha(0.85)
    bar.patch.set_edgecolor("0.7")
    ax.add_artist(bar)


def _km_per_map_unit(crs, latitude: float) -> float | None:
    """Kilometres per map unit: from the CRS's axis unit, or along the parallel at ``latitude``
    for degrees (111.32 km per degree at the equator times cos(latitude), on a sphere: common
    practice, no source)."""
    if crs is None:
        return None
    if crs.is_geographic:
        return 111.32 * math.cos(math.radians(latitude))
    factor = crs.axis_info[0].unit_conversion_factor if crs.axis_info else 1.0
    return factor / 1000.0


def _round_length(target: float) -> float:
    """The largest 1, 2 or 5 x 10^n not above ``target`` (> 0)."""
    power = 10.0 ** math.floor(math.log10(target))
    return max(step * power for step in (1.0, 2.0, 5.0) if step * power <= target)


def _north_arrow(ax) -> None:
    """An arrow and "N" at the top right, pointing up the map (grid north of the CRS)."""
    ax.annotate(
        "N",
        xy=(0.95, 0.97),
        xytext=(0.95, 0.84),
        xycoords="axes fraction",
        ha="center",
        va="center",
        fontsize=10,
        fontweight="bold",
        zorder=7,
        arrowprops={"facecolor": "black", "edgecolor": "white", "width": 3.0, "headwidth": 9.0},
        path_effects=HALO,
    )


def _map_axes(ax, region) -> None:
    crs = region.basins.crs
    ax.set_aspect("equal")
    y0, y1 = ax.get_ylim()
    margin = MAP_MARGIN * (y1 - y0)
    ax.set_ylim(y0 - margin, y1 + margin)  # free bands for the scale bar and the north arrow
    if crs is not None and crs.is_geographic:
        ax.set_xlabel("Longitude (degrees)")
        ax.set_ylabel("Latitude (degrees)")
    else:
        unit = crs.axis_info[0].unit_name if crs is not None and crs.axis_info else "m"
        ax.set_xlabel(f"Easting ({unit})")
        ax.set_ylabel(f"Northing ({unit})")
    if crs is not None:
        ax.text(
            0.99,
            0.01,
            crs.to_string(),
            transform=ax.transAxes,
            ha="right",
            fontsize=7,
            color="0.3",
            path_effects=HALO,
        )
    ax.tick_params(labelsize=7)
    ax.ticklabel_format(axis="both", style="plain", useOffset=False)
    _scale_bar(ax, region)
    _north_arrow(ax)


def _plain_log(ax, axis, *, span: float | None = None) -> None:
    """Log scale on one axis with plain-number labels (1, 2, 5 steps; even steps when the
    axis spans less than a decade, ``span`` = high / low)."""
    (ax.set_xscale if axis is ax.xaxis else ax.set_yscale)("log")
    narrow = span is not None and span < 10.0
    axis.set_major_locator(
        MaxNLocator(nbins=4) if narrow else LogLocator(subs=(1.0, 2.0, 5.0), numticks=8)
    )
    axis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:g}"))
    axis.set_minor_locator(NullLocator())


def _flow_axis(ax, log: bool, *series: pd.Series, floor: float | None = None) -> None:
    """Linear axis from zero, or log axis from ``floor`` (default ``LOG_DECADES`` below the
    highest flow) to above the highest flow."""
    top = max(float(np.nanmax(s.to_numpy(dtype=float))) for s in series)
    if not np.isfinite(top) or top <= 0:
        return
    if log:
        _plain_log(ax, ax.yaxis)
        bottom = floor if floor is not None else top * 10.0**-LOG_DECADES
        ax.set_ylim(bottom / 1.15, top * 1.5)
    else:
        ax.set_ylim(0.0, top * 1.05)


def _square_limits(values: np.ndarray, *, log: bool) -> tuple[float, float]:
    """Common axis limits holding every value with a 5% margin (in log space when ``log``)."""
    if not values.size:
        return (0.1, 1.0) if log else (0.0, 1.0)
    low, high = float(values.min()), float(values.max())
    if log:
        pad = max((high / low) ** 0.05, 1.05)
        return low / pad, high * pad
    margin = max(0.05 * (high - low), 0.05 * abs(high), 1e-9)
    return low - margin, high + margin


def _parameter_panel(ax, own: pd.Series, transferred: pd.Series, parameter, method: str) -> None:
    x = own.to_numpy(dtype=float)
    y = transferred.reindex(own.index).to_numpy(dtype=float)
    log = parameter.transform == "log"
    ax.scatter(x, y, s=18, color=TRANSFER_COLOUR, alpha=0.8, edgecolors="none")
    finite = np.isfinite(x) & np.isfinite(y) & ((x > 0) & (y > 0) if log else True)
    limits = _square_limits(np.r_[x[finite], y[finite]], log=log)
    ax.plot(limits, limits, color="0.4", linewidth=0.8, linestyle="--", label="1:1")
    if log:
        for axis in (ax.xaxis, ax.yaxis):
            _plain_log(ax, axis, span=limits[1] / limits[0])
    ax.set_xlim(*limits)
    ax.set_ylim(*limits)
    ax.set_aspect("equal")
    unit = f" ({parameter.unit})" if parameter.unit else ""
    ax.set_xlabel(f"calibrated {parameter.name}{unit}", fontsize=8)
    ax.set_ylabel(f"{method} {parameter.name}{unit}", fontsize=8)
    space = np.log(x[finite]) - np.log(y[finite]) if log else x[finite] - y[finite]
    rmse = float(np.sqrt(np.mean(space**2))) if space.size else float("nan")
    what = "RMSE of ln" if log else "RMSE"
    ax.set_title(f"{method}: {what} {rmse:.2f}", fontsize=9)
    ax.legend(loc="upper left", fontsize=7)
    ax.tick_params(labelsize=7)
