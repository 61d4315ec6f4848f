"""A validated region: basins, attributes, daily forcing and observed flow on common dates.

:func:`load_region` is the single entry point: settings -> readers (:mod:`regional.io`) ->
checks (:mod:`regional.checks`) -> wide daily tables -> attributes
(:mod:`regional.attributes`). It either returns a :class:`Region` or raises one
:class:`~regional.errors.InputError` naming the file, layer or column, basin and row at fault.
:func:`describe_region` summarises a region for ``regional check``.
"""

from __future__ import annotations

import difflib
import warnings
from dataclasses import dataclass, replace
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

from regional import checks, io
from regional.attributes import basin_area_km2, climate_table, compute_attributes
from regional.config import Settings, load_settings
from regional.errors import InputError, InputWarning
from regional.flowstats import MM_DAY_PER_M3S_KM2
from regional.models import get_model
from regional.series import (
    check_store,
    read_grids,
    store_blocks,
    store_reader,
    store_tables,
    write_store,
)
from regional.series import tables as series_tables

#: mm/day of runoff from 1 m3/s over 1 km2: 86 400 s/day * 1 m3/s / 1e6 m2 * 1000 mm/m.
MM_PER_DAY_PER_M3S_KM2 = MM_DAY_PER_M3S_KM2
#: Attributes never used for transfer by default: runoff_ratio needs observed flow; coordinates
#: are for proximity, not similarity.
NOT_TRANSFERABLE = ("runoff_ratio", "centroid_lon", "centroid_lat")


@dataclass(frozen=True, eq=False)
class Region:
    """Everything a run needs about a region, validated.

    Daily tables are DataFrames shaped (days, basins): index ``dates`` (named ``date``), columns
    ``basin_id`` in the order of ``basins``, values of :data:`regional.series.SERIES_DTYPE`
    (float32), each basin's column contiguous in memory (:mod:`regional.series`); or, loaded
    with ``series_in_store``, :class:`regional.series.StoreTable` of the same layout whose
    values stay in the series store until some basins' are asked for.

    Attributes
    ----------
    settings : Settings
        The parsed ``region.toml``.
    basins : GeoDataFrame
        Indexed by ``basin_id`` (str), the layer's CRS kept; polygons or points.
    attributes : DataFrame
        Attribute table indexed by ``basin_id`` (user columns, then computed ones).
    dates : DatetimeIndex
        Daily and continuous: the period covered by every basin's forcing.
    precip_mm, pet_mm : DataFrame
        Precipitation and potential evapotranspiration in mm/day (no missing values).
    temp_c : DataFrame or None
        Mean air temperature in deg C when given.
    flow_mm : DataFrame
        Observed flow in mm/day (converted from m3/s with the area when given so), NaN where
        missing; all NaN for ungauged basins.
    gauged, ungauged : tuple of str
        Basins with / without usable observed flow in the calibration period, in basin order.
        A basin whose observed flow is constant over the calibration or validation period is
        ungauged (listed in ``constant_flow``). A basin without usable flow whose parameters
        the user gave is neither: it is a donor only (:attr:`donor_only`).
    is_point : bool
        Basins were given as points (outlets) carrying their area.
    notes : tuple of str
        What was skipped, trimmed or approximated.
    warnings : tuple of str
        The :class:`~regional.errors.InputWarning` messages raised while loading.
    constant_flow : tuple of str
        Basins with observed flow that is one repeated value (e.g. all zero) over the
        calibration or validation period: they can be neither calibrated nor scored, so they
        are treated as ungauged and never serve as donors (unless the user gave their
        parameters: then they are donors only, see :attr:`donor_only`).
    parameters : DataFrame or None
        The user's calibrated parameters (``[model] parameters``), indexed by ``basin_id``,
        one column per parameter of every model in ``[model] name``; these basins are not
        calibrated. None when the config names no table.
    """

    settings: Settings
    basins: gpd.GeoDataFrame
    attributes: pd.DataFrame
    dates: pd.DatetimeIndex
    precip_mm: pd.DataFrame
    pet_mm: pd.DataFrame
    temp_c: pd.DataFrame | None
    flow_mm: pd.DataFrame
    gauged: tuple[str, ...]
    ungauged: tuple[str, ...]
    is_point: bool
    notes: tuple[str, ...]
    warnings: tuple[str, ...]
    constant_flow: tuple[str, ...] = ()
    parameters: pd.DataFrame | None = None

    @property
    def user_parameter_basins(self) -> tuple[str, ...]:
        """Gauged basins whose parameters the user gave (``[model] parameters``), in order."""
        if self.parameters is None:
            return ()
        given = set(self.parameters.index)
        return tuple(basin for basin in self.gauged if basin in given)

    @property
    def donor_only(self) -> tuple[str, ...]:
        """Basins whose parameters the user gave but which have no usable observed flow, in
        basin order: they serve as donors of parameter transfer (training rows, donor
        neighbours) but are not scored, never a leave-one-out target and not estimated."""
        if self.parameters is None:
            return ()
        given, gauged = set(self.parameters.index), set(self.gauged)
        return tuple(b for b in self.basins.index if b in given and b not in gauged)

    @property
    def calibration(self) -> tuple[pd.Timestamp, pd.Timestamp]:
        """The calibration period: ``[model] calibration``, or the whole common record."""
        period = self.settings.model.calibration
        return period if period is not None else (self.dates[0], self.dates[-1])

    def summary(self) -> RegionSummary:
        """Counts, record lengths and attribute ranges (see :func:`describe_region`)."""
        return describe_region(self)


