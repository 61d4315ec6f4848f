"""Readable labels and units for the report's column names, and flows in the report's unit.

Tables and layers written to files keep their machine column names (``share_nse_gt_0_5``,
``mean_flow_m3s``); the report shows each column under a label and its unit looked up here.
:data:`COLUMN_LABELS` is the one label table: add an entry beside a new column. Columns it does
not list get a label from their name and a unit from the name's ending (:data:`SUFFIX_UNITS`),
so a user's own attribute ``awc_mm`` still shows "mm".

Flows are shown in the unit chosen by ``[report] flow_unit``: m3/s (default) or mm/day, converted
through the basin area, Q_m3s = Q_mm x area_km2 / 86.4 (1 mm over 1 km2 is 1,000 m3; a day is
86,400 s).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd

from regional.flowstats import to_m3s

M3S = "m3/s"
MM_DAY = "mm/day"
FLOW_UNITS = (M3S, MM_DAY)
"""Units the report can show flows in."""

COLUMN_LABELS: dict[str, tuple[str, str]] = {
    # basins
    "basin_id": ("Basin", ""),
    "name": ("Name", ""),
    "method": ("Method", ""),
    "model": ("Model", ""),
    "parameter": ("Parameter", ""),
    "term": ("Term", ""),
    "quantity": ("Quantity", ""),
    "attribute": ("Attribute", ""),
    "item": ("Item", ""),
    "value": ("Value", ""),
    "stage": ("Stage", ""),
    "seconds": ("Time", "s"),
    # leave-one-out summary
    "n_basins": ("Basins", "count"),
    "median_nse": ("Median NSE", "-"),
    "q25_nse": ("NSE lower quartile", "-"),
    "q75_nse": ("NSE upper quartile", "-"),
    "share_nse_gt_0_5": ("Share with NSE > 0.5", "-"),
    "share_nse_gt_0": ("Share with NSE > 0", "-"),
    "median_kge": ("Median KGE", "-"),
    "median_log_nse": ("Median log-NSE", "-"),
    "median_pbias": ("Median bias", "%"),
    "loss_vs_calibrated": ("NSE loss against calibrated", "-"),
    "gain_vs_median": ("NSE gain over median", "-"),
    "coverage": ("Coverage of the bounds", "-"),
    "nominal_level": ("Nominal level", "-"),
    "level": ("Nominal level", "-"),
    "coverage_minus_level": ("Coverage minus level", "-"),
    "n_days": ("Days", "count"),
    "n_donors": ("Donors per target", "count"),
    "chosen": ("Chosen", ""),
    "median_nse_choice_held_out": ("Median NSE, count chosen without the basin", "-"),
    # calibration
    "count": ("Basins", "count"),
    "min": ("Minimum", ""),
    "q25": ("Lower quartile", ""),
    "median": ("Median", ""),
    "q75": ("Upper quartile", ""),
    "max": ("Maximum", ""),
    "score_calibration": ("Objective, calibration period", "-"),
    "score_validation": ("Objective, validation period", "-"),
    "nse_calibration": ("NSE, calibration period", "-"),
    "nse_validation": ("NSE, validation period", "-"),
    "kge_calibration": ("KGE, calibration period", "-"),
    "kge_validation": ("KGE, validation period", "-"),
    "n_days_calibration": ("Days scored, calibration period", "count"),
    "n_days_validation": ("Days scored, validation period", "count"),
    "n_runs": ("Model runs of the calibration search", "count"),
    # regression
    "transform": ("Transform", ""),
    "terms": ("Attributes selected", ""),
    "R2": ("R2", "-"),
    "adjusted R2": ("Adjusted R2", "-"),
    "RSE (transformed units)": ("Residual standard error", "transformed units"),
    "basins": ("Basins", "count"),
    "residual dof": ("Residual degrees of freedom", "count"),
    "estimate": ("Estimate", "per standard deviation"),
    "std_error": ("Standard error", "per standard deviation"),
    "estimate_raw": ("Estimate", "per attribute unit"),
    "std_error_raw": ("Standard error", "per attribute unit"),
    "t": ("t statistic", "-"),
    "p": ("p value (two-sided)", "-"),
    "vif": ("Variance inflation factor", "-"),
    # estimates at ungauged basins
    "loo_median_nse": ("Median leave-one-out NSE", "-"),
    "applicable": ("Applicable", ""),
    "reason": ("Reason", ""),
    "mahalanobis_d2": ("Mahalanobis distance squared", "-"),
    "nearest_donor_distance": ("Distance to nearest donor", "standardised"),
    "flow_unit": ("Unit", ""),
    "unit": ("Unit", ""),
    "mean_flow": ("Mean flow", ""),
    "mean_flow_bounds": ("Mean of the daily bounds", ""),
    "q5": ("Q5: flow exceeded 5 % of days", ""),
    "q50": ("Q50: median flow", ""),
    "q95": ("Q95: flow exceeded 95 % of days", ""),
    "min7_mean": ("Mean annual 7-day minimum", ""),
    # screening
    "rank": ("Rank", ""),
    "score": ("Screening score", "-"),
    "variance_reduction": ("Variance reduction", "-"),
    "donor_spread": ("Donor spread", "-"),
    "estimation_reduction": ("Estimation variance reduction", "-"),
    "leverage": ("Leverage", "-"),
    # error model
    "class": ("Flow class", ""),
    "percentile_low": ("From percentile", "%"),
    "percentile_high": ("To percentile", "%"),
    "lower_q": ("Lower log-error quantile", "-"),
    "upper_q": ("Upper log-error quantile", "-"),
    "n": ("Days", "count"),
    "offset_fraction": ("Log offset share of mean flow", "-"),
    # attributes
    "area_km2": ("Area", "km2"),
    "centroid_lon": ("Centroid longitude", "degrees"),
    "centroid_lat": ("Centroid latitude", "degrees"),
    "perimeter_km": ("Perimeter", "km"),
    "compactness": ("Compactness (Gravelius)", "-"),
    "aridity": ("Aridity (PET / P)", "-"),
    "aridity_class": ("Aridity class (UNEP)", ""),
    "runoff_ratio": ("Runoff ratio", "-"),
    "snow_fraction": ("Snow share of precipitation", "-"),
    "elevation_mean": ("Mean elevation", "m"),
    "slope_mean": ("Mean slope", "degrees"),
}
"""Machine column name -> (label, unit) shown in the report ("" unit: none shown)."""

SUFFIX_UNITS = (
    ("_m3s", "m3/s"),
    ("_km2", "km2"),
    ("_km", "km"),
    ("_mm_per_day", "mm/day"),
    ("_per_day", "1/day"),
    ("_mm", "mm"),
    ("_m", "m"),
    ("_days", "days"),
    ("_c", "degC"),
    ("_pct", "%"),
    ("_frac", "-"),
    ("_fraction", "-"),
    ("_share", "-"),
)
"""Unit read from a column name's ending when :data:`COLUMN_LABELS` does not list it."""


