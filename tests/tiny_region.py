"""A tiny seeded region written to a folder, for tests (used by conftest.py fixtures).

Every value here is invented. The region has six square polygon basins in a projected CRS
(UTM 33N), a soils overlay, three years of daily forcing and observed flow at four basins (two
are ungauged). :func:`make_parts` returns the pieces as frames and a settings dict so a test can
break exactly one thing, and :func:`write_region` writes them as a region folder.
"""

from __future__ import annotations

import copy
import hashlib
from dataclasses import dataclass, field, replace
from pathlib import Path

import geopandas as gpd
import matplotlib
import numpy as np
import pandas as pd
from scipy.signal import lfilter
from shapely.geometry import box

matplotlib.use("Agg")

CRS = "EPSG:32633"
START, END = "2001-01-01", "2003-12-31"
BASIN_IDS = ("B01", "B02", "B03", "B04", "B05", "B06")
UNGAUGED_IDS = ("B05", "B06")


@dataclass
class RegionParts:
    """The pieces of a test region; change one, then :func:`write_region`."""

    basins: gpd.GeoDataFrame
    soils: gpd.GeoDataFrame
    series: pd.DataFrame
    config: dict = field(default_factory=dict)
    series_name: str = "series.csv"

    def copy(self) -> RegionParts:
        return replace(
            self,
            basins=self.basins.copy(),
            soils=self.soils.copy(),
            series=self.series.copy(),
            config=copy.deepcopy(self.config),
        )


def make_parts(seed: int = 7) -> RegionParts:
    """Build the invented region (deterministic for a seed)."""
    rng = np.random.default_rng(seed)
    sizes_km = np.array([8.0, 10.0, 12.0, 9.0, 11.0, 14.0])
    x0 = 400_000.0 + np.concatenate([[0.0], np.cumsum(sizes_km[:-1] * 1000.0 + 2000.0)])
    geoms = [
        box(x, 5_000_000.0, x + s * 1000.0, 5_000_000.0 + s * 1000.0)
        for x, s in zip(x0, sizes_km, strict=True)
    ]
    basins = gpd.GeoDataFrame(
        {"basin_id": list(BASIN_IDS), "forest_pct": rng.uniform(10, 90, len(BASIN_IDS)).round(1)},
        geometry=geoms,
        crs=CRS,
    )
    west, south, east, north = basins.total_bounds
    middle = (west + east) / 2
    soils = gpd.GeoDataFrame(
        {"sand_frac": [0.2, 0.6], "awc_mm": [150.0, 80.0]},
        geometry=[
            box(west - 1000, south - 1000, middle, north + 1000),
            box(middle, south - 1000, east + 1000, north + 1000),
        ],
        crs=CRS,
    )
    series = _series(rng)
    config = {
        "region": {"name": "Test Vale (invented)"},
        "basins": {"path": "region.gpkg", "layer": "basins", "id": "basin_id"},
        "overlays": [{"path": "region.gpkg", "layer": "soils", "fields": ["sand_frac", "awc_mm"]}],
        "series": {
            "path": "series.csv",
            "id": "basin_id",
            "date": "date",
            "precip": "precip_mm",
            "pet": "pet_mm",
            "temp": "temp_c",
            "flow": "flow_mm",
        },
        "model": {
            "name": "linear",
            # The flow below is made without snow; the store's parameters are held (at the
            # values of the first releases) so that only k is calibrated and tests stay fast.
            # tests/test_pipeline.py calibrates and transfers them too.
            **SNOW_HELD,
            "warmup_days": 365,
            "calibration": ["2002-01-01", "2002-12-31"],
            "validation": ["2003-01-01", "2003-12-31"],
        },
        "transfer": {"attributes": ["area_km2", "aridity", "sand_frac"], "donors": 2},
        "output": {"folder": "results"},
    }
    return RegionParts(basins=basins, soils=soils, series=series, config=config)


SNOW_HELD = {"snow_threshold_c": 1.0, "melt_threshold_c": 0.0, "melt_factor_mm_per_degc_day": 3.0}
"""Snow parameters the tiny region holds fixed (keys of its [model] section)."""


def _series(rng: np.random.Generator) -> pd.DataFrame:
    """Daily forcing (wet/dry gamma rain, seasonal PET and temperature) and reservoir flow."""
    dates = pd.date_range(START, END, freq="D")
    day = dates.day_of_year.to_numpy()
    frames = []
    for number, basin in enumerate(BASIN_IDS):  # one frame per basin, vectorised over days
        wet = rng.random(len(dates)) < 0.35
        precip = np.where(wet, rng.gamma(0.8, 8.0, len(dates)), 0.0).round(2)
        pet = (2.0 + 1.5 * np.sin(2 * np.pi * (day - 100) / 365.25)).round(2)
        temp = (
            8.0 + 10.0 * np.sin(2 * np.pi * (day - 110) / 365.25) + rng.normal(0, 2, len(dates))
        ).round(2)
        k_per_day = 0.05 + 0.02 * number
        storage = lfilter([1.0], [1.0, -(1.0 - k_per_day)], 0.5 * precip)
        flow = (k_per_day * storage).round(3)
        if basin in UNGAUGED_IDS:
            flow = np.full(len(dates), np.nan)
        frames.append(
            pd.DataFrame(
                {
                    "basin_id": basin,
                    "date": dates.strftime("%Y-%m-%d"),
                    "precip_mm": precip,
                    "pet_mm": pet,
                    "temp_c": temp,
                    "flow_mm": flow,
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


def write_region(folder: Path, parts: RegionParts) -> Path:
    """Write ``parts`` as a region folder (region.gpkg, the series file, region.toml)."""
    folder.mkdir(parents=True, exist_ok=True)
    gpkg = folder / "region.gpkg"
    gpkg.unlink(missing_ok=True)
    parts.basins.to_file(gpkg, layer="basins", driver="GPKG")
    parts.soils.to_file(gpkg, layer="soils", driver="GPKG")
    config = copy.deepcopy(parts.config)
    series_path = folder / parts.series_name
    if parts.series_name.endswith(".parquet"):
        parts.series.to_parquet(series_path, index=False)
    else:
        parts.series.to_csv(series_path, index=False)
    if "series" in config:
        config["series"].setdefault("path", parts.series_name)
    (folder / "region.toml").write_text(to_toml(config), encoding="utf-8")
    return folder


def to_toml(config: dict) -> str:
    """A minimal TOML writer for the settings dicts of these tests."""
    lines = []
    for section, table in config.items():
        tables = table if isinstance(table, list) else [table]
        header = f"[[{section}]]" if isinstance(table, list) else f"[{section}]"
        for entry in tables:
            lines.append(header)
            lines.extend(f"{key} = {_toml_value(value)}" for key, value in entry.items())
            lines.append("")
    return "\n".join(lines)


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(item) for item in value) + "]"
    return repr(value)


def checksums(folder: Path) -> dict[str, str]:
    """sha256 of every file below ``folder`` (to prove inputs are not modified)."""
    return {
        str(path.relative_to(folder)): hashlib.sha256(path.read_bytes()).hexdigest()
        for path in sorted(folder.rglob("*"))
        if path.is_file()
    }
