"""Build a region folder from the real open dataset (gauge points and daily series).

The dataset lives outside the repository (``../shared/data/real`` beside the checkout, or the
folder named by the ``REGIONAL_REAL_DATA`` environment variable; see its README for source and
licence). It is never copied into the repository: this module writes a region.toml and, for a
subset, trimmed copies of the inputs into a temporary folder.

Used by ``tests/test_real_data.py`` (a subset small enough for CI) and
``benchmarks/real_data.py`` (every basin).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import geopandas as gpd
import pandas as pd

REAL_DATA = Path(
    os.environ.get("REGIONAL_REAL_DATA", Path(__file__).resolve().parents[2] / "shared/data/real")
)
ATTRIBUTES = (
    "area_km2",
    "elev_mean_m",
    "slope_mean_deg",
    "aridity_pet_p",
    "frac_snow",
    "forest_pct",
    "clay_pct",
    "sand_pct",
    "p_mean_mm_d",
    "high_prec_freq",
    "low_prec_freq",
    "karst_pct",
)
"""Attributes that need no observed flow (the dataset README: all of its columns qualify)."""
WARMUP_START, CALIBRATION, VALIDATION = (
    "1989-01-01",
    ("1990-01-01", "1999-12-31"),
    ("2000-01-01", "2009-12-31"),
)


def available() -> bool:
    """Whether the real dataset is present."""
    return (REAL_DATA / "basins.gpkg").is_file() and (REAL_DATA / "timeseries.csv.gz").is_file()


def build_region(
    folder: Path,
    *,
    parts: Sequence[str] | None = None,
    models: Sequence[str] = ("linear", "gr4j"),
    objective: str = "nse",
    methods: Sequence[str] = ("regression", "similarity", "proximity", "blended"),
    donors: int | str = "auto",
) -> Path:
    """Write a region folder for the real basins of the given USGS parts (all when None).

    Parameters
    ----------
    folder : Path
        Empty folder to write region.toml (and the subset's inputs) into.
    parts : sequence of str, optional
        Two-digit USGS station-numbering parts (``usgs_part``), e.g. ``["01", "03"]``.
    models : sequence of str
        Storage models to compare.
    objective : str
        Calibration objective.
    methods : sequence of str
        Transfer methods.
    donors : int or "auto"
        Donors per target, or ``"auto"`` to choose 1 to 10 in leave-one-out.
    """
    basins_path, series_path = REAL_DATA / "basins.gpkg", REAL_DATA / "timeseries.csv.gz"
    if parts is not None:
        basins = gpd.read_file(basins_path, layer="basins")
        basins = basins[basins["usgs_part"].isin(list(parts))]
        series = pd.read_csv(series_path, dtype={"basin_id": str})
        keep = series["basin_id"].isin(basins["basin_id"]) & series["date"].between(
            WARMUP_START, VALIDATION[1]
        )
        basins_path, series_path = folder / "basins.gpkg", folder / "series.parquet"
        basins.to_file(basins_path, layer="basins", driver="GPKG")
        series[keep].to_parquet(series_path, index=False)
    names = ", ".join(f'"{m}"' for m in models)
    transfers = ", ".join(f'"{m}"' for m in methods)
    donor_value = f'"{donors}"' if isinstance(donors, str) else str(int(donors))
    attributes = ", ".join(f'"{a}"' for a in ATTRIBUTES)
    (folder / "region.toml").write_text(
        f"""[region]
name = "CAMELS-US basins in Caravan (real data, test and benchmark only)"
[basins]
path = "{basins_path}"
layer = "basins"
id = "basin_id"
[series]
path = "{series_path}"
id = "basin_id"
date = "date"
precip = "precip_mm"
pet = "pet_mm"
temp = "temp_c"
flow = "flow_mm"
[model]
name = [{names}]
snow = "auto"
objective = "{objective}"
warmup_days = 365
calibration = ["{CALIBRATION[0]}", "{CALIBRATION[1]}"]
validation = ["{VALIDATION[0]}", "{VALIDATION[1]}"]
[transfer]
attributes = [{attributes}]
methods = [{transfers}]
donors = {donor_value}
[output]
folder = "results"
"""
    )
    return folder