@dataclass(frozen=True, eq=False)
class RegionSummary:
    """What ``regional check`` prints.

    Attributes
    ----------
    name : str
        ``[region] name``.
    n_basins, n_gauged, n_ungauged : int
        Basin counts.
    n_donor_only : int
        Basins with the user's parameters and no observed flow (donors only).
    geometry : str
        ``"polygons"`` or ``"points"``.
    period : (Timestamp, Timestamp)
        The common forcing period.
    calibration, validation : (Timestamp, Timestamp) or None
        The periods in use.
    records : DataFrame
        Per basin (index ``basin_id``): ``status`` (gauged/ungauged), ``first_flow``,
        ``last_flow``, ``flow_days``, ``flow_years`` (observed days / 365.25), ``gap_days``
        (missing days inside the flow record), ``calibration_days``.
    attribute_ranges : DataFrame
        Per numeric attribute (index): ``min``, ``median``, ``max``, ``missing`` (count).
    notes, warnings : tuple of str
        From loading.
    """

    name: str
    n_basins: int
    n_gauged: int
    n_ungauged: int
    geometry: str
    period: tuple[pd.Timestamp, pd.Timestamp]
    calibration: tuple[pd.Timestamp, pd.Timestamp]
    validation: tuple[pd.Timestamp, pd.Timestamp] | None
    records: pd.DataFrame
    attribute_ranges: pd.DataFrame
    notes: tuple[str, ...]
    warnings: tuple[str, ...]
    n_donor_only: int = 0


def load_region(path: str | Path | Settings, *, series_in_store: bool = False) -> Region:
    """Read, check and assemble a region.

    Parameters
    ----------
    path : str, Path or Settings
        The region folder (holding ``region.toml``), the TOML file, or settings already loaded.
    series_in_store : bool, default False
        When the series file is a series store, leave the daily tables in it
        (:class:`regional.series.StoreTable`: values read a block of basins at a time, where
        asked for) instead of holding them as grids: the store is checked, and the attributes
        of the series computed, a block of basins at a time. For the client of a run on a
        cluster, whose tasks read their own basins. Everything else is the same.

    Returns
    -------
    Region
        Validated basins, attributes and daily tables on the common forcing period.

    Raises
    ------
    InputError
        Any problem with the settings or the inputs, with the file, layer or column, basin and
        row at fault and the fix.

    Warns
    -----
    InputWarning
        Gaps in observed flow, short calibration records, attributes with missing values. The
        messages are also kept in ``Region.warnings``.
    """
    settings = path if isinstance(path, Settings) else load_settings(path)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        region = _build(settings, in_store=series_in_store)
    messages = []
    for record in caught:
        if issubclass(record.category, InputWarning):
            messages.append(str(record.message))
            warnings.warn(str(record.message), InputWarning, stacklevel=2)
        else:
            warnings.warn_explicit(record.message, record.category, record.filename, record.lineno)
    return replace(region, warnings=tuple(messages))


