"""Reuse of a fitted region: read it back, and estimate at the region's or new sites.

The commands ``regional predict`` and ``regional screen`` use these when the results folder of
an earlier run holds a fitted region (:mod:`regional.fitted`) whose inputs and settings are
unchanged: no calibration and no leave-one-out run. This module imports neither the
calibration search nor the report, so that estimates at new sites start quickly.
"""

from __future__ import annotations

import logging
from pathlib import Path

import geopandas as gpd
import pandas as pd

from regional import __version__, io
from regional.config import Settings
from regional.fitted import FittedRegion
from regional.fittedfiles import FOLDER, META, from_files, stale_reason
from regional.predict import predict_sites
from regional.predicted import Prediction, flow_parts
from regional.region import Region
from regional.sites import Sites

logger = logging.getLogger(__name__)


def stored_fit(settings: Settings, folder: str | Path) -> tuple[FittedRegion | None, str]:
    """The fitted region stored in a results folder, when it may be reused.

    Returns
    -------
    (fitted, reason)
        The fitted region and "" when the inputs (SHA-256 of every file) and the settings it
        depends on are those it was fitted from; else None and why it cannot be reused.
    """
    files = io.read_folder_files(folder, FOLDER)
    meta = files.pop(META, None)
    reason = stale_reason(meta, settings, io.file_checksums(settings.input_paths()))
    if reason is not None:
        return None, reason
    logger.info("reusing the fitted region stored in %s: no calibration", Path(folder) / FOLDER)
    return from_files(meta, files), ""


def predict_new_sites(fitted: FittedRegion, sites: Sites) -> Prediction:
    """Estimates at new sites (:func:`regional.sites.load_sites`) from a fitted region."""
    return predict_sites(
        fitted,
        sites.attributes,
        precip_mm=sites.precip_mm,
        pet_mm=sites.pet_mm,
        temp_c=sites.temp_c,
    )


def with_basin_columns(table: pd.DataFrame, region: Region | Sites) -> pd.DataFrame:
    """``table`` (indexed by ``basin_id``) with the basins layer's own columns in front.

    Every column of the user's basins layer (station names, rivers, codes ...) that the table
    does not already hold is placed first, so each basin's row carries them.
    """
    basins = region.basins
    own = [c for c in basins.columns if c != basins.geometry.name and c not in table.columns]
    front = pd.DataFrame(basins[own]).reindex(table.index.astype(str))
    front.index = table.index
    return pd.concat([front, table], axis=1)


def write_site_outputs(
    folder: str | Path, prediction: Prediction, sites: Sites, *, fitted_from: str | Path
) -> Path:
    """Write the estimates at new sites into their own folder (replaced only once complete).

    Files: ``parameters_sites.csv`` and ``flows_sites.csv`` (the columns of
    ``parameters_ungauged.csv`` and ``flows_ungauged.csv``), ``results.gpkg`` with the layer
    ``sites``, and ``run.json`` (the sites' files and checksums, the fitted region used).
    """
    tables = {
        "parameters_sites.csv": with_basin_columns(
            with_level(prediction.table, prediction.level), sites
        ).reset_index(),
        "flows_sites.csv": flow_parts(prediction),
    }
    layer = with_basin_columns(with_level(prediction.table, prediction.level), sites)
    manifest = {
        "regional": __version__,
        "sites": str(sites.path),
        "inputs": io.file_checksums(sites.input_paths()),
        "fitted_region": str(Path(fitted_from) / FOLDER),
        "prediction": {
            "level": prediction.level,
            "model": prediction.model,
            "method": prediction.method,
        },
        "notes": list(prediction.notes),
    }
    return io.write_run_folder(
        Path(folder),
        tables=tables,
        layers={"sites": with_geometry(layer, sites.basins)},
        crs=sites.basins.crs,
        figures={},
        report=None,
        manifest=manifest,
    )


def with_level(table: pd.DataFrame, level: float) -> pd.DataFrame:
    """The table with the nominal level of its bounds in a ``level`` column."""
    return table.assign(level=level) if "level" not in table.columns else table


def with_geometry(table: pd.DataFrame, basins: gpd.GeoDataFrame) -> gpd.GeoDataFrame:
    """A layer: ``table`` (indexed by basin id) with the basins' geometry, id as a column."""
    table = table.copy()
    table.index = table.index.astype(str)
    frame = gpd.GeoDataFrame(
        table, geometry=basins.geometry.reindex(table.index).to_numpy(), crs=basins.crs
    )
    frame.index.name = "basin_id"
    return frame.reset_index()
