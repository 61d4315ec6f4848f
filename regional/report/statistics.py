"""The flow statistics in the report: tables a practitioner can copy, and their two figures.

Tables are DataFrames (the HTML module renders them); figures are
:class:`matplotlib.figure.Figure` objects built without pyplot:

===========================  =====================================================================
name                         content
===========================  =====================================================================
``statistics_loo``           observed statistic against its leave-one-out estimate at every gauged
                             basin, the model route and the best direct route, log axes, 1:1 line
``statistics_fdc``           flow-duration curve of every ungauged basin (chosen estimates) with
                             its bounds, exceedance on a normal-probability scale
===========================  =====================================================================
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, NullFormatter
from scipy import stats as scistats

from regional import flowstats
from regional.report.jobs import FigureJob
from regional.report.labels import MM_DAY, flow_in_unit

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from regional.result import RunResult

HEADLINE = (
    "mean_flow_mm_day",
    "q5_mm_day",
    "q50_mm_day",
    "q95_mm_day",
    "min7_mean_mm_day",
    "min7_q10_mm_day",
    "baseflow_index",
    "amax_q2_mm_day",
    "amax_q10_mm_day",
    "amax_q100_mm_day",
    "runoff_ratio",
)
"""Statistics in the report's tables and the leave-one-out figure (all are in the CSV files)."""
MAX_FDC_BASINS = 24
"""Ungauged basins drawn in the flow-duration figure (the first by id beyond that)."""
ROUTE_STYLES = {
    "model": {"marker": "o", "color": "#08519c", "label": "model route"},
    "direct": {"marker": "^", "color": "#d95f02", "label": "best direct route"},
}

LABELS = {
    "statistic": ("Statistic", ""),
    "estimate": ("Estimate", ""),
    "low": ("Low", ""),
    "high": ("High", ""),
    "unit": ("Unit", ""),
    "route": ("Route", ""),
    "median_abs_rel_error": ("Median abs. relative error (LOO)", "-"),
    "median_abs_log_error": ("Median abs. log10 error (LOO)", "-"),
    "r2_log": ("R2 of log10 (LOO)", "-"),
    "median_log_bias": ("Median log10 bias (LOO)", "-"),
    "held_out_coverage": ("Held-out coverage", "-"),
    "best_model_error": ("Model route abs. log10 error", "-"),
    "best_direct_error": ("Best direct route abs. log10 error", "-"),
}
"""Report labels of the statistics tables' columns."""


def describe(name: str) -> str:
    """A statistic's readable name (e.g. "flow exceeded 95% of the time (q95)")."""
    item = flowstats.statistic(name)
    short = name.removesuffix("_mm_day")
    return f"{item.description} ({short})"


def skill_table(result: RunResult) -> pd.DataFrame:
    """One row per statistic: the chosen route and its leave-one-out skill and coverage, with
    the model and best direct route's median absolute log10 error beside."""
    summary = result.statistics.summary
    rows = []
    for name, group in summary.groupby("statistic", sort=False):
        chosen = group[group["chosen"]]
        if chosen.empty:
            continue
        row = chosen.iloc[0]
        direct = group[group["route"] != "model"]["median_abs_log_error"]
        model = group[group["route"] == "model"]["median_abs_log_error"]
        rows.append(
            {
                "statistic": describe(name),
                "route": row["route"],
                "n_basins": int(row["n_basins"]),
                "median_abs_rel_error": row["median_abs_rel_error"],
                "r2_log": row["r2_log"],
                "median_log_bias": row["median_log_bias"],
                "coverage": row["coverage"],
                "held_out_coverage": row["held_out_coverage"],
                "best_model_error": model.min() if len(model) else np.nan,
                "best_direct_error": direct.min() if len(direct) else np.nan,
            }
        )
    return pd.DataFrame(rows)