def convert_series(source: str | Path | Settings, target: str | Path) -> tuple[int, int]:
    """Check a region's basins and series and write the series as a series store.

    The store (:func:`regional.series.write_store`) is a Parquet file with one row group per
    basin, so a worker of a cluster reads only the basins of its task. Point ``[series] path``
    at it; the other ``[series]`` keys stay as they are.

    Returns
    -------
    (int, int)
        Basins and rows written.
    """
    settings = source if isinstance(source, Settings) else load_settings(source)
    basins, _ = _basins(settings)
    rows = write_store(settings, basins.index, target)
    return len(basins), rows


def describe_region(region: Region) -> RegionSummary:
    """Summarise a region: counts, record length per basin, attribute ranges, notes, warnings."""
    return RegionSummary(
        name=region.settings.region.name,
        n_basins=len(region.basins),
        n_gauged=len(region.gauged),
        n_ungauged=len(region.ungauged),
        geometry="points" if region.is_point else "polygons",
        period=(region.dates[0], region.dates[-1]),
        calibration=region.calibration,
        validation=region.settings.model.validation,
        records=_records(region),
        attribute_ranges=_attribute_ranges(region.attributes),
        notes=region.notes,
        warnings=region.warnings,
        n_donor_only=len(region.donor_only),
    )


# --------------------------------------------------------------------------------------------
# Steps of load_region
# --------------------------------------------------------------------------------------------


def _build(settings: Settings, *, in_store: bool = False) -> Region:
    notes: list[str] = []
    basins, is_point = _basins(settings)
    overlays, dem = region_overlays(settings), region_raster(settings)
    daily = _daily(settings, basins, notes, in_store=in_store)
    tables, summary = daily.tables, daily.summary
    calibration = daily.calibration
    flow_source = f"{daily.source}, column '{settings.series.flow_column}'"
    constant = _warn_constant(summary.constant, flow_source)
    gauged = _gauged(summary.observed, calibration, flow_source, constant=constant)
    checks.check_gauged_for_methods(
        len(gauged), methods=settings.transfer.methods, source=str(settings.path)
    )
    checks.warn_gap_days(summary.gaps, n_observed=summary.n_observed, source=flow_source)
    attributes = compute_attributes(
        basins,
        precip_mm=tables["precip"],
        pet_mm=tables["pet"],
        temp_c=tables.get("temp"),
        flow_mm=tables["flow"],
        overlays=overlays,
        dem=dem,
        climate=summary.climate,
    )
    _check_attribute_choice(settings, attributes.table)
    _check_transfer_attributes(settings, attributes.table, basins, tables["precip"])
    parameters = _user_parameters(settings, basins.index, gauged, temp=tables.get("temp"))
    known = set(gauged) | (set() if parameters is None else set(parameters.index))
    _check_candidates(settings, basins.index, gauged, known=known)
    ungauged = tuple(basin for basin in basins.index if basin not in known)
    return Region(
        settings=settings,
        basins=basins,
        attributes=attributes.table,
        dates=daily.dates,
        precip_mm=tables["precip"],
        pet_mm=tables["pet"],
        temp_c=tables.get("temp"),
        flow_mm=tables["flow"],
        gauged=gauged,
        ungauged=ungauged,
        is_point=is_point,
        notes=tuple(notes) + tuple(attributes.notes),
        warnings=(),
        constant_flow=tuple(basin for basin in basins.index if basin in constant),
        parameters=parameters,
    )


