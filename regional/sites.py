"""New sites for a fitted region: a vector file of basins and their daily forcing.

``regional predict REGION --sites SITES`` estimates flows at sites that are not part of the
region: SITES is a vector file (polygons, or points carrying their area) with the region's id
column (``[basins] id``), and the daily forcing of those sites lies beside it, in a file of the
same name with a series suffix (``sites.gpkg`` -> ``sites.csv``, ``sites.csv.gz`` or
``sites.parquet``) holding the region's series columns (id, date, precipitation, PET and, when
the region has it, temperature; no flow). The sites are checked like the region's inputs and
their attributes computed the same way (the region's overlays and raster included).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

from regional import checks, io
from regional.attributes import compute_attributes
from regional.config import Settings
from regional.errors import InputError
from regional.region import region_overlays, region_raster
from regional.series import SERIES_DTYPE

SERIES_SUFFIXES = (".csv", ".csv.gz", ".parquet")
"""Suffixes looked for, in this order, beside the sites file for their forcing."""


@dataclass(frozen=True, eq=False)
class Sites:
    """Checked new sites with their attributes and forcing.

    Attributes
    ----------
    basins : GeoDataFrame
        Indexed by site id (text), the file's CRS kept.
    attributes : DataFrame
        Computed as for the region's basins, indexed by site id.
    precip_mm, pet_mm : DataFrame
        Days x sites, mm/day, over the period common to every site.
    temp_c : DataFrame or None
        Days x sites, degC, when the region's series has temperature.
    path, series : Path
        The sites file and their forcing file.
    """

    basins: gpd.GeoDataFrame
    attributes: pd.DataFrame
    precip_mm: pd.DataFrame
    pet_mm: pd.DataFrame
    temp_c: pd.DataFrame | None
    path: Path
    series: Path

    def input_paths(self) -> tuple[Path, ...]:
        """The sites file and their forcing file."""
        return (self.path, self.series)


def load_sites(path: str | Path, settings: Settings, *, area_crs: str | None = None) -> Sites:
    """Read, check and give attributes to new sites (see the module text).

    Parameters
    ----------
    path : str or Path
        Vector file of the sites.
    settings : Settings
        The region's settings: id and series column names, overlays, raster.
    area_crs : str, optional
        The region's equal-area CRS (:attr:`regional.fitted.FittedRegion.area_crs`), so that
        the sites' attributes are computed as the region's were.

    Returns
    -------
    Sites

    Raises
    ------
    InputError
        Any problem with the sites or their forcing, naming file, column, site and row.
    """
    path = Path(path).expanduser().resolve()
    spec = settings.basins
    basins = io.read_basins(path, None, id_field=spec.id, area_field=spec.area)
    checks.check_basins(basins, source=f"sites {path}")
    if "area_km2" in basins.columns:
        basins = basins.assign(area_km2=pd.to_numeric(basins["area_km2"]).astype(float))
    series = series_beside(path)
    tables = _forcing(series, basins.index, settings)
    attributes = compute_attributes(
        basins,
        precip_mm=tables["precip"],
        pet_mm=tables["pet"],
        temp_c=tables.get("temp"),
        overlays=region_overlays(settings),
        dem=region_raster(settings),
        area_crs=area_crs or None,
    )
    return Sites(
        basins=basins,
        attributes=attributes.table,
        precip_mm=tables["precip"],
        pet_mm=tables["pet"],
        temp_c=tables.get("temp"),
        path=path,
        series=series,
    )


def series_beside(path: Path) -> Path:
    """The forcing file beside a sites file: same name, a series suffix."""
    stem = path.name.split(".")[0]
    tried = [path.with_name(stem + suffix) for suffix in SERIES_SUFFIXES]
    for candidate in tried:
        if candidate.is_file():
            return candidate
    raise InputError(
        f"no daily forcing found beside the sites file {path}: looked for "
        f"{', '.join(p.name for p in tried)} in {path.parent}. Fix: put the sites' series "
        "there (the region's series columns: id, date, precipitation, PET, temperature if "
        "used; no flow needed)."
    )


def _forcing(series: Path, ids: pd.Index, settings: Settings) -> dict[str, pd.DataFrame]:
    spec = settings.series
    forcing = [spec.precip, spec.pet] + ([spec.temp] if spec.temp else [])
    raw = io.read_series(series, id_column=spec.id, date_column=spec.date, value_columns=forcing)
    flow = "__no_flow__"
    long = checks.check_series(
        raw.assign(**{flow: np.nan}),
        source=f"series {series}",
        id_column=spec.id,
        date_column=spec.date,
        forcing_columns=forcing,
        flow_column=flow,
        basin_ids=list(ids),
        max_precip_mm_per_day=spec.max_precip_mm_per_day,
    )
    grouped = long.groupby("basin_id", sort=False)["date"]
    start, end = checks.check_common_period(
        grouped.min(), grouped.max(), source=f"series {series}"
    )
    dates = pd.date_range(start, end, freq="D", name="date")
    names = {spec.precip: "precip", spec.pet: "pet"} | ({spec.temp: "temp"} if spec.temp else {})
    day = (long["date"].to_numpy() - dates[0].to_datetime64()) // np.timedelta64(1, "D")
    column = ids.get_indexer(long["basin_id"])
    inside = (day >= 0) & (day < len(dates))
    tables = {}
    for source, name in names.items():  # held as the region's series are: (basins, days) grids
        grid = np.full((len(ids), len(dates)), np.nan, dtype=SERIES_DTYPE)
        grid[column[inside], day[inside]] = long[source].to_numpy(dtype=float)[inside]
        columns = pd.Index(ids, name="basin_id")
        tables[name] = pd.DataFrame(grid.T, index=dates, columns=columns, copy=False)
    return tables