def estimate_table(result: RunResult, unit: str, *, names=HEADLINE) -> pd.DataFrame:
    """Long table per ungauged basin and statistic: estimate, bounds, unit, route, skill.

    Flows are given in ``unit`` (the report's flow unit), ratios as they are.
    """
    stats = result.statistics
    table = stats.ungauged[stats.ungauged["statistic"].isin(list(names))].copy()
    summary = stats.summary[stats.summary["chosen"]].set_index("statistic")
    flows = table["unit"].eq(flowstats.FLOW_UNIT)
    if unit != MM_DAY:
        for column in ("estimate", "low", "high"):
            table.loc[flows, column] = table.loc[flows, f"{column}_m3s"]
        table.loc[flows, "unit"] = unit
    order = {name: i for i, name in enumerate(names)}
    table = table.sort_values(
        ["basin_id", "statistic"], key=lambda s: s.map(order) if s.name == "statistic" else s
    )
    out = pd.DataFrame(
        {
            "basin_id": table["basin_id"].to_numpy(),
            "statistic": [describe(n) for n in table["statistic"]],
            "estimate": table["estimate"].to_numpy(),
            "low": table["low"].to_numpy(),
            "high": table["high"].to_numpy(),
            "unit": table["unit"].to_numpy(),
            "route": table["route"].to_numpy(),
            "median_abs_rel_error": summary["median_abs_rel_error"]
            .reindex(table["statistic"])
            .to_numpy(),
            "coverage": summary["coverage"].reindex(table["statistic"]).to_numpy(),
            "applicable": table["applicable"].to_numpy(dtype=bool),
        }
    )
    return out


def copyable_text(frame: pd.DataFrame) -> str:
    """Tab-separated text of a table (numbers to four significant digits), for pasting."""
    lines = ["\t".join(map(str, frame.columns))]
    for values in frame.itertuples(index=False, name=None):
        lines.append("\t".join(_plain(v) for v in values))
    return "\n".join(lines)


def _plain(value) -> str:
    if isinstance(value, float):
        return "" if math.isnan(value) else f"{value:.4g}"
    return str(value)


# --------------------------------------------------------------------------------------------
# Figures


def statistics_figures(result: RunResult) -> dict[str, Figure]:
    """``statistics_loo`` always (with statistics); ``statistics_fdc`` with ungauged basins."""
    return {job.name: job.draw(result) for job in statistics_jobs(result)}


def statistics_jobs(result: RunResult) -> list[FigureJob]:
    """What :func:`statistics_figures` draws, as one job per figure
    (:mod:`regional.report.jobs`); neither figure reads daily series."""
    if result.statistics is None:
        return []
    stats = result.statistics
    jobs = [FigureJob("statistics_loo", loo_scatter, panels=len(HEADLINE))]
    if len(stats.ungauged):
        basins = min(MAX_FDC_BASINS, stats.ungauged["basin_id"].nunique())
        jobs.append(FigureJob("statistics_fdc", ungauged_duration_curves, panels=basins))
    return jobs


def loo_scatter(result: RunResult, *, names=HEADLINE) -> Figure:
    """Observed against leave-one-out estimate per statistic, model and best direct route."""
    stats = result.statistics
    names = [n for n in names if n in set(stats.summary["statistic"])]
    columns = 4
    rows = math.ceil(len(names) / columns)
    fig = Figure(figsize=(3.0 * columns, 2.9 * rows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, columns)).ravel()
    for ax, name in zip(axes, names, strict=False):
        _loo_panel(ax, stats, name)
    for ax in axes[len(names) :]:
        ax.set_axis_off()
    handles = [
        axes[0].scatter([], [], s=14, **{k: v for k, v in style.items()})
        for style in ROUTE_STYLES.values()
    ]
    fig.legend(handles=handles, loc="outside lower center", ncols=2, frameon=False)
    fig.suptitle(
        "Observed statistic against its leave-one-out estimate (log axes; chosen route above "
        "each panel)"
    )
    return fig