@dataclass(frozen=True, eq=False)
class _Summary:
    """What loading needs of the daily series, per basin: the constant-flow findings of each
    block (period -> basin -> why), the observed days in the calibration period, the gap
    days of the flow record, how many basins have observed flow, and the attributes of the
    series (:func:`regional.attributes.climate_table`)."""

    constant: list[dict[str, dict[str, str]]]
    observed: pd.Series
    gaps: pd.Series
    n_observed: int
    climate: pd.DataFrame


@dataclass(frozen=True, eq=False)
class _Daily:
    """The daily tables of a region (grids, or :class:`regional.series.StoreTable`), their
    common dates, the description of the file, the calibration period and the summary."""

    dates: pd.DatetimeIndex
    tables: dict
    source: str
    calibration: tuple[pd.Timestamp, pd.Timestamp]
    summary: _Summary


def _daily(
    settings: Settings, basins: gpd.GeoDataFrame, notes: list[str], *, in_store: bool
) -> _Daily:
    """The daily tables and their per-basin summary: held as grids, or (``in_store`` and the
    series file is a series store) left in the store and summarised a block of basins at a
    time, so that no grid of the whole region is held."""
    if in_store and io.series_store_basins(settings.series.path) is not None:
        return _daily_in_store(settings, basins, notes)
    return _daily_as_grids(settings, basins, notes)


def _daily_in_store(settings: Settings, basins: gpd.GeoDataFrame, notes: list[str]) -> _Daily:
    """The daily tables left in the series store, checked and summarised a block at a time."""
    first, last, source = check_store(settings, basins.index)
    dates = _common_dates(first, last, source, notes)
    calibration = _check_periods(settings, dates, notes)
    area = basin_area_km2(basins) if settings.series.flow_m3s is not None else None
    temp = bool(settings.series.temp)
    reader = store_reader(settings, dates, with_temp=temp, area_km2=area)
    tables = {
        name.split("_")[0]: table for name, table in store_tables(reader, basins.index).items()
    }
    blocks = (
        _summary_of(
            block,
            part["precip_mm"],
            part["pet_mm"],
            part.get("temp_c"),
            part["flow_mm"],
            settings,
            calibration,
        )
        for block, part in store_blocks(reader, basins.index)
    )
    return _Daily(dates, tables, source, calibration, _stacked(list(blocks)))


def _daily_as_grids(settings: Settings, basins: gpd.GeoDataFrame, notes: list[str]) -> _Daily:
    """The daily tables read whole into grids, summarised at once."""
    grids, source = read_grids(settings, basins.index)
    dates = _common_dates(grids.first, grids.last, source, notes)
    tables = series_tables(grids, dates, basins.index)
    del grids
    tables["flow"] = _flow_mm(tables["flow"], basins, settings)
    calibration = _check_periods(settings, dates, notes)
    ids = list(basins.index)
    summary = _summary_of(
        ids,
        tables["precip"],
        tables["pet"],
        tables.get("temp"),
        tables["flow"],
        settings,
        calibration,
    )
    return _Daily(dates, tables, source, calibration, _stacked([summary]))


def _summary_of(ids, precip, pet, temp, flow, settings: Settings, calibration) -> _Summary:
    """The :class:`_Summary` of some basins' tables (a block, or the whole region)."""
    periods = {"calibration": calibration, "validation": settings.model.validation}
    return _Summary(
        constant=[_constant_in(flow, periods)],
        observed=flow.loc[calibration[0] : calibration[1]].notna().sum(axis=0),
        gaps=checks.flow_gap_days(flow),
        n_observed=int(flow.notna().any(axis=0).sum()),
        climate=climate_table(ids, precip_mm=precip, pet_mm=pet, temp_c=temp, flow_mm=flow),
    )


def _stacked(parts: list[_Summary]) -> _Summary:
    """The summaries of consecutive blocks of basins as one."""
    if len(parts) == 1:
        return parts[0]
    return _Summary(
        constant=[found for part in parts for found in part.constant],
        observed=pd.concat([part.observed for part in parts]),
        gaps=pd.concat([part.gaps for part in parts]),
        n_observed=sum(part.n_observed for part in parts),
        climate=pd.concat([part.climate for part in parts]),
    )


