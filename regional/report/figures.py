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
``ungauged_hydrographs``    estimated flow with its bounds at ungauged basins (up to 12 panels)
``screening``               candidate gauge sites ranked by score, with the score's parts
``model_comparison``        median leave-one-out NSE per method and model (several models only)
==========================  ======================================================================
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullLocator

from regional.crossval import CALIBRATED, MEDIAN
from regional.models import get_model

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import RunResult

NSE_RANGE = (-1.0, 1.0)
"""Axis range of NSE figures; values below are counted in a note, not hidden silently."""
MAX_LABELLED_BASINS = 60
"""Basin ids are written on maps of at most this many basins (unless asked otherwise)."""
MAX_PANELS = 12
"""Most small multiples in one figure (ungauged hydrographs)."""
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
"""Decades of flow shown below the peak on log flow axes (lower flows fall off the axis)."""


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
    figures = {
        "loo_nse_map": loo_nse_map(result),
        "parameters": parameter_scatter(result),
        "nse_cdf": nse_cdf(result),
        "hydrographs": hydrographs(result),
    }
    if len(result.runs) > 1:
        figures["model_comparison"] = model_comparison(result)
    if result.prediction is not None:
        figures["ungauged_mean_flow_map"] = ungauged_mean_flow_map(result)
        figures["ungauged_hydrographs"] = ungauged_hydrographs(result)
    if result.screening is not None:
        figures["screening"] = screening_bars(result)
    return figures


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
    ax.legend(
        handles=[
            Patch(facecolor="white", edgecolor="0.25", label="ungauged basin (no score)"),
        ],
        loc="lower left",
        fontsize=8,
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
    params = [p for p in get_model(model).parameters if p.name in loo.params.columns]
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
    of the evaluation period.

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
    nse = _scores(result, model, method)["nse"].dropna().sort_values(ascending=False)
    picks = _best_median_worst(nse)
    window = _last_years(loo.observed.index, years)
    fig = Figure(figsize=(10.0, 2.6 * len(picks) + 0.6), layout="constrained")
    axes = fig.subplots(len(picks), 1, squeeze=False, sharex=True)[:, 0]
    own_nse = _scores(result, model, CALIBRATED)["nse"]
    for ax, (rank, basin) in zip(axes, picks, strict=True):
        ax.plot(window, loo.observed.loc[window, basin], **OBSERVED_STYLE)
        ax.plot(window, loo.simulated[CALIBRATED].loc[window, basin], **CALIBRATED_STYLE)
        ax.plot(
            window,
            loo.simulated[method].loc[window, basin],
            color=TRANSFER_COLOUR,
            linewidth=0.9,
            label=f"transferred ({method})",
        )
        _flow_axis(
            ax, log, loo.observed.loc[window, basin], loo.simulated[method].loc[window, basin]
        )
        ax.set_ylabel("Flow (mm/day)")
        ax.set_title(
            f"{rank}: {_basin_label(result.region, basin)}: NSE {method} {nse[basin]:.2f}, "
            f"calibrated {own_nse.get(basin, np.nan):.2f}",
            fontsize=10,
            loc="left",
        )
        ax.grid(True, color="0.92")
    axes[0].legend(loc="upper right", fontsize=8, ncols=3)
    axes[-1].set_xlabel("Date")
    fig.suptitle(f"Daily flow in the evaluation period, leave-one-out ({model})")
    return fig


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
    applicability check are hatched (polygons) or crossed (points).

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
    flow = table["mean_flow_mm"].astype(float)
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
    bar.set_label("Estimated mean flow (mm/day)")
    if _want_labels(label_basins, region):
        _label_basins(ax, region, list(table.index))
    handles = [
        Patch(facecolor="0.9", edgecolor="0.7", label="gauged basin"),
        _flag_handle(region, len(flagged)),
    ]
    ax.legend(handles=handles, loc="lower left", fontsize=8)
    _map_axes(ax, region)
    ax.set_title(
        f"Mean flow at ungauged basins: {prediction.method} ({prediction.model})\n"
        f"{len(flagged)} of {len(table)} outside what the gauges support"
    )
    return fig


def ungauged_hydrographs(
    result: RunResult, *, years: float = 1.0, log: bool = True, max_panels: int = MAX_PANELS
) -> Figure:
    """Estimated daily flow with its lower and upper bounds, one small panel per ungauged basin.

    Shows the last ``years`` of the estimated series; at most ``max_panels`` basins (flagged
    ones first, then by id), the rest named in the title.

    Parameters
    ----------
    result : RunResult
        With a prediction.
    years : float, default 1.0
        Length of the window shown, years.
    log : bool, default True
        Log flow axis.
    max_panels : int, default 12
        Most basins drawn.

    Returns
    -------
    Figure
    """
    prediction = _require(result.prediction, "prediction")
    flows = prediction.flows
    table = prediction.table
    basins = sorted(table.index, key=lambda b: (bool(table.loc[b, "applicable"]), str(b)))
    shown = basins[:max_panels]
    ncols = min(3, len(shown))
    nrows = math.ceil(len(shown) / ncols)
    fig = Figure(figsize=(4.2 * ncols, 2.5 * nrows + 0.9), layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True).ravel()
    for ax, basin in zip(axes, shown, strict=False):
        series = flows[flows["basin_id"] == basin].set_index("date").sort_index()
        series.index = pd.to_datetime(series.index)
        series = series.loc[_last_years(series.index, years)]
        ax.fill_between(
            series.index,
            series["flow_low_mm"],
            series["flow_high_mm"],
            color="#9ecae1",
            linewidth=0,
            label=f"{prediction.level:.0%} bounds",
        )
        ax.plot(series.index, series["flow_mm"], color="#08519c", linewidth=0.8, label="estimate")
        _flow_axis(ax, log, series["flow_high_mm"], series["flow_mm"])
        flag = "" if bool(table.loc[basin, "applicable"]) else " (flagged)"
        ax.set_title(f"{_basin_label(result.region, basin)}{flag}", fontsize=9, loc="left")
        ax.set_ylabel("Flow (mm/day)", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.tick_params(axis="x", labelrotation=30)
    for ax in axes[len(shown) :]:
        ax.set_visible(False)
    axes[0].legend(loc="upper right", fontsize=7)
    more = (
        f"; {len(basins) - len(shown)} more basins in flows_ungauged.csv"
        if len(basins) > len(shown)
        else ""
    )
    fig.suptitle(
        f"Estimated daily flow at ungauged basins with {prediction.level:.0%} bounds: "
        f"{prediction.method} ({prediction.model}){more}"
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
    frame = region.basins.loc[basins]
    points = frame.geometry if region.is_point else frame.geometry.representative_point()
    for basin, point in zip(frame.index, points, strict=True):
        ax.annotate(
            str(basin),
            (point.x, point.y),
            fontsize=6,
            ha="center",
            va="center",
            color="0.1",
            zorder=5,
        )


def _map_axes(ax, region) -> None:
    crs = region.basins.crs
    ax.set_aspect("equal")
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
            color="0.4",
        )
    ax.tick_params(labelsize=7)
    ax.ticklabel_format(axis="both", style="plain", useOffset=False)


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


def _flow_axis(ax, log: bool, *series: pd.Series) -> None:
    """Linear axis from zero, or log axis spanning ``LOG_DECADES`` below the highest flow."""
    top = max(float(np.nanmax(s.to_numpy(dtype=float))) for s in series)
    if not np.isfinite(top) or top <= 0:
        return
    if log:
        _plain_log(ax, ax.yaxis)
        ax.set_ylim(top * 10.0**-LOG_DECADES, top * 1.5)
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