def column_label(column: str, *, extra: Mapping[str, tuple[str, str]] | None = None) -> tuple:
    """(label, unit) of a column: ``extra`` first, then :data:`COLUMN_LABELS`, then its name.

    Parameters
    ----------
    column : str
        Machine column name.
    extra : mapping of str -> (str, str), optional
        Labels of this table only (e.g. a model's parameters, flows in the report's unit).

    Returns
    -------
    tuple of (str, str)
        The label and the unit ("" when the column has none or it is unknown).
    """
    for table in (extra or {}, COLUMN_LABELS):
        if column in table:
            return table[column]
    name = str(column)
    for suffix, unit in SUFFIX_UNITS:
        if name.endswith(suffix) and len(name) > len(suffix):
            return _readable(name[: -len(suffix)]), unit
    return _readable(name), ""


def parameter_labels(parameters) -> dict[str, tuple[str, str]]:
    """Labels of a model's parameters from its parameter table (description and unit)."""
    return {p.name: (_first_upper(p.description or p.name), p.unit) for p in parameters}


def flow_in_unit(flow_mm, area_km2, unit: str):
    """Flow in mm/day as ``unit``: unchanged for mm/day, through the area for m3/s.

    Parameters
    ----------
    flow_mm : ndarray, Series or DataFrame
        Flow, mm/day.
    area_km2 : float, ndarray or Series
        Basin area, km2: one number, an array broadcastable against ``flow_mm``, or a Series
        aligned on the index of ``flow_mm`` (one area per row).
    unit : {"m3/s", "mm/day"}
    """
    _check_unit(unit)
    if unit == MM_DAY:
        return flow_mm
    if np.ndim(area_km2) == 0:
        return flow_mm * float(to_m3s(np.ones(1), np.full(1, float(area_km2)))[0])
    if isinstance(flow_mm, pd.Series | pd.DataFrame):
        area = pd.Series(area_km2).reindex(flow_mm.index).to_numpy(dtype=float)
        if isinstance(flow_mm, pd.DataFrame):
            area = area[:, None]
        return flow_mm * to_m3s(np.ones(1), area)
    return to_m3s(np.asarray(flow_mm, dtype=float), np.asarray(area_km2, dtype=float))


def _check_unit(unit: str) -> None:
    if unit not in FLOW_UNITS:
        raise ValueError(f"flow unit must be one of {FLOW_UNITS}, got {unit!r}")


def _readable(name: str) -> str:
    return _first_upper(name.replace("_", " ").strip())


def _first_upper(text: str) -> str:
    return text[:1].upper() + text[1:]