def _user_parameters(
    settings: Settings,
    basin_ids: pd.Index,
    gauged: tuple[str, ...],
    *,
    temp: pd.DataFrame | None,
) -> pd.DataFrame | None:
    """The user's parameter table, checked against the models' parameters and bounds."""
    path = settings.model.parameters
    if path is None:
        return None
    bounds = {
        parameter.name: (parameter.lower, parameter.upper, name)
        for name in settings.model.names
        for parameter in get_model(name).parameters
    }
    table = checks.check_parameter_table(
        io.read_parameter_table(path),
        source=f"parameter table {path}",
        bounds=bounds,
        basin_ids=list(basin_ids),
    )
    _check_donor_snow(settings, [b for b in table.index if b not in set(gauged)], temp=temp)
    return table


def _check_donor_snow(settings: Settings, donors: list[str], *, temp: pd.DataFrame | None) -> None:
    """Basins without flow cannot calibrate snow parameters: the config must hold them."""
    model = settings.model
    if not donors or not model.use_snow(has_temperature=temp is not None):
        return
    held = {"snow_threshold_c": model.snow_threshold_c}
    held["melt_factor_mm_per_degc_day"] = model.melt_factor_mm_per_degc_day
    missing = [name for name, value in held.items() if value is None]
    if missing:
        shown = ", ".join(f"'{b}'" for b in donors[:5]) + (" ..." if len(donors) > 5 else "")
        raise InputError(
            f"parameter table {model.parameters} ([model] parameters): basins {shown} have no "
            "observed flow in the calibration period, so the snow store's parameters "
            f"({', '.join(missing)}) cannot be calibrated there, and the table holds none. "
            f"Fix: set {' and '.join(missing)} in [model] of {settings.path}, give those "
            "basins' observed flow, or delete their rows."
        )


def _basins(settings: Settings) -> tuple[gpd.GeoDataFrame, bool]:
    spec = settings.basins
    basins = io.read_basins(spec.path, spec.layer, id_field=spec.id, area_field=spec.area)
    source = f"basins {spec.path}" + (f" (layer '{spec.layer}')" if spec.layer else "")
    is_point = checks.check_basins(
        basins, source=source, flow_in_m3s=settings.series.flow_m3s is not None
    )
    if "area_km2" in basins.columns:
        basins = basins.assign(area_km2=pd.to_numeric(basins["area_km2"]).astype(float))
    return basins, is_point


def region_overlays(settings: Settings) -> tuple[io.Overlay, ...]:
    """The overlay layers the settings name, read and checked."""
    overlays = []
    for spec in settings.overlays:
        overlay = io.read_overlay(spec.path, spec.layer, fields=spec.fields)
        checks.check_overlay(overlay)
        overlays.append(overlay)
    return tuple(overlays)


def region_raster(settings: Settings) -> io.Raster | None:
    """The raster the settings name (None without one), read and checked."""
    if settings.raster is None:
        return None
    raster = io.read_raster(settings.raster.path)
    checks.check_raster(raster)
    return raster


def _common_dates(
    first: pd.Series, last: pd.Series, source: str, notes: list[str]
) -> pd.DatetimeIndex:
    start, end = checks.check_common_period(first, last, source=source)
    trimmed = int(((first < start) | (last > end)).sum())
    if trimmed:
        notes.append(
            f"forcing of {trimmed} basins trimmed to the period common to all basins, "
            f"{start:%Y-%m-%d}..{end:%Y-%m-%d}"
        )
    return pd.date_range(start, end, freq="D", name="date")


def _flow_mm(flow: pd.DataFrame, basins: gpd.GeoDataFrame, settings: Settings) -> pd.DataFrame:
    """Observed flow in mm/day: as given, or from m3/s with the basin area (86.4 / area_km2)."""
    if settings.series.flow_m3s is None:
        return flow
    return flow_m3s_to_mm(flow, basin_area_km2(basins))


