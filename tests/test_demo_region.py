"""The committed demo region: generator determinism and consistency of its files."""

from __future__ import annotations

import hashlib
import importlib.util
import json
import tomllib
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

import regional
from regional import io
from regional.attributes import compute_attributes
from regional.config import load_settings

DEMO = Path(__file__).resolve().parents[1] / "demo_region"


def _load_generator():
    spec = importlib.util.spec_from_file_location("make_demo", DEMO / "make_demo.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def truth() -> dict:
    return json.loads((DEMO / "truth.json").read_text())


@pytest.fixture(scope="module")
def series() -> dict[str, pd.DataFrame]:
    long = pd.read_csv(DEMO / "series.csv.gz", dtype={"basin_id": str}, parse_dates=["date"])
    names = ("precip_mm", "pet_mm", "temp_c", "flow_mm")
    return {name: long.pivot(index="date", columns="basin_id", values=name) for name in names}


@pytest.fixture(scope="module")
def basins() -> gpd.GeoDataFrame:
    return io.read_basins(DEMO / "region.gpkg", "basins", id_field="basin_id")


def test_generator_is_deterministic(tmp_path):
    generator = _load_generator()
    runs = [tmp_path / "a", tmp_path / "b"]
    for out in runs:
        generator.build_demo(out, start="2001-01-01", end="2002-12-31")
    for name in ("series.csv.gz", "truth.json", "dem.tif", "region.gpkg"):
        assert _sha256(runs[0] / name) == _sha256(runs[1] / name), name
    # the short run's geometry is the committed one: the period only changes the series
    committed = gpd.read_file(DEMO / "region.gpkg", layer="basins").geometry
    short_run = gpd.read_file(runs[0] / "region.gpkg", layer="basins").geometry
    assert committed.geom_equals_exact(short_run, 0.0).all()


def test_counts_ids_and_gauged_status_agree(truth, series, basins):
    ids = sorted(basins.index)
    assert ids == sorted(truth["basins"]) == sorted(series["precip_mm"].columns)
    assert len(ids) == truth["counts"]["basins"] == 48
    calibration = series["flow_mm"].loc["2002-01-01":"2011-12-31"]
    gauged_in_series = set(calibration.columns[calibration.notna().any()])
    gauged_in_truth = {b for b, record in truth["basins"].items() if record["gauged"]}
    assert gauged_in_series == gauged_in_truth
    assert len(gauged_in_truth) >= 32
    assert len(ids) - len(gauged_in_truth) >= 12
    ungauged = sorted(set(ids) - gauged_in_truth)
    assert series["flow_mm"][ungauged].isna().all().all()


def test_nested_basins_lie_inside_their_outlets(truth, basins):
    nested = {b: r["contains"] for b, r in truth["basins"].items() if r["contains"]}
    assert len(nested) >= 3
    area = basins.geometry.area
    for outlet, inner in nested.items():
        for basin in inner:
            shared = basins.geometry[basin].intersection(basins.geometry[outlet]).area
            assert shared / area[basin] > 0.999, (basin, outlet)
    assert basins.geometry.is_valid.all()


def test_series_complete_and_physical(series):
    dates = series["precip_mm"].index
    assert dates[0] == pd.Timestamp("2001-01-01")
    assert dates[-1] == pd.Timestamp("2020-12-31")
    assert len(dates) == len(pd.date_range("2001-01-01", "2020-12-31"))
    for name in ("precip_mm", "pet_mm", "temp_c"):
        assert series[name].notna().all().all(), name
    assert (series["precip_mm"] >= 0).all().all()
    assert (series["pet_mm"] >= 0).all().all()
    assert series["flow_mm"].min().min() >= 0  # min skips the blanks
    gauged = series["flow_mm"].columns[series["flow_mm"].notna().any()]
    with_gaps = series["flow_mm"][gauged].isna().any()
    assert with_gaps.sum() >= 5  # a few gaps, reported by the tool as warnings


def test_attributes_in_truth_are_the_tools_own(truth, series, basins):
    soils = io.read_overlay(DEMO / "region.gpkg", "soils", fields=["sand_frac", "awc_mm"])
    table = compute_attributes(
        basins,
        precip_mm=series["precip_mm"],
        pet_mm=series["pet_mm"],
        temp_c=series["temp_c"],
        overlays=[soils],
        dem=io.read_raster(DEMO / "dem.tif"),
    ).table
    for name in ("slope_mean", "aridity", "sand_frac"):
        stored = pd.Series({b: r[name] for b, r in truth["basins"].items()})
        np.testing.assert_allclose(table.loc[stored.index, name], stored, rtol=1e-9)
    assert table["slope_mean"].max() - table["slope_mean"].min() > 5.0  # slope varies (degrees)
    assert table["snow_fraction"].max() > 0.2  # some snow in the high basins


def test_hidden_relation_reproduces_true_k(truth):
    coefficients = truth["coefficients"]
    records = pd.DataFrame(truth["basins"]).T
    log_k = coefficients["intercept"] + records["ln_k_residual"].astype(float)
    for name in ("slope_mean", "aridity", "sand_frac"):
        log_k += coefficients[name] * records[name].astype(float)
    np.testing.assert_allclose(np.exp(log_k), records["k_per_day"].astype(float), rtol=1e-12)
    k = records["k_per_day"].astype(float)
    assert 0.003 < k.min() and k.max() < 0.3
    residual_sd = records["ln_k_residual"].astype(float).std()
    assert 0.5 * truth["residual_sd_ln"] < residual_sd < 1.5 * truth["residual_sd_ln"]
    # strong but not perfect: the attributes explain most of the variance of ln k
    explained = 1.0 - residual_sd**2 / np.log(k).var()
    assert 0.7 < explained < 0.97


def test_observed_flow_is_the_model_with_true_k_times_noise(truth, series):
    gauged = [b for b, r in truth["basins"].items() if r["gauged"]]
    k = np.array([truth["basins"][b]["k_per_day"] for b in gauged])

    def log_error(k_per_day: np.ndarray) -> np.ndarray:
        flow = regional.simulate(
            truth["model"]["name"],
            series["precip_mm"][gauged].to_numpy(),
            series["pet_mm"][gauged].to_numpy(),
            {"k_per_day": k_per_day, **truth["model"]["snow"]},
            temp=series["temp_c"][gauged].to_numpy(),
            warmup_days=365,
        ).flow[365:]
        observed = series["flow_mm"][gauged].to_numpy()[365:]
        usable = np.isfinite(observed) & (flow > 0.05) & (observed > 0.05)
        return np.log(observed[usable] / flow[usable])

    error = log_error(k)
    noise = truth["flow_noise"]
    expected_sd = np.hypot(noise["slow_sd_ln"], noise["daily_sd_ln"])
    assert abs(error.mean()) < 0.05
    assert error.std() == pytest.approx(expected_sd, rel=0.25)
    assert log_error(2.0 * k).std() > 1.5 * error.std()  # the truth k fits, a wrong one does not


def test_region_toml_parses_and_points_at_the_files():
    document = tomllib.loads((DEMO / "region.toml").read_text())
    assert document["transfer"]["methods"] == ["regression", "similarity", "proximity"]
    settings = load_settings(DEMO / "region.toml")
    for path in (settings.basins.path, settings.series.path, settings.raster.path):
        assert path.is_file(), path
    assert settings.overlays[0].fields == ("sand_frac", "awc_mm")
    assert settings.model.calibration == (pd.Timestamp("2002-01-01"), pd.Timestamp("2011-12-31"))


def test_demo_region_is_small_and_says_it_is_invented():
    files = [p for p in DEMO.rglob("*") if p.is_file() and "results" not in p.parts]
    files = [p for p in files if "__pycache__" not in p.parts]
    assert sum(p.stat().st_size for p in files) <= 10 * 1024 * 1024
    readme = (DEMO / "README.md").read_text().lower()
    assert "every value" in readme and "invented" in readme


DRY_ARIDITY = 0.9
"""PET / P from which the demo's climate counts as dry (its eastern levels; README.md)."""


def test_flow_stops_only_where_the_climate_is_dry(truth, series):
    # The demo's observed flow is recorded to 0.001 mm/day; a zero is a day below that. Humid
    # basins never reach it, some of the driest do (in summer droughts), as in a real district.
    flow = series["flow_mm"]
    zero_days = (flow == 0).sum()
    aridity = pd.Series({b: r["aridity"] for b, r in truth["basins"].items()})
    with_zeros = zero_days[zero_days > 0].index
    assert len(with_zeros) >= 2
    assert (aridity[with_zeros] >= DRY_ARIDITY).all(), aridity[with_zeros]
    gauged_humid = [b for b in flow.columns[flow.notna().any()] if aridity[b] < DRY_ARIDITY]
    assert len(gauged_humid) >= 20
    assert (flow[gauged_humid].min() > 0).all()
    months = flow.index[(flow[with_zeros] == 0).any(axis=1)].month
    assert set(months) <= {6, 7, 8, 9}  # summer droughts, not winters under snow