def _loo_panel(ax, stats, name: str) -> None:
    summary = stats.summary[stats.summary["statistic"] == name].set_index("route")
    direct = summary.drop(index="model", errors="ignore")["median_abs_log_error"].dropna()
    routes = {"model": "model"}
    if len(direct):
        routes["direct"] = direct.idxmin()
    loo = stats.loo[stats.loo["statistic"] == name]
    floor = flowstats.ZERO_FLOW_MM_DAY
    values = []
    for kind, route in routes.items():
        part = loo[loo["route"] == route]
        obs = np.maximum(part["observed"].to_numpy(dtype=float), floor)
        est = np.maximum(part["estimated"].to_numpy(dtype=float), floor)
        ax.scatter(obs, est, s=12, alpha=0.75, **ROUTE_STYLES[kind])
        values += [obs, est]
    values = np.concatenate(values)
    values = values[np.isfinite(values)]
    chosen = summary.index[summary["chosen"]]
    chosen_route = chosen[0] if len(chosen) else "-"
    unit = flowstats.statistic(name).unit
    ax.set_title(f"{name.removesuffix('_mm_day')} ({unit})\nchosen: {chosen_route}", fontsize=9)
    ax.tick_params(labelsize=7)
    if not values.size:
        _no_data(ax)
        return
    low, high = values.min() / 1.3, values.max() * 1.3
    ax.plot([low, high], [low, high], color="grey", linewidth=0.8, linestyle="--")
    ax.set_xlim(low, high)
    ax.set_ylim(low, high)
    ax.set_xscale("log")
    ax.set_yscale("log")
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        axis.set_minor_formatter(NullFormatter())


def _no_data(ax) -> None:
    ax.text(
        0.5,
        0.5,
        "too few years or basins",
        ha="center",
        va="center",
        fontsize=8,
        transform=ax.transAxes,
    )
    ax.set_xticks([])
    ax.set_yticks([])


def ungauged_duration_curves(result: RunResult, *, max_basins: int = MAX_FDC_BASINS) -> Figure:
    """Flow-duration curve (chosen estimates of Q1 .. Q99) with its bounds per ungauged basin,
    in the report's flow unit."""
    unit = result.settings.report.flow_unit
    table = result.statistics.ungauged_wide()
    basins = sorted(table.index.astype(str))[:max_basins]
    columns = min(4, len(basins))
    rows = math.ceil(len(basins) / columns)
    fig = Figure(figsize=(3.0 * columns, 2.6 * rows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, columns, squeeze=False)).ravel()
    percent = np.asarray(flowstats.EXCEEDANCE_PERCENT, dtype=float)
    position = scistats.norm.ppf(percent / 100.0)
    area = result.region.attributes["area_km2"].astype(float)
    for ax, basin in zip(axes, basins, strict=False):
        parts = {}
        for suffix in ("", "_low", "_high"):
            values = table.loc[basin, [f"q{int(p)}_mm_day{suffix}" for p in percent]]
            parts[suffix] = flow_in_unit(values.to_numpy(dtype=float), area[basin], unit)
        ax.set_title(basin, fontsize=9)
        ax.tick_params(labelsize=7)
        positive = parts[""][np.isfinite(parts[""]) & (parts[""] > 0)]
        if not positive.size:
            _no_data(ax)
            continue
        floor = max(positive.min() / 100.0, 1e-9)
        low = np.maximum(parts["_low"], floor)
        ax.fill_between(position, low, parts["_high"], color="#9ecae1", label="bounds")
        ax.plot(position, np.maximum(parts[""], floor), color="#08519c", label="estimate")
        ax.set_yscale("log")
        ax.set_xticks(position[[0, 2, 5, 8, 10]], [f"{p:g}" for p in percent[[0, 2, 5, 8, 10]]])
    for ax in axes[len(basins) :]:
        ax.set_axis_off()
    fig.supxlabel("exceedance (% of days)")
    fig.supylabel(f"flow ({unit})")
    level = result.statistics.level
    fig.suptitle(f"Flow-duration curve at each ungauged basin with {level:.0%} bounds")
    return fig