def flow_m3s_to_mm(flow_m3s: pd.DataFrame, area_km2: pd.Series) -> pd.DataFrame:
    """Convert flow in m3/s to mm/day over the basin area.

    Parameters
    ----------
    flow_m3s : DataFrame, shape (days, basins)
        Flow in m3/s; columns basin_id.
    area_km2 : Series
        Basin area in km2 indexed by basin_id.

    Returns
    -------
    DataFrame
        Flow in mm/day: ``flow_m3s * 86.4 / area_km2`` (1 m3/s over 86.4 km2 is 1 mm/day).
    """
    area = area_km2.reindex(flow_m3s.columns).to_numpy(dtype=float)
    factor = MM_PER_DAY_PER_M3S_KM2 / area
    dtypes = set(flow_m3s.dtypes)
    if len(dtypes) == 1 and pd.api.types.is_float_dtype(next(iter(dtypes))):
        factor = factor.astype(next(iter(dtypes)))  # keep the storage type (float32)
    return flow_m3s * factor


def _check_periods(
    settings: Settings, dates: pd.DatetimeIndex, notes: list[str]
) -> tuple[pd.Timestamp, pd.Timestamp]:
    model = settings.model
    periods = {"calibration": model.calibration, "validation": model.validation}
    checks.check_periods(periods, start=dates[0], end=dates[-1], source=str(settings.path))
    calibration = model.calibration or (dates[0], dates[-1])
    if model.calibration is None:
        notes.append(
            f"no [model] calibration period given: the whole record "
            f"{dates[0]:%Y-%m-%d}..{dates[-1]:%Y-%m-%d} is used"
        )
    if model.initial_storage_mm is None:
        _check_warmup(settings, dates, calibration)
    return calibration


def _check_warmup(
    settings: Settings, dates: pd.DatetimeIndex, calibration: tuple[pd.Timestamp, pd.Timestamp]
) -> None:
    """The warm-up must fit in the forcing before the first scored day (``run`` fails else).

    With a ``[model] calibration`` period the warm-up must fit before it (or before the
    validation period when that comes first); without one, the first ``warmup_days`` of the
    record warm up the store and at least two days must remain to score.
    """
    model = settings.model
    where = f"key 'warmup_days' in [model] of {settings.path}"
    if model.calibration is None:
        left = len(dates) - model.warmup_days
        if left < 2:
            raise InputError(
                f"{where}: the warm-up must leave at least 2 days of the record to calibrate "
                f"on; found warmup_days = {model.warmup_days} and a record of {len(dates)} days "
                f"({dates[0]:%Y-%m-%d}..{dates[-1]:%Y-%m-%d}). Fix: lower warmup_days, or set "
                "initial_storage_mm to start without a warm-up."
            )
        return
    first = min(p[0] for p in (calibration, model.validation) if p is not None)
    lead = (first - dates[0]).days
    if lead < model.warmup_days:
        raise InputError(
            f"{where}: the warm-up must fit in the forcing before the first scored day; found "
            f"warmup_days = {model.warmup_days} but only {lead} days of forcing from "
            f"{dates[0]:%Y-%m-%d} to the start {first:%Y-%m-%d}. Fix: set warmup_days <= "
            f"{lead}, start the calibration period later, or set initial_storage_mm."
        )


def _constant_in(
    flow_mm: pd.DataFrame, periods: dict[str, tuple[pd.Timestamp, pd.Timestamp] | None]
) -> dict[str, dict[str, str]]:
    """Period -> basins whose observed flow is one repeated value over it -> why."""
    found: dict[str, dict[str, str]] = {}
    for name, period in periods.items():
        if period is None:
            continue
        part = flow_mm.loc[period[0] : period[1]]
        days = part.notna().sum(axis=0)
        low, high = part.min(axis=0), part.max(axis=0)
        constant = (days > 0) & (low == high)
        found[name] = {
            basin: f"'{basin}' ({name} {period[0]:%Y-%m-%d}..{period[1]:%Y-%m-%d}: "
            f"{int(days[basin])} observed days, all {low[basin]:g} mm/day)"
            for basin in constant.index[constant.to_numpy()]
        }
    return found


def _warn_constant(blocks: list[dict[str, dict[str, str]]], source: str) -> dict[str, str]:
    """Basins whose observed flow is constant over a scoring period -> why (warned), from the
    findings of :func:`_constant_in` of consecutive blocks of basins.

    Such a record can be neither calibrated (no variance to fit) nor scored (NSE and KGE
    divide by its variance): the basin is treated as ungauged and never serves as a donor.
    """
    found: dict[str, str] = {}
    names = dict.fromkeys(name for block in blocks for name in block)
    for name in names:
        for block in blocks:
            for basin, why in block.get(name, {}).items():
                found.setdefault(basin, why)
    if found:
        warnings.warn(
            f"{source}: observed flow is constant over a scoring period at "
            f"{len(found)} basin(s): {', '.join(found.values())}; a constant record can be "
            "neither calibrated nor scored, so these basins are treated as ungauged and serve "
            "as no donor. Fix: check the gauge record (a filled gap, a code such as 0 for "
            "missing); leave missing days empty.",
            InputWarning,
            stacklevel=2,
        )
    return found


def _gauged(
    observed: pd.Series,
    calibration: tuple[pd.Timestamp, pd.Timestamp],
    source: str,
    *,
    constant: dict[str, str],
) -> tuple[str, ...]:
    """Basins with observed flow in the calibration period (``observed``: days per basin)."""
    observed = observed.copy()
    observed[observed.index.isin(list(constant))] = 0
    checks.check_gauged(observed, source=source, period=calibration)
    return tuple(observed.index[observed.to_numpy() > 0])


def _check_attribute_choice(settings: Settings, table: pd.DataFrame) -> None:
    chosen = settings.transfer.attributes
    numeric = [name for name in table.columns if _is_numeric(table[name])]
    if chosen is not None:
        for name in chosen:
            if name not in table.columns or name not in numeric:
                near = difflib.get_close_matches(name, numeric, n=1)
                hint = f"did you mean '{near[0]}'? " if near else ""
                what = "not numeric" if name in table.columns else "not an attribute"
                raise InputError(
                    f"key 'attributes' in [transfer] of {settings.path}: '{name}' is {what}; "
                    f"transfer attributes must be numeric attribute columns; numeric "
                    f"attributes: {', '.join(numeric)}. Fix: {hint}list only these names."
                )


def transfer_attribute_names(settings: Settings, table: pd.DataFrame) -> tuple[str, ...]:
    """Attribute columns the transfer uses: ``[transfer] attributes`` when given; else every
    numeric attribute except those in :data:`NOT_TRANSFERABLE`."""
    chosen = settings.transfer.attributes
    if chosen is not None:
        return tuple(chosen)
    return tuple(c for c in table.columns if _is_numeric(table[c]) and c not in NOT_TRANSFERABLE)


def _check_transfer_attributes(
    settings: Settings, table: pd.DataFrame, basins: gpd.GeoDataFrame, precip: pd.DataFrame
) -> None:
    """Every basin needs a finite value of every transfer attribute; name where a gap came from."""
    names = list(transfer_attribute_names(settings, table))
    values = table[names].apply(pd.to_numeric, errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if not bad.any():
        return
    column = int(np.flatnonzero(bad.any(axis=0))[0])
    name = names[column]
    rows = np.flatnonzero(bad[:, column])
    found = ", ".join(
        f"'{table.index[r]}' ({_shown_value(values[r, column])})" for r in rows[: checks.SHOWN]
    )
    more = f" and {len(rows) - checks.SHOWN} more" if len(rows) > checks.SHOWN else ""
    origin = _attribute_origin(settings, name, basins, table.index[rows], precip)
    raise InputError(
        f"transfer attribute '{name}' is missing or infinite at {len(rows)} basin(s): "
        f"{found}{more}; it comes from {origin}. Every basin needs a finite value of every "
        f"transfer attribute. Fix: correct the source, or drop '{name}' from [transfer] "
        f"attributes in {settings.path}."
    )


def _shown_value(value: float) -> str:
    return "missing" if np.isnan(value) else f"{value:g}"


def _attribute_origin(
    settings: Settings,
    name: str,
    basins: gpd.GeoDataFrame,
    where: pd.Index,
    precip: pd.DataFrame,
) -> str:
    if name in basins.columns:
        return f"column '{name}' of the basins layer {settings.basins.path}"
    for overlay in settings.overlays:
        if name in overlay.fields:
            layer = f" (layer '{overlay.layer}')" if overlay.layer else ""
            return (
                f"the overlay {overlay.path}{layer}, field '{name}', whose polygons do not "
                "cover these basins"
            )
    if name == "aridity":
        mean_p = precip.loc[:, list(where)].mean(axis=0)
        dry = [f"'{b}'" for b in mean_p.index[mean_p.to_numpy() == 0]]
        if dry:
            return (
                "the computation aridity = mean PET / mean precipitation, and precipitation "
                f"is zero on every day at {', '.join(dry[: checks.SHOWN])} (series "
                f"{settings.series.path}, column '{settings.series.precip}')"
            )
    return f"the computation of '{name}' by regional (docs/attributes.md)"


def _check_candidates(
    settings: Settings, basin_ids: pd.Index, gauged: tuple[str, ...], *, known: set[str]
) -> None:
    candidates = settings.screening.candidates
    if candidates is None:
        return
    unknown = [basin for basin in candidates if basin not in basin_ids]
    already = [basin for basin in candidates if basin in set(gauged)]
    given = [basin for basin in candidates if basin in known and basin not in set(gauged)]
    if unknown or already or given:
        problem = f"unknown basin ids {unknown}" if unknown else f"basins already gauged {already}"
        if given and not (unknown or already):
            problem = f"basins whose parameters the user gave ([model] parameters) {given}"
        raise InputError(
            f"key 'candidates' in [screening] of {settings.path}: candidates must be ungauged "
            f"basins of the basins layer; found {problem}. Fix: list ungauged basin ids (as "
            "quoted text), or leave the key out to screen every ungauged basin."
        )


def _is_numeric(values: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)


# --------------------------------------------------------------------------------------------
# Steps of describe_region
# --------------------------------------------------------------------------------------------


def _records(region: Region) -> pd.DataFrame:
    flow = region.flow_mm
    valid = flow.notna()
    counts = valid.sum(axis=0)
    first = valid.idxmax(axis=0).where(counts > 0)
    last = valid.iloc[::-1].idxmax(axis=0).where(counts > 0)
    start, end = region.calibration
    gauged, donors = set(region.gauged), set(region.donor_only)
    return pd.DataFrame(
        {
            "status": [
                "donor (user parameters, no flow)"
                if basin in donors
                else _status(basin, gauged, region.constant_flow)
                for basin in flow.columns
            ],
            "first_flow": first,
            "last_flow": last,
            "flow_days": counts.astype(int),
            "flow_years": (counts / 365.25).round(1),
            "gap_days": checks.flow_gap_days(flow).astype(int),
            "calibration_days": valid.loc[start:end].sum(axis=0).astype(int),
        },
        index=pd.Index(flow.columns, name="basin_id"),
    )


def _status(basin: str, gauged: set[str], constant: tuple[str, ...]) -> str:
    if basin in gauged:
        return "gauged"
    return "ungauged (constant flow)" if basin in constant else "ungauged"


def _attribute_ranges(table: pd.DataFrame) -> pd.DataFrame:
    numeric = table[[name for name in table.columns if _is_numeric(table[name])]]
    return pd.DataFrame(
        {
            "min": numeric.min(),
            "median": numeric.median(),
            "max": numeric.max(),
            "missing": numeric.isna().sum().astype(int),
        }
    )
